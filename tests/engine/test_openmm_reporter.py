"""The reporter in an ordinary OpenMM script, and every bad input the adapter refuses or warns about.

References: OpenMM's reporter protocol (app.Simulation._simulate, 8.x: describeNextReport dict form,
reporters called in list order); the CV log is read back with gridbias.cvlog.read_cvlog; the logged bias
is checked against the engine's own bias energy (its force group) read by a reporter that runs first.
"""

import io
import math
import subprocess
import sys
import warnings

import numpy as np
import pytest

mm = pytest.importorskip("openmm")
from openmm import app, unit  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.cvlog import read_cvlog  # noqa: E402

pytestmark = [pytest.mark.openmm, pytest.mark.filterwarnings("ignore:axis .* coarser than sigma/2")]
PI = math.pi


def chain_system(n=6):
    """A flexible chain of n carbon-mass particles (bonds, angles, torsions): stable, cheap dynamics."""
    system = mm.System()
    topology = app.Topology()
    residue = topology.addResidue("CHN", topology.addChain())
    for _ in range(n):
        system.addParticle(12.0)
        topology.addAtom("C", app.element.carbon, residue)
    bonds = mm.HarmonicBondForce()
    angles = mm.HarmonicAngleForce()
    torsions = mm.PeriodicTorsionForce()
    for i in range(n - 1):
        bonds.addBond(i, i + 1, 0.15, 2e5)
    for i in range(n - 2):
        angles.addAngle(i, i + 1, i + 2, 1.9, 400.0)
    for i in range(n - 3):
        torsions.addTorsion(i, i + 1, i + 2, i + 3, 3, 0.0, 2.0)
    for f in (bonds, angles, torsions):
        system.addForce(f)
    positions = np.array([[0.15 * i, 0.1 * (i % 2), 0.03 * (i % 3)] for i in range(n)])
    return topology, system, positions


def dihedral_bias(cvs, **kw):
    return gbo.make_bias(cvs, lower=[-PI] * len(cvs), upper=[PI] * len(cvs), bins=[48] * len(cvs),
                         sigma=[0.3] * len(cvs), height=1.0, temperature=300.0, bias_factor=6.0, **kw)


def simulation(topology, system, positions, seed=1):
    integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 2 / unit.picosecond, 0.002 * unit.picoseconds)
    integrator.setRandomNumberSeed(seed)
    sim = app.Simulation(topology, system, integrator, mm.Platform.getPlatformByName("Reference"))
    sim.context.setPositions(positions)
    return sim


class EngineEnergyRecorder:
    """Records (step, engine bias energy, CVs) every `every` steps; runs before the bias reporter."""

    def __init__(self, link, every):
        self.link, self.every, self.rows = link, every, []

    def describeNextReport(self, simulation):
        return {"steps": self.every - simulation.currentStep % self.every, "periodic": False,
                "include": ["positions"]}

    def report(self, simulation, state):
        self.rows.append((simulation.currentStep, self.link.bias_energy(simulation), self.link.cv_values(simulation)))


def test_reporter_in_plain_script(tmp_path):
    """Deposits every stride beside other reporters; checkpoints; the log holds step, time, CVs and the
    bias in effect at that step (the engine's own energy, read before the deposit)."""
    topology, system, positions = chain_system()
    cvs = [gbo.dihedral(0, 1, 2, 3, name="t1"), gbo.dihedral(1, 2, 3, 4, name="t2")]
    link = gbo.attach(system, cvs, dihedral_bias(cvs), pending_hills=3)
    sim = simulation(topology, system, positions)
    recorder = EngineEnergyRecorder(link, 40)
    text = io.StringIO()
    sim.reporters.append(recorder)
    sim.reporters.append(app.StateDataReporter(text, 25, step=True, potentialEnergy=True))
    rep = link.reporter(stride=40, checkpoint=tmp_path / "run.gbz", checkpoint_every=200, log=tmp_path / "run.gbl",
                        log_every=20)
    sim.reporters.append(rep)
    sim.step(1000)
    rep.close()
    assert link.bias.n_hills == 25
    assert len(text.getvalue().splitlines()) == 1 + 40
    assert gb.checkpoint.read_checkpoint(tmp_path / "run.gbz")[0]["step"] == 1000
    log = read_cvlog(tmp_path / "run.gbl")
    assert log.columns == ("step", "time", "t1", "t2", "bias")
    assert log.unit("t1") == "rad" and log.unit("bias") == "kJ/mol" and log.unit("time") == "ps"
    np.testing.assert_array_equal(log.column("step"), np.arange(20, 1001, 20))
    np.testing.assert_allclose(log.column("time"), log.column("step") * 0.002, rtol=1e-12)
    by_step = {int(s): i for i, s in enumerate(log.column("step"))}
    for step, energy, s in recorder.rows:
        i = by_step[step]
        np.testing.assert_allclose([log.column("t1")[i], log.column("t2")[i]], s, atol=1e-12)
        assert log.column("bias")[i] == pytest.approx(energy, abs=2e-3)
    # the deposits happened at the logged CVs, with the history's times
    np.testing.assert_allclose(link.bias.history.centers, [r[2] for r in recorder.rows], atol=1e-12)
    np.testing.assert_allclose(link.bias.history.times, [r[0] * 0.002 for r in recorder.rows], rtol=1e-12)


