"""Plots: files are written, the data drawn is the data given, units and labels as asked, headless."""

import subprocess
import sys

import numpy as np
import pytest

import gridbias as gb
from gridbias import analysis, plots
from gridbias.errors import ParameterError

pytest.importorskip("matplotlib")

KT = gb.KB * 300.0
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def torus_surface():
    grid = gb.Grid([-np.pi, -np.pi], [np.pi, np.pi], [36, 36], periodic=[True, True])
    x, y = np.meshgrid(*grid.axes, indexing="ij")
    fes = 12.0 * (2.0 - np.cos(x + 1.2) - np.cos(y - 1.0)) + 3.0 * np.sin(2 * x)
    return analysis.Surface(grid, fes - fes.min(), np.nan, 0, KT, None)


def line_surface():
    grid = gb.Grid([-2.0], [2.0], [80])
    fes = 10.0 * (grid.axes[0] ** 2 - 1.0) ** 2
    return analysis.Surface(grid, fes, 5.0, 10, KT, 6.0)


def check_files(figure, tmp_path, name):
    png = plots.save_figure(figure, tmp_path / f"{name}.png")
    svg = plots.save_figure(figure, tmp_path / f"{name}.svg")
    assert open(png, "rb").read(8) == PNG_MAGIC
    assert b"<svg" in open(svg, "rb").read(2000)


def test_1d_surface_curve_is_the_free_energy_in_the_unit_asked(tmp_path):
    surface = line_surface()
    figure = plots.plot_free_energy(surface)
    ax = figure.axes[0]
    np.testing.assert_allclose(ax.lines[0].get_xdata(), surface.grid.axes[0])
    np.testing.assert_allclose(ax.lines[0].get_ydata(), surface.free_energy)
    assert ax.get_ylabel() == "free energy (kJ/mol)"
    check_files(figure, tmp_path, "line")
    in_kt = plots.plot_free_energy(surface, energy_unit="kBT").axes[0]
    np.testing.assert_allclose(in_kt.lines[0].get_ydata(), surface.free_energy / KT)


def test_profile_gets_an_error_band_of_one_standard_error(tmp_path, rng):
    x = rng.normal(size=20_000)
    profile = analysis.free_energy_along(analysis.FrameWeights.from_log_weights(np.zeros(x.size), KT), x,
                                         np.linspace(-2, 2, 21), names=["distance (nm)"])
    figure = plots.plot_free_energy(profile)
    ax = figure.axes[0]
    np.testing.assert_allclose(ax.lines[0].get_ydata(), profile.free_energy)
    band = ax.collections[0].get_paths()[0].vertices
    assert band[:, 1].max() == pytest.approx(np.nanmax(profile.free_energy + profile.error))
    assert ax.get_xlabel() == "distance (nm)"
    check_files(figure, tmp_path, "profile")
    as_angle = plots.plot_free_energy(profile, names=["theta"], angular=[True], angle_unit="deg").axes[0]
    np.testing.assert_allclose(as_angle.lines[0].get_xdata(), np.degrees(profile.centers[0]))
    assert as_angle.get_xlabel() == "theta (deg)"


def test_2d_surface_in_degrees_with_basins_and_both_energy_units(tmp_path):
    surface = torus_surface()
    basins = analysis.find_basins(surface.grid, surface.free_energy, KT)
    figure = plots.plot_free_energy(surface, basins=basins, names=["phi", "psi"], angle_unit="deg")
    ax = figure.axes[0]
    assert ax.get_xlabel() == "phi (deg)" and ax.get_ylabel() == "psi (deg)"
    assert ax.get_xlim() == pytest.approx((-180.0, 180.0))  # the periodic axis spans the whole period
    marker = [line for line in ax.lines if line.get_marker() == "o"][0]
    np.testing.assert_allclose([marker.get_xdata()[0], marker.get_ydata()[0]], np.degrees(basins.markers[0]))
    assert [t.get_text() for t in ax.texts] == list(basins.names)
    colour_bar_labels = [a.get_ylabel() for a in figure.axes[1:]] + [
        c.get_ylabel() for a in figure.axes[1:] for c in a.child_axes]
    assert "free energy (kJ/mol)" in colour_bar_labels
    assert any("k_\\mathrm{B}T" in label for label in colour_bar_labels)
    filled = ax.collections[0]
    assert filled.get_cmap().name == "cividis"
    np.testing.assert_allclose(np.diff(filled.levels), KT)  # one level per kBT
    check_files(figure, tmp_path, "surface")


def test_2d_surface_in_radians_with_boxes(tmp_path):
    surface = torus_surface()
    boxes = analysis.basins_from_boxes(surface.grid, {"wrap": ([2.5, -1.0], [-2.5, 1.0])})
    figure = plots.plot_free_energy(surface, basins=boxes, energy_unit="kBT")
    ax = figure.axes[0]
    assert ax.get_xlabel() == "CV 1 (rad)"
    assert len(ax.patches) == 2  # the box wraps through the periodic edge: drawn in two pieces
    check_files(figure, tmp_path, "boxes")


