"""Rendering of scan results: JSON, HTML, Markdown, CSV and figures.

Renderers never compute statistics; they format what the analyses returned.
:func:`write_report` writes every output atomically inside one directory.
"""
from .write import write_report

__all__ = ["write_report"]
