"""Commands refuse files of another run, never write over their inputs, bound what typos can size, and end
every error in one line with exit 2 (bad input) or 1 (failure), never "unexpected ... bug"."""

import errno
import math
import os

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import gridbias as gb
import gridbias._files as gbf
from gridbias.cli import main
from gridbias.cvlog import CVLogWriter


def make_run_files(folder, *, run_id=None, temperature=300.0, log_run_id="same", seed=0):
    """A 1-D bias checkpoint (GridBias.save) and a CV log of 60 frames; the log's header as a run's."""
    grid = gb.Grid([-math.pi], [math.pi], [60], [True])
    bias = gb.GridBias(grid, [0.35], 1.0, 300.0, bias_factor=6.0)
    rng = np.random.default_rng(seed)
    for i in range(30):
        bias.deposit([rng.uniform(-3, 3)], time=float(i))
    if run_id is not None:
        bias._run_id = run_id
    ckpt = folder / "run.gbz"
    bias.save(ckpt)
    meta = {"temperature": temperature, "grid": grid.to_dict(), "bias_factor": 6.0}
    if log_run_id is not None:
        meta["run_id"] = bias.run_id if log_run_id == "same" else log_run_id
    log = folder / "run.gbl"
    with CVLogWriter(log, ["step", "time", "cv0", "bias"], ["1", "ps", "rad", "kJ/mol"], meta) as writer:
        t = np.arange(60) * 0.5
        writer.write(np.column_stack([t * 10, t, rng.uniform(-3, 3, 60), np.zeros(60)]))
    return ckpt, log


