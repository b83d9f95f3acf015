"""Every Python block of the README and the user guide runs, page by page, as a reader would run it.

The blocks of one page run in order in one namespace (a page reads like one script: the names a block uses
are defined by a visible block above it). A block right after the comment ``<!-- not run: REASON -->`` is
shown but not run (an MPI launch, say); the reason is required. Long MD in a block is cut short by
``GRIDBIAS_DOCS_MAX_STEPS``: ``openmm.app.Simulation.step`` runs at most that many steps per call, so a
page that asks for five million steps is checked in seconds with the same code.
"""

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
PAGES = [ROOT / "README.md", *sorted((ROOT / "docs").glob("**/*.md"))]
PAGES = [p for p in PAGES if "_build" not in p.parts and "gallery" not in p.parts]
_BLOCK = re.compile(r"(<!--\s*not run:\s*(?P<reason>[^>]*?)\s*-->\s*\n)?```python\n(?P<code>.*?)```", re.S)
MAX_STEPS = 200


def python_blocks(path):
    """(line, code, reason-not-run or None) of every ```python block of a Markdown file, in order."""
    text = path.read_text()
    blocks = []
    for match in _BLOCK.finditer(text):
        line = text.count("\n", 0, match.start("code")) + 1
        blocks.append((line, match.group("code"), match.group("reason")))
    return blocks


def test_pages_found():
    assert ROOT / "README.md" in PAGES
    assert any(python_blocks(p) for p in PAGES)


def test_not_run_blocks_give_a_reason():
    for page in PAGES:
        for line, _, reason in python_blocks(page):
            assert reason is None or reason.strip(), f"{page.name}:{line}: '<!-- not run: -->' needs a reason"


@pytest.fixture
def short_md(monkeypatch):
    """Cap every Simulation.step call at MAX_STEPS steps (the page's code is unchanged)."""
    try:
        from openmm import app
    except ImportError:
        return
    original = app.Simulation.step

    def capped(self, steps):
        return original(self, min(int(steps), MAX_STEPS))

    monkeypatch.setattr(app.Simulation, "step", capped)


@pytest.mark.parametrize("page", PAGES, ids=[str(p.relative_to(ROOT)) for p in PAGES])
def test_page_blocks_run(page, tmp_path, monkeypatch, short_md):
    blocks = python_blocks(page)
    if not any(reason is None for _, _, reason in blocks):
        pytest.skip(f"{page.name} has no Python block to run")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("MPLBACKEND", "Agg")
    monkeypatch.setenv("GRIDBIAS_DOCS_MAX_STEPS", str(MAX_STEPS))
    namespace = {"__name__": "__docs__"}
    for line, code, reason in blocks:
        if reason is not None:
            continue
        try:
            exec(compile(code, f"{page.relative_to(ROOT)}:{line}", "exec"), namespace)
        except Exception as exc:  # the failing block's place, then the error
            raise AssertionError(f"{page.relative_to(ROOT)}, block at line {line}: "
                                 f"{type(exc).__name__}: {exc}") from exc
