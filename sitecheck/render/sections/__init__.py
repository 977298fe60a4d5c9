"""Per-analysis report sections, in the order a decision is made (``ORDER``).

A section module either

* builds one display model, ``model(doc, min_cell) -> dict`` (with ``id`` and
  ``title``; ``None`` when its section is absent), rendered by
  ``templates/sections/<name>.html.j2`` and ``<name>.md.j2`` (autoescaped), or
* in the older style, returns strings: ``html(doc, min_cell)`` and
  ``markdown(doc, min_cell)`` ("" when absent). Such a section still appears in
  the page, its contents and findings.md.

Sections receive the suppressed document (``render/safety.py``). ``actions``
(the checklist) and ``hygiene`` (data hygiene, methods) are rendered by the page
itself and are not listed here.
"""
from importlib import import_module

ORDER = ["probe", "leakage", "fingerprints", "repair", "drift", "maps", "harmonisation", "outcome"]  # module names inside this package, e.g. "probe", "leakage", ...


def modules():
    return [import_module(f"{__name__}.{name}") for name in ORDER]