def test_restore_cuts_the_log_back(tmp_path):
    topology, system, positions = chain_system()
    cvs = [gbo.dihedral(0, 1, 2, 3)]
    link = gbo.attach(system, cvs, dihedral_bias(cvs))
    sim = simulation(topology, system, positions)
    rep = link.reporter(stride=10, checkpoint=tmp_path / "run.gbz", checkpoint_every=100, log=tmp_path / "run.gbl")
    sim.reporters.append(rep)
    sim.step(150)
    assert read_cvlog(tmp_path / "run.gbl").n_records == 15
    link.restore(sim, tmp_path / "run.gbz")
    assert read_cvlog(tmp_path / "run.gbl").n_records == 10
    sim.step(50)
    assert read_cvlog(tmp_path / "run.gbl").column("step")[-1] == 150
    rep.close()
    # a fresh script reusing the log without restoring first is refused (the records would interleave)
    topology, system, positions = chain_system()
    link2 = gbo.attach(system, cvs, dihedral_bias(cvs))
    sim2 = simulation(topology, system, positions)
    sim2.reporters.append(link2.reporter(stride=10, log=tmp_path / "run.gbl"))
    with pytest.raises(gb.CVLogError, match="belongs to another run .*restore it first"):
        sim2.step(10)


def test_nan_cvs_stop_the_run(tmp_path):
    topology, system, positions = chain_system()
    cvs = [gbo.dihedral(0, 1, 2, 3)]
    link = gbo.attach(system, cvs, dihedral_bias(cvs))
    sim = simulation(topology, system, positions)
    sim.reporters.append(link.reporter(stride=10, checkpoint=tmp_path / "run.gbz", checkpoint_every=20))
    sim.step(20)
    bad = positions.copy()
    bad[2] = np.nan
    sim.context.setPositions(bad)
    with pytest.raises(gb.BlownUpError, match=r"not finite at step 30.*run\.gbz' at step 20"):
        sim.step(20)
    assert gb.checkpoint.read_checkpoint(tmp_path / "run.gbz")[0]["step"] == 20
    with pytest.raises(gb.BlownUpError, match="declared blown up at step 30.*was not touched"):
        link.save(sim, tmp_path / "run.gbz")
    assert gb.checkpoint.read_checkpoint(tmp_path / "run.gbz")[0]["step"] == 20


@pytest.mark.filterwarnings("ignore:CV .* is outside the grid")
def test_starting_point_outside_grid_warns():
    topology, system, positions = chain_system()
    cvs = [gbo.distance(0, 5)]
    bias = gbo.make_bias(cvs, lower=[0.0], upper=[0.4], bins=[40], sigma=[0.02], height=1.0, temperature=300.0)
    link = gbo.attach(system, cvs, bias)
    sim = simulation(topology, system, positions)
    sim.reporters.append(link.reporter(stride=10))
    with pytest.warns(UserWarning, match=r"starting CV values \[0\.75.*outside the grid"):
        sim.step(10)


def test_checkpoint_lock_and_temperature_warning(tmp_path):
    topology, system, positions = chain_system()
    cvs = [gbo.dihedral(0, 1, 2, 3)]
    bias = gbo.make_bias(cvs, lower=[-PI], upper=[PI], bins=[48], sigma=[0.3], height=1.0, temperature=350.0)
    link = gbo.attach(system, cvs, bias)
    rep = link.reporter(stride=10, checkpoint=tmp_path / "run.gbz", checkpoint_every=10)
    with pytest.raises(gb.LockError, match="in use"):
        link.reporter(stride=10, checkpoint=tmp_path / "run.gbz", checkpoint_every=10)
    sim = simulation(topology, system, positions)
    sim.reporters.append(rep)
    with pytest.warns(UserWarning, match="integrator runs at 300.0 K but the bias was made for 350.0 K"):
        sim.step(10)
    rep.close()
    link.reporter(stride=10, checkpoint=tmp_path / "run.gbz", checkpoint_every=10).close()


