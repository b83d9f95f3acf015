"""The ``gridbias`` command: each subcommand end to end on a small run made here, and its errors.

The run is synthetic (a two-state hopping CV with Gaussian noise, well-tempered hills on a small periodic
grid): these tests check the command's plumbing and formats; the numbers must equal what the analysis
functions give for the same input, which their own tests check against analytic results.
"""

import io
import math
import os
import subprocess
import sys

import numpy as np
import pytest

import gridbias as gb
from gridbias import analysis
from gridbias.cli import main
from gridbias.cvlog import CVLogWriter
from gridbias.progress import ProgressLine

CENTRES = np.array([[-1.4, 1.2], [1.1, -0.8]])
STRIDE_PS = 0.5


def _synthetic_run(folder, rng, n_frames=600):
    """A WT bias over two periodic CVs and its CV log (step, time, cv0, cv1, bias felt before the deposit)."""
    grid = gb.Grid([-math.pi, -math.pi], [math.pi, math.pi], [48, 48], [True, True])
    bias = gb.GridBias(grid, sigma=[0.35, 0.35], height=1.5, temperature=300.0, bias_factor=6.0)
    state = 0
    rows = []
    for k in range(n_frames):
        if rng.random() < 0.05:
            state = 1 - state
        s = grid.wrap(CENTRES[state] + rng.normal(scale=0.3, size=2))
        t = (k + 1) * STRIDE_PS
        rows.append([k + 1, t, s[0], s[1], bias.evaluate(s)[0]])
        bias.deposit(s, time=t)
    checkpoint = os.path.join(folder, "bias.gbz")
    bias.save(checkpoint)
    log = os.path.join(folder, "frames.gbl")
    with CVLogWriter(log, ["step", "time", "cv0", "cv1", "bias"], ["1", "ps", "rad", "rad", "kJ/mol"]) as w:
        w.write(rows)
    return checkpoint, log, bias, np.array(rows)


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli")
    checkpoint, log, bias, rows = _synthetic_run(str(folder), np.random.default_rng(7))
    return {"folder": folder, "checkpoint": checkpoint, "log": log, "bias": bias, "rows": rows}


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


# -------------------------------------------------------------------------------------------------- help
@pytest.mark.parametrize("command", [None, "demo", "inspect", "export", "reweight"])
def test_help_of_every_command_states_units(capsys, command):
    argv = ([command] if command else []) + ["--help"]
    code, out, err = _run(capsys, *argv)
    assert code == 0 and err == ""
    assert "kJ/mol" in out and "ps" in out
    if command is None:
        assert "Exit codes" in out and all(c in out for c in ("demo", "inspect", "export", "reweight"))


def test_version(capsys):
    code, out, _ = _run(capsys, "--version")
    assert code == 0 and out.startswith("gridbias ")


# ----------------------------------------------------------------------------------------------- inspect
def test_inspect_summarises_the_checkpoint(capsys, run):
    code, out, err = _run(capsys, "inspect", run["checkpoint"])
    assert code == 0, err
    bias = run["bias"]
    assert "bias checkpoint (no MD state, last hill at 300 ps)" in out
    assert "well-tempered metadynamics, bias factor 6, 300 K" in out
    assert "cv0: units not recorded" in out
    assert "cv0: -3.142 .. 3.142, 48 bins of 0.1309, periodic" in out  # no unit: shown as stored
    assert f"{bias.n_hills} deposited" in out
    recent = np.asarray(bias.history.heights)[-10:].mean()
    assert f"({100 * recent / bias.height:.3g}% of the initial)" in out
    assert "from 0.5 to 300 ps" in out
    # The basins are the ones the analysis finds on the final surface.
    found = analysis.find_basins(bias.grid, bias.free_energy(), bias.kT)
    assert found.n_basins == 2
    for b, name in enumerate(found.names):
        row = f"  {name:<4}" + "".join(f"{x:>14.4g}" for x in found.markers[b])
        assert row in out
    assert "Verdict:" in out and "hill height decayed" in out
    assert "add --log" in out


def test_inspect_with_log_reports_reweighted_differences_with_errors(capsys, run):
    code, out, err = _run(capsys, "inspect", run["checkpoint"], "--log", run["log"], "--angles", "rad")
    assert code == 0, err
    assert "(reweighted frames):" in out and "+/-" in out
    assert "time-independent offset weights: 600 of 600 frames used" in out
    assert "transitions counted along the frames given" in out
    assert "cv0: -3.142 .. 3.142 rad, 48 bins" in out  # the log's units, shown in radians as asked


