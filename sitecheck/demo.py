"""An invented network of four hospitals, with known, injected site effects.

Every name here is made up: the hospitals (Aldermoor, Brackenholt,
Cindervale, Duskwater), the patients (random draws) and the outcome
(``admitted_hdu``, admission to a high-dependency unit). Value ranges are
plausible adult emergency-department ranges from common practice, chosen by
the authors for illustration; they are not reference ranges.

:func:`generate_demo` returns the table and its ground truth: the list of
effects injected on purpose. ``null=True`` gives the same network with no
site effect at all (same case mix, same measurement habits, same outcome
model at every site), for tests of false-positive rates.
"""
from __future__ import annotations

import json
import os
from dataclasses import dataclass
from typing import Dict, List, Optional

import numpy as np
import pandas as pd

SITES = ("Aldermoor", "Brackenholt", "Cindervale", "Duskwater")
PREFIX = {"Aldermoor": "ALD", "Brackenholt": "BRK", "Cindervale": "CDV", "Duskwater": "DSK"}
_SHARE = np.array([0.30, 0.25, 0.25, 0.20])

#: mg/dL per mmol/L for glucose (molar mass 180.16 g/mol), as in SI conversion tables.
GLUCOSE_MGDL_PER_MMOLL = 18.016


@dataclass(frozen=True)
class DemoData:
    """The demo table and what was injected into it."""

    frame: pd.DataFrame
    truth: dict


def _effects() -> List[dict]:
    return [
        {"feature": "sodium", "site": "Brackenholt", "kind": "shift",
         "detail": "analyser offset: +4 mmol/L on every value"},
        {"feature": "glucose", "site": "Cindervale", "kind": "unit_ratio",
         "detail": f"recorded in mg/dL instead of mmol/L (x {GLUCOSE_MGDL_PER_MMOLL})"},
        {"feature": "crp", "site": "Duskwater", "kind": "floor",
         "detail": "detection limit: values below 5 mg/L reported as 5"},
        {"feature": "temperature", "site": "Aldermoor", "kind": "precision",
         "detail": "rounding habit: recorded to the nearest 0.5 degC instead of 0.1"},
        {"feature": "lactate", "site": "Brackenholt", "kind": "missing_code",
         "detail": "missing values coded as -99"},
        {"feature": "albumin", "site": "Duskwater", "kind": "site_missing",
         "detail": "never measured at this site"},
        {"feature": "troponin", "site": "Aldermoor", "kind": "censored_below",
         "detail": "values below 5 ng/L written as '<5' in the export"},
        {"feature": "potassium", "site": "Cindervale", "kind": "number_format",
         "detail": "written with a decimal comma ('4,2')"},
    ]


#: The arrival dates cover two years, drawn uniformly.
DEMO_START, DEMO_DAYS = "2025-01-01", 730


def _recalibration() -> dict:
    """The one change over time: an analyser recalibration at one site in the second year (month 16
    of 24). About 0.33 SD from its month on, so about 0.12 SD over the whole period: under the
    fingerprints' 0.2, so that only the drift analysis sees it."""
    return {"feature": "potassium", "site": "Aldermoor", "kind": "recalibration", "from": "2026-04-01",
            "offset": 0.15, "detail": "analyser recalibrated: potassium reads 0.15 mmol/L higher from 2026-04-01"}


