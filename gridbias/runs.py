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
           "read_run_checkpoint", "Run", "load_run", "read_log", "RunFrames", "run_frames", "log_column",
           "check_pair"]

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
    stop : dict or None
        The stop decision recorded by ``BiasLink.run_until`` (``gridbias.stopping.StopDecision.to_dict``),
        None while the run goes on.
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
    stop: dict | None = None


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
    if c.stop is not None:
        meta["stop"] = dict(c.stop)
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


_MAX_PARTICLES = 10**9
_MAX_STEP = 2**62
_FIELDS = {"version", "bias", "cvs", "labels", "n_particles", "platform", "openmm_version", "step", "time_ps",
           "engine", "written"}
_ENGINE_FIELDS = {"route", "pending_hills", "n_folded", "n_pending", "name"}


def _parse_run_checkpoint(path, meta, arrays) -> RunCheckpoint:
    """The one check of a run checkpoint before anything uses it: every field's type and range, every
    array's dtype and shape against the metadata, a finite MD state. (The bias inside is checked by
    ``GridBias.from_state``.)"""
    parts = _check_run_checkpoint(path, meta, arrays)
    return RunCheckpoint(
        path=path, step=parts["step"], time=parts["time_ps"], platform=meta["platform"],
        labels=tuple(parts["labels"]), cvs=tuple(parts["cvs"]), n_particles=parts["n_particles"],
        bias_state=parts["bias_meta"], bias_arrays=parts["bias_arrays"], engine=dict(meta["engine"]),
        folded_values=parts["folded"], md_checkpoint=arrays["md.checkpoint"].tobytes(),
        positions=arrays["md.positions"], velocities=arrays["md.velocities"], box=arrays["md.box"],
        openmm_version=meta["openmm_version"], written=meta["written"], version=meta["version"],
        stop=parts["stop"])


def _fail(path, text):
    raise CheckpointError(f"run checkpoint {path!r}: {text}")


def _int(path, where, value, low, high):
    if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
        _fail(path, f"{where} must be an integer in {low}..{high}, got {str(value)[:60]!r}")
    return value


def _str(path, where, value, limit=200):
    if not isinstance(value, str) or len(value) > limit:
        _fail(path, f"{where} must be a text of at most {limit} characters")
    return value