def test_inspect_reports_saddle_points_and_barriers_as_the_analysis_finds_them(capsys, run):
    code, out, err = _run(capsys, "inspect", run["checkpoint"], "--log", run["log"], "--angles", "rad")
    assert code == 0, err
    bias = run["bias"]
    found = analysis.find_basins(bias.grid, bias.free_energy(), bias.kT)
    crossing = analysis.find_crossings(bias.grid, bias.free_energy(), bias.kT, found)[0]
    assert "saddle points and barriers" in out
    assert f"{crossing.basins[0]} <-> {crossing.basins[1]}: saddle at (cv0 {crossing.saddle[0]:.4g}" in out
    assert f"from {crossing.basins[0]}: {crossing.barriers[0]:8.3f} kJ/mol" in out
    assert "reweighted frames" in out.split("saddle points and barriers")[1]
    assert "estimators agree" in out  # with the log's bias column the verdict cross-checks the estimators


def test_inspect_thresholds_change_the_verdict(capsys, run):
    _, strict, _ = _run(capsys, "inspect", run["checkpoint"], "--transitions", "1000")
    _, loose, _ = _run(capsys, "inspect", run["checkpoint"], "--transitions", "1")
    assert "needed >= 1000" in strict and "[FAILS ] transitions" in strict
    assert "needed >= 1" in loose and "[holds ] transitions" in loose


# ------------------------------------------------------------------------------------------------ export
def test_export_csv_and_npz_hold_the_surface(capsys, run, tmp_path):
    csv, npz = tmp_path / "fes.csv", tmp_path / "fes.npz"
    code, out, err = _run(capsys, "export", run["checkpoint"], str(csv), str(npz))
    assert code == 0, err
    assert f"wrote {csv}" in out and f"wrote {npz}" in out
    bias = run["bias"]
    fes = bias.free_energy()
    with open(csv) as f:
        assert f.readline().strip() == "cv0,cv1,free_energy[kJ/mol]"  # a bare bias: units unknown
    table = np.loadtxt(csv, delimiter=",", skiprows=1)
    nodes = bias.grid.nodes().reshape(-1, 2)
    np.testing.assert_allclose(table[:, :2], nodes, rtol=1e-9)
    np.testing.assert_allclose(table[:, 2], fes.reshape(-1), rtol=1e-9, atol=1e-9)
    with np.load(npz, allow_pickle=False) as data:
        np.testing.assert_array_equal(data["free_energy"], fes)
        np.testing.assert_array_equal(data["axis1"], bias.grid.axes[1])
        assert data["names"].tolist() == ["cv0", "cv1"]
        assert data["periodic"].tolist() == [True, True]
        assert float(data["bias_factor"]) == 6.0 and int(data["n_hills"]) == bias.n_hills
        assert math.isclose(float(data["kT"]), bias.kT)


def test_export_a_past_surface(capsys, run, tmp_path):
    bias = run["bias"]
    for option, value, n in (("--hills", "200", 200), ("--time", "100", 200)):
        path = tmp_path / f"past{option}.npz"
        code, _, err = _run(capsys, "export", run["checkpoint"], str(path), option, value)
        assert code == 0, err
        with np.load(path) as data:
            np.testing.assert_array_equal(data["free_energy"], bias.rebuilt(n).free_energy())
            assert int(data["n_hills"]) == n


def test_export_figures(capsys, run, tmp_path):
    pytest.importorskip("matplotlib")
    png, svg = tmp_path / "fes.png", tmp_path / "fes.svg"
    code, _, err = _run(capsys, "export", run["checkpoint"], str(png), str(svg))
    assert code == 0, err
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert b"<svg" in svg.read_bytes()[:1000]


# ---------------------------------------------------------------------------------------------- reweight
def test_reweight_one_column_matches_the_analysis_functions(capsys, run, tmp_path):
    csv, npz = tmp_path / "cv1.csv", tmp_path / "cv1.npz"
    code, out, err = _run(capsys, "reweight", run["checkpoint"], run["log"], "--along", "cv1", "--bins", "24",
                          "--range", "-180", "180", "--output", str(csv), str(npz))
    assert code == 0, err
    rows = run["rows"]
    weights = analysis.offset_weights(run["bias"], rows[:, 1], frame_bias=rows[:, 4])
    expected = analysis.free_energy_along(weights, rows[:, 3], np.linspace(-math.pi, math.pi, 25))
    with np.load(npz) as data:
        np.testing.assert_allclose(data["free_energy"], expected.free_energy, rtol=1e-12, equal_nan=True)
        np.testing.assert_allclose(data["error"], expected.error, rtol=1e-12, equal_nan=True)
        assert data["names"].tolist() == ["cv1"] and data["units"].tolist() == ["rad"]
    table = np.loadtxt(csv, delimiter=",", skiprows=1)
    np.testing.assert_allclose(table[:, 0], np.degrees(expected.centers[0]))
    np.testing.assert_allclose(table[:, 1], expected.free_energy, rtol=1e-9, equal_nan=True)
    assert "effective sample size" in out and out.count("\n") > 24
    sparse = int((np.isfinite(expected.free_energy) & (expected.counts < 20)).sum())
    assert sparse > 0 and sum(line.endswith(" *") for line in out.splitlines()) == sparse
    assert f"note: {sparse} bins hold fewer than 20 frames (marked *)" in out


