"""What a user sees from the command line and its files says what it shows: units, moments, limits."""

import math

import numpy as np
import pytest

import gridbias as gb
from gridbias import analysis, exports
from gridbias.cli import main


@pytest.fixture(scope="module")
def angle_run(tmp_path_factory):
    """A bias on a non-periodic angle (rad) with hills at known times, saved as a bias checkpoint."""
    grid = gb.Grid([0.5], [3.0], [100])
    bias = gb.GridBias(grid, sigma=[0.1], height=1.0, temperature=300.0, bias_factor=5.0)
    rng = np.random.default_rng(11)
    for k in range(200):
        bias.deposit([1.0 + 1.2 * rng.random()], time=0.5 * (k + 1))
    path = tmp_path_factory.mktemp("screens") / "angle.gbz"
    bias.save(str(path))
    return path, bias


def test_export_refuses_a_time_after_the_end_of_the_run(capsys, angle_run, tmp_path):
    path, _ = angle_run
    code = main(["export", str(path), str(tmp_path / "late.npz"), "--time", "5000"])
    _, err = capsys.readouterr()
    assert code == 2
    assert "--time 5000 ps is after the end of the run (100 ps" in err
    assert not (tmp_path / "late.npz").exists()


def test_exported_figure_shows_angles_in_the_tables_unit_and_names_its_moment(angle_run):
    pytest.importorskip("matplotlib")
    path, bias = angle_run
    surface = analysis.surface_at(bias, time=40.0)
    figure = exports.surface_figure(surface, names=["theta"], units=["rad"], angle_unit="deg")
    ax = figure.axes[0]
    assert ax.get_title() == "free-energy surface at t = 40 ps, 80 hills"
    assert "deg" in ax.get_xlabel() or "°" in ax.get_xlabel()
    line = ax.get_lines()[0]
    np.testing.assert_allclose(line.get_xdata()[[0, -1]], np.degrees([0.5, 3.0]))
    table = exports.surface_bytes(surface, "csv", names=["theta"], units=["rad"], angle_unit="deg")
    assert table.decode().splitlines()[0] == "theta[deg],free_energy[kJ/mol]"
    assert math.isclose(float(table.decode().splitlines()[1].split(",")[0]), math.degrees(0.5))


def test_export_help_lists_exactly_the_npz_arrays_written(capsys, angle_run, tmp_path):
    path, _ = angle_run
    assert main(["export", str(path), str(tmp_path / "fes.npz")]) == 0
    with np.load(tmp_path / "fes.npz") as data:
        written = set(data.files)
    assert written == {"axis0"} | set(exports.SURFACE_NPZ_KEYS)
    capsys.readouterr()
    assert main(["export", "--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    for key in exports.SURFACE_NPZ_KEYS:
        assert key in text
    assert "temperature," not in text


def test_burn_in_without_the_final_method_is_refused(capsys, tmp_path):
    code = main(["reweight", "missing.gbz", "missing.gbl", "--along", "cv0", "--burn-in", "0.2"])
    _, err = capsys.readouterr()
    assert code == 2
    assert "--burn-in applies to --method final only" in err


def test_a_wall_given_a_quantity_says_how_the_adapter_takes_one():
    unit = pytest.importorskip("openmm.unit")
    with pytest.raises(gb.ParameterError, match=r"give the wall as a dict.*make_bias"):
        gb.Wall(cv=1, bound=85 * unit.degree, k=100.0, side="above")


@pytest.mark.parametrize("command", ["inspect", "demo"])
def test_min_depth_errors_name_the_option(capsys, command, angle_run):
    path, _ = angle_run
    argv = [command, str(path)] if command == "inspect" else [command]
    code = main([*argv, "--min-depth", "0.5"])
    err = capsys.readouterr().err
    assert code == 2 and "argument --min-depth" in err and "min_depth_kT" not in err


def test_demo_status_line_measures_speed_past_the_start_up_and_shows_small_heights():
    import time

    from gridbias.demo.settings import DemoSettings
    from gridbias.demo.simulation import _status_line

    grid = gb.Grid([-math.pi], [math.pi], [72], [True])
    bias = gb.GridBias(grid, sigma=[0.3], height=1.5, temperature=300.0, bias_factor=2.0)
    for _ in range(300):  # hills on one spot, bias factor 2: their heights fall far below 1 % of the first
        bias.deposit([0.0])
    settings = DemoSettings(length_ns=1.0)
    first = _status_line(settings, 1000, bias, None, "phi-psi")
    assert "measuring" in first and "ETA" not in first
    share = 100 * np.mean(bias.history.heights[-10:]) / bias.height
    assert share < 1 and f"({share:.2g}% of the first)" in first and "(0%)" not in first
    later = _status_line(settings, 101_000, bias, (1000, time.monotonic() - 2.0), "phi-psi")
    assert "ns/day" in later and "left" in later