def _check_run_checkpoint(path: str, meta: dict, arrays: dict) -> dict:
    """Check a run checkpoint's metadata and arrays; return its parts.

    Returns
    -------
    dict with ``bias_meta``, ``bias_arrays`` (the bias state, for ``GridBias.from_state``), ``cvs``,
    ``labels``, ``n_particles``, ``step``, ``time_ps``, ``platform``, ``folded`` (grid shape), ``n_folded``.

    Raises
    ------
    CheckpointError
        Naming the path and the first field that is missing, of the wrong type or out of range.
    """
    missing = _FIELDS - set(meta)
    if missing:
        _fail(path, f"the checkpoint is incomplete (missing {sorted(missing)})")
    version = _int(path, "version", meta["version"], 1, 2**31)
    if version > CHECKPOINT_VERSION:
        raise CheckpointError(f"{path}: written by a newer gridbias (format {version}); upgrade")
    bias_meta = meta["bias"]
    if not isinstance(bias_meta, dict):
        _fail(path, "bias must be a bias state (a dict)")
    cvs, labels = meta["cvs"], meta["labels"]
    if not isinstance(cvs, list) or not all(isinstance(c, dict) for c in cvs) or not 1 <= len(cvs) <= 3:
        _fail(path, "cvs must be a list of 1 to 3 CV descriptions")
    if not isinstance(labels, list) or len(labels) != len(cvs):
        _fail(path, f"labels must be a list of {len(cvs)} names")
    for label in labels:
        _str(path, "labels", label, 200)
    n_particles = _int(path, "n_particles", meta["n_particles"], 1, _MAX_PARTICLES)
    step = _int(path, "step", meta["step"], 0, _MAX_STEP)
    time_ps = meta["time_ps"]
    if isinstance(time_ps, bool) or not isinstance(time_ps, (int, float)) or not math.isfinite(time_ps):
        _fail(path, f"time_ps must be a finite number, got {str(time_ps)[:60]!r}")
    for key in ("platform", "openmm_version", "written"):
        _str(path, key, meta[key])
    engine = meta["engine"]
    if not isinstance(engine, dict) or set(engine) != _ENGINE_FIELDS:
        _fail(path, f"engine must hold {sorted(_ENGINE_FIELDS)}")
    _str(path, "engine route", engine["route"])
    _str(path, "engine name", engine["name"])
    pending = _int(path, "engine pending_hills", engine["pending_hills"], 0, 2**31)
    n_folded = _int(path, "engine n_folded", engine["n_folded"], 0, 2**53)
    _int(path, "engine n_pending", engine["n_pending"], 0, pending)
    expected = {"bias.coefficients", "bias.hill_centers", "bias.hill_heights", "bias.hill_times",
                "engine.folded_values", *_MD_ARRAYS}
    if set(arrays) != expected:
        _fail(path, f"arrays are {sorted(arrays)[:10]}, expected {sorted(expected)}")
    folded = arrays["engine.folded_values"]
    if folded.dtype != np.float64 or not np.isfinite(folded).all():
        _fail(path, "engine.folded_values must be finite float64 values")
    blob = arrays["md.checkpoint"]
    if blob.dtype != np.uint8 or blob.ndim != 1:
        _fail(path, "md.checkpoint must be a flat uint8 array")
    for name, shape in (("md.positions", (n_particles, 3)), ("md.velocities", (n_particles, 3)),
                        ("md.box", (3, 3))):
        a = arrays[name]
        if a.dtype != np.float64 or a.shape != shape or not np.isfinite(a).all():
            _fail(path, f"{name} must be finite float64 of shape {shape} (the metadata's {n_particles} "
                        f"particles), got {a.shape} {a.dtype}")
    stop = meta.get("stop")
    if stop is not None:
        if not (isinstance(stop, dict) and {"rule", "reason", "step"} <= set(stop)):
            _fail(path, "stop must be a recorded stop decision (rule, reason, step)")
        _str(path, "stop rule", stop["rule"])
        _str(path, "stop reason", stop["reason"], 2000)
        _int(path, "stop step", stop["step"], 0, _MAX_STEP)
        when = stop.get("time")
        if when is not None and (isinstance(when, bool) or not isinstance(when, (int, float))
                                 or not math.isfinite(when)):
            _fail(path, f"stop time must be a finite number or null, got {str(when)[:60]!r}")
    bias_arrays = {k[len("bias."):]: v for k, v in arrays.items() if k.startswith("bias.")}
    return {"bias_meta": bias_meta, "bias_arrays": bias_arrays, "cvs": cvs, "labels": labels,
            "n_particles": n_particles, "step": step, "time_ps": float(time_ps), "platform": meta["platform"],
            "folded": folded, "n_folded": n_folded, "stop": stop}


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
        One phrase per CV ("dihedral of atom indices 4-6-8-14 (0-based; PDB serials 5-7-9-15)"), or ""
        when unknown.
    time : float, ps
        Simulated time at the checkpoint (run checkpoints), else the time of the last hill (NaN if none).
    step : int or None
        MD step at the checkpoint (run checkpoints only).
    source : str
        "OpenMM run checkpoint" or "bias checkpoint".
    platform : str or None
    run_id : str or None
        The run's identity as the file records it (None: a file from before run ids).
    cvs : tuple of dict or None
        The CV definitions the file records (None: a bias checkpoint, which records none).
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
    run_id: str | None = None
    cvs: tuple | None = None


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
        # OpenMM counts atoms from 0, PDB files from 1: say which is which, so nobody mixes them up
        atoms = "-".join(str(a) for a in spec["atoms"])
        serials = "-".join(str(int(a) + 1) for a in spec["atoms"])
        return unit, f"{kind.replace('_', ' ')} of atom indices {atoms} (0-based; PDB serials {serials})"
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
                   checkpoint.time, checkpoint.step, "OpenMM run checkpoint", checkpoint.platform,
                   checkpoint.bias_state.get("run_id"), checkpoint.cvs)
    if meta.get("kind") == _BIAS_KIND:
        bias = _bias_from_state(path, meta, arrays)
        times = np.asarray(bias.history.times)
        t_last = float(times[-1]) if times.size else math.nan
        d = bias.ndim
        return Run(path, bias, tuple(f"cv{i}" for i in range(d)), ("",) * d, ("",) * d, t_last, None,
                   "bias checkpoint", None, meta.get("run_id"))
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
        Missing, damaged or foreign file, metadata gridbias wrote that is impossible (a run id, temperature,
        grid or CVs of the wrong type or range), or fewer than ``min_records`` complete records.
    """
    from ._identity import check_log_metadata
    from .cvlog import read_cvlog

    log = read_cvlog(path)
    try:
        check_log_metadata(log.metadata)
    except ValueError as exc:
        raise CVLogError(f"CV log {os.fspath(path)!r} has impossible metadata: {exc}") from exc
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


def check_pair(run: Run, log) -> None:
    """Refuse a CV log that is not ``run``'s own (CVLogError naming both files and what differs).

    Compared where both files record them: the run id, the CVs, the grid, the temperature and the bias
    factor. Files from before run ids are still compared on everything else.
    """
    from ._identity import check_log_metadata, describe_mismatch

    try:
        check_log_metadata(log.metadata)
    except ValueError as exc:
        raise CVLogError(f"CV log {log.path!r} has impossible metadata: {exc}") from exc
    b = run.bias
    facts = {"run_id": run.run_id, "cvs": None if run.cvs is None else list(run.cvs), "grid": b.grid,
             "temperature": b.temperature, "bias_factor": b.bias_factor}
    problem = describe_mismatch(run.path, facts, log.path, log.metadata)
    if problem:
        raise CVLogError(problem)


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
        The log belongs to another run (``gridbias._identity.describe_mismatch``: run id, CVs, grid,
        temperature or bias factor differ, naming both files), a missing column, a non-finite value, times
        that go back, or fewer than 4 frames left.
    """
    check_pair(run, log)
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
