"""Trajectory files of a biased run (DCD, XTC) lined up with its CV log, for reweighting afterwards.

Frames written by OpenMM's own ``DCDReporter`` or ``XTCReporter`` at a multiple of the log interval share
their steps with CV-log records, and each such record holds the bias its frame felt. :func:`load_frames`
reads a trajectory with mdtraj (the ``traj`` extra), finds the step of every frame and checks the frames
against the log: every frame must have a record at its step, and the CVs recomputed from the frame's
coordinates must equal the logged ones. Frames from another run, from before a restart cut (a crashed
segment whose log records were cut back and rewritten), or a trajectory longer than its log are refused
with the frame and the reason named. Then ``analysis.weights_at_steps`` gives the frames' weights, and
any quantity mdtraj (or anything else) computes from the frames can be reweighted.

Step numbers: a DCD header stores the first frame's step and the interval; an XTC frame stores its step.
OpenMM 8.6 writes the interval as the first step whatever the current step is, so a trajectory file
started after step 0 (a restart writing a new file) says the wrong steps: give ``first_step=`` then.
"""

from __future__ import annotations

import math
import os
import struct
import warnings
from dataclasses import dataclass

import numpy as np

from .analysis.frames import record_index
from .errors import ParameterError
from .openmm import cvs as _cvs

__all__ = ["Frames", "frame_steps", "load_frames", "DEFAULT_TOLERANCE"]

#: Largest difference between a CV recomputed from a frame and its logged value (nm or rad) that still
#: counts as the same configuration. XTC stores coordinates to 0.001 nm, which moves an angle between
#: 0.1-nm bonds by up to ~0.01 rad; DCD stores float32 Angstrom (~1e-6 relative). Frames of another run or
#: another segment differ by far more (a judgement call, not a measured optimum).
DEFAULT_TOLERANCE = 0.05

_FORMATS = (".dcd", ".xtc")


def _require_mdtraj():
    try:
        import mdtraj
    except ImportError:
        raise ImportError("reading trajectory files needs mdtraj: pip install 'gridbias[traj]'") from None
    return mdtraj


def _format_of(path) -> str:
    ext = os.path.splitext(path)[1].lower()
    if ext not in _FORMATS:
        raise ParameterError(f"trajectory {path!r}: the format is chosen by the extension, one of "
                             f"{', '.join(_FORMATS)}; got {ext or 'none'!r}")
    return ext


def _dcd_header(path) -> tuple[int, int, int]:
    """(first step, interval, complete frames) from a DCD file's header and size (CHARMM/OpenMM layout)."""
    try:
        with open(path, "rb") as f:
            head = f.read(100)
            size = os.fstat(f.fileno()).st_size
            if len(head) < 100 or struct.unpack("<i", head[:4])[0] != 84 or head[4:8] != b"CORD":
                raise ParameterError(f"trajectory {path!r} is not a DCD file (no 'CORD' header)")
            _, first, interval = struct.unpack("<3i", head[8:20])
            has_box = struct.unpack("<i", head[48:52])[0] != 0
            title_bytes = struct.unpack("<i", head[92:96])[0]
            f.seek(104 + title_bytes)
            n_atoms = struct.unpack("<i", f.read(4))[0]
    except (OSError, struct.error) as exc:
        raise ParameterError(f"could not read the DCD header of {path!r}: {exc}") from exc
    header = 112 + title_bytes
    frame = (56 if has_box else 0) + 3 * (8 + 4 * n_atoms)
    if n_atoms < 1 or title_bytes < 0 or size < header:
        raise ParameterError(f"trajectory {path!r} has a damaged DCD header ({n_atoms} atoms)")
    if interval < 1:
        raise ParameterError(f"trajectory {path!r}: its DCD header gives a frame interval of {interval}")
    return first, interval, (size - header) // frame