def test_basin_differences_with_error_bars(tmp_path):
    times = np.linspace(0, 100, 6)
    values = np.column_stack([np.zeros(6), np.linspace(3, 5, 6)])
    errors = np.column_stack([np.zeros(6), np.full(6, 0.4)])
    reweighted = analysis.BasinDifferences(("A", "B"), 0, times, values, errors, np.ones((6, 2), bool), KT,
                                           "reweighted frames")
    from_bias = analysis.BasinDifferences(("A", "B"), 0, times, values + 0.5, None, None, KT, "bias")
    figure = plots.plot_basin_differences([from_bias, reweighted], window_fraction=0.25)
    ax = figure.axes[0]
    data = [c for c in ax.containers]
    np.testing.assert_allclose(data[0].lines[0].get_ydata(), values[:, 1] + 0.5)
    np.testing.assert_allclose(data[1].lines[0].get_ydata(), values[:, 1])
    segments = data[1].lines[2][0].get_segments()
    np.testing.assert_allclose([s[1, 1] - s[0, 1] for s in segments], 0.8)  # +/- 0.4 kJ/mol
    check_files(figure, tmp_path, "differences")


def test_cv_timeseries_one_panel_per_cv(tmp_path, rng):
    times = np.arange(200) * 0.5
    cvs = np.column_stack([rng.uniform(-np.pi, np.pi, 200), rng.normal(size=200)])
    figure = plots.plot_cv_timeseries(times, cvs, names=["phi", "d (nm)"], angular=[True, False],
                                      angle_unit="deg")
    assert len(figure.axes) == 2
    np.testing.assert_allclose(figure.axes[0].lines[0].get_ydata(), np.degrees(cvs[:, 0]))
    np.testing.assert_allclose(figure.axes[1].lines[0].get_ydata(), cvs[:, 1])
    assert figure.axes[0].get_ylabel() == "phi (deg)"
    check_files(figure, tmp_path, "cvs")


def test_hill_heights_on_a_log_axis_with_the_threshold(tmp_path):
    times = np.arange(1, 101, dtype=float)
    heights = 2.0 / times
    figure = plots.plot_hill_heights(times, heights, initial_height=2.0, max_height_fraction=0.05)
    ax = figure.axes[0]
    assert ax.get_yscale() == "log"
    np.testing.assert_allclose(ax.lines[0].get_ydata(), heights)
    assert ax.lines[2].get_ydata()[0] == pytest.approx(0.1)
    check_files(figure, tmp_path, "heights")


def test_blocking_curve_marks_the_plateau(tmp_path, rng):
    curve = analysis.blocking_curve(rng.normal(size=4096))
    figure = plots.plot_blocking_curve(curve, unit="nm")
    ax = figure.axes[0]
    usable = curve.n_blocks >= curve.min_blocks
    np.testing.assert_allclose(ax.containers[0].lines[0].get_ydata(), curve.standard_errors[usable])
    assert any(line.get_ydata()[0] == pytest.approx(curve.standard_error) for line in ax.lines)
    check_files(figure, tmp_path, "blocking")
    short = analysis.blocking_curve(np.cumsum(rng.normal(size=64)))
    assert "no plateau" in plots.plot_blocking_curve(short).axes[0].texts[0].get_text()


def test_drawing_into_a_given_axes_returns_its_figure():
    figure, axes = plots.new_figure(1, 2)
    assert plots.plot_free_energy(line_surface(), ax=axes[1]) is figure


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: plots.plot_free_energy(line_surface(), angle_unit="grad"),
         "angle_unit must be 'rad' or 'deg'"),
        (lambda: plots.plot_free_energy(line_surface(), energy_unit="kcal"),
         "energy_unit must be 'kJ/mol' or 'kBT'"),
        (lambda: plots.plot_free_energy(np.zeros(3)), "result must be a Surface"),
        (lambda: plots.plot_cv_timeseries(np.arange(3.0), np.zeros(4)),
         r"cvs must have shape \(n,\) or \(n, d\)"),
    ],
)
def test_bad_options_are_refused(call, match):
    with pytest.raises(ParameterError, match=match):
        call()


def test_save_figure_refuses_other_formats_and_missing_folders(tmp_path):
    figure = plots.plot_free_energy(line_surface())
    with pytest.raises(ParameterError, match=r"path must end in .png or .svg, got '.*fes.jpg'"):
        plots.save_figure(figure, tmp_path / "fes.jpg")
    with pytest.raises(ParameterError, match="folder .* does not exist"):
        plots.save_figure(figure, tmp_path / "missing" / "fes.png")


def test_missing_matplotlib_names_the_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)
    with pytest.raises(ImportError, match=r"pip install 'gridbias\[plot\]'"):
        plots.new_figure()


def test_importing_is_free_and_plotting_never_touches_pyplot():
    code = (
        "import sys, numpy as np, gridbias.plots as p, gridbias as gb\n"
        "assert 'matplotlib' not in sys.modules\n"
        "from gridbias import analysis\n"
        "g = gb.Grid([0.0], [1.0], [10])\n"
        "p.plot_free_energy(analysis.Surface(g, np.zeros(11), 0.0, 0, 2.5, None))\n"
        "assert 'matplotlib.pyplot' not in sys.modules\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, env={"MPLBACKEND": "", "PATH": ""})
