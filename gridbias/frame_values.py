"""Per-frame values computed after a run, read from a file and lined up with the run's CV log by step.

Two file kinds (what ``gridbias reweight --values`` reads):

- ``.npy`` (read without pickle): shape ``(n,)``, one value per CV-log record in log order (``n`` must equal
  the number of records); or shape ``(n, 2)``, rows of ``(step, value)`` for any subset of the records.
- ``.csv``: one header line naming the columns, one of them ``step``, exactly one other (a unit may follow
  a name in brackets, as gridbias writes them: ``rg[nm]``); comma-separated numbers below.

Every step must be the step of a CV-log record, every value finite: a file that does not fit the log is
refused with the row and the reason named.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np

from .analysis.frames import record_index
from .errors import ParameterError

__all__ = ["FrameValues", "read_frame_values", "FORMATS"]

#: File extensions read by :func:`read_frame_values`.
FORMATS = (".npy", ".csv")


@dataclass(frozen=True, eq=False)
class FrameValues:
    """Values of one quantity at some of a CV log's records.

    Attributes
    ----------
    name, unit : str
        From the CSV header (``name[unit]``), or the file's stem and "" for ``.npy``.
    steps : (n,) int64
        The step of each value.
    values : (n,) float
    records : (n,) int
        The row of the CV-log record at each step.
    """

    name: str
    unit: str
    steps: np.ndarray
    values: np.ndarray
    records: np.ndarray


def _split_header(cell: str) -> tuple[str, str]:
    cell = cell.strip()
    if cell.endswith("]") and "[" in cell:
        name, unit = cell[:-1].split("[", 1)
        return name.strip(), unit.strip()
    return cell, ""


def _read_csv(path) -> tuple[str, str, np.ndarray, np.ndarray]:
    try:
        with open(path, encoding="utf-8") as f:
            header = f.readline()
        data = np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2, dtype=float)
    except (OSError, UnicodeDecodeError) as exc:
        raise ParameterError(f"could not read values file {path!r}: {exc}") from exc
    except ValueError as exc:
        raise ParameterError(f"values file {path!r} is not a comma-separated table of numbers under one "
                             f"header line ({exc})") from exc
    cells = [_split_header(c) for c in header.strip().split(",")]
    names = [n for n, _ in cells]
    if "step" not in names:
        raise ParameterError(f"values file {path!r} has no 'step' column (its header: {header.strip()!r}); "
                             "a CSV file gives the step of every value")
    others = [k for k, n in enumerate(names) if n != "step"]
    if len(others) != 1:
        raise ParameterError(f"values file {path!r} must hold 'step' and exactly one other column; its "
                             f"header names {names}")
    if data.size and data.shape[1] != len(names):
        raise ParameterError(f"values file {path!r}: the header names {len(names)} columns but the rows hold "
                             f"{data.shape[1]}")
    k = others[0]
    data = data.reshape(-1, len(names))
    return cells[k][0], cells[k][1], data[:, names.index("step")], data[:, k]


def _read_npy(path, record_steps) -> tuple[str, str, np.ndarray, np.ndarray]:
    try:
        array = np.load(path, allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise ParameterError(f"could not read values file {path!r} as a NumPy .npy array (no pickle): "
                             f"{exc}") from exc
    if not isinstance(array, np.ndarray) or array.dtype.kind not in "iuf":
        raise ParameterError(f"values file {path!r} must hold a numeric array, got dtype "
                             f"{getattr(array, 'dtype', type(array).__name__)}")
    name = os.path.splitext(os.path.basename(path))[0]
    if array.ndim == 1:
        if array.shape[0] != record_steps.shape[0]:
            raise ParameterError(
                f"values file {path!r} holds {array.shape[0]} values but the CV log has "
                f"{record_steps.shape[0]} records: a .npy file of shape (n,) gives one value per record, in log "
                "order; for a subset give (step, value) rows, shape (n, 2)")
        return name, "", np.asarray(record_steps, dtype=float), array.astype(float)
    if array.ndim == 2 and array.shape[1] == 2:
        return name, "", array[:, 0].astype(float), array[:, 1].astype(float)
    raise ParameterError(f"values file {path!r} holds an array of shape {array.shape}; expected (n,) (one "
                         "value per record) or (n, 2) (step, value rows)")


def read_frame_values(path, record_steps) -> FrameValues:
    """Read per-frame values of one quantity and line them up with a CV log's records by step.

    Parameters
    ----------
    path : str or os.PathLike
        A ``.npy`` or ``.csv`` file (see the module docstring).
    record_steps : (r,) int-valued float
        The log's ``step`` column.

    Returns
    -------
    FrameValues

    Raises
    ------
    ParameterError
        Unreadable or malformed file, non-finite values (naming the row), repeated steps, or steps without
        a CV-log record (saying how many, where, and why that may be).
    """
    path = os.fspath(path)
    ext = os.path.splitext(path)[1].lower()
    if ext not in FORMATS:
        raise ParameterError(f"values file {path!r}: the format is chosen by the extension, one of "
                             f"{', '.join(FORMATS)}; got {ext or 'none'!r}")
    if not os.path.isfile(path):
        raise ParameterError(f"values file {path!r} does not exist")
    records_steps = np.asarray(record_steps, dtype=float)
    name, unit, steps, values = _read_csv(path) if ext == ".csv" else _read_npy(path, records_steps)
    if values.size == 0:
        raise ParameterError(f"values file {path!r} holds no values")
    for what, column in (("step", steps), ("value", values)):
        bad = np.flatnonzero(~np.isfinite(column))
        if bad.size:
            raise ParameterError(f"values file {path!r}: row {int(bad[0])} has the {what} {column[bad[0]]}; "
                                 f"every {what} must be finite ({bad.size} rows are not)")
    if (np.diff(steps) <= 0).any():
        bad = int(np.flatnonzero(np.diff(steps) <= 0)[0]) + 1
        raise ParameterError(f"values file {path!r}: the steps must increase, but row {bad} has step "
                             f"{steps[bad]:g} after {steps[bad - 1]:g}")
    try:
        records = record_index(records_steps, steps)
    except ParameterError as exc:
        raise ParameterError(f"values file {path!r} does not fit the CV log: {exc}") from None
    return FrameValues(name or "values", unit, steps.astype(np.int64), values, records)
