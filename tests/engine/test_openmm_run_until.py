"""``BiasLink.run_until``: an OpenMM script that stops itself, records why, and continues when run again.

One particle in the tilted quartic double well h (x^2 - 1)^2 + t x (closed form; minima near x = -1, +1),
held near the x axis by a harmonic well in y and z, biased along x (OpenMM's Reference platform).
"""

import time

import numpy as np
import pytest

mm = pytest.importorskip("openmm")

from openmm import app  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias import stopping  # noqa: E402
from gridbias.analysis import basins_from_boxes  # noqa: E402
from gridbias.runs import read_run_checkpoint  # noqa: E402

pytestmark = pytest.mark.openmm


def script(folder, rules, *, seed=5):
    """What a user writes: build, attach, add the reporter, run until the rules hold."""
    system = mm.System()
    system.addParticle(1.0)
    well = mm.CustomExternalForce("20*(x^2-1)^2 + 3*x + 50*(y^2+z^2)")
    well.addParticle(0, [])
    system.addForce(well)
    cvs = [gbo.coordinate(0, "x", name="x")]
    bias = gbo.make_bias(cvs, lower=[-2.0], upper=[2.0], bins=[200], sigma=[0.1], height=2.0,
                         temperature=300.0, bias_factor=6.0)
    link = gbo.attach(system, cvs, bias)
    integrator = mm.LangevinMiddleIntegrator(300.0, 5.0, 0.005)
    integrator.setRandomNumberSeed(seed)
    topology = app.Topology()
    topology.addAtom("P", None, topology.addResidue("P", topology.addChain()))
    simulation = app.Simulation(topology, system, integrator, mm.Platform.getPlatformByName("Reference"))
    simulation.context.setPositions([[-1.0, 0.0, 0.0]])
    simulation.context.setVelocitiesToTemperature(300.0, seed)
    reporter = link.reporter(50, checkpoint=folder / "run.gbz", checkpoint_every=5_000, log=folder / "run.gbl")
    simulation.reporters.append(reporter)
    try:
        decision = link.run_until(simulation, rules)
    finally:
        reporter.close()
    return decision, link, simulation


GRID_BOXES = {"L": ([-1.5], [-0.05]), "R": ([0.05], [1.5])}


def test_max_steps_stops_records_and_a_second_run_does_nothing_more(tmp_path):
    decision, link, simulation = script(tmp_path, stopping.MaxSteps(4_000))
    assert decision.rule == "MaxSteps(4000)" and simulation.currentStep == 4_000
    saved = read_run_checkpoint(tmp_path / "run.gbz")
    assert saved.step == 4_000 and saved.stop["rule"] == "MaxSteps(4000)"
    again, link2, simulation2 = script(tmp_path, stopping.MaxSteps(4_000))
    assert again == decision and simulation2.currentStep == 4_000
    assert link2.bias.n_hills == link.bias.n_hills == 80
    # a larger limit is another rule: the run continues to it
    longer, link3, simulation3 = script(tmp_path, stopping.MaxSteps(5_000))
    assert longer.rule == "MaxSteps(5000)" and simulation3.currentStep == 5_000 and link3.bias.n_hills == 100


def test_a_budget_that_ends_mid_run_and_the_next_job_continues(tmp_path):
    started = time.time()
    first, link, simulation = script(tmp_path, stopping.TimeBudget(2.0, margin=1.0) | stopping.MaxSteps(10**8))
    assert first.rule.startswith("TimeBudget") and 0 < simulation.currentStep < 10**8
    assert time.time() - started < 2.0 + 1.0  # inside the budget (the margin covers the final checkpoint)
    assert read_run_checkpoint(tmp_path / "run.gbz").step == simulation.currentStep
    goal = simulation.currentStep + 1_000
    second, link2, simulation2 = script(tmp_path, stopping.TimeBudget(600.0, margin=1.0) | stopping.MaxSteps(goal))
    assert second.rule == f"MaxSteps({goal})" and simulation2.currentStep == goal
    assert link2.bias.n_hills == goal // 50


def test_enters_basin_reads_the_cv_log(tmp_path):
    from gridbias.cvlog import read_cvlog

    boxes = basins_from_boxes(gb.Grid([-2.0], [2.0], [200]), GRID_BOXES)
    decision, _, simulation = script(tmp_path, stopping.EntersBasin(boxes, "R") | stopping.MaxSteps(10**6))
    assert decision.rule == "EntersBasin(R)" and "entered basin R" in decision.reason
    log = read_cvlog(tmp_path / "run.gbl")
    entered = int(np.flatnonzero(log.column("x") > 0.05)[0])
    # stopped within one stretch (10 strides of 50 steps) of the first logged frame inside R
    assert 0 <= simulation.currentStep - log.column("step")[entered] <= 500
