"""sitecheck: can the site be predicted from the features of a pooled clinical table?

The public API is small:

- :func:`sitecheck.scan.scan_file` / :func:`sitecheck.scan.scan_frame` run every analysis and
  return a :class:`sitecheck.report.result.ScanResult`;
- :func:`sitecheck.reading.intake.read_table`, :func:`sitecheck.table.roles.assign_roles` and
  :func:`sitecheck.table.prepare.prepare` are the steps, for use on their own;
- :func:`sitecheck.demo.generate_demo` makes the invented demo network.
"""

__version__ = "0.1.0"

from .errors import InputError  # noqa: E402

__all__ = ["InputError", "__version__"]
