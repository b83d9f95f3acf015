"""Marks drawn on free-energy plots (basins, saddle points, minimum free-energy paths) and the palette they
share with ``gridbias.plots`` (private; the public figures are in gridbias.plots)."""

from __future__ import annotations

import numpy as np

_INK = "#1d2b36"  # lines and text: a dark slate
_ACCENT = "#b5532b"  # thresholds and plateau marks: burnt orange (dark enough to read in greyscale)
_SERIES = ("#1d2b36", "#b5532b", "#4f7f6f", "#7a5c9c", "#8a8a3c")


def _closed_periodic(grid, axes, values):
    """Repeat the first node after the last on periodic axes, so a plot spans the whole period."""
    coords = []
    for axis, periodic in enumerate(grid.periodic):
        coordinate = np.asarray(axes[axis], dtype=float)
        if periodic:
            coordinate = np.append(coordinate, grid.upper[axis])
            values = np.concatenate([values, np.take(values, [0], axis=axis)], axis=axis)
        coords.append(coordinate)
    return coords, values


def _box_rectangles(grid, low, high, scales):
    """Axis-aligned rectangles (x0, y0, w, h) drawing a 2-D box, split where it wraps a periodic axis."""
    pieces = []
    for axis in range(2):
        lo, hi = float(low[axis]), float(high[axis])
        if grid.periodic[axis]:
            period = grid.span[axis]
            if hi - lo >= period:
                spans = [(grid.lower[axis], grid.upper[axis])]
            else:
                start = grid.lower[axis] + (lo - grid.lower[axis]) % period
                width = (hi - lo) % period
                end = start + width
                spans = [(start, min(end, grid.upper[axis]))]
                if end > grid.upper[axis]:
                    spans.append((grid.lower[axis], end - period))
        else:
            spans = [(lo, hi)]
        pieces.append([(a * scales[axis], b * scales[axis]) for a, b in spans])
    return [(x0, y0, x1 - x0, y1 - y0) for x0, x1 in pieces[0] for y0, y1 in pieces[1]]


def _mark_basins(ax, basins, scales, ndim, curve=None, shown=None):
    from matplotlib.patches import Rectangle

    for k, name in enumerate(basins.names):
        point = basins.markers[k] * np.asarray(scales)
        if ndim == 1:
            y = float(np.interp(basins.markers[k][0], curve[0], curve[1])) if curve is not None else 0.0
            ax.annotate(name, (point[0], y), xytext=(0, 10), textcoords="offset points", ha="center",
                        color=_ACCENT, fontweight="bold")
            continue
        ax.plot(point[0], point[1], marker="o", markersize=5, markerfacecolor="white", markeredgecolor=_INK)
        label_box = dict(boxstyle="round,pad=0.2", facecolor="white", edgecolor="none", alpha=0.8)
        ax.annotate(name, (point[0], point[1]), xytext=(6, 6), textcoords="offset points", color=_INK,
                    fontweight="bold", bbox=label_box)
        if basins.boxes is not None:
            for x0, y0, w, h in _box_rectangles(basins.grid, basins.boxes[0][k], basins.boxes[1][k], scales):
                ax.add_patch(Rectangle((x0, y0), w, h, fill=False, edgecolor="white", linewidth=1.2,
                                       linestyle=(0, (4, 2))))
    if ndim == 2 and basins.boxes is None and basins.n_basins > 1:
        # catchment borders, drawn only where the surface is shown (not across the flat top above it)
        coords, labels = _closed_periodic(basins.grid, basins.grid.axes, basins.labels.astype(float))
        if shown is not None:
            labels = np.where(shown, labels, np.nan)
        x, y = (c * s for c, s in zip(coords, scales, strict=True))
        ax.contour(x, y, np.ma.masked_invalid(labels.T), levels=np.arange(basins.n_basins - 1) + 0.5,
                   colors="white", linewidths=0.9, linestyles="dotted")


def _path_segments(grid, path):
    """Split a node path where it jumps across a periodic boundary: list of (m, d) pieces."""
    step = np.abs(np.diff(path, axis=0))
    jump = np.zeros(step.shape[0], dtype=bool)
    for axis in range(grid.ndim):
        if grid.periodic[axis]:
            jump |= step[:, axis] > 0.5 * grid.span[axis]
    return np.split(path, np.flatnonzero(jump) + 1)


def _mark_crossings(ax, crossings, grid, scales, ndim, curve=None):
    for c in crossings:
        if ndim == 1:
            x = c.saddle[0]
            y = float(np.interp(x, curve[0], curve[1]))
            ax.plot(x * scales[0], y, marker="x", markersize=8, markeredgewidth=2, color=_ACCENT)
            continue
        for piece in _path_segments(grid, np.asarray(c.path)):
            ax.plot(piece[:, 0] * scales[0], piece[:, 1] * scales[1], color="white", linewidth=2.6, alpha=0.9)
            ax.plot(piece[:, 0] * scales[0], piece[:, 1] * scales[1], color=_ACCENT, linewidth=1.4)
        ax.plot(c.saddle[0] * scales[0], c.saddle[1] * scales[1], marker="X", markersize=9,
                markerfacecolor=_ACCENT, markeredgecolor="white", markeredgewidth=1.0, linestyle="none")
