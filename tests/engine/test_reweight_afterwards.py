"""Reweighting after the run, through a real OpenMM run with the reporter, on a 3-D analytic potential.

One particle moves on U(x, y, z) (OpenMM custom force); x is biased (well-tempered), y is logged as an
observable by the reporter, and z is computed afterwards from the DCD written by OpenMM's DCDReporter,
read with mdtraj. Both reweighted profiles must match the exact marginals F(y), F(z) (scipy quadrature)
and the reweighted averages the exact expectation values of the same model.
"""

import math
import re

import numpy as np
import pytest

openmm = pytest.importorskip("openmm")
mdtraj = pytest.importorskip("mdtraj")
from openmm import app  # noqa: E402
from scipy import integrate  # noqa: E402

from gridbias import analysis, trajectories  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.cvlog import read_cvlog  # noqa: E402
from gridbias.errors import ParameterError  # noqa: E402

pytestmark = pytest.mark.openmm

TEMPERATURE = 300.0
KT = TEMPERATURE * 0.00831446261815324  # kJ/mol (R in kJ/mol/K, CODATA 2018)
# U(x, y, z), kJ/mol and nm: a tilted double well in x (barrier 5 kT), y harmonic about 0.5 x, and a double
# well in z (barrier 1.5 kT) about 0.6 y. Coupled, so the marginals are not those of the separate terms.
A, TILT, KY, SLOPE_Y, BZ, SLOPE_Z, HALF_GAP = 5 * KT, 0.5 * KT, 30.0, 0.5, 1.5 * KT, 0.6, 0.5
EXPRESSION = (f"{A}*(x^2-1)^2 + {TILT}*x + {KY / 2}*(y-{SLOPE_Y}*x)^2"
              f" + {BZ}*((z-{SLOPE_Z}*y)^2-{HALF_GAP ** 2})^2/{HALF_GAP ** 4}")
LOG_EVERY, DCD_EVERY = 100, 200
N_STEPS = 300_000
BOUND = 3.5  # nm: the integrals run over [-BOUND, BOUND], where exp(-U/kT) is below 1e-40 at the edges


def _ux(x):
    return A * (x**2 - 1) ** 2 + TILT * x


def _uy(x, y):
    return KY / 2 * (y - SLOPE_Y * x) ** 2


def _uz(y, z):
    return BZ * ((z - SLOPE_Z * y) ** 2 - HALF_GAP**2) ** 2 / HALF_GAP**4


def _quad(f, lo=-BOUND, hi=BOUND):
    return integrate.quad(f, lo, hi, epsabs=0, epsrel=1e-10, limit=200)[0]


def _gx_y(y):
    """int dx exp(-(Ux + Uy)/kT) at y."""
    return _quad(lambda x: math.exp(-(_ux(x) + _uy(x, y)) / KT))


def _gz_y(y):
    """int dz exp(-Uz/kT) at y (does not depend on y: Uz depends on z - 0.6 y only, up to the bound)."""
    return _quad(lambda z: math.exp(-_uz(y, z) / KT), SLOPE_Z * y - BOUND, SLOPE_Z * y + BOUND)


def exact_marginal_y(y_points):
    """F(y) = -kT ln int int exp(-U/kT) dx dz, by scipy quadrature (minimum 0)."""
    p = np.array([_gx_y(y) * _gz_y(y) for y in y_points])
    f = -KT * np.log(p)
    return f - f.min()


def exact_marginal_z(z_points):
    """F(z) = -kT ln int int exp(-U/kT) dx dy, by scipy quadrature (minimum 0)."""
    p = np.array([_quad(lambda y, z=z: _gx_y(y) * math.exp(-_uz(y, z) / KT)) for z in z_points])
    f = -KT * np.log(p)
    return f - f.min()


def exact_probability_x_below_zero():
    """P(x < 0) over the model, by scipy quadrature (x from -BOUND to 0 against the whole range)."""
    def density(y, x):
        return math.exp(-(_ux(x) + _uy(x, y)) / KT)

    left = integrate.dblquad(density, -BOUND, 0.0, -BOUND, BOUND, epsrel=1e-9)[0]
    return left / integrate.dblquad(density, -BOUND, BOUND, -BOUND, BOUND, epsrel=1e-9)[0]


def _topology():
    top = app.Topology()
    residue = top.addResidue("P", top.addChain())
    top.addAtom("P", app.element.carbon, residue)
    return top


