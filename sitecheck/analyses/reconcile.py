"""Reconciling two views of the same table: fingerprints and the leak ranking.

A fingerprint says *why* a feature marks a site; the leak ranking says how much
the probe *needs* the feature. The two disagree when a fingerprinted feature
drops the probe's AUC by nothing distinguishable from 0: the site is already
told apart by something else, so permuting this one feature costs the probe
nothing. :func:`reconcile` names that something else, so that no reader takes
the feature for clean.

The rule reads only numbers the two analyses already produced (no new fit):

1. the feature was also permuted with a correlated group or a declared panel
   whose joint drop interval lies above 0: the group is named, with its drop;
2. else the highest-ranked leaking feature (drop interval above 0) with a
   fingerprint at the same site;
3. else the leaking feature with the largest standardised mean difference of
   that site against the rest (the leak ranking's univariate screen);
4. else none is named (the probe may not have used the feature: too few rows
   carry the artefact, or the trees found other splits first).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Tuple

from sitecheck._records import fields_dict

RULE = ("a fingerprinted feature whose leak-ranking drop interval includes 0 is explained by, in order: "
        "the correlated group or panel it was permuted with, when the group's drop interval lies above 0; the highest-ranked leaking feature (interval "
        "above 0) fingerprinted at the same site; the leaking feature with the largest |SMD| of that site "
        "against the rest")


@dataclass(frozen=True)
class Redundancy:
    """Why a fingerprinted feature ranks near zero.

    Attributes
    ----------
    feature, site, kind : str
        The fingerprint.
    rank : int
        The feature's rank in the leak ranking.
    score : float
    score_ci : (float, float)
        Its AUC drop and interval (includes 0).
    reason : str
        ``group`` (permuted with correlated features or a panel), ``same_site``
        (another leaking feature is fingerprinted at the site), ``site_gap``
        (another leaking feature differs most at the site) or ``none``.
    via : tuple of str
        The feature(s) that carry the site instead.
    via_rank : int or None
    via_score : float or None
    via_score_ci : (float, float) or None
        The drop of ``via`` (of the group, for ``group``).
    via_kind : str or None
        The fingerprint kind of ``via`` at the site (``same_site``).
    via_smd : float or None
        |SMD| of the site against the rest for ``via`` (``site_gap``).
    """

    feature: str
    site: Optional[str]
    kind: str
    rank: int
    score: float
    score_ci: Tuple[float, float]
    reason: str
    via: Tuple[str, ...] = ()
    via_rank: Optional[int] = None
    via_score: Optional[float] = None
    via_score_ci: Optional[Tuple[float, float]] = None
    via_kind: Optional[str] = None
    via_smd: Optional[float] = None

    def to_dict(self) -> Dict[str, Any]:
        return fields_dict(self)


@dataclass(frozen=True)
class Reconciliation:
    """Every fingerprint near zero in the leak ranking, with its explanation (``entries``)."""

    entries: Tuple[Redundancy, ...]
    rule: str = RULE

    def to_dict(self) -> Dict[str, Any]:
        return {"rule": self.rule, "entries": [e.to_dict() for e in self.entries]}


def _lo(ci) -> float:
    try:
        return float(ci[0])
    except (TypeError, IndexError, ValueError):
        return float("nan")


def reconcile(leakage, fingerprints) -> Reconciliation:
    """Explain fingerprinted features that rank near zero in the leak ranking.

    Parameters
    ----------
    leakage : LeakageResult
        :func:`sitecheck.analyses.leakage.rank_leakage`'s result.
    fingerprints : FingerprintResult
        :func:`sitecheck.analyses.fingerprints.find_fingerprints`'s result.

    Returns
    -------
    Reconciliation
        One entry per (feature, site, kind) fingerprint whose feature's drop
        interval includes 0, in fingerprint order.
    """
    entries = {e.feature: e for e in leakage.entries}
    leaking = [e for e in leakage.entries if _lo(e.score_ci) > 0]  # sorted by score, largest first
    out: List[Redundancy] = []
    for f in fingerprints.findings:
        e = entries.get(f.feature)
        if e is None or _lo(e.score_ci) > 0:
            continue
        base = dict(feature=f.feature, site=f.site, kind=f.kind, rank=int(e.rank), score=float(e.score),
                    score_ci=(float(e.score_ci[0]), float(e.score_ci[1])))
        group = next((c for c in leakage.clusters if f.feature in c.members and len(c.members) > 1
                      and _lo(c.score_ci) > 0), None)
        if group is not None:
            out.append(Redundancy(**base, reason="group", via=tuple(m for m in group.members if m != f.feature),
                                  via_score=float(group.score),
                                  via_score_ci=(float(group.score_ci[0]), float(group.score_ci[1]))))
            continue
        marked = {g.feature: g.kind for g in fingerprints.findings if g.site == f.site and g.feature != f.feature}
        same = next((g for g in leaking if g.feature in marked), None)
        if same is not None:
            out.append(Redundancy(**base, reason="same_site", via=(same.feature,), via_rank=int(same.rank),
                                  via_score=float(same.score),
                                  via_score_ci=(float(same.score_ci[0]), float(same.score_ci[1])),
                                  via_kind=marked[same.feature]))
            continue
        best, best_smd = None, 0.0
        for g in leaking:
            if g.feature == f.feature:
                continue
            smd = ((g.univariate or {}).get("smd") or {}).get(f.site)
            if isinstance(smd, (int, float)) and abs(smd) > best_smd:
                best, best_smd = g, abs(float(smd))
        if best is not None:
            out.append(Redundancy(**base, reason="site_gap", via=(best.feature,), via_rank=int(best.rank),
                                  via_score=float(best.score),
                                  via_score_ci=(float(best.score_ci[0]), float(best.score_ci[1])), via_smd=best_smd))
            continue
        out.append(Redundancy(**base, reason="none"))
    return Reconciliation(entries=tuple(out))