def test_reweight_two_columns_and_final_bias_method(capsys, run, tmp_path):
    npz = tmp_path / "both.npz"
    code, out, err = _run(capsys, "reweight", run["checkpoint"], run["log"], "--along", "cv0", "cv1",
                          "--bins", "12", "--method", "final", "--burn-in", "0.3", "--output", str(npz))
    assert code == 0, err
    assert "final bias weights" in out
    with np.load(npz) as data:
        assert data["free_energy"].shape == (12, 12)
        assert np.nanmin(data["free_energy"]) == 0.0


def test_reweight_figure(capsys, run, tmp_path):
    pytest.importorskip("matplotlib")
    png = tmp_path / "cv0.png"
    code, _, err = _run(capsys, "reweight", run["checkpoint"], run["log"], "--along", "cv0",
                        "--output", str(png))
    assert code == 0, err
    assert png.read_bytes()[:4] == b"\x89PNG"


# -------------------------------------------------------------------------------------------------- errors
def _garbage(folder):
    path = folder / "garbage.gbz"
    path.write_bytes(np.random.default_rng(1).bytes(500))
    return str(path)


def _truncated(folder, checkpoint):
    path = folder / "cut.gbz"
    path.write_bytes(open(checkpoint, "rb").read()[:300])
    return str(path)


# case -> (argv built from the run and a scratch folder, a fragment the one-line error must contain)
BAD_INPUT = {
    "missing checkpoint": (lambda r, d: ["inspect", str(d / "nope.gbz")], "does not exist"),
    "checkpoint is a folder": (lambda r, d: ["inspect", str(d)], "Is a directory"),
    "garbage checkpoint": (lambda r, d: ["export", _garbage(d), str(d / "a.csv")],
                           "not a gridbias checkpoint"),
    "truncated checkpoint": (lambda r, d: ["inspect", _truncated(d, r["checkpoint"])], "truncated"),
    "CV log given as checkpoint": (lambda r, d: ["inspect", r["log"]], "CV log"),
    "checkpoint given as CV log": (lambda r, d: ["reweight", r["checkpoint"], r["checkpoint"], "--along",
                                                 "cv0"], "checkpoint"),
    "missing CV log": (lambda r, d: ["inspect", r["checkpoint"], "--log", str(d / "none.gbl")],
                       "does not exist"),
    "unknown --along column": (lambda r, d: ["reweight", r["checkpoint"], r["log"], "--along", "chi"],
                               "no column 'chi'"),
    "unknown --columns": (lambda r, d: ["reweight", r["checkpoint"], r["log"], "--along", "cv0",
                                        "--columns", "a,b"], "no column 'a'"),
    "too few --columns": (lambda r, d: ["inspect", r["checkpoint"], "--log", r["log"], "--columns", "cv0"],
                          "give 2 CV column names"),
    "three --along columns": (lambda r, d: ["reweight", r["checkpoint"], r["log"], "--along", "cv0", "cv1",
                                            "time"], "one or two columns"),
    "reversed --range": (lambda r, d: ["reweight", r["checkpoint"], r["log"], "--along", "cv0", "--range",
                                       "10", "-10"], "must exceed"),
    "bad output type": (lambda r, d: ["export", r["checkpoint"], str(d / "fes.txt")], "extension"),
    "missing output folder": (lambda r, d: ["export", r["checkpoint"], str(d / "no" / "fes.csv")],
                              "does not exist"),
    "too many hills": (lambda r, d: ["export", r["checkpoint"], str(d / "x.csv"), "--hills", "100000"],
                       "--hills must be 1..600"),
    "time before the first hill": (lambda r, d: ["export", r["checkpoint"], str(d / "x.csv"), "--time",
                                                 "0.1"], "before the first hill"),
    "bad burn-in": (lambda r, d: ["reweight", r["checkpoint"], r["log"], "--along", "cv0", "--method",
                                  "final", "--burn-in", "1.5"], "--burn-in: expected a number in [0, 1)"),
    "unknown option": (lambda r, d: ["inspect", r["checkpoint"], "--colour", "red"],
                       "unrecognized arguments"),
    "no command": (lambda r, d: [], "required"),
    "bad fraction": (lambda r, d: ["inspect", r["checkpoint"], "--window", "2"], "--window"),
    "bad count": (lambda r, d: ["export", r["checkpoint"], "x.csv", "--hills", "many"], "--hills"),
}


