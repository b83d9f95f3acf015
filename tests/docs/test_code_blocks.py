"""Every Python block of the README and the user guide runs, page by page, as a reader would run it.

The blocks of one page run in order in one namespace (a page reads like one script: the names a block uses
are defined by a visible block above it). A block right after ``<!-- run by tests/PATH.py -->`` is run by
that test instead (on a run it makes for the block); the test must exist and read this page. A block right
after ``<!-- not run: REASON -->`` is shown but not run (an MPI launch, say); the reason is required. A long
MD call in a block (more than LONG_RUN steps) is cut to MAX_STEPS: ``openmm.app.Simulation.step`` is
capped, so a page that asks for five million steps is checked in seconds with the same code; shorter calls
run as written.
"""

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
PAGES = [ROOT / "README.md", *sorted((ROOT / "docs").glob("**/*.md"))]
PAGES = [p for p in PAGES if "_build" not in p.parts and "gallery" not in p.parts]
_BLOCK = re.compile(r"(<!--\s*(not run:\s*(?P<reason>[^>]*?)|run by\s+(?P<runner>\S+?))\s*-->\s*\n)?"
                    r"```python\n(?P<code>.*?)```", re.S)
MAX_STEPS = 200
LONG_RUN = 100_000


def python_blocks(path):
    """(line, code, why it is not run here or None) of every ```python block of a Markdown file, in order."""
    text = path.read_text()
    blocks = []
    for match in _BLOCK.finditer(text):
        line = text.count("\n", 0, match.start("code")) + 1
        elsewhere = match.group("reason")
        if match.group("runner"):
            elsewhere = f"run by {match.group('runner')}"
        blocks.append((line, match.group("code"), elsewhere))
    return blocks


def test_blocks_run_elsewhere_name_a_test_that_reads_the_page():
    for page in PAGES:
        for match in _BLOCK.finditer(page.read_text()):
            runner = match.group("runner")
            if runner:
                test = ROOT / runner
                assert test.is_file(), f"{page.name}: {runner} does not exist"
                assert page.name in test.read_text(), f"{runner} does not read {page.name}"


def test_pages_found():
    assert ROOT / "README.md" in PAGES
    assert any(python_blocks(p) for p in PAGES)


def test_not_run_blocks_give_a_reason():
    for page in PAGES:
        for line, _, reason in python_blocks(page):
            assert reason is None or reason.strip(), f"{page.name}:{line}: '<!-- not run: -->' needs a reason"


@pytest.fixture
def short_md(monkeypatch):
    """Cut every Simulation.step call longer than LONG_RUN to MAX_STEPS steps (the page's code is unchanged)."""
    try:
        from openmm import app
    except ImportError:
        return
    original = app.Simulation.step

    def capped(self, steps):
        return original(self, MAX_STEPS if int(steps) > LONG_RUN else int(steps))

    monkeypatch.setattr(app.Simulation, "step", capped)


RUNNABLE = [p for p in PAGES if any(elsewhere is None for _, _, elsewhere in python_blocks(p))]


@pytest.mark.parametrize("page", RUNNABLE, ids=[str(p.relative_to(ROOT)) for p in RUNNABLE])
def test_page_blocks_run(page, tmp_path, monkeypatch, short_md):
    blocks = python_blocks(page)
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
