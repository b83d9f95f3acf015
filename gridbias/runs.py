"""Run files: the layout of a run checkpoint, opening any checkpoint, and pairing it with its CV log.

A *run checkpoint* (kind ``gridbias.openmm-run``) is what the OpenMM adapter writes (``BiasLink.save``
and the reporter): the bias, the CV definitions, the engine's state and the MD state. A *bias
checkpoint* (kind ``gridbias.bias``) is what ``GridBias.save`` writes. To analyse either one::

    from gridbias.runs import load_run
    run = load_run("run.gbz")          # any checkpoint: run.bias, run.names, run.units, run.time, run.step

:func:`run_frames` then takes the frames of a CV log that belong to that checkpoint. Every failure is a
library error (CheckpointError, CVLogError, ParameterError) whose one line names the file and the problem.
This module is the one place that knows the run-checkpoint layout: the adapter writes and restores
through :func:`write_run_checkpoint` and :func:`read_run_checkpoint`.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .errors import CheckpointError, CVLogError, ParameterError

__all__ = ["CHECKPOINT_KIND", "CHECKPOINT_VERSION", "RunCheckpoint", "write_run_checkpoint",
           "read_run_checkpoint", "Run", "load_run", "read_log", "RunFrames", "run_frames", "log_column"]

#: The ``kind`` of a run checkpoint (gridbias.checkpoint container).
CHECKPOINT_KIND = "gridbias.openmm-run"
#: The layout version this gridbias writes (and the newest it reads).
CHECKPOINT_VERSION = 1

_BIAS_KIND = "gridbias.bias"
_MD_ARRAYS = ("md.checkpoint", "md.positions", "md.velocities", "md.box")


# ------------------------------------------------------------------------------------- the run checkpoint
@dataclass(frozen=True, eq=False)
class RunCheckpoint:
    """Everything a run checkpoint holds; ``BiasLink.restore`` returns the one it restored.

    Attributes
    ----------
    path : str
    step : int
        MD step at the checkpoint.
    time : float, ps
        Simulated time at the checkpoint.
    platform : str
        The OpenMM platform it was written on (a restore on it continues bit for bit).
    labels : tuple of str
        CV names.
    cvs : tuple of dict
        JSON definitions of the CVs (what a restore compares).
    n_particles : int
    bias_state : dict
        The bias's metadata (``GridBias.to_state``); ``bias_arrays`` holds its arrays.
    bias_arrays : dict of str to ndarray
    engine : dict
        ``route``, ``pending_hills``, ``n_folded`` (hills in the engine's table), ``n_pending``, ``name``.
    folded_values : ndarray, grid shape
        The engine's table, kJ/mol.
    md_checkpoint : bytes
        OpenMM's own checkpoint of the Context (exact on the same platform and build).
    positions, velocities : (n_particles, 3) float, nm and nm/ps
    box : (3, 3) float, nm
    openmm_version, written : str
        The OpenMM version and the local time of writing.
    version : int
        Layout version.
    """

    path: str
    step: int
    time: float
    platform: str
    labels: tuple
    cvs: tuple
    n_particles: int
    bias_state: dict
    bias_arrays: dict
    engine: dict
    folded_values: np.ndarray
    md_checkpoint: bytes
    positions: np.ndarray
    velocities: np.ndarray
    box: np.ndarray
    openmm_version: str = ""
    written: str = ""
    version: int = CHECKPOINT_VERSION


def write_run_checkpoint(path, checkpoint: RunCheckpoint) -> None:
    """Write ``checkpoint`` (its ``path`` is ignored) to ``path`` atomically, kind :data:`CHECKPOINT_KIND`.

    Raises
    ------
    CheckpointError
        The file could not be written (the old file, if any, is intact).
    """
    from .checkpoint import write_checkpoint

    c = checkpoint
    meta = {"version": c.version, "bias": c.bias_state, "cvs": list(c.cvs), "labels": list(c.labels),
            "n_particles": int(c.n_particles), "platform": c.platform, "openmm_version": c.openmm_version,
            "step": int(c.step), "time_ps": float(c.time), "engine": dict(c.engine), "written": c.written}
    arrays = {f"bias.{k}": np.ascontiguousarray(v) for k, v in c.bias_arrays.items()}
    arrays["engine.folded_values"] = np.ascontiguousarray(c.folded_values)
    arrays["md.checkpoint"] = np.frombuffer(c.md_checkpoint, dtype=np.uint8)
    arrays["md.positions"] = np.ascontiguousarray(c.positions, dtype=float)
    arrays["md.velocities"] = np.ascontiguousarray(c.velocities, dtype=float)
    arrays["md.box"] = np.ascontiguousarray(c.box, dtype=float)
    write_checkpoint(path, meta, arrays, kind=CHECKPOINT_KIND)


def read_run_checkpoint(path) -> RunCheckpoint:
    """Read and check a run checkpoint written by the OpenMM adapter.

    Raises
    ------
    CheckpointError
        Missing, damaged or foreign file, another kind (a bias checkpoint: use :func:`load_run`), a layout
        newer than this gridbias, or missing or malformed entries. The message names the file.
    """
    from .checkpoint import read_checkpoint

    path = os.fspath(path)
    meta, arrays = read_checkpoint(path, kind=CHECKPOINT_KIND)
    return _parse_run_checkpoint(path, meta, arrays)


def _parse_run_checkpoint(path, meta, arrays) -> RunCheckpoint:
    try:
        version = int(meta["version"])
        if version > CHECKPOINT_VERSION:
            raise CheckpointError(f"{path}: written by a newer gridbias (format {meta['version']}); upgrade")
        bias_state = meta["bias"]
        engine = meta["engine"]
        if not isinstance(bias_state, dict) or not isinstance(engine, dict):
            raise TypeError("'bias' and 'engine' must be JSON objects")
        engine = dict(engine)
        engine["n_folded"] = int(engine["n_folded"])
        cvs = tuple(meta["cvs"])
        labels = tuple(str(x) for x in meta["labels"]) if meta.get("labels") else tuple(
            f"cv{i}" for i in range(len(cvs)))
        checkpoint = RunCheckpoint(
            path=path, step=int(meta["step"]), time=float(meta["time_ps"]), platform=str(meta["platform"]),
            labels=labels, cvs=cvs, n_particles=int(meta["n_particles"]), bias_state=bias_state,
            bias_arrays={k[len("bias."):]: v for k, v in arrays.items() if k.startswith("bias.")},
            engine=engine, folded_values=arrays["engine.folded_values"],
            md_checkpoint=arrays["md.checkpoint"].tobytes(), positions=arrays["md.positions"],
            velocities=arrays["md.velocities"], box=arrays["md.box"],
            openmm_version=str(meta.get("openmm_version", "")), written=str(meta.get("written", "")),
            version=version)
    except CheckpointError:
        raise
    except KeyError as exc:
        raise CheckpointError(f"{path}: checkpoint is incomplete (missing {exc})") from exc
    except (TypeError, ValueError, AttributeError) as exc:
        raise CheckpointError(f"{path}: checkpoint metadata is malformed ({type(exc).__name__}: {exc})") from exc
    return checkpoint


# -------------------------------------------------------------------------------------- any checkpoint
@dataclass(frozen=True)
class Run:
    """A checkpoint opened for analysis: the bias and what is known about its CVs and its moment.

    Attributes
    ----------
    path : str
    bias : GridBias
    names : tuple of str
        CV names (``cv0, cv1, ...`` when the file does not name them).
    units : tuple of str
        CV units ("rad", "nm", or "" when unknown).
    definitions : tuple of str
        One phrase per CV ("dihedral of atoms 4-6-8-14"), or "" when unknown.
    time : float, ps
        Simulated time at the checkpoint (run checkpoints), else the time of the last hill (NaN if none).
    step : int or None
        MD step at the checkpoint (run checkpoints only).
    source : str
        "OpenMM run checkpoint" or "bias checkpoint".
    platform : str or None
    """

    path: str
    bias: object
    names: tuple
    units: tuple
    definitions: tuple
    time: float
    step: int | None
    source: str
    platform: str | None


_ANGLE_KINDS = ("dihedral", "angle")


def _describe_cv(spec) -> tuple[str, str]:
    """(unit, phrase) for a CV definition stored by the OpenMM adapter."""
    if not isinstance(spec, dict):
        return "", ""
    kind = str(spec.get("kind", "?"))
    if kind == "force":
        return str(spec.get("unit", "")), f"energy of a {spec.get('class', 'force')}"
    unit = "rad" if kind in _ANGLE_KINDS else "nm"
    if "atoms" in spec:
        atoms = "-".join(str(a) for a in spec["atoms"])
        return unit, f"{kind.replace('_', ' ')} of atoms {atoms}"
    if kind == "centroid_distance":
        return unit, (f"distance between centroids of {len(spec.get('group1', []))} and "
                      f"{len(spec.get('group2', []))} atoms")
    return unit, kind.replace("_", " ")


def load_run(path) -> Run:
    """Open any checkpoint for analysis: a run checkpoint of the OpenMM adapter or a ``GridBias.save`` file.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    Run
        ``run.bias`` is a GridBias (free energies, hill history, everything ``gridbias.analysis`` takes).

    Raises
    ------
    CheckpointError
        Missing, unreadable, damaged or foreign file, or a checkpoint that holds no bias.

    Examples
    --------
    >>> run = load_run("run.gbz")  # doctest: +SKIP
    >>> surface = gridbias.analysis.surface_at(run.bias)  # doctest: +SKIP
    """
    from .checkpoint import read_checkpoint

    path = os.fspath(path)
    meta, arrays = read_checkpoint(path)
    if isinstance(meta.get("bias"), dict):  # a run checkpoint of the OpenMM adapter
        checkpoint = _parse_run_checkpoint(path, meta, arrays)
        bias = _bias_from_state(path, checkpoint.bias_state, checkpoint.bias_arrays)
        described = [_describe_cv(s) for s in checkpoint.cvs] or [("", "")] * bias.ndim
        return Run(path, bias, checkpoint.labels, tuple(u for u, _ in described), tuple(p for _, p in described),
                   checkpoint.time, checkpoint.step, "OpenMM run checkpoint", checkpoint.platform)
    if meta.get("kind") == _BIAS_KIND:
        bias = _bias_from_state(path, meta, arrays)
        times = np.asarray(bias.history.times)
        t_last = float(times[-1]) if times.size else math.nan
        d = bias.ndim
        return Run(path, bias, tuple(f"cv{i}" for i in range(d)), ("",) * d, ("",) * d, t_last, None,
                   "bias checkpoint", None)
    raise CheckpointError(f"checkpoint {path!r} holds no metadynamics bias (its metadata has neither a "
                          f"'bias' entry nor kind {_BIAS_KIND!r})")


def _bias_from_state(path, meta, arrays):
    from .bias import GridBias

    try:
        return GridBias.from_state(meta, arrays)
    except CheckpointError as exc:
        raise CheckpointError(f"checkpoint {path!r}: {exc}") from exc


# ------------------------------------------------------------------------------------------ its CV log
def read_log(path, *, min_records: int = 4):
    """Read a CV log for analysis (``gridbias.cvlog.read_cvlog``), refusing one with too few records.

    Raises
    ------
    CVLogError
        Missing, damaged or foreign file, or fewer than ``min_records`` complete records.
    """
    from .cvlog import read_cvlog

    log = read_cvlog(path)
    if log.n_records < min_records:
        raise CVLogError(f"CV log {os.fspath(path)!r} holds {log.n_records} complete records; at least "
                         f"{min_records} are needed")
    return log


def log_column(log, name: str, what: str = "column") -> np.ndarray:
    """The finite float values of column ``name`` of ``log``; CVLogError naming ``what`` otherwise."""
    if name not in log.columns:
        raise CVLogError(f"{what}: CV log {log.path!r} has no column {name!r}; its columns are "
                         f"{', '.join(log.columns)}")
    values = np.asarray(log.column(name), dtype=float)
    if not np.isfinite(values).all():
        bad = int(np.flatnonzero(~np.isfinite(values))[0])
        raise CVLogError(f"{what}: column {name!r} of CV log {log.path!r} holds {values[bad]} at record "
                         f"{bad}; every value must be finite")
    return values


class RunFrames(NamedTuple):
    """The frames of a CV log that belong to a checkpoint (see :func:`run_frames`)."""

    times: np.ndarray  # (n,) ps
    cvs: np.ndarray  # (n, d) CV units
    bias: np.ndarray | None  # (n,) kJ/mol, the bias each frame felt, when logged
    note: str  # what was left out, or ""


def run_frames(run: Run, log, cv_columns=None, time_column: str = "time") -> RunFrames:
    """The frames of ``log`` that belong to ``run``: times, CV values and logged bias, in time order.

    Frames logged after the checkpoint's time are left out (the checkpoint does not hold the bias they
    felt) and ``note`` says how many.

    Parameters
    ----------
    run : Run
    log : CVLog
    cv_columns : sequence of str, optional
        The log columns holding the biased CVs, in the bias's order (default: the run's CV names).
    time_column : str
        The log column holding the simulated time, ps.

    Raises
    ------
    ParameterError
        The wrong number of ``cv_columns``.
    CVLogError
        A missing column, a non-finite value, times that go back, or fewer than 4 frames left.
    """
    names = list(cv_columns or run.names)
    if len(names) != run.bias.ndim:
        raise ParameterError(f"cv_columns: give {run.bias.ndim} CV column names (the checkpoint has "
                             f"{run.bias.ndim} CVs), got {len(names)}: {', '.join(names)}")
    times = log_column(log, time_column, "time column")
    cvs = np.column_stack([log_column(log, n, "CV columns") for n in names])
    logged_bias = log_column(log, "bias", "bias column") if "bias" in log.columns else None
    if (np.diff(times) < 0).any():
        bad = int(np.flatnonzero(np.diff(times) < 0)[0]) + 1
        raise CVLogError(f"CV log {log.path!r}: column {time_column!r} goes back in time at record {bad} "
                         f"({times[bad]} after {times[bad - 1]} ps); one run's frames in time order are "
                         "needed")
    note = ""
    if np.isfinite(run.time):
        keep = times <= run.time * (1 + 1e-12) + 1e-9
        dropped = int((~keep).sum())
        if dropped:
            note = (f"{dropped} frames logged after the checkpoint's time ({run.time:g} ps) were left "
                    "out: the checkpoint does not hold the bias they felt")
            times, cvs = times[keep], cvs[keep]
            logged_bias = None if logged_bias is None else logged_bias[keep]
    if times.size < 4:
        raise CVLogError(f"CV log {log.path!r} has {times.size} frames within the checkpoint's time; "
                         "at least 4 are needed")
    return RunFrames(times, cvs, logged_bias, note)
