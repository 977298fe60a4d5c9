"""sitecheck: can the site be predicted from the features of a pooled clinical table?

The public API is small; everything else is reachable for those who need it but may change.

- :func:`scan_file` / :func:`scan_frame` run every analysis and return a :class:`ScanResult`;
  :class:`ScanOptions` holds everything but the column roles;
- :func:`read_table`, :class:`RoleSpec` and :func:`assign_roles` are the first steps, for use on
  their own (reading a file with its missing-value codes; validating the column roles);
- :func:`fit_harmoniser` and :func:`apply_harmoniser` fit and apply a harmonisation (centring,
  scaling, quantile mapping or ComBat); the fit, a :class:`HarmonisationFit`, saves and loads its
  parameters as JSON;
- :func:`generate_demo` makes the invented four-hospital demo network;
- :class:`InputError` is the one error a user can fix (a file, a column, a value).

Names are imported on first use, so ``import sitecheck`` (and the command line) stays fast.

Examples
--------
>>> import sitecheck
>>> sorted(sitecheck.__all__)[:3]
['HarmonisationFit', 'InputError', 'RoleSpec']
"""

__version__ = "0.1.0"

from .errors import InputError  # noqa: E402

_LAZY = {
    "scan_file": "sitecheck.scan",
    "scan_frame": "sitecheck.scan",
    "ScanOptions": "sitecheck.scan",
    "ScanResult": "sitecheck.report.result",
    "read_table": "sitecheck.reading.intake",
    "RoleSpec": "sitecheck.table.roles",
    "assign_roles": "sitecheck.table.roles",
    "fit_harmoniser": "sitecheck.harmonise.methods",
    "apply_harmoniser": "sitecheck.harmonise.methods",
    "HarmonisationFit": "sitecheck.harmonise.methods",
    "generate_demo": "sitecheck.demo",
}

__all__ = sorted(["InputError", "__version__", *_LAZY])


def __getattr__(name):
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'sitecheck' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