def _simulation(seed):
    """One particle on U, x biased (well-tempered) on the Reference platform: (link, simulation)."""
    system = openmm.System()
    system.addParticle(10.0)
    force = openmm.CustomExternalForce(EXPRESSION)
    force.addParticle(0, [])
    system.addForce(force)
    cvs = [gbo.coordinate(0, "x", name="x")]
    bias = gbo.make_bias(cvs, lower=[-2.2], upper=[2.2], bins=[110], sigma=[0.1], height=1.0,
                         temperature=TEMPERATURE, bias_factor=5.0)
    link = gbo.attach(system, cvs, bias, route="cvforce")  # Reference + CustomCVForce: the cheap route here
    integrator = openmm.LangevinMiddleIntegrator(TEMPERATURE, 5.0, 0.01)
    integrator.setRandomNumberSeed(seed)
    platform = openmm.Platform.getPlatformByName("Reference")
    simulation = app.Simulation(_topology(), system, integrator, platform)
    simulation.context.setPositions([[-1.0, -0.5, 0.0]])
    simulation.context.setVelocitiesToTemperature(TEMPERATURE, seed)
    return link, simulation


def run_biased(folder, seed, *, n_steps=N_STEPS, observables=True, trajectory="dcd"):
    """The biased run: x biased, y logged as an observable, a DCD (or XTC) file every DCD_EVERY steps.
    Returns the link."""
    link, simulation = _simulation(seed)
    extra = {"observables": [gbo.coordinate(0, "y", name="y")]} if observables else {}
    reporter = link.reporter(LOG_EVERY, log=str(folder / "run.gbl"), **extra)
    simulation.reporters.append(reporter)
    writer = app.DCDReporter if trajectory == "dcd" else app.XTCReporter
    simulation.reporters.append(writer(str(folder / f"run.{trajectory}"), DCD_EVERY))
    simulation.step(n_steps)
    reporter.close()
    return link


def exact_average_yz(g, *, z_above=None):
    """<g(y, z)> over the model (x integrated out) by nested scipy quadrature; with ``z_above`` the average
    of g times the indicator of z > z_above (integration limits, not a step in the integrand)."""
    def inner(y, weight, lower):
        lo, hi = SLOPE_Z * y - BOUND, SLOPE_Z * y + BOUND
        lo = lo if lower is None else max(lo, lower)
        return _quad(lambda z: weight(z) * math.exp(-_uz(y, z) / KT), lo, hi) if hi > lo else 0.0

    num = _quad(lambda y: _gx_y(y) * inner(y, lambda z: g(y, z), z_above))
    den = _quad(lambda y: _gx_y(y) * inner(y, lambda z: 1.0, None))
    return num / den


EDGES = np.linspace(-1.6, 1.6, 33)
MIN_FRAMES = 20  # bins with fewer frames are left out: first-order error bars fail there (common practice)


@pytest.fixture(scope="module")
def exact():
    """The exact values the runs are compared with (scipy quadrature, a few seconds, computed once)."""
    centers = 0.5 * (EDGES[1:] + EDGES[:-1])
    return {"F(y)": exact_marginal_y(centers), "F(z)": exact_marginal_z(centers),
            "<y^2>": exact_average_yz(lambda y, z: y * y), "<z^2>": exact_average_yz(lambda y, z: z * z),
            "P(x<0)": exact_probability_x_below_zero(),
            "P(z>0)": exact_average_yz(lambda y, z: 1.0, z_above=0.0)}


@pytest.fixture(scope="module", params=[2, 7])
def biased_run(request, tmp_path_factory):
    folder = tmp_path_factory.mktemp(f"three_d_{request.param}")
    link = run_biased(folder, request.param)
    log = read_cvlog(folder / "run.gbl")
    weights = analysis.offset_weights(link.bias, log.column("time"), frame_bias=log.column("bias"))
    return folder, link, log, weights


