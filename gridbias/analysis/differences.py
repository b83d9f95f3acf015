"""Free-energy differences between basins as a function of simulated time, with errors."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._checks import as_count, as_points, as_series, frozen, same_length
from .basins import Basins, basin_free_energies
from .blocking import DEFAULT_MIN_BLOCKS, blocking_curve
from .reweighting import FrameWeights
from .surfaces import _counts_from, _replay, evenly_spaced_times

__all__ = ["BasinDifferences", "basin_differences_from_bias", "basin_differences_from_frames"]


@dataclass(frozen=True, eq=False)
class BasinDifferences:
    """Basin free energies relative to a reference basin at several moments of the run.

    Attributes
    ----------
    names : tuple of k str
        Basin names.
    reference : int
        Index of the reference basin (its column is 0).
    times : (m,) float, ps
    differences : (m, k) float, kJ/mol
        ``F_B(t) - F_ref(t)``; NaN where a basin had no weight yet.
    errors : (m, k) float, kJ/mol, or None
        One standard error from block analysis (reweighted frames); None for estimates from the bias,
        which carry no error bar of their own.
    plateau_found : (m, k) bool, or None
        False where the blocking curve had no plateau: the error is then only a lower bound.
    kT : float, kJ/mol
    source : str
        ``"bias"`` or ``"reweighted frames"``.
    """

    names: tuple
    reference: int
    times: np.ndarray
    differences: np.ndarray
    errors: np.ndarray | None
    plateau_found: np.ndarray | None
    kT: float
    source: str

    def table(self) -> str:
        """The differences at the last time as text, one line per basin (kJ/mol and kBT)."""
        ref = self.names[self.reference]
        lines = [f"free energy relative to basin {ref} at t = {self.times[-1]:.6g} ps ({self.source}):"]
        for b, name in enumerate(self.names):
            if b == self.reference:
                continue
            value = self.differences[-1, b]
            text = f"  {name} - {ref}: {value:8.3f} kJ/mol ({value / self.kT:7.3f} kBT)"
            if self.errors is not None:
                err = self.errors[-1, b]
                text += f" +/- {err:.3f} kJ/mol"
                if not self.plateau_found[-1, b]:
                    text += " (no blocking plateau: error is a lower bound)"
            lines.append(text)
        return "\n".join(lines)


def _check_reference(basins, reference) -> int:
    if not isinstance(basins, Basins):
        raise ParameterError(f"basins must be Basins (from basins_from_boxes or find_basins), got "
                             f"{type(basins).__name__}")
    if isinstance(reference, str):
        if reference not in basins.names:
            raise ParameterError(f"reference {reference!r} is not a basin name; names are {basins.names}")
        return basins.names.index(reference)
    reference = as_count("reference", reference, 0)
    if reference >= basins.n_basins:
        raise ParameterError(
            f"reference must be a basin index 0..{basins.n_basins - 1} or a name, got {reference}")
    return reference


def basin_differences_from_bias(bias, basins: Basins, *, times=None, n_hills=None, n_points: int = 20,
                                reference=0, progress: Callable[[int, int], None] | None = None
                                ) -> BasinDifferences:
    """Basin free-energy differences from the bias estimate at past times.

    Parameters
    ----------
    bias : GridBias
    basins : Basins
        On the bias grid.
    times : (m,) float, ps, keyword-only, optional
        Moments (the hill history must carry times). Or give
    n_hills : (m,) int, keyword-only, optional
        Hill counts. With neither: ``n_points`` moments evenly spaced over the run, in time when every
        hill carries a time, otherwise in hill count (``times`` are then NaN).
    n_points : int, keyword-only, default 20
    reference : int or str, keyword-only, default 0
        Reference basin (index or name).
    progress : callable(done, total), keyword-only, optional

    Returns
    -------
    BasinDifferences
        ``source="bias"``, ``errors=None``.

    Notes
    -----
    At each time the surface is ``-V`` (standard) or ``-(gamma/(gamma-1)) V`` (well-tempered) and
    ``F_B = -kT ln sum_{s in B} exp(-F(s)/kT)``. The hills are replayed once, forward.
    """
    ref = _check_reference(basins, reference)
    if basins.grid != bias.grid:
        raise ParameterError(
            f"basins were defined on another grid: {bias.grid.describe_difference(basins.grid)}")
    if times is None and n_hills is None:
        if bias.n_hills and np.isfinite(bias.history.times).all():
            times = evenly_spaced_times(bias, n_points)
        else:
            n_points = as_count("n_points", n_points, 1)
            n_hills = np.unique(np.rint(np.linspace(0, bias.n_hills, n_points + 1)[1:]).astype(np.int64))
    counts, stamps = _counts_from(bias, times, n_hills)
    factor = 1.0 if bias.bias_factor is None else bias.bias_factor / (bias.bias_factor - 1.0)
    out = np.empty((counts.size, basins.n_basins))
    for done, (i, partial) in enumerate(_replay(bias, counts), start=1):
        f_b = basin_free_energies(basins, -factor * partial.values, bias.kT)
        out[i] = f_b - f_b[ref]
        if progress is not None:
            progress(done, counts.size)
    return BasinDifferences(basins.names, ref, frozen(stamps), frozen(out), None, None, bias.kT, "bias")


def basin_differences_from_frames(weights: FrameWeights, frame_times, frame_cvs, basins: Basins, *,
                                  times=None, n_points: int = 20, reference=0,
                                  min_blocks: int = DEFAULT_MIN_BLOCKS) -> BasinDifferences:
    """Basin free-energy differences from reweighted frames, using the frames up to each time.

    Parameters
    ----------
    weights : FrameWeights
        One entry per frame.
    frame_times : (n,) float, ps
        Non-decreasing (one trajectory in time order).
    frame_cvs : (n, d) float, CV units
    basins : Basins
    times : (m,) float, ps, keyword-only, optional
        Moments; default ``n_points`` evenly spaced over the frames' times.
    n_points : int, keyword-only, default 20
    reference : int or str, keyword-only, default 0
    min_blocks : int, keyword-only, default 30

    Returns
    -------
    BasinDifferences
        ``source="reweighted frames"``, with block-analysis errors.

    Notes
    -----
    ``p_B = sum_{i in B} w_i / sum_i w_i`` over the frames up to t, ``F_B - F_ref = -kT ln(p_B / p_ref)``.
    The error is the block-analysis standard error (Flyvbjerg & Petersen, J. Chem. Phys. 91, 461, 1989) of
    the mean of the linearised series ``kT w_i ([i in ref]/p_ref - [i in B]/p_B) / mean(w)``, i.e. first-order
    propagation of the blocked numerators and denominator through the ratio and the log (common practice,
    no source).
    """
    if not isinstance(weights, FrameWeights):
        raise ParameterError(f"weights must be FrameWeights, got {type(weights).__name__}")
    ref = _check_reference(basins, reference)
    t = as_series("frame_times", frame_times)
    cvs = as_points("frame_cvs", frame_cvs, basins.grid.ndim)
    same_length(weights=weights.log_weights, frame_times=t, frame_cvs=cvs)
    if t.size == 0:
        raise ParameterError("frame_times is empty: there are no frames")
    if (np.diff(t) < 0).any():
        bad = int(np.flatnonzero(np.diff(t) < 0)[0])
        raise ParameterError(f"frame_times must be non-decreasing (one trajectory in time order), but frame "
                             f"{bad + 1} ({t[bad + 1]} ps) comes after frame {bad} ({t[bad]} ps)")
    if times is None:
        times = np.linspace(t[0], t[-1], as_count("n_points", n_points, 1))
    stamps = as_series("times", np.atleast_1d(times))
    basin_n = basins.assign(cvs)
    lw = weights.log_weights
    used = weights.used
    k = basins.n_basins
    diffs = np.full((stamps.size, k), np.nan)
    errors = np.full((stamps.size, k), np.nan)
    plateau = np.zeros((stamps.size, k), dtype=bool)
    for m, stop in enumerate(np.searchsorted(t, stamps, side="right")):
        take = np.flatnonzero(used[:stop])
        if take.size == 0:
            continue
        start = int(take[0])
        w = np.where(used[start:stop], np.exp(lw[start:stop] - lw[take].max()), 0.0)
        member = basin_n[start:stop]
        p = np.bincount(member[member >= 0], weights=w[member >= 0], minlength=k) / w.sum()
        if p[ref] == 0:
            continue
        for b in range(k):
            if b == ref:
                diffs[m, b], errors[m, b], plateau[m, b] = 0.0, 0.0, True
            elif p[b] > 0:
                diffs[m, b] = -weights.kT * np.log(p[b] / p[ref])
                if w.size >= 4:
                    series = w * ((member == ref) / p[ref] - (member == b) / p[b]) / w.mean()
                    curve = blocking_curve(series, min_blocks=min_blocks)
                    errors[m, b] = weights.kT * curve.standard_error
                    plateau[m, b] = curve.plateau_found
    return BasinDifferences(basins.names, ref, frozen(stamps), frozen(diffs), frozen(errors), frozen(plateau),
                            weights.kT, "reweighted frames")