@pytest.mark.parametrize("case", sorted(BAD_INPUT))
def test_bad_input_is_one_line_on_stderr_with_exit_code_2(capsys, run, tmp_path, case):
    make_argv, fragment = BAD_INPUT[case]
    code, out, err = _run(capsys, *make_argv(run, tmp_path))
    assert code == 2
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("gridbias"), err
    assert fragment in err
    assert "Traceback" not in err


def test_a_damaged_file_names_its_path(capsys, run, tmp_path):
    path = _truncated(tmp_path, run["checkpoint"])
    code, _, err = _run(capsys, "inspect", path)
    assert code == 2 and path in err


def test_unexpected_errors_are_one_line_unless_traceback_is_asked(capsys, run, monkeypatch):
    import gridbias.cli as cli

    def broken(path):
        raise TypeError("boom")

    monkeypatch.setattr(cli, "load_run", broken)
    code, _, err = _run(capsys, "inspect", run["checkpoint"])
    assert code == 1 and err.count("\n") == 1 and "unexpected TypeError: boom" in err
    code, _, err = _run(capsys, "inspect", run["checkpoint"], "--traceback")
    assert code == 1 and "Traceback" in err and err.strip().endswith("report it)")


@pytest.mark.parametrize("error", [gb.LockError("checkpoint 'x.gbz' is in use by process 1"),
                                   gb.BlownUpError("CV values are not finite at step 10")])
def test_run_time_failures_of_the_library_are_exit_code_1(capsys, run, monkeypatch, error):
    import gridbias.cli as cli

    def fail(path):
        raise error

    monkeypatch.setattr(cli, "load_run", fail)
    code, _, err = _run(capsys, "inspect", run["checkpoint"])
    assert code == 1 and err == f"gridbias inspect: error: {error}\n"


def test_write_failure_is_exit_code_1(capsys, run, tmp_path, monkeypatch):
    import gridbias.cli as cli

    def full_disk(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(cli.os, "replace", full_disk)
    target = tmp_path / "fes.csv"
    code, _, err = _run(capsys, "export", run["checkpoint"], str(target))
    assert code == 1 and "No space left on device" in err and str(target) in err
    assert not target.exists() and not list(tmp_path.glob("fes.csv.tmp-*"))


# ---------------------------------------------------------------------------------------- the real command
def test_python_dash_m_and_exit_codes_in_a_process(run, tmp_path):
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    command = [sys.executable, "-m", "gridbias", "export", run["checkpoint"], str(tmp_path / "a.npz")]
    ok = subprocess.run(command, capture_output=True, text=True, env=env, timeout=120)
    assert ok.returncode == 0, ok.stderr
    assert ok.stderr == ""
    bad = subprocess.run([sys.executable, "-m", "gridbias", "inspect", str(tmp_path / "missing.gbz")],
                         capture_output=True, text=True, env=env, timeout=120)
    assert bad.returncode == 2 and bad.stdout == ""
    assert bad.stderr.count("\n") == 1 and "does not exist" in bad.stderr


# ------------------------------------------------------------------------------------------------ progress
def test_progress_line_rewrites_in_place_on_a_terminal():
    class Terminal(io.StringIO):
        def isatty(self):
            return True

    stream = Terminal()
    line = ProgressLine(stream, interval=0.0)
    line.update("step 1 of 2, long text")
    line.update("step 2 of 2")
    line.finish()
    assert stream.getvalue() == "\rstep 1 of 2, long text\rstep 2 of 2           \n"


def test_progress_line_stays_quiet_in_a_log_for_short_tasks():
    stream = io.StringIO()
    report = ProgressLine(stream, plain_interval=60.0).counter("replaying")
    for k in range(1, 11):
        report(k, 10)
    assert stream.getvalue() == ""
    slow = ProgressLine(stream, plain_interval=0.0).counter("replaying", "moments")
    for k in range(1, 3):
        slow(k, 2)
    assert stream.getvalue() == "replaying: 1 of 2 moments\nreplaying: 2 of 2 moments\n"