def _check_profile(profile, exact_f):
    """RMSE over the bins with exact F < 4 kT (and >= MIN_FRAMES frames), after aligning the zeros with
    Boltzmann weights, must be below 3x the rms of the reported errors there: for independent Gaussian errors
    the RMSE over ~20 bins is the rms error within ~15 %, and 3x leaves room for the correlation between
    bins through the common normalisation and for the noise of the error estimate itself."""
    keep = (exact_f < 4 * KT) & (profile.counts >= MIN_FRAMES)
    assert keep.sum() >= 15, keep.sum()
    w = np.exp(-exact_f[keep] / KT)
    diff = profile.free_energy[keep] - exact_f[keep]
    diff = diff - np.sum(w * diff) / np.sum(w)
    rmse = math.sqrt(np.mean(diff**2))
    rms_error = math.sqrt(np.mean(profile.error[keep] ** 2))
    assert profile.plateau_found[keep].mean() >= 0.8  # elsewhere the error is a lower bound: a stricter check
    assert rmse < 3 * rms_error, (rmse / KT, rms_error / KT)
    assert rmse < 0.5 * KT  # and the run is long enough for the check to mean something


def test_logged_observable_profile_matches_the_exact_marginal(biased_run, exact):
    """F(y) from the observable y the reporter logged, reweighted with c(t), against quadrature."""
    _, _, log, weights = biased_run
    assert log.columns == ("step", "time", "x", "bias", "y")
    assert log.metadata["observables"] == [{"name": "y", "kind": "coordinate", "atoms": [0], "axis": "y"}]
    profile = analysis.free_energy_along(weights, log.column("y"), EDGES)
    _check_profile(profile, exact["F(y)"])


