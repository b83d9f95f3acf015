"""Read the CV time series of a run from a CV log (.gbl), a CSV file or a NumPy .npy array."""

from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["Series", "read_series"]

_NOT_CVS = ("step", "time", "bias")


@dataclass(frozen=True)
class Series:
    """CV columns of a run and what the file says about them.

    Attributes
    ----------
    path : str
    data : (n, d) float, CV units
    names, units : tuple of str
    periods : tuple of float or None
    interval : float or None, ps (None without a time column)
    timestep : float or None, ps (from a CV log's step and time columns)
    temperature : float or None, K (recorded in a CV log)
    """

    path: str
    data: np.ndarray
    names: tuple
    units: tuple
    periods: tuple
    interval: float | None
    timestep: float | None
    temperature: float | None


def _even_interval(path, times):
    steps = np.diff(times)
    if times.size < 2 or not (np.all(steps > 0) and np.allclose(steps, steps[0], rtol=1e-6, atol=1e-9)):
        raise ParameterError(f"{path!r}: the time column is not evenly spaced and increasing; the "
                             "autocorrelation time needs equally spaced frames")
    return float(times[-1] - times[0]) / (times.size - 1)


def _pick(path, available, columns):
    chosen = [c for c in available if c not in _NOT_CVS] if columns is None else list(columns)
    for c in chosen:
        if c not in available:
            raise ParameterError(f"{path!r} has no column {c!r}; its columns: {', '.join(available)}")
    if not chosen:
        raise ParameterError(f"{path!r} has no CV column (only {', '.join(available)})")
    return chosen


def _from_log(path, columns):
    from .cvlog import read_cvlog

    log = read_cvlog(path)
    chosen = _pick(path, list(log.columns), columns)
    interval = timestep = None
    if "time" in log.columns and log.n_records >= 2:
        times = log.column("time")
        interval = _even_interval(path, times)
        if "step" in log.columns and log.column("step")[-1] > log.column("step")[0]:
            step = log.column("step")
            timestep = float(times[-1] - times[0]) / float(step[-1] - step[0])
    described = dict(zip([c for c in log.columns if c not in _NOT_CVS], log.metadata.get("cvs") or [],
                         strict=False))
    periods = tuple(2 * math.pi if isinstance(described.get(c), dict)
                    and described[c].get("kind") == "dihedral" else None for c in chosen)
    if "bias" in log.columns and log.n_records and np.any(log.column("bias") != 0.0):
        raise ParameterError(f"{path!r} is the log of a biased run (its bias column is not zero): the advice "
                             "needs an unbiased run, whose fluctuations and correlation times are the system's own")
    temperature = log.metadata.get("temperature")
    data = np.column_stack([log.column(c) for c in chosen]) if log.n_records else np.empty((0, len(chosen)))
    return Series(path, data, tuple(chosen), tuple(log.unit(c) for c in chosen), periods, interval, timestep,
                  None if temperature is None else float(temperature))


def _from_csv(path, columns):
    try:
        with open(path, encoding="utf-8") as f:
            header = f.readline()
        table = np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2)
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise ParameterError(f"cannot read {path!r} as CSV (one header line of names, then numbers): "
                             f"{exc}") from None
    fields = [h.strip() for h in header.strip().split(",")]
    names, units = [], []
    for h in fields:
        name, _, unit = h.partition("[")
        names.append(name.strip())
        units.append(unit.rstrip("]").strip() or "nm")
    if table.size and table.shape[1] != len(names):
        raise ParameterError(f"{path!r}: the header names {len(names)} columns but the rows hold "
                             f"{table.shape[1]}")
    chosen = _pick(path, names, columns)
    data = np.column_stack([table[:, names.index(c)] for c in chosen]) if table.size else np.empty((0, 1))
    out_units = []
    for j, c in enumerate(chosen):
        unit = units[names.index(c)]
        if unit == "deg":
            data[:, j] = np.radians(data[:, j])
            unit = "rad"
        out_units.append(unit)
    interval = _even_interval(path, table[:, names.index("time")]) if "time" in names and table.size else None
    return Series(path, data, tuple(chosen), tuple(out_units), (None,) * len(chosen), interval, None, None)


def _from_npy(path, columns):
    try:
        table = np.load(path, allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise ParameterError(f"cannot read {path!r} as a NumPy .npy array of numbers: {exc}") from None
    if table.ndim == 1:
        table = table[:, None]
    if table.ndim != 2 or not np.issubdtype(table.dtype, np.number):
        raise ParameterError(f"{path!r} must hold an (n, d) array of numbers, "
                             f"got {table.dtype} {table.shape}")
    names = [f"cv{i}" for i in range(table.shape[1])]
    chosen = _pick(path, names, columns)
    data = np.column_stack([table[:, names.index(c)] for c in chosen]).astype(float)
    return Series(path, data, tuple(chosen), ("nm",) * len(chosen), (None,) * len(chosen), None, None, None)


def read_series(path, *, columns=None) -> Series:
    """The CV columns of ``path`` (.gbl, .csv or .npy, chosen by the extension).

    Raises
    ------
    ParameterError
        The file is missing, unreadable or of an unknown kind, or a column is unknown.
    CVLogError
        A damaged or foreign CV log.
    """
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise ParameterError(f"no such file: {path!r}")
    ext = os.path.splitext(path)[1].lower()
    readers = {".gbl": _from_log, ".csv": _from_csv, ".npy": _from_npy}
    if ext not in readers:
        raise ParameterError(f"{path!r}: the file type is taken from the extension, which must be .gbl "
                             "(CV log), .csv or .npy")
    return readers[ext](path, columns)
