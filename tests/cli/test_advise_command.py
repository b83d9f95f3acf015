"""``gridbias advise``: the advice from a CV log or a column file; bad input is one line and exit 2."""

import math

import numpy as np
import pytest

from gridbias.cli import main
from gridbias.cvlog import CVLogWriter

T = 300.0


def _ou(seed, n=3_000, tau=0.1, interval=0.01, sd=0.1, centre=0.0):
    rng = np.random.default_rng(seed)
    a = math.exp(-interval / tau)
    x = np.empty(n)
    x[0] = centre
    for i in range(1, n):
        x[i] = centre + a * (x[i - 1] - centre) + sd * math.sqrt(1 - a * a) * rng.standard_normal()
    return x


@pytest.fixture
def cv_log(tmp_path):
    d, phi = _ou(1, centre=0.3, sd=0.02), _ou(2, centre=-1.2, sd=0.2)
    steps = 5 * np.arange(1, d.size + 1)
    path = tmp_path / "short.gbl"
    meta = {"cvs": [{"kind": "distance"}, {"kind": "dihedral"}], "temperature": T}
    with CVLogWriter(path, ["step", "time", "d", "phi"], ["1", "ps", "nm", "rad"], meta) as log:
        log.write(np.column_stack([steps, 0.002 * steps, d, phi]))
    return path


def test_advise_from_cv_log(cv_log, capsys):
    code = main(["advise", str(cv_log), "--barrier", "30", "--range", "d", "0.1", "0.6", "--budget", "20000"])
    out = capsys.readouterr().out
    assert code == 0
    assert "gbo.make_bias(cvs" in out and "link.reporter(stride=" in out  # timestep from the log: steps
    assert "lower=[0.0" in out and "-math.pi" in out  # phi is a dihedral: the whole period
    prose = " ".join(out.split())  # the prose is wrapped
    assert "20,000 ps buy" in prose and "bias_factor: 6" in prose


def test_advise_from_csv_with_angle_range_in_degrees(tmp_path, capsys):
    x = _ou(3, centre=1.5, sd=0.1)
    path = tmp_path / "angles.csv"
    np.savetxt(path, np.column_stack([0.01 * np.arange(x.size), np.degrees(x)]), delimiter=",",
               header="time,theta[deg]", comments="")
    assert main(["advise", str(path), "--temperature", "300", "--range", "theta", "60", "120"]) == 0
    out = capsys.readouterr().out
    assert f'"bound": {math.radians(60)!r}' in out  # typed in degrees, pasted in rad
    assert "stride = max(1, round(" in out  # no time step known: the stride is given in ps
    assert "no expected barrier" in " ".join(out.split())


@pytest.mark.parametrize("argv, message", [
    (["advise", "missing.gbl", "--temperature", "300"], "no such file"),
    (["advise", "{log}", "--columns", "psi"], "no column 'psi'"),
    (["advise", "{log}", "--range", "psi", "0", "1"], "--range psi: no such CV"),
    (["advise", "{log}", "--range", "d", "a", "1"], "--range: expected a number"),
    (["advise", "{log}", "--periodic", "x"], "--periodic x: no such CV"),
    (["advise", "{short}", "--temperature", "300"], "too short: 20 frames"),
    (["advise", "{nan}", "--temperature", "300", "--interval", "0.1"], r"not finite \(nan\) at frame 40"),
    (["advise", "{log}", "--barrier", "-3"], "expected a positive number"),
])
def test_bad_input_is_one_line_and_exit_2(argv, message, cv_log, tmp_path, capsys, monkeypatch):
    import re

    monkeypatch.chdir(tmp_path)
    short = tmp_path / "short.csv"
    np.savetxt(short, np.column_stack([np.arange(20.0), np.arange(20.0)]), delimiter=",", header="time,x",
               comments="")
    nan = tmp_path / "nan.npy"
    values = _ou(4, n=500)
    values[40] = np.nan
    np.save(nan, values)
    argv = [a.format(log=cv_log, short=short, nan=nan) for a in argv]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and re.search(message, err), err