def test_attach_after_simulation_is_explained():
    topology, system, positions = chain_system()
    sim = simulation(topology, system, positions)
    cvs = [gbo.dihedral(0, 1, 2, 3)]
    link = gbo.attach(system, cvs, dihedral_bias(cvs))
    sim.reporters.append(link.reporter(stride=10))
    with pytest.raises(gb.ParameterError, match="before creating the Simulation"):
        sim.step(10)


def test_simulation_of_another_system_is_refused():
    topology, system, positions = chain_system()
    cvs = [gbo.dihedral(0, 1, 2, 3)]
    link = gbo.attach(system, cvs, dihedral_bias(cvs))
    _, other_system, _ = chain_system()
    sim = simulation(topology, other_system, positions)
    sim.reporters.append(link.reporter(stride=10))
    with pytest.raises(gb.ParameterError, match="not the one the bias was attached to"):
        sim.step(10)


@pytest.mark.parametrize("build, message", [
    (lambda: gbo.dihedral(1, 2, 2, 3), "atom 2 is repeated"),
    (lambda: gbo.distance(-1, 2), "atom index"),
    (lambda: gbo.distance(1.5, 2), "atom index"),
    (lambda: gbo.coordinate(0, "w"), "axis must be 'x', 'y' or 'z'"),
    (lambda: gbo.centroid_distance([], [1]), "at least one atom"),
    (lambda: gbo.centroid_distance([1, 1], [2]), "atom 1 is repeated"),
    (lambda: gbo.distance_combination([(0, 1), (1, 2)], [1.0]), "2 finite numbers"),
    (lambda: gbo.distance_combination([(0, 1), (0, 1)], [1.0, 1.0]), "pair is repeated"),
    (lambda: gbo.from_force("not a force"), "needs an openmm.Force"),
])
def test_bad_cv_definitions(build, message):
    with pytest.raises(gb.ParameterError, match=message):
        build()


def test_bad_attach_arguments():
    topology, system, positions = chain_system()
    d = gbo.dihedral(0, 1, 2, 3)
    ok = dihedral_bias([d])
    with pytest.raises(gb.ParameterError, match="atom index 9 but the System has 6 particles"):
        gbo.attach(system, [gbo.dihedral(0, 1, 2, 9)], ok)
    with pytest.raises(gb.ParameterError, match="CV 0 .dihedral. is periodic but grid axis 0 is not"):
        gbo.attach(system, [d], gb.GridBias(gb.Grid([-PI], [PI], [40]), [0.3], 1.0, 300.0))
    with pytest.raises(gb.ParameterError, match="has period 6.28.* spans 3.14"):
        gbo.attach(system, [d], gb.GridBias(gb.Grid([0], [PI], [40], [True]), [0.3], 1.0, 300.0))
    with pytest.raises(gb.ParameterError, match="CV 0 .distance. is not periodic but grid axis 0 is periodic"):
        gbo.attach(system, [gbo.distance(0, 1)], gb.GridBias(gb.Grid([-PI], [PI], [40], [True]), [0.3], 1.0, 300.0))
    with pytest.raises(gb.ParameterError, match="2 CV axes but 1 CVs"):
        gbo.attach(system, [d], dihedral_bias([d, gbo.dihedral(1, 2, 3, 4)]))
    with pytest.raises(gb.ParameterError, match="force_group must be an integer 0..31, got 32"):
        gbo.attach(system, [d], ok, force_group=32)
    with pytest.raises(gb.ParameterError, match="pending_hills must be an integer 0..64"):
        gbo.attach(system, [d], ok, pending_hills=-1)
    with pytest.raises(gb.ParameterError, match="route must be 'auto', 'compound' or 'cvforce'"):
        gbo.attach(system, [d], ok, route="fast")
    with pytest.raises(gb.ParameterError, match="cvs\\[0\\] must be a CV"):
        gbo.attach(system, [(0, 1, 2, 3)], ok)
    bonds = system.getForce(0)
    with pytest.raises(gb.ParameterError, match="is force 0 of the System"):
        gbo.attach(system, [gbo.from_force(bonds)], gb.GridBias(gb.Grid([0.0], [10.0], [40]), [0.5], 1.0, 300.0))
    gbo.attach(system, [d], ok)
    with pytest.raises(gb.ParameterError, match="already attached.*pass another name"):
        gbo.attach(system, [d], ok)
    with pytest.warns(UserWarning, match="already in force group 31"):
        gbo.attach(system, [d], ok, name="second")
    boxed = mm.System()
    boxed.addParticle(1.0)
    boxed.setDefaultPeriodicBoxVectors(mm.Vec3(2, 0, 0), mm.Vec3(0, 2, 0), mm.Vec3(0, 0, 2))
    nonbonded = mm.NonbondedForce()
    nonbonded.setNonbondedMethod(mm.NonbondedForce.PME)
    nonbonded.addParticle(0.0, 0.3, 0.5)
    boxed.addForce(nonbonded)
    with pytest.raises(gb.ParameterError, match="coordinate. needs a System without a periodic box"):
        gbo.attach(boxed, [gbo.coordinate(0, "x")], gb.GridBias(gb.Grid([0.0], [2.0], [40]), [0.2], 1.0, 300.0))


