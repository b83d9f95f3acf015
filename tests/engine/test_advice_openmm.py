"""advise_from_simulation: a short unbiased OpenMM run measured against closed forms; its code runs.

Three independent particles in a harmonic well U = k |r|^2 / 2 under OpenMM's LangevinMiddleIntegrator:
each coordinate fluctuates with sd sqrt(kB T / k) (equipartition) and has the integrated autocorrelation
time gamma m / k (Langevin harmonic oscillator; integrate C'' + gamma C' + (k/m) C = 0 from 0 to infinity;
the Ornstein-Uhlenbeck value 1/lambda in the overdamped limit, Uhlenbeck & Ornstein 1930, from memory).
"""

import math

import numpy as np
import pytest

openmm = pytest.importorskip("openmm")
from openmm import app, unit  # noqa: E402

from gridbias import KB, ParameterError  # noqa: E402
from gridbias import advice as adv  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402

pytestmark = pytest.mark.openmm
K, MASS, FRICTION, DT, T = 100.0, 1.0, 10.0, 0.005, 300.0


def _system():
    system = openmm.System()
    well = openmm.CustomExternalForce("0.5*k*(x^2+y^2+z^2)")
    well.addGlobalParameter("k", K)
    topology = app.Topology()
    chain = topology.addChain()
    for i in range(3):
        system.addParticle(MASS)
        well.addParticle(i, [])
        topology.addAtom("Ar", app.element.argon, topology.addResidue("AR", chain))
    system.addForce(well)
    return topology, system


def _simulation(topology, system, seed):
    integrator = openmm.LangevinMiddleIntegrator(T * unit.kelvin, FRICTION / unit.picosecond,
                                                 DT * unit.picosecond)
    integrator.setRandomNumberSeed(seed)
    simulation = app.Simulation(topology, system, integrator, openmm.Platform.getPlatformByName("Reference"))
    simulation.context.setPositions(np.zeros((3, 3)))
    simulation.context.setVelocitiesToTemperature(T, seed)
    return simulation


CVS = [gbo.coordinate(i, "x", name=f"x{i}") for i in range(3)]


@pytest.mark.parametrize("seed", [5, 6])
def test_short_openmm_run_matches_closed_forms(seed, tmp_path):
    topology, system = _system()
    simulation = _simulation(topology, system, seed)
    advice = gbo.advise_from_simulation(simulation, CVS, duration=200 * unit.picosecond,
                                        sample_interval=0.02 * unit.picosecond, cv_range=[(-1.0, 1.0)] * 3,
                                        barrier=20 * unit.kilojoule_per_mole, log=tmp_path / "short.gbl",
                                        progress=False)
    sd, tau = math.sqrt(KB * T / K), FRICTION * MASS / K
    for s in advice.statistics:
        assert abs(s.fluctuation - sd) < 4 * sd * math.sqrt(tau / 200.0), s.line()
        assert s.decayed and abs(s.autocorrelation_time - tau) < 4 * s.autocorrelation_error, s.line()
    assert advice.timestep == pytest.approx(DT) and advice.temperature == pytest.approx(T)
    again = adv.advise_from_file(tmp_path / "short.gbl", cv_range=[(-1.0, 1.0)] * 3, barrier=20.0)
    assert again.code() == advice.code()


def test_pasted_code_runs_the_biased_simulation(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    topology, system = _system()
    cvs = CVS[:2]  # a 2-D grid: a 3-D table of this resolution is costly to push
    advice = gbo.advise_from_simulation(_simulation(topology, system, 7), cvs, duration=50.0,
                                        sample_interval=0.02, cv_range=[(-1.0, 1.0)] * 2, barrier=20.0,
                                        progress=False)
    code = advice.code().replace(adv.SIMULATION_LINE, "simulation = make_simulation(topology, system, 8)")
    namespace = {"gbo": gbo, "cvs": cvs, "system": system, "topology": topology,
                 "make_simulation": _simulation}
    exec(compile(code, "advice", "exec"), namespace)
    simulation, link = namespace["simulation"], namespace["link"]
    simulation.step(10 * advice.stride)
    assert link.bias.n_hills == 10 and link.bias.bias_factor == advice.bias_factor
    for reporter in simulation.reporters:
        reporter.close()


def test_bad_input(tmp_path):
    topology, system = _system()
    simulation = _simulation(topology, system, 9)
    (tmp_path / "old.gbl").write_bytes(b"")
    with pytest.raises(ParameterError, match="already exists"):
        gbo.advise_from_simulation(simulation, CVS, duration=10.0, log=tmp_path / "old.gbl", progress=False)
    with pytest.raises(ParameterError, match="at least 100 are needed"):
        gbo.advise_from_simulation(simulation, CVS, duration=1.0, progress=False)
    force_cv = gbo.from_force(openmm.CustomExternalForce("x"))
    with pytest.raises(ParameterError, match="from_force CV"):
        gbo.advise_from_simulation(simulation, [force_cv], duration=10.0, progress=False)
    with pytest.raises(ParameterError, match="atom 7"):
        gbo.advise_from_simulation(simulation, [gbo.distance(0, 7)], duration=10.0, progress=False)
    with pytest.raises(ParameterError, match="duration must be in units compatible"):
        gbo.advise_from_simulation(simulation, CVS, duration=10 * unit.kelvin, progress=False)
