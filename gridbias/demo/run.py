"""The demo from start to report: claim the results folder, run the simulation, analyse it.

``gridbias demo`` calls :func:`run_demo`. What it runs and why: :mod:`gridbias.demo.settings`; the
simulation loop: :mod:`gridbias.demo.simulation`; the analysis and report: :mod:`gridbias.demo.report`.
"""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass

from .._files import CheckpointLock, new_folders
from ..errors import LockError, ParameterError
from .report import analyse
from .settings import (
    CONFORMERS,
    FULL_LENGTH_NS,
    OWN_FILES,
    QUICK_LENGTH_NS,
    SUBFOLDERS,
    DemoSettings,
)
from .simulation import say, simulate

__all__ = ["DemoSettings", "DemoResult", "run_demo", "CONFORMERS", "SUBFOLDERS", "FULL_LENGTH_NS",
           "QUICK_LENGTH_NS"]


@dataclass(frozen=True)
class DemoResult:
    """What a call of :func:`run_demo` did.

    Attributes
    ----------
    folder : str
        The mode's results folder.
    completed : bool
        False when the run was interrupted (a checkpoint was written; call again to continue).
    step : int
        MD step reached.
    report : str
        The text report (empty when interrupted).
    files : tuple of str
        Files written by the analysis.
    """

    folder: str
    completed: bool
    step: int
    report: str
    files: tuple


def _remove_own_files(folder):
    for name in OWN_FILES:
        path = os.path.join(folder, name)
        if os.path.isfile(path):
            os.unlink(path)



def _length(settings) -> str:
    if settings.until_converged:
        return f"until the convergence verdict holds (at most {settings.length_ns:g} ns)"
    return f"{settings.length_ns:g} ns"


def run_demo(out="gridbias-demo", settings: DemoSettings | None = None, *, fresh=False, stream=None,
             progress=None) -> DemoResult:
    """Run (or continue) the demo and write its results.

    Parameters
    ----------
    out : str or os.PathLike
        Results folder (created if needed); the mode works in ``out/phi-psi`` or ``out/phi-only``.
    settings : DemoSettings, optional
        Default: the full 2d run.
    fresh : bool, keyword-only
        Remove this mode's earlier files (only the files the demo writes) and start again.
    stream : text stream, keyword-only
        Where messages and the report go (default sys.stdout).
    progress : gridbias.progress.ProgressLine, keyword-only
        The progress display (default: one on sys.stderr).

    Returns
    -------
    DemoResult

    Raises
    ------
    CheckpointError
        The folder's checkpoint is damaged or was written with other settings (use ``fresh``).
    LockError
        Another demo is running in the same folder (or another run holds its checkpoint).
    ImportError
        OpenMM (or, for the figures, matplotlib) is missing.
    """
    from ..progress import ProgressLine

    settings = DemoSettings() if settings is None else settings
    stream = sys.stdout if stream is None else stream
    progress = ProgressLine() if progress is None else progress
    folder = os.path.join(os.fspath(out), SUBFOLDERS[settings.mode])
    if os.path.exists(folder) and not os.path.isdir(folder):
        raise ParameterError(f"out: {folder!r} exists and is not a folder")
    # A run that fails before writing anything leaves no empty folders behind.
    with new_folders(folder):
        # One demo per folder: claim it before touching any file (a second run must not remove or cut the
        # files of a live one).
        claim = CheckpointLock(os.path.join(folder, "demo-run"))
        try:
            claim.acquire()
        except LockError as exc:
            raise LockError(f"another gridbias demo is running in {folder!r}; wait for it or stop it "
                            f"({exc})") from None
        try:
            if fresh:
                _remove_own_files(folder)
            biased = " and ".join(settings.biased)
            say(stream, f"gridbias demo ({settings.mode}): well-tempered metadynamics of the alanine dipeptide "
                         f"in vacuum, biased on {biased}, {_length(settings)}; results in {folder}")
            completed, step, info = simulate(folder, settings, stream, progress)
            if not completed:
                return DemoResult(folder, False, step, "", ())
            report, files = analyse(folder, settings, info, progress)
        finally:
            claim.release()
    say(stream, "")
    say(stream, report)
    return DemoResult(folder, True, step, report, files)