@pytest.mark.parametrize("kwargs, message", [
    ({"stride": 0}, "stride must be an integer number of steps >= 1, got 0"),
    ({"stride": 2.5}, "stride must be an integer"),
    ({"stride": 10, "checkpoint_every": 100}, "checkpoint_every needs checkpoint="),
    ({"stride": 10, "checkpoint": "x.gbz"}, "needs checkpoint_every="),
    ({"stride": 10, "log_every": 5}, "log_every needs log="),
])
def test_bad_reporter_arguments(kwargs, message):
    topology, system, positions = chain_system()
    cvs = [gbo.dihedral(0, 1, 2, 3)]
    link = gbo.attach(system, cvs, dihedral_bias(cvs))
    with pytest.raises(gb.ParameterError, match=message):
        link.reporter(**kwargs)


def test_units_are_converted():
    """Quantities: degrees -> rad, angstrom -> nm, kcal/mol -> kJ/mol (x 4.184), Celsius not accepted."""
    cvs = [gbo.dihedral(0, 1, 2, 3), gbo.distance(0, 4)]
    bias = gbo.make_bias(cvs, lower=[-180 * unit.degree, 2 * unit.angstrom], upper=[180 * unit.degree, 1.2],
                         bins=[36, 50], sigma=[20 * unit.degree, 0.5 * unit.angstrom],
                         height=0.5 * unit.kilocalorie_per_mole, temperature=300 * unit.kelvin,
                         walls=[{"cv": 1, "bound": 10 * unit.angstrom, "side": "above",
                                 "k": 1.0 * unit.kilocalorie_per_mole / unit.angstrom**2}])
    assert bias.grid.lower.tolist() == pytest.approx([-PI, 0.2])
    assert bias.grid.periodic.tolist() == [True, False]
    assert bias.sigma.tolist() == pytest.approx([math.radians(20), 0.05])
    assert bias.height == pytest.approx(2.092)
    assert bias.walls[0].bound == pytest.approx(1.0) and bias.walls[0].k == pytest.approx(418.4)
    with pytest.raises(gb.ParameterError, match="sigma\\[1\\] must be in units compatible with nanometer"):
        gbo.make_bias(cvs, lower=[-PI, 0.2], upper=[PI, 1.2], bins=[36, 50], sigma=[0.3, 1 * unit.kelvin],
                      height=1.0, temperature=300.0)


def test_import_without_openmm_explains_the_extra():
    """`import gridbias.openmm` works without OpenMM; using it names the pip extra."""
    code = ("import sys; sys.modules['openmm'] = None\n"
            "from gridbias import openmm as gbo\n"
            "cv = gbo.dihedral(0, 1, 2, 3)\n"
            "try:\n    gbo.attach(None, [cv], None)\nexcept ImportError as e:\n    print('ImportError:', e)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert "ImportError:" in out.stdout and "pip install 'gridbias[openmm]'" in out.stdout, out.stderr


def test_deposit_outside_grid_keeps_engine_in_step():
    """A CV outside a non-periodic axis deposits nothing (core rule) and the engine stays equal to it."""
    topology, system, positions = chain_system()
    cvs = [gbo.distance(0, 5)]
    bias = gbo.make_bias(cvs, lower=[0.0], upper=[0.4], bins=[40], sigma=[0.02], height=1.0, temperature=300.0)
    link = gbo.attach(system, cvs, bias, pending_hills=2)
    sim = simulation(topology, system, positions)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert link.deposit(sim) == 0.0
    assert bias.n_outside == 1 and link.bias_energy(sim) == 0.0
