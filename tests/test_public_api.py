"""The public face: every name in ``sitecheck.__all__`` is documented (numpydoc) and its Examples run."""
import doctest
import inspect

import pytest

import sitecheck

PUBLIC = [n for n in sitecheck.__all__ if n != "__version__"]


@pytest.mark.parametrize("name", PUBLIC)
def test_public_name_has_numpydoc_sections(name):
    obj = getattr(sitecheck, name)
    doc = inspect.getdoc(obj) or ""
    assert "Examples\n--------" in doc, f"{name}: no Examples section"
    if inspect.isfunction(obj):
        assert "Parameters\n----------" in doc, f"{name}: no Parameters section"
        assert "Returns\n-------" in doc, f"{name}: no Returns section"
    elif inspect.isclass(obj) and not issubclass(obj, Exception):
        assert "Parameters\n----------" in doc or "Attributes\n----------" in doc, name


@pytest.mark.parametrize("name", PUBLIC)
def test_public_examples_run(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # examples that write files write them here
    obj = getattr(sitecheck, name)
    finder = doctest.DocTestFinder(recurse=False)
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    tests = finder.find(obj, name, globs={})
    examples = sum(len(t.examples) for t in tests)
    assert examples >= 2, f"{name}: fewer than two runnable example lines"
    for t in tests:
        runner.run(t)
    assert runner.failures == 0, f"{name}: {runner.failures} example(s) failed"


def test_package_docstring_examples_run():
    result = doctest.testmod(sitecheck, optionflags=doctest.ELLIPSIS)
    assert result.attempted >= 1 and result.failed == 0
