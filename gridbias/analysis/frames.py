"""Line up frames saved apart from the CV log (trajectory frames, per-frame values) with its records.

A frame written at step ``s`` (by a trajectory reporter, or any script) carries the weight of the CV-log
record of step ``s``: the record holds the bias that frame felt. A frame whose step has no record (another
interval, another run, a step after the log ends or before it starts) has no weight and is refused,
never guessed.
"""

from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from ._checks import as_series, frozen, preview
from .reweighting import FrameWeights, kish_effective_sample_size

__all__ = ["record_index", "weights_at_steps", "weights_at_times", "DEFAULT_TIME_TOLERANCE"]

#: Largest difference (ps) between a frame's time and a record's time that still counts as the same moment.
#: Times written by different programs differ by rounding (float32 in trajectory files: ~1e-7 relative).
DEFAULT_TIME_TOLERANCE = 1e-4


def _as_steps(name, value) -> np.ndarray:
    steps = as_series(name, value)
    if not np.array_equal(steps, np.round(steps)):
        bad = int(np.flatnonzero(steps != np.round(steps))[0])
        raise ParameterError(f"{name} must hold whole step numbers, got {steps[bad]} at index {bad}")
    return steps.astype(np.int64)


def _describe_misses(missing, frame_keys, record_keys, unit) -> str:
    first, last = record_keys.min(), record_keys.max()
    intervals = np.unique(np.diff(np.sort(record_keys)))
    spacing = f"one every {intervals[0]:g}" if intervals.size == 1 else "at irregular intervals"
    after = int((frame_keys[missing] > last).sum())
    before = int((frame_keys[missing] < first).sum())
    why = []
    if after:
        why.append(f"{after} after the log's last record (the frames run past the log: a trajectory longer "
                   "than its log, frames from after a restart cut, or the log of another run)")
    if before:
        why.append(f"{before} before its first record")
    between = missing.size - after - before
    if between:
        why.append(f"{between} between records (the frame interval is not a multiple of the log interval, "
                   "or the frames come from another run)")
    return (f"{missing.size} of {frame_keys.size} frames have no CV-log record at their {unit} (first: "
            f"frame {missing[0]} at {unit} {frame_keys[missing[0]]:g}); the log has {record_keys.size} "
            f"records from {unit} {first:g} to {last:g}, {spacing}: " + "; ".join(why))


def record_index(record_steps, frame_steps) -> np.ndarray:
    """The CV-log record of each frame, matched by MD step.

    Parameters
    ----------
    record_steps : (r,) int-valued float
        The ``step`` column of the CV log (unique).
    frame_steps : (n,) int-valued float
        The step at which each frame was written (e.g. from ``gridbias.trajectories.frame_steps``).

    Returns
    -------
    (n,) int
        Row of the log record for each frame.

    Raises
    ------
    ParameterError
        A frame whose step has no record (saying how many, where, and the likely cause), repeated steps
        in the log, or non-integer / non-finite steps.
    """
    records = _as_steps("record_steps", record_steps)
    frames = _as_steps("frame_steps", frame_steps)
    return _match(records, frames, "step")


def _match(records, frames, unit, tolerance=0.0) -> np.ndarray:
    if records.size == 0:
        raise ParameterError("the CV log holds no records: there is nothing to line frames up with")
    order = np.argsort(records, kind="stable")
    ordered = records[order]
    repeated = np.flatnonzero(np.diff(ordered) <= tolerance)
    if repeated.size:
        raise ParameterError(f"the CV log holds two records at {unit} {ordered[repeated[0]]:g}: one run's "
                             "log (cut back at restarts) has each step once")
    pos = np.clip(np.searchsorted(ordered, frames), 1, ordered.size - 1) if ordered.size > 1 \
        else np.zeros(frames.size, dtype=np.int64)
    if ordered.size > 1:
        left_closer = np.abs(frames - ordered[pos - 1]) <= np.abs(ordered[pos] - frames)
        pos = np.where(left_closer, pos - 1, pos)
    missing = np.flatnonzero(~(np.abs(ordered[pos] - frames) <= tolerance))
    if missing.size:
        raise ParameterError(_describe_misses(missing, frames, records, unit))
    return order[pos]


def _subset(weights: FrameWeights, rows: np.ndarray) -> FrameWeights:
    lw = weights.log_weights[rows]
    return FrameWeights(frozen(lw), frozen(weights.offsets[rows]), weights.kT, weights.method,
                        weights.burn_in_time, kish_effective_sample_size(lw))


def weights_at_steps(weights: FrameWeights, record_steps, frame_steps) -> FrameWeights:
    """The reweighting weights of frames saved at given steps, taken from the CV-log records of those steps.

    Parameters
    ----------
    weights : FrameWeights
        Weights of the log's records (from ``offset_weights`` or ``final_bias_weights``), one per record.
    record_steps : (r,) int-valued float
        The log's ``step`` column, in the same order as ``weights``.
    frame_steps : (n,) int-valued float
        The step of each frame, in the frames' (time) order.

    Returns
    -------
    FrameWeights
        One weight per frame (same method, kT and burn-in; effective sample size of the frames).

    Raises
    ------
    ParameterError
        Frames without a record at their step (see :func:`record_index`), or ``weights`` and
        ``record_steps`` of different lengths.

    Examples
    --------
    >>> import numpy as np
    >>> from gridbias.analysis import FrameWeights
    >>> w = FrameWeights.from_log_weights(np.log([1.0, 2.0, 3.0, 4.0]), kT=2.494)
    >>> weights_at_steps(w, [500, 1000, 1500, 2000], [1000, 2000]).normalized()
    array([0.33333333, 0.66666667])
    """
    records = _as_steps("record_steps", record_steps)
    _check_weights(weights, records)
    return _subset(weights, _match(records, _as_steps("frame_steps", frame_steps), "step"))


def weights_at_times(weights: FrameWeights, record_times, frame_times, *,
                     tolerance: float = DEFAULT_TIME_TOLERANCE) -> FrameWeights:
    """As :func:`weights_at_steps`, matching frames to records by simulated time (ps) within ``tolerance``.

    Use it for frames that carry times but no steps. ``tolerance`` (ps, default 1e-4) absorbs the rounding
    of times written in single precision; it must stay well below the log interval.
    """
    records = as_series("record_times", record_times)
    _check_weights(weights, records)
    frames = as_series("frame_times", frame_times)
    tol = float(tolerance)
    if not (np.isfinite(tol) and tol >= 0):
        raise ParameterError(f"tolerance must be a finite number of ps >= 0, got {tolerance!r}")
    gaps = np.diff(np.sort(records))
    if gaps.size and tol >= 0.5 * gaps.min():
        raise ParameterError(f"tolerance ({tol:g} ps) must be below half the smallest interval between "
                             f"records ({gaps.min():g} ps), or a frame could match two records")
    return _subset(weights, _match(records, frames, "time (ps)", tol))


def _check_weights(weights, records):
    if not isinstance(weights, FrameWeights):
        raise ParameterError(f"weights must be FrameWeights (from offset_weights or final_bias_weights), "
                             f"got {type(weights).__name__}")
    if records.size != weights.n_frames:
        raise ParameterError(f"weights has {weights.n_frames} entries but the log has {records.size} records "
                             f"({preview(records)}): give the weights of every record, in log order")
