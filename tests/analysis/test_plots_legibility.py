"""Plots read as a reader of a paper expects: paired colours, keys for empty bins, no axis stretched by a
bin of a few frames, reference lines clear of the legend."""

import numpy as np
import pytest

import gridbias as gb
from gridbias import analysis, plots
from gridbias.errors import ParameterError

pytest.importorskip("matplotlib")

KT = gb.KB * 300.0


def profile(free_energy, counts, ndim=1):
    fes = np.asarray(free_energy, dtype=float)
    edges = tuple(np.linspace(0.0, 1.0, n + 1) for n in fes.shape)
    zeros = np.zeros_like(fes)
    return analysis.Profile(edges, fes, zeros + 0.2, zeros, np.asarray(counts), np.ones(fes.shape, bool), KT,
                            100.0, ("q",) * fes.ndim)


def differences(source, values):
    times = np.linspace(0.0, 100.0, len(values))
    diffs = np.column_stack([np.zeros(len(values)), values])
    return analysis.BasinDifferences(("A", "B"), 0, times, diffs, None, None, KT, source)


def test_both_estimates_of_one_difference_share_a_colour():
    figure = plots.plot_basin_differences([differences("bias", [3.0, 2.0, 2.5]),
                                           differences("reweighted frames", [2.8, 2.1, 2.4])])
    pairs = [c for c in figure.axes[0].containers if c.get_label().startswith("B − A")]
    assert len(pairs) == 2
    lines = [c.lines[0] for c in pairs]
    assert lines[0].get_color() == lines[1].get_color()
    assert lines[0].get_linestyle() != lines[1].get_linestyle()


def test_initial_height_line_is_inside_the_axes_and_clear_of_the_legend():
    times = np.linspace(0.0, 100.0, 200)
    heights = 1.2 * np.exp(-times / 30.0)
    figure = plots.plot_hill_heights(times, heights, initial_height=1.2, max_height_fraction=0.05)
    ax = figure.axes[0]
    assert ax.get_ylim()[1] > 1.2 * 1.5  # room above the reference line
    assert ax.get_legend()._loc == 3  # lower left: the corner decaying heights leave free


def test_a_bin_of_few_frames_does_not_stretch_the_energy_axis():
    fes = np.array([0.0, 2.0, 4.0, 3.0, 70.0])
    figure = plots.plot_free_energy(profile(fes, [500, 400, 300, 200, 2]))
    ax = figure.axes[0]
    assert ax.get_ylim()[1] < 10.0
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "bins with fewer than 20 frames" in labels


def test_min_frames_is_checked():
    with pytest.raises(ParameterError, match="min_frames"):
        plots.plot_free_energy(profile([0.0, 1.0], [30, 30]), min_frames=-1)


def test_bins_without_frames_have_a_key():
    fes = np.array([[0.0, 1.0, np.nan], [2.0, np.nan, 3.0], [1.0, 2.0, 4.0]])
    figure = plots.plot_free_energy(profile(fes, np.where(np.isnan(fes), 0, 50)))
    labels = [t.get_text() for t in figure.axes[0].get_legend().get_texts()]
    assert labels == ["no frames"]


def test_a_periodic_surface_curve_is_closed_and_drawn_whole():
    grid = gb.Grid([-np.pi], [np.pi], [36], periodic=[True])
    fes = 5.0 * (1 - np.cos(grid.axes[0]))
    figure = plots.plot_free_energy(analysis.Surface(grid, fes, 10.0, 5, KT, 6.0))
    line = figure.axes[0].get_lines()[0]
    assert line.get_xdata().size == 37 and np.isfinite(line.get_ydata()).all()
