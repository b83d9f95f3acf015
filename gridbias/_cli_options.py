"""Shared pieces of the ``gridbias`` command: exit codes, its error, output checks, wrapped help, option types.

Kept apart from ``gridbias.cli`` so that each command-line module stays small; only the command-line modules
import it.
"""

from __future__ import annotations

import argparse
import math
import os
import textwrap

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_BAD_INPUT = 2


class CommandError(Exception):
    """A failure to report as one line on stderr with the given exit code."""

    def __init__(self, message: str, code: int = EXIT_BAD_INPUT):
        super().__init__(message)
        self.code = code


def _check_outputs(paths, allowed, option, inputs=()):
    """Check outputs up front (extension, folder, never an input or twice one file); [(path, format)]."""
    from ._files import same_file

    checked = []
    for path in paths:
        for other in [*inputs, *(p for p, _ in checked)]:
            if same_file(path, other):
                raise CommandError(f"{option} {path!r} is the same file as {other!r}: a command never writes over "
                                   "a file it reads or writes twice; choose another output name")
        ext = os.path.splitext(path)[1].lower().lstrip(".")
        if ext not in allowed:
            raise CommandError(f"{option} {path!r}: the file type is taken from the extension, which must be "
                               f"one of {', '.join('.' + a for a in allowed)}")
        folder = os.path.dirname(os.path.abspath(path))
        if not os.path.isdir(folder):
            raise CommandError(f"{option} {path!r}: the folder {folder!r} does not exist")
        if os.path.isdir(path):
            raise CommandError(f"{option} {path!r} is a folder, not a file name")
        checked.append((path, ext))
    return checked




class _UsageError(Exception):
    pass


class _Formatter(argparse.HelpFormatter):
    """Help text with descriptions and epilogs wrapped paragraph by paragraph (lines kept apart)."""

    def _fill_text(self, text, width, indent):
        return "\n".join(textwrap.fill(paragraph, width, initial_indent=indent, subsequent_indent=indent)
                         for paragraph in text.split("\n"))


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage error as one line instead of printing the usage and exiting."""

    def error(self, message):
        raise _UsageError(f"{message} (see '{self.prog} --help')")


_UNITS = ("Units: energies in kJ/mol (and kBT where marked), times in ps, temperatures in K, CVs in their "
          "own units (nm, rad)")
_UNITS_NOTE = _UNITS + "; angles are shown and typed in degrees unless --angle-unit rad."


def _option_type(convert, allowed, expected, malformed):
    """An argparse type: ``convert(text)`` must succeed (else "expected <malformed>") and satisfy
    ``allowed`` (else "expected <expected>"); both messages quote the text given."""
    def parse(text):
        try:
            x = convert(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {malformed}, got {text!r}") from None
        if not allowed(x):
            raise argparse.ArgumentTypeError(f"expected {expected}, got {text!r}")
        return x
    return parse


_fraction = _option_type(float, lambda x: 0 < x <= 1, "a number in (0, 1]", "a number between 0 and 1")
_positive = _option_type(float, lambda x: math.isfinite(x) and x > 0, "a positive number", "a positive number")
_count = _option_type(int, lambda n: n >= 1, "a whole number >= 1", "a whole number")
_finite = _option_type(float, math.isfinite, "a finite number", "a number")
# basins need a depth above the 1 kBT their cores span (analysis.find_basins); 100 kBT merges everything
_min_depth = _option_type(float, lambda x: 1 < x <= 100, "a number of kBT above 1 (basin cores span 1 kBT) and at "
                          "most 100", "a number of kBT")
_burn_in = _option_type(float, lambda x: 0 <= x < 1, "a number in [0, 1)", "a number between 0 and 1")


# Bounds of the options that size arrays or work, far above any useful value (a typo must not exhaust the
# machine): bins per column and in all, moments replayed, demo ns (1 us: days anywhere), OpenMM's 32-bit seeds.
MAX_BINS, MAX_BINS_TOTAL, MAX_POINTS, MAX_LENGTH_NS, MAX_SEED = 5_000, 4_000_000, 1_000, 1_000.0, 2**31 - 1


def _count_upto(limit, why):
    return _option_type(int, lambda n: 1 <= n <= limit, f"a whole number in 1..{limit:,} ({why})", "a whole number")


def _names(text):
    names = [n.strip() for n in text.split(",")]
    if not all(names):
        raise argparse.ArgumentTypeError(f"expected comma-separated column names, got {text!r}")
    return names


def _add_angle_unit(p):
    p.add_argument("--angle-unit", "--angles", dest="angle_unit", choices=("deg", "rad"), default="deg",
                   help="show (and read --range values of) angle CVs in degrees or radians (default deg; "
                        "--angles is the older spelling)")


def _add_frames(p):
    p.add_argument("--columns", type=_names, metavar="NAME[,NAME...]",
                   help="the log columns holding the biased CVs, in the bias's order (default: the CV names "
                        "stored in the checkpoint)")
    p.add_argument("--time-column", default="time", metavar="NAME",
                   help="the log column holding the simulated time in ps (default 'time')")
