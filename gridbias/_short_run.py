"""Measure one CV of a short unbiased run: fluctuation, range visited, autocorrelation time, basins seen."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .analysis.autocorrelation import MIN_RUN_LENGTH, autocorrelation_time
from .analysis.blocking import blocking_curve
from .errors import ParameterError

__all__ = ["CVStatistics", "measure_cv", "basin_labels", "longest_stretch"]

_HIST_BINS = 64               # bins of the histogram that finds the basins of the short run
_MIN_BASIN_FRACTION = 0.02    # a mode holding fewer frames is not counted as a basin
_DIP = math.exp(-1.0)         # modes separated by a density dip below this fraction (1 kBT) are two basins


@dataclass(frozen=True)
class CVStatistics:
    """What the short run shows about one CV.

    Attributes
    ----------
    name, unit : str
    period : float or None
        Period in CV units (periodic axis ``[-period/2, period/2]``), None when not periodic.
    mean, fluctuation : float
        Mean and standard deviation in the starting basin, CV units (circular about the mean if periodic).
    lowest, highest : float
        The range visited over the whole run (periodic: the arc about the mean, may cross the boundary).
    autocorrelation_time, autocorrelation_error : float
        Integrated autocorrelation time in the starting basin and its error, ps (error NaN: a lower bound).
    decayed : bool
        The autocorrelation decayed within the run (self-consistent window, >= 50 tau, blocking plateau).
    n_basins : int
        Basins the short run visited (density modes separated by a dip of at least 1 kBT).
    measured_on : str
        Which frames the fluctuation and the autocorrelation time come from.
    """

    name: str
    unit: str
    period: float | None
    mean: float
    fluctuation: float
    lowest: float
    highest: float
    autocorrelation_time: float
    autocorrelation_error: float
    decayed: bool
    n_basins: int
    measured_on: str

    def line(self) -> str:
        """The statistics as one line of text."""
        tau = (f"{self.autocorrelation_time:.3g} +/- {self.autocorrelation_error:.2g} ps" if self.decayed
               else f">= {self.autocorrelation_time:.3g} ps (did not decay)")
        kind = f"periodic {self.period:.4g}" if self.period is not None else "not periodic"
        return (f"  {self.name} [{self.unit}, {kind}]: mean {self.mean:.4g}, "
                f"fluctuation {self.fluctuation:.3g}, "
                f"visited {self.lowest:.4g} .. {self.highest:.4g}, autocorrelation time {tau}, "
                f"{self.n_basins} basin{'s' if self.n_basins != 1 else ''} seen ({self.measured_on})")


def basin_labels(x, period):
    """(per-frame basin label, number of basins) from the modes of the smoothed histogram of ``x``."""
    circular = period is not None
    if circular:
        edges = np.linspace(-period / 2, period / 2, _HIST_BINS + 1)
        values = _wrap(x, period)
    else:
        edges = np.linspace(x.min(), x.max(), _HIST_BINS + 1)
        values = x
    counts = np.histogram(values, edges)[0].astype(float)
    kernel = np.exp(-0.5 * (np.arange(-4, 5) / 1.5) ** 2)
    pad = (counts[-4:], counts[:4]) if circular else (np.zeros(4), np.zeros(4))
    p = np.convolve(np.concatenate([pad[0], counts, pad[1]]), kernel / kernel.sum(), mode="valid")
    m = p.size
    nxt, prv = np.roll(p, -1), np.roll(p, 1)
    if not circular:
        nxt[-1], prv[0] = -1.0, -1.0
    peaks = [i for i in range(m) if p[i] > prv[i] and p[i] >= nxt[i]]
    while len(peaks) > 1:
        cuts = _cuts(p, peaks, circular)
        # Two modes are one basin when the density between them stays above _DIP of the lower peak
        # (on a circle with two modes, the higher of the two dips decides).
        tops = [min(p[peaks[k]], p[peaks[(k + 1) % len(peaks)]]) for k in range(len(peaks))]
        shallow = [k for k in range(len(peaks) - (0 if circular else 1))
                   if _path_dip(p, cuts, k, circular) > _DIP * tops[k]]
        if shallow:
            k = shallow[0]
            a, b = peaks[k], peaks[(k + 1) % len(peaks)]
            peaks.remove(a if p[a] < p[b] else b)
            continue
        mass = np.bincount(_label_bins(m, cuts, circular), weights=p, minlength=len(peaks))
        small = int(np.argmin(mass))
        if mass[small] >= _MIN_BASIN_FRACTION * p.sum():
            break
        peaks.pop(small)
    if len(peaks) == 1:
        return np.zeros(x.size, dtype=np.int64), 1
    bin_of = np.clip(np.searchsorted(edges, values, side="right") - 1, 0, _HIST_BINS - 1)
    return _label_bins(m, _cuts(p, peaks, circular), circular)[bin_of], len(peaks)


def _cuts(p, peaks, circular):
    """Bin of lowest density between each peak and the next (on a circle also between the last and first)."""
    m = p.size
    cuts = []
    for k in range(len(peaks) if circular else len(peaks) - 1):
        a, b = peaks[k], peaks[(k + 1) % len(peaks)]
        idx = np.arange(a + 1, b + (m if b <= a else 0)) % m
        cuts.append(int(idx[np.argmin(p[idx])]))
    return cuts


def _path_dip(p, cuts, k, circular):
    """Density at the dip a path must cross between peak k and peak k + 1."""
    if circular and len(cuts) == 2:
        return max(p[cuts[0]], p[cuts[1]])
    return p[cuts[k]]


def _label_bins(m, cuts, circular):
    """Basin of each histogram bin (0..k-1, in the order of the peaks) given the cuts between them."""
    j = np.arange(m)
    if not circular:
        return np.searchsorted(np.array(cuts), j, side="left")
    shift = cuts[-1] + 1
    rotated = (np.array(cuts[:-1], dtype=np.int64) - shift) % m
    return np.searchsorted(rotated, (j - shift) % m, side="left")


def longest_stretch(mask):
    """(start, stop) of the longest run of True in mask."""
    padded = np.concatenate([[False], mask, [False]]).astype(np.int8)
    change = np.flatnonzero(np.diff(padded))
    starts, stops = change[0::2], change[1::2]
    k = int(np.argmax(stops - starts))
    return int(starts[k]), int(stops[k])


def _wrap(x, period):
    return x - period * np.round(x / period)


def measure_cv(x, *, name, unit, period, interval, warnings):
    """Statistics of one CV series ``x`` (n,); appends warnings (str) to ``warnings``."""
    n = x.size
    if period is not None:
        angle = 2 * np.pi * x / period
        centre = period / (2 * np.pi) * math.atan2(np.sin(angle).mean(), np.cos(angle).mean())
        spread = _wrap(x - centre, period)
    else:
        centre, spread = 0.0, x
    if not np.ptp(spread) > 1e-12 * max(1.0, float(np.abs(x).max())):
        raise ParameterError(f"CV {name!r} is constant ({x[0]!r} in all {n} frames): it cannot be "
                             "measured; check the CV definition (atoms, constraints) or the column chosen")
    labels, n_basins = basin_labels(x, period)
    on = "all frames"
    start, stop = 0, n
    if n_basins > 1:
        start, stop = longest_stretch(labels == labels[0])
        on = f"starting basin, frames {start}..{stop - 1}"
        warnings.append(
            f"{name}: the short run hopped between {n_basins} basins, so its barrier is at most a few kBT at "
            f"this temperature; fluctuation and autocorrelation time are measured inside the starting basin "
            f"(its longest stay, frames {start}..{stop - 1}). Check that this CV needs a bias at all, and that "
            "the grid covers every basin")
    part = spread[start:stop]
    if period is not None:
        local = part.mean()
        part_centre = centre + local
        fluctuation = float(np.std(part))
        mean = float(_wrap(part_centre, period))
        lowest, highest = float(centre + spread.min()), float(centre + spread.max())
    else:
        mean, fluctuation = float(part.mean()), float(np.std(part))
        lowest, highest = float(x.min()), float(x.max())
    if part.size < 16 or not np.ptp(part) > 0:
        raise ParameterError(f"CV {name!r}: the longest stretch inside the starting basin has {part.size} "
                             "frames; too few to measure; run longer")
    tau = autocorrelation_time(part, interval=interval)
    decayed = tau.decayed
    if decayed and part.size >= 128 and not blocking_curve(part).plateau_found:
        decayed = False
    if not decayed:
        warnings.append(
            f"{name}: the autocorrelation did not decay within the run (autocorrelation time at least "
            f"{tau.time:.3g} ps; the run spans {tau.run_length:.1f} times that); the stride is based on a "
            f"lower bound. Run at least {MIN_RUN_LENGTH:g} autocorrelation times long, or check "
            "whether the CV drifts (an unequilibrated start, a slow process)")
    elif tau.time < interval:
        warnings.append(
            f"{name}: the CV decorrelates within one sampling interval ({interval:g} ps): its "
            f"autocorrelation time ({tau.time:.3g} ps) is not resolved; the stride uses the interval "
            "instead (sample more often for a shorter stride)")
    return CVStatistics(name, unit, period, mean, fluctuation, lowest, highest, tau.time,
                        tau.error if decayed else float("nan"), decayed, n_basins, on)