def frame_steps(path, *, first_step=None) -> np.ndarray:
    """The MD step of every frame of a DCD or XTC file.

    Parameters
    ----------
    path : str or os.PathLike
        ``.dcd`` (steps from the header: first step + k * interval) or ``.xtc`` (each frame's own step;
        needs mdtraj).
    first_step : int, keyword-only, optional
        The step of the first frame, overriding the file's (OpenMM writes the interval there even for a
        file started after step 0, e.g. after a restart). The interval is kept.

    Returns
    -------
    (n,) int64
    """
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ParameterError(f"trajectory {path!r} does not exist")
    if _format_of(path) == ".dcd":
        first, interval, n = _dcd_header(path)
        steps = first + interval * np.arange(n, dtype=np.int64)
    else:
        mdtraj = _require_mdtraj()
        with mdtraj.formats.XTCTrajectoryFile(path) as f:
            _, _, steps, _ = f.read()
        steps = np.asarray(steps, dtype=np.int64)
    if first_step is not None:
        if isinstance(first_step, bool) or not isinstance(first_step, (int, np.integer)) or first_step < 0:
            raise ParameterError(f"first_step must be a step number (integer >= 0), got {first_step!r}")
        steps = steps - (steps[0] if steps.size else 0) + int(first_step)
    return steps


@dataclass(frozen=True, eq=False)
class Frames:
    """A trajectory lined up with its CV log (from :func:`load_frames`).

    Attributes
    ----------
    trajectory : mdtraj.Trajectory
        The frames (coordinates in nm), for any mdtraj analysis.
    steps : (n,) int64
        The step of each frame.
    records : (n,) int
        The row of the CV-log record of each frame.
    checked : tuple of str
        The logged CVs that were recomputed from the frames and found equal (empty: nothing could be checked).
    """

    trajectory: object
    steps: np.ndarray
    records: np.ndarray
    checked: tuple


_BUILDERS = {
    "distance": lambda s: _cvs.Distance(*s["atoms"]),
    "angle": lambda s: _cvs.Angle(*s["atoms"]),
    "dihedral": lambda s: _cvs.Dihedral(*s["atoms"]),
    "coordinate": lambda s: _cvs.Coordinate(s["atoms"][0], s["axis"]),
    "centroid_distance": lambda s: _cvs.CentroidDistance(s["group1"], s["group2"], s["weights1"],
                                                         s["weights2"]),
    "distance_combination": lambda s: _cvs.DistanceCombination(s["pairs"], s["coefficients"]),
}


def _logged_geometry(log) -> list:
    """[(column, CV rebuilt from the log's metadata)] for the logged CVs computable from coordinates."""
    meta = log.metadata if isinstance(log.metadata, dict) else {}
    cv_specs = meta.get("cvs") or []
    named = list(zip(log.columns[2:2 + len(cv_specs)], cv_specs, strict=False))
    named += [(spec.get("name"), spec) for spec in meta.get("observables") or [] if isinstance(spec, dict)]
    out = []
    for column, spec in named:
        if isinstance(spec, dict) and spec.get("kind") in _BUILDERS and column in log.columns:
            try:
                out.append((column, _BUILDERS[spec["kind"]](spec)))
            except (KeyError, TypeError, ParameterError) as exc:
                raise ParameterError(f"CV log {log.path!r}: the definition of column {column!r} in its "
                                     f"metadata is malformed ({exc})") from exc
    return out


