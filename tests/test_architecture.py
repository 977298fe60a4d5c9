"""The package's layout rules (contributor guide, "Layout"): checked on the source, not assumed."""
import ast
from pathlib import Path

import sitecheck

PKG = Path(sitecheck.__file__).parent


def _imports(path: Path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name
        elif isinstance(node, ast.ImportFrom) and node.module:
            yield ("." * node.level) + node.module


def test_only_the_cli_imports_click():
    offenders = [str(p.relative_to(PKG)) for p in PKG.rglob("*.py")
                 if "cli" not in p.relative_to(PKG).parts
                 and any(m == "click" or m.startswith("click.") for m in _imports(p))]
    assert offenders == []


def test_no_analysis_or_table_stage_imports_a_renderer_or_the_cli():
    stages = ("analyses", "table", "reading", "harmonise", "report")
    offenders = []
    for p in PKG.rglob("*.py"):
        rel = p.relative_to(PKG)
        if rel.parts[0] not in stages:
            continue
        for m in _imports(p):
            if m.startswith(("sitecheck.render", "sitecheck.cli")):
                offenders.append(f"{rel}: {m}")
    assert offenders == []


def test_public_names_resolve_and_are_listed():
    assert "scan_file" in sitecheck.__all__ and "InputError" in sitecheck.__all__
    for name in sitecheck.__all__:
        assert getattr(sitecheck, name) is not None, name
    # the public face stays small
    assert len(sitecheck.__all__) <= 16
