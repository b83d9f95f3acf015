"""The package layout DEVELOPERS.md draws: no import cycle, small modules with a stated job, one home per job.

Imports are read from the source with ``ast`` (module-level and function-local ones alike, so an import
deferred into a function to dodge a cycle still counts).
"""

import ast
import re
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[2] / "gridbias"
MAX_LINES = 600


def _modules():
    """{dotted module name: path} for every module of the package (a package is its __init__)."""
    found = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        found[".".join(parts)] = path
    return found


MODULES = _modules()


def _imports(name, path):
    """The package modules that module ``name`` imports anywhere in its source."""
    is_package = path.name == "__init__.py"
    here = name.split(".") if is_package else name.split(".")[:-1]
    targets = set()
    for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import):
            targets.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = here[: len(here) - node.level + 1] if node.level else []
            module = ".".join(base + (node.module.split(".") if node.module else []))
            for alias in node.names:  # "from . import cvs" names a module; "from .x import y" names y in x
                child = f"{module}.{alias.name}"
                targets.add(child if child in MODULES else module)
    return {t for t in targets if t in MODULES and t != name}


GRAPH = {name: _imports(name, path) for name, path in MODULES.items()}


def _cycle():
    """One import cycle as a list of modules, or None."""
    state = {}

    def visit(node, stack):
        state[node] = "open"
        stack.append(node)
        for nxt in sorted(GRAPH[node]):
            if state.get(nxt) == "open":
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in state:
                found = visit(nxt, stack)
                if found:
                    return found
        state[node] = "done"
        stack.pop()
        return None

    for name in sorted(GRAPH):
        if name not in state:
            found = visit(name, [])
            if found:
                return found
    return None


def test_the_import_graph_is_read():
    assert "gridbias.runs" in GRAPH["gridbias.cli"] and "gridbias.openmm.forces" in GRAPH["gridbias.openmm"]


def test_no_import_cycle():
    cycle = _cycle()
    assert cycle is None, "import cycle: " + " -> ".join(cycle)


# The rows of the layout picture in DEVELOPERS.md, bottom up: a module imports only from its row or below.
LAYERS = {
    "files": ["errors", "_files", "checkpoint", "cvlog"],
    "core": ["gridbias", "grid", "walls", "history", "_kernels", "bias", "walkers", "testsystems", "_dynamics",
             "_identity", "_consistency", "_bias_state"],
    "services": ["analysis", "plots", "_plot_marks", "exports", "progress", "runs", "openmm", "trajectories",
                 "frame_values",
                 "stopping", "core_run",
                 "advice", "_short_run", "_series_files"],
    "application": ["demo"],
    "entry point": ["cli", "_cli_options", "_advise_command", "__main__"],
}


def _layer(name):
    parts = name.split(".")
    top = parts[1] if len(parts) > 1 else "gridbias"
    return next(k for k, (_, members) in enumerate(LAYERS.items()) if top in members)


def test_every_module_has_a_row_in_the_layout_picture():
    for name in MODULES:
        _layer(name)  # raises StopIteration for a module DEVELOPERS.md does not place


def test_imports_run_down_the_layout_picture():
    rows = list(LAYERS)
    upward = [f"{name} ({rows[_layer(name)]}) imports {target} ({rows[_layer(target)]})"
              for name, targets in GRAPH.items() for target in targets if _layer(target) > _layer(name)]
    assert upward == []


def test_only_the_main_module_imports_the_command_line():
    importers = sorted(name for name, targets in GRAPH.items() if "gridbias.cli" in targets)
    assert importers == ["gridbias.__main__"]


@pytest.mark.parametrize("name", sorted(MODULES))
def test_module_is_small_and_states_its_job(name):
    path = MODULES[name]
    lines = path.read_text().count("\n")
    assert lines <= MAX_LINES, f"{path.name} has {lines} lines; split it (at most {MAX_LINES})"
    docstring = ast.get_docstring(ast.parse(path.read_text()))
    assert docstring and docstring.strip().splitlines()[0].strip(), f"{name} has no docstring stating its job"


# A file put in place by rename or link, a builtin open() for writing, or a figure saved straight to a path.
OWN_WRITE = re.compile(r"os\.(replace|rename|link)\(|(?<![\w.])open\([^)]*[\"'][wax]b?[\"']|savefig\(path")


def test_one_atomic_writer_and_no_private_quantity_values():
    """Renames that put a file in place happen in gridbias/_files.py only; quantities are converted in
    gridbias/openmm/_units.py only and nothing reads Quantity._value; no code switches on class names."""
    for path in MODULES.values():
        text = path.read_text()
        if path.name != "_files.py":
            assert not OWN_WRITE.search(text), f"{path} writes files its own way"
        if path.name != "_units.py":
            assert "value_in_unit" not in text, f"{path} converts quantities its own way"
        assert not re.search(r"\._value\b", text), f"{path} reads a quantity's private value"
        assert "__name__ ==" not in text, f"{path} switches on a class name"


def test_ci_runs_the_readme_test_command_with_the_linter():
    """.ci/run runs the README's second quick-start command verbatim, and that command runs ruff."""
    root = PACKAGE.parent
    readme = (root / "README.md").read_text()
    command = next(line for line in readme.splitlines() if "pip install \".[all]\"" in line)
    assert "ruff check && python -m pytest" in command
    assert command in (root / ".ci" / "run").read_text().splitlines()
