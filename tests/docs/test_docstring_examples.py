"""Every ``>>>`` example in the package's docstrings runs and prints what it says (doctest)."""

import doctest
import importlib
import pkgutil

import pytest

import gridbias


def _modules():
    names = ["gridbias"]
    for info in pkgutil.walk_packages(gridbias.__path__, prefix="gridbias."):
        if info.name.startswith("gridbias.__main__"):
            continue
        names.append(info.name)
    return sorted(names)


MODULES = _modules()


def test_docstring_examples_exist():
    finder = doctest.DocTestFinder()
    found = 0
    for name in MODULES:
        try:
            module = importlib.import_module(name)
        except ImportError:  # an optional dependency is missing: its own tests skip
            continue
        found += sum(len(t.examples) for t in finder.find(module))
    assert found > 0


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name, tmp_path, monkeypatch):
    try:
        module = importlib.import_module(name)
    except ImportError as exc:
        pytest.skip(f"{name} needs an optional dependency: {exc}")
    monkeypatch.chdir(tmp_path)
    flags = doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE
    result = doctest.testmod(module, optionflags=flags, verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} docstring examples of {name} failed"
