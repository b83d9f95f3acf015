"""Input checks for the analysis modules; each error names the argument, the value and what is allowed."""

from __future__ import annotations

import math

import numpy as np

from ..errors import ParameterError

__all__ = ["frozen", "preview", "as_series", "as_points", "as_fraction", "as_positive", "as_count",
           "same_length"]


def frozen(arr) -> np.ndarray:
    """A read-only copy of ``arr`` (result objects hand out arrays nobody can change by accident)."""
    out = np.array(arr)
    out.setflags(write=False)
    return out


def preview(arr) -> str:
    """The first few entries of an array as text, for error messages."""
    flat = np.asarray(arr).ravel()
    text = np.array2string(flat[:5], precision=4, separator=", ")
    return text[:-1] + ", ...]" if flat.size > 5 else text


def as_series(name, value, *, allow_nonfinite=False) -> np.ndarray:
    """A 1-D float64 array (n,); NaN/inf refused unless ``allow_nonfinite``."""
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be a 1-D array of numbers, got {type(value).__name__}") from None
    if arr.ndim != 1:
        raise ParameterError(f"{name} must be a 1-D array (n,), got shape {arr.shape}")
    if not allow_nonfinite and not np.isfinite(arr).all():
        bad = int(np.flatnonzero(~np.isfinite(arr))[0])
        raise ParameterError(f"{name} must be finite, got {arr[bad]} at index {bad}")
    return np.ascontiguousarray(arr)


def as_points(name, value, ndim=None) -> np.ndarray:
    """A finite (n, d) float64 array; a 1-D array is read as (n, 1) when ``ndim`` is None or 1."""
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise ParameterError(
            f"{name} must be an (n, d) array of numbers, got {type(value).__name__}") from None
    if arr.ndim == 1 and ndim in (None, 1):
        arr = arr[:, None]
    if arr.ndim != 2 or (ndim is not None and arr.shape[1] != ndim):
        wanted = "(n, d)" if ndim is None else f"(n, {ndim})"
        raise ParameterError(f"{name} must have shape {wanted}, got shape {arr.shape}")
    if not np.isfinite(arr).all():
        bad = np.argwhere(~np.isfinite(arr))[0]
        raise ParameterError(f"{name} must be finite, got {arr[tuple(bad)]} at index {tuple(bad.tolist())}")
    return np.ascontiguousarray(arr)


def as_fraction(name, value, *, allow_zero=True, allow_one=False) -> float:
    """A float in [0, 1) (bounds configurable)."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be a number in [0, 1), got {value!r}") from None
    low_ok = x >= 0 if allow_zero else x > 0
    high_ok = x <= 1 if allow_one else x < 1
    if not (math.isfinite(x) and low_ok and high_ok):
        interval = ("[" if allow_zero else "(") + "0, 1" + ("]" if allow_one else ")")
        raise ParameterError(f"{name} must be in {interval}, got {value!r}")
    return x


def as_positive(name, value, unit="") -> float:
    """A finite float > 0."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be a number > 0 {unit}, got {value!r}".rstrip()) from None
    if not (math.isfinite(x) and x > 0):
        raise ParameterError(f"{name} must be finite and > 0 {unit}, got {value!r}".rstrip())
    return x


def as_count(name, value, minimum) -> int:
    """An int >= minimum (bools refused)."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise ParameterError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if int(value) < minimum:
        raise ParameterError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def same_length(**arrays) -> int:
    """The common first-axis length of the given arrays; ParameterError naming them if they differ."""
    lengths = {name: len(arr) for name, arr in arrays.items()}
    if len(set(lengths.values())) > 1:
        listed = ", ".join(f"{name} has {n}" for name, n in lengths.items())
        raise ParameterError(f"per-frame arrays must have one entry per frame: {listed}")
    return next(iter(lengths.values()))
