"""The one validator of a bias state (``GridBias.to_state``, a ``gridbias.bias`` file or the bias inside a
run checkpoint): a file whose checksum is right but whose content is impossible never loads."""

from __future__ import annotations

import math
import warnings

import numpy as np

from ._consistency import table_problem
from ._identity import check_run_id
from .errors import CheckpointError
from .grid import Grid
from .walls import Wall

__all__ = ["checked_bias", "STATE_KIND", "STATE_VERSION"]

STATE_KIND = "gridbias.bias"
STATE_VERSION = 1
_FIELDS = {"kind", "version", "grid", "sigma", "height", "temperature", "bias_factor", "cutoff", "walls",
           "n_hills", "n_outside", "run_id", "walkers"}
_ARRAYS = {"coefficients", "hill_centers", "hill_heights", "hill_times"}
_MAX_COUNT = 2**53  # integers in a state file beyond this cannot be counts of anything held in memory
_MAX_PERIODS = 2**20  # periods from the grid within which a periodic hill centre keeps ~1e-10 precision


def _is(value, kind) -> bool:
    """JSON type check: bool is not a number, and an int is a float."""
    if isinstance(value, bool):
        return kind is bool
    if kind is float:
        return isinstance(value, (int, float))
    return isinstance(value, kind)


def _show(value) -> str:
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _field(meta, key, kind, low=None):
    """A number from a state's metadata, checked for type, finiteness and lower bound."""
    value = meta[key]
    if not _is(value, kind) or (kind is float and not math.isfinite(value)):
        raise CheckpointError(f"bias state {key} must be {'an integer' if kind is int else 'a number'}, got "
                              f"{_show(value)}")
    if (low is not None and value < low) or (kind is int and value > _MAX_COUNT):
        raise CheckpointError(f"bias state {key} = {_show(value)} is out of range")
    return value


def checked_bias(cls, meta, arrays):
    """A ``cls`` (GridBias or a subclass) holding the state ``(meta, arrays)``, or CheckpointError.

    Checks, in this order, so that nothing is allocated before the file is known to hold it: every
    metadata field's type, range and finiteness; every array's name, dtype and shape against the metadata
    and the grid; then the contents (finite table, finite centres inside the grid, finite heights >= 0,
    finite or NaN times) and the table against the replay of its own hills (gridbias._consistency).
    """
    if not isinstance(meta, dict) or not isinstance(arrays, dict):
        raise CheckpointError("bias state must be a (meta dict, arrays dict) pair")
    if meta.get("kind") != STATE_KIND:
        raise CheckpointError(f"not a gridbias bias state (kind {_show(meta.get('kind'))})")
    version = _field(meta, "version", int, low=1)
    if version > STATE_VERSION:
        raise CheckpointError(f"bias state version {version} is newer than this gridbias reads "
                              f"({STATE_VERSION}); upgrade gridbias")
    unknown = set(meta) - _FIELDS
    if unknown:
        raise CheckpointError(f"bias state has unknown fields {sorted(unknown)[:5]}")
    spec = meta["grid"]
    if not isinstance(spec, dict) or set(spec) != {"lower", "upper", "bins", "periodic"}:
        raise CheckpointError("bias state grid must hold exactly lower, upper, bins and periodic")
    for key, kind in (("lower", float), ("upper", float), ("bins", int), ("periodic", bool)):
        if not isinstance(spec[key], list) or not all(_is(x, kind) for x in spec[key]):
            raise CheckpointError(f"bias state grid {key} must be a list of {kind.__name__}")
    grid = Grid.from_dict(spec)  # GridError (memory budget included) before anything is allocated
    d = grid.ndim
    sigma = meta["sigma"]
    if not isinstance(sigma, list) or len(sigma) != d or not all(_is(x, float) for x in sigma):
        raise CheckpointError(f"bias state sigma must be a list of {d} numbers")
    for key in ("height", "temperature", "cutoff"):
        _field(meta, key, float)
    if meta["bias_factor"] is not None:
        _field(meta, "bias_factor", float)
    walls = meta["walls"]
    if not isinstance(walls, list) or len(walls) > 64:
        raise CheckpointError("bias state walls must be a list of at most 64 walls")
    for w in walls:
        if not isinstance(w, dict) or set(w) != {"cv", "bound", "k", "side", "power"} or not _is(w["cv"], int):
            raise CheckpointError(f"bias state wall {_show(w)} is not a wall description")
    n = _field(meta, "n_hills", int, low=0)
    n_outside = _field(meta, "n_outside", int, low=0)
    run_id = check_run_id(meta["run_id"], "bias state run_id") if "run_id" in meta else None
    if "walkers" in meta:  # written by a SharedBias: walker count and exchanges
        walkers = meta["walkers"]
        if not isinstance(walkers, dict) or set(walkers) != {"count", "exchanges"}:
            raise CheckpointError("bias state walkers must hold exactly count and exchanges")
        _field(walkers, "count", int, low=1)
        _field(walkers, "exchanges", int, low=0)
    if set(arrays) != _ARRAYS:
        raise CheckpointError(f"bias state arrays are {sorted(arrays)[:6]}, expected {sorted(_ARRAYS)}")
    shape3 = tuple(grid.shape) + (1,) * (3 - d)
    expected = {"coefficients": (1 << d,) + shape3, "hill_centers": (n, d), "hill_heights": (n,),
                "hill_times": (n,)}
    for name, shape in expected.items():
        a = arrays[name]
        if not isinstance(a, np.ndarray) or a.dtype != np.float64 or a.shape != shape:
            got = (a.shape, a.dtype) if isinstance(a, np.ndarray) else type(a).__name__
            raise CheckpointError(f"bias state array {name} is {got}; n_hills={n} and the grid need "
                                  f"{shape} float64")
    coef, centers = arrays["coefficients"], arrays["hill_centers"]
    heights, times = arrays["hill_heights"], arrays["hill_times"]
    if not np.isfinite(coef).all():
        raise CheckpointError("coefficients hold NaN or infinite values")
    if not np.isfinite(centers).all() or not grid.contains(centers).all():
        raise CheckpointError("hill centres must be finite and inside the grid")
    # On a periodic axis any value wraps, but far out the wrapped position keeps no precision (a centre
    # 1e56 away lands anywhere): centres must lie within _MAX_PERIODS periods of the grid.
    periodic = np.asarray(grid.periodic, dtype=bool)
    if periodic.any() and n:
        offset = np.abs(centers[:, periodic] - np.asarray(grid.lower)[periodic])
        with np.errstate(over="ignore"):  # a span near the float limit: no centre is then too far
            limit = _MAX_PERIODS * np.asarray(grid.span)[periodic]
        if (offset > limit).any():
            raise CheckpointError(f"hill centres on periodic axes must lie within {_MAX_PERIODS} periods of "
                                  "the grid (further out their wrapped position is lost to rounding)")
    if not (np.isfinite(heights).all() and (heights >= 0).all()):
        raise CheckpointError("hill heights must be finite and >= 0 kJ/mol")
    if np.isinf(times).any():
        raise CheckpointError("hill times must be finite or NaN (ps)")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = cls(grid, sigma, meta["height"], meta["temperature"], meta["bias_factor"],
                   [Wall.from_dict(w) for w in walls], cutoff=meta["cutoff"])
    bias._history.extend(centers, heights, times)
    bias._n_outside = n_outside
    problem = table_problem(bias, coef)
    if problem:
        raise CheckpointError(f"bias state contradicts itself: {problem}")
    bias._coef[...] = coef
    if run_id is not None:
        bias._run_id = run_id
    return bias