def generate_demo(n_rows: int = 6000, *, seed: int = 7, null: bool = False) -> DemoData:
    """Generate the invented four-hospital emergency-attendance table.

    Parameters
    ----------
    n_rows : int, default 6000
        Total attendances; split 30/25/25/20% over the four sites.
    seed : int, default 7
    null : bool, default False
        No site effect of any kind: same case mix, measurement and outcome
        model everywhere.

    Returns
    -------
    DemoData
        ``frame`` has columns ``attendance_id`` (site-prefixed code),
        ``hospital``, ``arrival_date`` (two years from 2025-01-01), ``age``,
        ``sex``, ``arrival_mode``, vital signs, a blood panel and
        ``admitted_hdu``; ``truth`` lists the injected effects and, under
        ``drift``, the one change over time (both empty for the null variant).
        Two columns are written as laboratory exports write them: ``troponin`` at
        Aldermoor as ``<5`` below the detection limit, ``potassium`` at Cindervale
        with a decimal comma; they are text (object) columns, read as numbers by
        :mod:`sitecheck.reading.intake`.

    Examples
    --------
    >>> from sitecheck import generate_demo
    >>> demo = generate_demo(1200, seed=7)
    >>> demo.frame.shape[0], sorted(demo.frame["hospital"].unique())
    (1200, ['Aldermoor', 'Brackenholt', 'Cindervale', 'Duskwater'])
    >>> sorted({e["kind"] for e in demo.truth["effects"]})[:3]
    ['censored_below', 'floor', 'missing_code']
    """
    if n_rows < 80:
        raise ValueError("n_rows must be at least 80")
    rng = np.random.default_rng(seed)
    counts = np.floor(_SHARE * n_rows).astype(int)
    counts[0] += n_rows - counts.sum()
    site = np.repeat(np.array(SITES, dtype=object), counts)
    n = len(site)
    is_ = {s: site == s for s in SITES}

    # -- case mix ----------------------------------------------------------
    age = rng.gamma(shape=9.0, scale=6.2, size=n) + 8
    if not null:
        age[is_["Cindervale"]] += 8.0  # older case mix
    age = np.clip(np.round(age), 18, 99)
    sex = np.where(rng.random(n) < 0.5, "F", "M").astype(object)
    male = sex == "M"
    sev = rng.normal(0, 1, n) + 0.015 * (age - 55)  # latent acuity
    p_amb = 1 / (1 + np.exp(-(-0.8 + 0.7 * sev + 0.02 * (age - 55))))
    u = rng.random(n)
    mode = np.where(u < p_amb, "ambulance", np.where(u < p_amb + (1 - p_amb) * 0.7, "walk-in", "gp-referral")).astype(object)

    # -- vital signs -------------------------------------------------------
    hr = np.round(np.clip(rng.normal(86, 14, n) + 8 * sev, 38, 190))
    rr = np.round(np.clip(rng.normal(17, 3, n) + 2.2 * sev, 8, 45))
    sbp = np.round(rng.normal(130, 18, n) + 0.35 * (age - 55) - 6 * np.maximum(sev - 1, 0))
    dbp = np.round(0.55 * sbp + rng.normal(6, 8, n))
    temp = np.round(rng.normal(36.9, 0.45, n) + 0.35 * np.maximum(sev, 0), 1)
    spo2 = np.round(np.clip(rng.normal(97, 1.6, n) - 1.6 * np.maximum(sev, 0), 75, 100))

    # -- blood panel -------------------------------------------------------
    hb = np.round(rng.normal(np.where(male, 146, 131), 14, n) - 0.12 * (age - 55))
    wbc = np.round(np.exp(rng.normal(np.log(8.2), 0.32, n) + 0.18 * sev), 1)
    plt_ = np.round(np.clip(rng.normal(255, 65, n), 20, 900))
    sodium = np.round(rng.normal(138.5, 3.0, n) - 0.8 * np.maximum(sev, 0))
    potassium_exact = rng.normal(4.2, 0.45, n)
    potassium = np.round(potassium_exact, 1)
    creat = np.round(np.exp(rng.normal(np.log(78), 0.28, n) + 0.006 * (age - 55) + 0.12 * male + 0.1 * np.maximum(sev, 0)))
    urea = np.round(np.exp(rng.normal(np.log(5.8), 0.35, n) + 0.008 * (age - 55) + 0.1 * np.maximum(sev, 0)), 1)
    glucose = np.round(np.exp(rng.normal(np.log(6.0), 0.22, n) + 0.06 * sev), 1)
    crp = np.round(np.exp(rng.normal(np.log(9.0), 1.1, n) + 0.55 * sev), 1)
    albumin = np.round(rng.normal(39, 4.2, n) - 1.3 * np.maximum(sev, 0) - 0.05 * (age - 55))
    bili = np.round(np.exp(rng.normal(np.log(9.5), 0.45, n)))
    lactate = np.round(np.exp(rng.normal(np.log(1.3), 0.35, n) + 0.25 * sev), 1)
    trop = np.round(2 + np.exp(rng.normal(np.log(7.0), 0.9, n) + 0.012 * (age - 55) + 0.3 * np.maximum(sev, 0)))

    # -- outcome -----------------------------------------------------------
    base = {"Aldermoor": -2.0, "Brackenholt": -2.0, "Cindervale": -2.0, "Duskwater": -2.0}
    if not null:
        base = {"Aldermoor": -2.1, "Brackenholt": -1.6, "Cindervale": -2.2, "Duskwater": -2.6}
    b0 = np.array([base[s] for s in site])
    logit = b0 + 1.0 * sev + 0.025 * (age - 55) + 0.35 * (lactate - 1.4) + 0.08 * (rr - 17) - 0.05 * (spo2 - 97)
    outcome = (rng.random(n) < 1 / (1 + np.exp(-logit))).astype(int)

    # -- missingness at random, the same everywhere --------------------------
    def mcar(x, rate):
        x = x.astype(float).copy()
        x[rng.random(n) < rate] = np.nan
        return x

    temp, spo2 = mcar(temp, 0.02), mcar(spo2, 0.02)
    crp, lactate, trop, albumin, bili = (mcar(crp, 0.04), mcar(lactate, 0.08), mcar(trop, 0.10),
                                         mcar(albumin, 0.05), mcar(bili, 0.05))
    glucose = mcar(glucose, 0.03)

    lactate_obj = lactate.astype(object)
    if not null:
        b = is_["Brackenholt"]
        sodium[b] += 4.0
        c = is_["Cindervale"]
        glucose[c] = np.round(glucose[c] * GLUCOSE_MGDL_PER_MMOLL)
        d = is_["Duskwater"]
        crp[d & (crp < 5)] = 5.0
        a = is_["Aldermoor"]
        temp[a] = np.round(temp[a] * 2) / 2
        lactate[b & np.isnan(lactate)] = -99.0
        albumin[d] = np.nan

    order = rng.permutation(n)
    start = pd.Timestamp(DEMO_START)
    days = rng.integers(0, DEMO_DAYS, n)
    if not null:  # drawn last, so every other column is the same with or without it
        r = _recalibration()
        after = is_[r["site"]] & (start + pd.to_timedelta(days, unit="D") >= pd.Timestamp(r["from"]))
        potassium[after] = np.round(potassium_exact[after] + r["offset"], 1)  # the analyser reads higher, then rounds
    # export idioms: written into the cells as text after the recalibration (no random draw,
    # so every value above is unchanged)
    trop_out = trop.astype(object)
    potassium_out = potassium.astype(object)
    if not null:
        a, c = is_["Aldermoor"], is_["Cindervale"]
        low = a & (trop < 5)
        trop_out[low] = "<5"
        potassium_out[c] = [f"{v:.1f}".replace(".", ",") for v in potassium[c]]

    ids = np.array([f"{PREFIX[s]}-{100000 + i:06d}" for i, s in enumerate(site)], dtype=object)
    frame = pd.DataFrame({
        "attendance_id": ids,
        "hospital": site,
        "arrival_date": (start + pd.to_timedelta(days, unit="D")).strftime("%Y-%m-%d"),
        "age": age.astype(int),
        "sex": sex,
        "arrival_mode": mode,
        "heart_rate": hr.astype(int),
        "resp_rate": rr.astype(int),
        "systolic_bp": sbp.astype(int),
        "diastolic_bp": dbp.astype(int),
        "temperature": temp,
        "spo2": spo2,
        "haemoglobin": hb.astype(int),
        "wbc": wbc,
        "platelets": plt_.astype(int),
        "sodium": sodium.astype(int),
        "potassium": potassium_out,
        "creatinine": creat.astype(int),
        "urea": urea,
        "glucose": glucose,
        "crp": crp,
        "albumin": albumin,
        "bilirubin": bili,
        "lactate": lactate,
        "troponin": trop_out,
        "admitted_hdu": outcome,
    }).iloc[order].reset_index(drop=True)

    prevalence = {s: float(frame.loc[frame.hospital == s, "admitted_hdu"].mean()) for s in SITES}
    truth = {
        "scenario": "invented four-hospital emergency network (demo)",
        "seed": int(seed),
        "n_rows": int(n),
        "null": bool(null),
        "site_column": "hospital",
        "outcome": "admitted_hdu",
        "covariates": ["age", "sex"],
        "identifier": "attendance_id",
        "effects": [] if null else _effects(),
        "case_mix": [] if null else [{"covariate": "age", "site": "Cindervale",
                                      "detail": "patients about 8 years older on average"}],
        "outcome_prevalence": {"varies_by_site": not null,
                               "baseline_logit": base, "observed": prevalence},
        "time_column": "arrival_date",
        "period": {"first": DEMO_START, "last": f"{start + pd.Timedelta(days=DEMO_DAYS - 1):%Y-%m-%d}"},
        "drift": [] if null else [_recalibration()],
    }
    return DemoData(frame=frame, truth=truth)


def write_demo(out_dir: str, *, n_rows: int = 6000, seed: int = 7) -> Dict[str, str]:
    """Write ``demo.csv`` and ``demo_truth.json`` into ``out_dir``; return their paths."""
    os.makedirs(out_dir, exist_ok=True)
    d = generate_demo(n_rows, seed=seed)
    csv_path = os.path.join(out_dir, "demo.csv")
    truth_path = os.path.join(out_dir, "demo_truth.json")
    tmp = csv_path + ".tmp"
    d.frame.to_csv(tmp, index=False, na_rep="NA")
    os.replace(tmp, csv_path)
    tmp = truth_path + ".tmp"
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(d.truth, fh, indent=2, sort_keys=True)
        fh.write("\n")
    os.replace(tmp, truth_path)
    return {"data": csv_path, "truth": truth_path}


#: Settings for the scan the ``demo`` command runs.
DEMO_ROLES = {"site": "hospital", "outcome": "admitted_hdu", "covariates": ("age", "sex"),
              "identifiers": ("attendance_id",), "time": "arrival_date"}