def run_cli(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    assert "unexpected" not in err, err
    if code:
        assert err.count("\n") == 1 and err.startswith("gridbias"), err
    return code, out, err


def test_the_own_log_is_accepted(tmp_path, capsys):
    ckpt, log = make_run_files(tmp_path)
    code, out, err = run_cli(capsys, "reweight", ckpt, log, "--along", "cv0", "--bins", "12")
    assert code == 0, err


@pytest.mark.parametrize("command", ["inspect", "reweight"])
def test_a_log_of_another_run_is_refused_naming_both_files(tmp_path, capsys, command):
    ckpt, log = make_run_files(tmp_path, log_run_id="0123456789abcdef0123456789abcdef")
    argv = [command, ckpt, "--log", log] if command == "inspect" else [command, ckpt, log, "--along", "cv0"]
    code, _, err = run_cli(capsys, *argv)
    assert code == 2
    for part in (str(log), str(ckpt), "does not belong to the run", "run id", "0123456789abcdef"):
        assert part in err, (part, err)


def test_a_log_at_another_temperature_is_refused_even_without_ids(tmp_path, capsys):
    """Files from before run ids: what they record is still compared."""
    ckpt, log = make_run_files(tmp_path, temperature=310.0, log_run_id=None)
    code, _, err = run_cli(capsys, "reweight", ckpt, log, "--along", "cv0")
    assert code == 2 and "temperature 300 K vs 310 K" in err


def test_export_never_writes_over_its_checkpoint(tmp_path, capsys):
    """The issue's example, `gridbias export ck.npz ck.npz`, used to replace the checkpoint by the surface."""
    ckpt, _ = make_run_files(tmp_path)
    named_npz = tmp_path / "ck.npz"
    os.rename(ckpt, named_npz)
    before = named_npz.read_bytes()
    code, _, err = run_cli(capsys, "export", named_npz, named_npz)
    assert code == 2 and "is the same file as" in err
    os.link(named_npz, tmp_path / "alias.npz")  # another name of the same file (same inode)
    code, _, err = run_cli(capsys, "export", named_npz, tmp_path / "alias.npz")
    assert code == 2 and "is the same file as" in err
    assert named_npz.read_bytes() == before


def test_a_failed_write_exits_1(tmp_path, capsys, monkeypatch):
    ckpt, _ = make_run_files(tmp_path)

    def full(fd, data):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(gbf, "write_all", full)
    code, _, err = run_cli(capsys, "export", ckpt, tmp_path / "fes.csv")
    assert code == 1 and "No space left on device" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.gbl", "run.gbz"]  # nothing left behind


@pytest.mark.parametrize("argv, match", [
    (["reweight", "{ckpt}", "{log}", "--along", "cv0", "--bins", "100000000"], "--bins: expected a whole number in"),
    (["inspect", "{ckpt}", "--points", "1000000000"], "--points: expected a whole number in 1..1,000"),
    (["demo", "--length", "1e308"], "--length: expected a number of ns in"),
    (["demo", "--seed", "99999999999999999999"], "--seed: expected a whole number in"),
    (["reweight", "{ckpt}", "{log}", "--along", "cv0", "--method", "final", "--burn-in", "0.999999"], ""),
    (["reweight", "{ckpt}", "{log}", "--along", "cv0", "--range", "0", "inf"], "--range: expected a finite"),
    (["export", "{ckpt}", "x.csv", "--time", "nan"], "--time: expected a finite number"),
])
def test_typos_that_would_size_arrays_or_run_for_minutes_are_one_line(tmp_path, capsys, argv, match):
    ckpt, log = make_run_files(tmp_path)
    argv = [a.format(ckpt=ckpt, log=log) for a in argv]
    code, _, err = run_cli(capsys, *argv)
    assert code == 2 and match in err


TEXTS = st.one_of(st.sampled_from(["0", "-1", "1e308", "nan", "inf", "-inf", "1e-320", "0.999999", "2", "abc",
                                   "", "1e9", "10000"]),
                  st.integers(-10**12, 10**12).map(str), st.floats(allow_nan=True).map(repr))
OPTIONS = {
    "reweight": ["--bins", "--burn-in", "--range"],
    "export": ["--time", "--hills"],
    "inspect": ["--points", "--min-depth", "--window", "--transitions", "--max-height", "--drift"],
}


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(command=st.sampled_from(sorted(OPTIONS)), data=st.data())
def test_any_option_value_ends_in_exit_0_1_or_2_with_one_line(tmp_path_factory, capsys, command, data):
    folder = tmp_path_factory.mktemp("run")
    ckpt, log = make_run_files(folder)
    option = data.draw(st.sampled_from(OPTIONS[command]))
    values = [data.draw(TEXTS)] + ([data.draw(TEXTS)] if option == "--range" else [])
    if command == "reweight":
        argv = ["reweight", ckpt, log, "--along", "cv0", "--method", "final", option, *values]
    elif command == "export":
        argv = ["export", ckpt, folder / "fes.csv", option, *values]
    else:
        argv = ["inspect", ckpt, "--log", log, option, *values]
        if option != "--points":
            argv += ["--points", "4"]
    code, _, _ = run_cli(capsys, *argv)
    assert code in (0, 1, 2)


def test_a_demo_that_fails_leaves_no_folder(tmp_path, capsys):
    """The issue's example: a failed --platform left an empty results folder."""
    pytest.importorskip("openmm")
    import openmm

    names = {openmm.Platform.getPlatform(i).getName() for i in range(openmm.Platform.getNumPlatforms())}
    missing = next((p for p in ("CUDA", "HIP", "OpenCL") if p not in names), None)
    if missing is None:
        pytest.skip("every GPU platform is available here")
    code, _, err = run_cli(capsys, "demo", "--out", tmp_path / "results", "--platform", missing, "--length", "0.0002")
    assert code == 2 and "available platform names" in err and repr(missing) in err
    assert not (tmp_path / "results").exists()


def test_a_command_that_fails_halfway_removes_the_outputs_it_made(tmp_path, capsys, monkeypatch):
    """Two outputs, the second cannot be written: the first is removed again, nothing is left behind."""
    ckpt, _ = make_run_files(tmp_path)
    real, calls = gbf.write_all, []

    def second_fails(fd, data):
        calls.append(1)
        if len(calls) > 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(fd, data)

    monkeypatch.setattr(gbf, "write_all", second_fails)
    code, _, err = run_cli(capsys, "export", ckpt, tmp_path / "fes.csv", tmp_path / "fes.npz")
    assert code == 1 and "fes.npz" in err and "No space left" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.gbl", "run.gbz"]
