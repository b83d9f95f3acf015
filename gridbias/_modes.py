"""Basins of a short unbiased run: the modes of the smoothed histogram of one CV, and in-basin stretches."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["basin_labels", "longest_stretch"]

_HIST_BINS = 64               # bins of the histogram that finds the basins of the short run
_MIN_BASIN_FRACTION = 0.02    # a mode holding fewer frames is not counted as a basin
_DIP = math.exp(-1.0)         # modes separated by a density dip below this fraction (1 kBT) are two basins


def _wrap(x, period):
    return x - period * np.round(x / period)


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
