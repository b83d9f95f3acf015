"""Sphinx configuration of the gridbias documentation site.

Build it with ``python -m sphinx -W -b html docs docs/_build/html`` (the README's third command). The API
reference is generated at build time from each public module's ``__all__`` (see ``_write_api_pages``), so
every public name has a page and no list here can fall behind the code.
"""

import importlib
import os
import shutil
import sys
from pathlib import Path

DOCS = Path(__file__).resolve().parent
ROOT = DOCS.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(DOCS))

import gridbias  # noqa: E402  (after the path is set, so a source checkout documents itself)

project = "gridbias"
author = "gridbias developers"
copyright = "2026, gridbias developers"
release = gridbias.__version__
version = release

extensions = [
    "sphinx.ext.autodoc",
    "sphinx.ext.mathjax",
    "numpydoc",
    "myst_parser",
    "sphinx_gallery.gen_gallery",
]

source_suffix = {".rst": "restructuredtext", ".md": "markdown"}
exclude_patterns = ["_build", "Thumbs.db", ".DS_Store", "api/generated/*.rst.tmp"]
myst_heading_anchors = 3
myst_enable_extensions = ["dollarmath"]

html_theme = "pydata_sphinx_theme"
html_title = "gridbias"
html_theme_options = {
    "navigation_depth": 2,
    "show_toc_level": 2,
    "secondary_sidebar_items": ["page-toc"],
}
html_static_path = []

autodoc_default_options = {"members": True, "inherited-members": False, "show-inheritance": True}
autodoc_typehints = "none"
numpydoc_show_class_members = False
numpydoc_class_members_toctree = False
numpydoc_xref_param_type = False

# The examples run as the gallery: each example script is executed as a short run (arguments in _gallery.py)
# and its output and figures are shown on its page. They run from a copy under _build/, so the files they
# write never land in examples/. The MPI walkers example is shown but not run.
os.environ.setdefault("MPLBACKEND", "Agg")
EXAMPLES_COPY = DOCS / "_build" / "examples"
shutil.rmtree(EXAMPLES_COPY, ignore_errors=True)
shutil.copytree(ROOT / "examples", EXAMPLES_COPY, ignore=shutil.ignore_patterns("__pycache__"))
sphinx_gallery_conf = {
    "examples_dirs": str(EXAMPLES_COPY),
    "gallery_dirs": "gallery",
    "filename_pattern": r"^((?!walkers).)*$",
    "reset_argv": "_gallery.reset_argv",
    "ignore_pattern": r"__init__\.py",
    "download_all_examples": False,
    "remove_config_comments": True,
    "within_subsection_order": "FileNameSortKey",
    "image_scrapers": ("matplotlib", "_gallery.png_scraper"),
    "abort_on_example_error": True,
}

#: Public modules documented in the API reference, in reading order, with the title of their page.
API_MODULES = {
    "gridbias": "Core: grid, bias, walls, errors",
    "gridbias.openmm": "OpenMM adapter",
    "gridbias.analysis": "Analysis",
    "gridbias.plots": "Plots",
    "gridbias.walkers": "Several walkers (MPI)",
    "gridbias.cvlog": "CV logs",
    "gridbias.testsystems": "Analytic test systems",
}
OPTIONAL_API_MODULES = ("gridbias.runs", "gridbias.advice", "gridbias.stopping")


def _public_modules():
    modules = dict(API_MODULES)
    for name in OPTIONAL_API_MODULES:
        try:
            module = importlib.import_module(name)
        except ImportError:
            continue
        modules[name] = (module.__doc__ or name).strip().splitlines()[0].rstrip(".")
    return modules


def _write_api_pages(app):
    """Write one reST page per public module listing every name of its ``__all__``."""
    out = Path(app.srcdir) / "api"
    out.mkdir(exist_ok=True)
    pages = []
    for name, title in _public_modules().items():
        module = importlib.import_module(name)
        names = [n for n in getattr(module, "__all__", []) if not n.startswith("__")]
        lines = [title, "=" * len(title), "", f".. module:: {name}", "", f"``import {name}``", ""]
        for public in names:
            obj = getattr(module, public)
            if isinstance(obj, type):
                directive = "autoclass"
            elif callable(obj):
                directive = "autofunction"
            else:
                directive = "autodata"
            lines += [f".. {directive}:: {name}.{public}", ""]
            if directive == "autodata":
                lines += ["   :no-value:", ""]
        page = name.replace(".", "_")
        text = "\n".join(lines)
        path = out / f"{page}.rst"
        if not path.exists() or path.read_text() != text:
            path.write_text(text)
        pages.append(page)
    index = ["API reference", "=============", "",
             "Every public name, generated from the docstrings (numpydoc). Units are OpenMM's defaults: "
             "kJ/mol, nm, radians, ps, K.", "", ".. toctree::", "   :maxdepth: 1", ""]
    index += [f"   {page}" for page in pages]
    text = "\n".join(index) + "\n"
    path = out / "index.rst"
    if not path.exists() or path.read_text() != text:
        path.write_text(text)


def setup(app):
    app.connect("builder-inited", _write_api_pages)