def test_quantity_from_the_dcd_profile_matches_the_exact_marginal(biased_run, exact):
    """F(z) with z computed afterwards from OpenMM's DCD (read with mdtraj), against quadrature."""
    folder, _, log, weights = biased_run
    frames = trajectories.load_frames(folder / "run.dcd", log, top=_topology())
    assert frames.checked == ("x", "y")  # the logged CVs recomputed from the frames agree
    np.testing.assert_array_equal(frames.steps, np.arange(1, N_STEPS // DCD_EVERY + 1) * DCD_EVERY)
    frame_weights = analysis.weights_at_steps(weights, log.column("step"), frames.steps)
    z = frames.trajectory.xyz[:, 0, 2]
    profile = analysis.free_energy_along(frame_weights, z, EDGES)
    _check_profile(profile, exact["F(z)"])


def test_averages_and_region_probabilities_match_exact_expectations(biased_run, exact):
    """<y^2>, <z^2>, P(x < 0) and P(z > 0) of the unbiased model (nested scipy quadrature), within 4 standard
    errors of the reweighted estimates."""
    folder, _, log, weights = biased_run
    frames = trajectories.load_frames(folder / "run.dcd", log, top=_topology())
    frame_weights = analysis.weights_at_steps(weights, log.column("step"), frames.steps)
    z = frames.trajectory.xyz[:, 0, 2]
    checks = [
        (analysis.reweighted_average(weights, log.column("y") ** 2), exact["<y^2>"]),
        (analysis.reweighted_average(frame_weights, z**2), exact["<z^2>"]),
        (analysis.region_probability(weights, log.column("x") < 0), exact["P(x<0)"]),
        (analysis.region_probability(frame_weights, z > 0), exact["P(z>0)"]),
    ]
    for estimate, value in checks:
        found = estimate.value if hasattr(estimate, "value") else estimate.probability
        # without a blocking plateau the error is a lower bound, which only makes the check stricter
        assert abs(found - value) < 4 * estimate.error, (found, estimate.error, value)


def test_frames_that_do_not_line_up_are_refused(biased_run, tmp_path):
    """A DCD longer than its log, frames at a non-multiple interval, and another run's frames: each refused
    with the reason named."""
    folder, _, log, weights = biased_run
    from gridbias.cvlog import CVLogWriter

    short = tmp_path / "short.gbl"
    with CVLogWriter(short, log.columns, log.units, log.metadata) as writer:
        writer.write(log.data[: log.n_records // 2])
    with pytest.raises(ParameterError, match=r"after the log's last record \(the frames run past the log"):
        trajectories.load_frames(folder / "run.dcd", read_cvlog(short), top=_topology())
    with pytest.raises(ParameterError, match="not a multiple of the log interval"):
        analysis.weights_at_steps(weights, log.column("step"), np.arange(1, 50) * 150)
    other = tmp_path / "other"
    other.mkdir()
    run_biased(other, 99, n_steps=2_000)
    with pytest.raises(ParameterError, match=r"does not line up with CV log .* \(step 200\) x computed"):
        trajectories.load_frames(other / "run.dcd", log, top=_topology())
    with pytest.raises(ParameterError, match="first_step must be a step number"):
        trajectories.frame_steps(folder / "run.dcd", first_step=-1)


def test_observable_names_must_not_clash(tmp_path):
    system = openmm.System()
    system.addParticle(10.0)
    cvs = [gbo.coordinate(0, "x", name="x")]
    bias = gbo.make_bias(cvs, lower=[-2.0], upper=[2.0], bins=[120], sigma=[0.1], height=1.0,
                         temperature=TEMPERATURE)
    link = gbo.attach(system, cvs, bias, route="cvforce")
    log = str(tmp_path / "run.gbl")
    with pytest.raises(ParameterError, match=r"observables\[0\] is named 'x', already the name of the bia"):
        link.reporter(10, log=log, observables=[gbo.coordinate(0, "y", name="x")])
    twice = [gbo.coordinate(0, "y", name="y"), gbo.coordinate(0, "z", name="y")]
    with pytest.raises(ParameterError, match=r"observables\[1\] is named 'y', already the name of observ"):
        link.reporter(10, log=log, observables=twice)
    with pytest.raises(ParameterError, match=r"observables\[0\] is named 'bias', already the name of a col"):
        link.reporter(10, log=log, observables=[gbo.coordinate(0, "y", name="bias")])
    with pytest.raises(ParameterError, match=r"observables\[0\] \(coordinate\) has no name"):
        link.reporter(10, log=log, observables=[gbo.coordinate(0, "y")])
    with pytest.raises(ParameterError, match="observables are written to the CV log: give log="):
        link.reporter(10, observables=[gbo.coordinate(0, "y", name="y")])
    assert not (tmp_path / "run.gbl").exists()  # nothing written by a refused call


# ------------------------------------------------------------------------------ gridbias reweight --values
@pytest.fixture(scope="module")
def short_run(tmp_path_factory):
    """A short biased run with its bias saved, the log, and z of every DCD frame (computed afterwards)."""
    folder = tmp_path_factory.mktemp("short")
    link = run_biased(folder, 5, n_steps=60_000)
    link.bias.save(folder / "bias.gbz")
    log = read_cvlog(folder / "run.gbl")
    frames = trajectories.load_frames(folder / "run.dcd", log, top=_topology())
    return folder, frames.steps, frames.trajectory.xyz[:, 0, 2].astype(float)


def _reweight(capsys, folder, values_file, *extra):
    from gridbias.cli import main

    code = main(["reweight", str(folder / "bias.gbz"), str(folder / "run.gbl"), "--columns", "x",
                 "--values", str(values_file), *extra])
    out, err = capsys.readouterr()
    return code, out, err


def test_reweight_command_takes_values_from_csv_and_npy(short_run, capsys, tmp_path):
    folder, steps, z = short_run
    csv = tmp_path / "z.csv"
    np.savetxt(csv, np.column_stack([steps, z]), delimiter=",", header="step,z[nm]", comments="")
    out_csv = tmp_path / "fz.csv"
    code, out, err = _reweight(capsys, folder, csv, "--bins", "20", "--output", str(out_csv))
    assert code == 0, err
    assert f"({steps.size} frames)" in out and "unbiased average of z:" in out and " nm" in out
    table = np.loadtxt(out_csv, delimiter=",", skiprows=1)
    assert table.shape[0] == 20
    pairs = tmp_path / "z.npy"
    np.save(pairs, np.column_stack([steps, z]))
    code, out_npy, err = _reweight(capsys, folder, pairs, "--bins", "20")
    assert code == 0, err
    def numbers(text):  # the average and the table, without units (a .npy file has none)
        return re.findall(r"average of z: (\S+)", text) + [line.split()[1:] for line in text.splitlines()
                                                           if re.match(r"\s+-?\d", line)]

    assert numbers(out_npy) == numbers(out)
    code, out, err = _reweight(capsys, folder, csv, "--along", "x", "--bins", "12")  # 2-D: x and z
    assert code == 0, err
    assert "free energy along x, z" in out


@pytest.mark.parametrize("make, message", [
    (lambda steps, z: ("csv", np.column_stack([steps + 50, z])), "does not fit the CV log: .*between record"),
    (lambda steps, z: ("csv", np.column_stack([np.r_[steps, steps[-1] + 200], np.r_[z, 0.0]])),
     r"after the log's last record"),
    (lambda steps, z: ("csv", np.column_stack([steps, np.where(np.arange(z.size) == 3, np.nan, z)])),
     "row 3 has the value nan; every value must be finite"),
    (lambda steps, z: ("npy", z), r"holds \d+ values but the CV log has \d+ records"),
    (lambda steps, z: ("npy", np.column_stack([steps[::-1], z])), "the steps must increase"),
])
def test_reweight_command_refuses_values_that_do_not_fit_the_log(short_run, capsys, tmp_path, make, message):
    folder, steps, z = short_run
    kind, data = make(steps, z)
    path = tmp_path / f"bad.{kind}"
    if kind == "csv":
        np.savetxt(path, data, delimiter=",", header="step,z", comments="")
    else:
        np.save(path, data)
    output = tmp_path / "never.csv"
    code, out, err = _reweight(capsys, folder, path, "--output", str(output))
    assert code == 2
    assert err.count("\n") == 1 and str(path) in err
    assert re.search(message, err), err
    assert not output.exists()  # nothing written


def test_trajectory_example_runs(tmp_path):
    """examples/reweight_from_trajectory.py: a short run, then the profile of a quantity from its DCD."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    script = Path(__file__).resolve().parents[2] / "examples" / "reweight_from_trajectory.py"
    env = {**os.environ, "PYTHONPATH": str(script.parents[1]) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    res = subprocess.run([sys.executable, str(script), "--steps", "12000", "--folder", "out"], cwd=tmp_path,
                         capture_output=True, text=True, timeout=300, env=env)
    assert res.returncode == 0, res.stderr[-3000:]
    assert "12 frames from out/run.dcd, lined up with out/run.gbl (checked: phi)" in res.stdout
    assert "unbiased average O...H distance:" in res.stdout
    table = np.loadtxt(tmp_path / "out" / "hbond.csv", delimiter=",", skiprows=1)
    assert table.shape == (20, 4)


def test_xtc_frames_line_up_too(tmp_path):
    """OpenMM's XTCReporter (coordinates to 0.001 nm): each frame's own step, checked against the log."""
    run_biased(tmp_path, 3, n_steps=4_000, trajectory="xtc")
    log = read_cvlog(tmp_path / "run.gbl")
    frames = trajectories.load_frames(tmp_path / "run.xtc", log, top=_topology())
    assert frames.steps.tolist() == list(range(DCD_EVERY, 4_001, DCD_EVERY)) and frames.checked == ("x", "y")
    np.testing.assert_allclose(frames.trajectory.xyz[:, 0, 0], log.column("x")[frames.records], atol=1e-3)


def test_frames_around_a_restart(tmp_path):
    """A run stopped at step 3000 after its checkpoint of step 2000 and continued from it: the log is cut
    back to 2000. OpenMM numbers a DCD's frames by count, so a DCD appended across the restart runs past the
    log and is refused; a new DCD for the continuation lines up once its first step is given, and not before."""
    log_path, checkpoint, dcd = tmp_path / "run.gbl", tmp_path / "run.gbz", tmp_path / "run.dcd"

    def reporter(link):
        return link.reporter(LOG_EVERY, log=str(log_path), checkpoint=str(checkpoint), checkpoint_every=2_000,
                             observables=[gbo.coordinate(0, "y", name="y")])

    link, simulation = _simulation(4)
    first = reporter(link)
    simulation.reporters += [first, app.DCDReporter(str(dcd), DCD_EVERY)]
    simulation.step(3_000)
    first.close()
    link, simulation = _simulation(4)
    second = reporter(link)
    continuation = tmp_path / "continued.dcd"
    simulation.reporters += [second, app.DCDReporter(str(dcd), DCD_EVERY, append=True),
                             app.DCDReporter(str(continuation), DCD_EVERY)]
    link.restore(simulation, str(checkpoint))
    simulation.step(1_000)
    second.close()
    log = read_cvlog(log_path)
    assert log.column("step")[-1] == 3_000 and log.n_records == 30
    with pytest.raises(ParameterError, match=r"5 of 20 frames .* after the log's last record .*restart cut"):
        trajectories.load_frames(dcd, log, top=_topology())
    with pytest.raises(ParameterError, match=r"does not line up .*carry wrong steps .*give first_step="):
        trajectories.load_frames(continuation, log, top=_topology())
    frames = trajectories.load_frames(continuation, log, top=_topology(), first_step=2_000 + DCD_EVERY)
    assert frames.steps.tolist() == [2_200, 2_400, 2_600, 2_800, 3_000] and frames.checked == ("x", "y")
