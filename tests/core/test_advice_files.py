"""advise_from_file: the same advice from a CV log (.gbl), a CSV file and a .npy array; bad files refused."""

import math

import numpy as np
import pytest

from gridbias import CVLogError, ParameterError
from gridbias import advice as adv
from gridbias.cvlog import CVLogWriter

T = 300.0


def _series(seed=1, n=4_000):
    rng = np.random.default_rng(seed)
    a = math.exp(-0.01 / 0.1)
    x = np.empty(n)
    phi = np.empty(n)
    x[0], phi[0] = 0.3, 3.0
    for i in range(1, n):  # an OU distance near 0.3 nm and an OU torsion near +pi (it wraps)
        x[i] = 0.3 + a * (x[i - 1] - 0.3) + 0.02 * math.sqrt(1 - a * a) * rng.standard_normal()
        phi[i] = 3.0 + a * (phi[i - 1] - 3.0) + 0.2 * math.sqrt(1 - a * a) * rng.standard_normal()
    return x, (phi + np.pi) % (2 * np.pi) - np.pi


def _same(a, b):
    assert a.sigma == b.sigma and a.bins == b.bins and a.lower == b.lower and a.upper == b.upper
    assert a.stride == b.stride and a.periodic == b.periodic and a.code() == b.code()


def test_cv_log_gives_the_same_advice(tmp_path):
    x, phi = _series()
    steps = 5 * np.arange(1, x.size + 1)
    path = tmp_path / "short.gbl"
    meta = {"cvs": [{"kind": "distance"}, {"kind": "dihedral"}], "temperature": T, "unbiased": True}
    with CVLogWriter(path, ["step", "time", "d", "phi"], ["1", "ps", "nm", "rad"], meta) as log:
        log.write(np.column_stack([steps, 0.002 * steps, x, phi]))
    from_file = adv.advise_from_file(path, barrier=30.0, cv_range=[(0.1, 0.6), None])
    direct = adv.advise(np.column_stack([x, phi]), interval=0.01, temperature=T, timestep=0.002,
                        names=["d", "phi"], units=["nm", "rad"], periods=[None, 2 * math.pi], barrier=30.0,
                        cv_range=[(0.1, 0.6), None])
    _same(from_file, direct)
    assert from_file.periodic == (False, True) and from_file.timestep == pytest.approx(0.002)


def test_csv_and_npy_give_the_same_advice(tmp_path):
    x, phi = _series(2)
    times = 0.01 * np.arange(1, x.size + 1)
    csv = tmp_path / "short.csv"
    np.savetxt(csv, np.column_stack([times, x, np.degrees(phi)]), delimiter=",", header="time,d[nm],phi[deg]",
               comments="")
    npy = tmp_path / "short.npy"
    np.save(npy, np.column_stack([x, phi]))
    options = {"temperature": T, "periods": [None, 2 * math.pi], "barrier": 30.0, "timestep": 0.002,
               "cv_range": [(0.1, 0.6), None]}
    from_csv = adv.advise_from_file(csv, **options)
    from_npy = adv.advise_from_file(npy, interval=0.01, **options)
    direct = adv.advise(np.column_stack([x, phi]), interval=0.01, units=["nm", "rad"], **options)
    _same(from_csv, direct)
    assert from_npy.sigma == direct.sigma and from_npy.stride == direct.stride
    assert [s.name for s in from_csv.statistics] == ["d", "phi"]
    only = adv.advise_from_file(csv, columns=["d"], temperature=T, cv_range=[(0.1, 0.6)], barrier=30.0)
    assert len(only.statistics) == 1


def test_bad_files_are_refused(tmp_path):
    with pytest.raises(ParameterError, match="no such file"):
        adv.advise_from_file(tmp_path / "missing.gbl", temperature=T)
    other = tmp_path / "run.txt"
    other.write_text("1,2\n")
    with pytest.raises(ParameterError, match="must be .gbl"):
        adv.advise_from_file(other, temperature=T)
    fake = tmp_path / "fake.gbl"
    fake.write_bytes(b"not a log at all" * 10)
    with pytest.raises(CVLogError):
        adv.advise_from_file(fake, temperature=T)
    npy = tmp_path / "a.npy"
    np.save(npy, np.random.default_rng(0).normal(size=(500, 1)))
    with pytest.raises(ParameterError, match="no time column"):
        adv.advise_from_file(npy, temperature=T)
    with pytest.raises(ParameterError, match="no column 'psi'"):
        adv.advise_from_file(npy, columns=["psi"], temperature=T, interval=0.1)
    csv = tmp_path / "uneven.csv"
    np.savetxt(csv, np.column_stack([np.r_[0.0, np.cumsum(np.full(499, 0.1))][::-1], np.zeros(500)]),
               delimiter=",", header="time,x", comments="")
    with pytest.raises(ParameterError, match="not evenly spaced"):
        adv.advise_from_file(csv, temperature=T)
    with pytest.raises(ParameterError, match="records no temperature"):
        adv.advise_from_file(npy, interval=0.1)


def test_log_of_a_biased_run_is_refused(tmp_path):
    x, _ = _series(3, n=500)
    path = tmp_path / "biased.gbl"
    with CVLogWriter(path, ["step", "time", "d", "bias"], ["1", "ps", "nm", "kJ/mol"], {"temperature": T}) as log:
        log.write(np.column_stack([np.arange(500.0), 0.01 * np.arange(500.0), x, np.full(500, 3.0)]))
    with pytest.raises(ParameterError, match="biased run"):
        adv.advise_from_file(path)


def test_a_long_run_is_not_a_short_run():
    with pytest.raises(ParameterError, match="not a short run"):
        adv.advise(np.zeros(adv.MAX_FRAMES + 1), interval=0.01, temperature=T)
