"""Per-analysis report sections. Each module defines ``html(doc, min_cell)`` and
``markdown(doc, min_cell)`` returning a string ("" when its section is absent).
ORDER lists them in the order a decision is made."""
from importlib import import_module

ORDER = ["probe", "leakage", "fingerprints", "drift", "maps", "harmonisation", "outcome"]  # module names inside this package, e.g. "probe", "leakage", ...


def modules():
    return [import_module(f"{__name__}.{name}") for name in ORDER]