def _check(frames_xyz, boxes, records, steps, log, path, tolerance) -> tuple:
    checked = []
    for column, cv in _logged_geometry(log):
        logged = np.asarray(log.column(column))[records]
        if max(cv.atoms) >= frames_xyz.shape[1]:
            raise ParameterError(f"trajectory {path!r} has {frames_xyz.shape[1]} atoms but the logged CV "
                                 f"{column!r} uses atom {max(cv.atoms)}: frames of another system, or of an "
                                 "atom subset (pass check=False for those)")
        values = np.array([cv.value(frames_xyz[k], None if boxes is None else boxes[k])
                           for k in range(frames_xyz.shape[0])])
        diff = values - logged
        if cv.periodic:
            diff = (diff + math.pi) % (2 * math.pi) - math.pi
        bad = np.flatnonzero(~(np.abs(diff) <= tolerance))
        if bad.size:
            k = int(bad[0])
            raise ParameterError(
                f"trajectory {path!r} does not line up with CV log {log.path!r}: at frame {k} (step "
                f"{steps[k]}) {column} computed from the coordinates is {values[k]:.6g} {cv.unit} but the "
                f"log recorded {logged[k]:.6g} ({bad.size} of {len(steps)} frames differ by more than "
                f"{tolerance:g}). The frames come from another run, from a segment before a restart cut, or "
                "carry wrong steps (a file started after step 0: give first_step=)")
        checked.append(column)
    return tuple(checked)


def load_frames(path, log, *, top, first_step=None, tolerance: float = DEFAULT_TOLERANCE,
                check: bool = True) -> Frames:
    """Read a DCD or XTC trajectory with mdtraj and line its frames up with the CV log's records.

    Parameters
    ----------
    path : str or os.PathLike
        The trajectory (``.dcd`` or ``.xtc``), written at a multiple of the log interval.
    log : gridbias.cvlog.CVLog
        The run's CV log (``read_cvlog``), cut back at restarts as the reporter does.
    top : str, mdtraj.Topology or openmm.app.Topology, keyword-only
        The topology (e.g. the starting structure's PDB file).
    first_step : int, keyword-only, optional
        See :func:`frame_steps`.
    tolerance : float, keyword-only, default 0.05
        Largest difference between a logged CV and the same CV recomputed from the frame (nm or rad).
    check : bool, keyword-only, default True
        Recompute the logged geometric CVs (biased or observables) from the frames and compare. Turn it
        off only for trajectories of an atom subset.

    Returns
    -------
    Frames

    Raises
    ------
    ParameterError
        A frame without a log record (wrong interval, trajectory longer than the log, another run), a frame
        whose recomputed CVs differ from the logged ones, an unreadable file. Nothing is changed.
    ImportError
        mdtraj is missing (``pip install 'gridbias[traj]'``).
    """
    mdtraj = _require_mdtraj()
    path = os.fspath(path)
    steps = frame_steps(path, first_step=first_step)
    tol = float(tolerance)
    if not (math.isfinite(tol) and tol > 0):
        raise ParameterError(f"tolerance must be a finite number > 0 (nm or rad), got {tolerance!r}")
    if steps.size == 0:
        raise ParameterError(f"trajectory {path!r} holds no frames")
    records = record_index(log.column("step"), steps)  # refuses frames without a record before reading them
    if hasattr(top, "getNumAtoms"):  # an openmm.app.Topology
        top = mdtraj.Topology.from_openmm(top)
    try:
        traj = mdtraj.load(path, top=top)
    except Exception as exc:  # mdtraj raises many kinds (IOError, ValueError, its own)
        raise ParameterError(f"could not read trajectory {path!r} with mdtraj: {exc}") from exc
    if traj.n_frames != steps.size:
        raise ParameterError(f"trajectory {path!r}: mdtraj read {traj.n_frames} frames but the file's header "
                             f"and size say {steps.size}; the file may be damaged")
    checked = ()
    if check:
        boxes = None if traj.unitcell_vectors is None else np.asarray(traj.unitcell_vectors, dtype=float)
        checked = _check(np.asarray(traj.xyz, dtype=float), boxes, records, steps, log, path, tol)
        if not checked:
            warnings.warn(f"CV log {log.path!r} holds no CV computable from coordinates (only from_force "
                          f"CVs): the frames of {path!r} were matched by step only, not checked against it",
                          stacklevel=2)
    return Frames(traj, steps, records, checked)
