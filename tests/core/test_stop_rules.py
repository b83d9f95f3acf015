"""Stop rules and a self-stopping run of a Python MD loop (the core BAOAB driver, Leimkuhler & Matthews 2013).

Checked: each rule stops the run for its reason and records it in the checkpoint; running the same loop
again continues an unfinished run and does nothing more for a finished one; a time budget ends a run
mid-way with a checkpoint that continues. Thresholds of the verdict: see tests/analysis/.
"""

import time

import numba
import numpy as np
import pytest

import gridbias as gb
from gridbias import stopping
from gridbias.analysis import assess_convergence, basins_from_boxes
from gridbias.checkpoint import read_checkpoint
from gridbias.core_run import CHECKPOINT_KIND, StoppingRun
from gridbias.errors import ParameterError
from gridbias.testsystems import DoubleWell, run_langevin

pytestmark = pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics")

T = 300.0
KT = gb.KB * T
GRID = gb.Grid([-2.0], [2.0], [200])
BOXES = basins_from_boxes(GRID, {"L": ([-1.5], [-0.05]), "R": ([0.05], [1.5])})
WELL = DoubleWell(barrier=20.0, tilt=3.0)
DT, STRIDE = 0.005, 50


def new_bias(gamma=6.0):
    walls = [gb.Wall(0, 1.6, 500.0, "above"), gb.Wall(0, -1.6, 500.0, "below")]
    return gb.GridBias(GRID, sigma=[0.1], height=2.0, temperature=T, bias_factor=gamma, walls=walls)


def simulate(path, rules, *, seed=1, bias=None, max_loops=100_000):
    """The user's script: a Langevin loop that deposits every STRIDE steps and stops when a rule holds."""
    bias = new_bias() if bias is None else bias
    run = StoppingRun(bias, rules, checkpoint=path, checkpoint_every=20 * STRIDE)
    rng = np.random.default_rng(seed + run.step)
    x, v = (run.state["x"], run.state["v"]) if run.state else (np.array([-1.0]), None)
    loops = 0
    while run.decision is None and loops < max_loops:
        traj = run_langevin(WELL, x, v0=v, n_steps=STRIDE, dt=DT, friction=5.0, temperature=T, rng=rng,
                            bias=bias, record_every=STRIDE)
        x, v = traj.positions[-1], traj.velocities[-1]
        t = run.time + STRIDE * DT
        frame_bias = float(traj.bias_energies[-1])
        bias.deposit(x, time=t)
        run.advance(STRIDE, time=t, cvs=x, frame_bias=frame_bias, state={"x": x, "v": v})
        loops += 1
    run.close()
    return run, bias, loops


def test_max_steps_stops_and_a_second_run_does_nothing_more(tmp_path):
    path = tmp_path / "run.gbz"
    run, bias, loops = simulate(path, stopping.MaxSteps(3_000))
    assert run.decision.rule == "MaxSteps(3000)" and run.step == 3_000 and loops == 60
    meta, arrays = read_checkpoint(path, kind=CHECKPOINT_KIND)
    assert meta["stop"]["rule"] == "MaxSteps(3000)" and meta["step"] == 3_000
    assert arrays["frames.cvs"].shape == (60, 1) and arrays["bias.hill_centers"].shape == (60, 1)
    again, bias2, loops2 = simulate(path, stopping.MaxSteps(3_000))
    assert loops2 == 0 and again.step == 3_000 and bias2.n_hills == 60
    assert str(again.decision) == str(run.decision)
    np.testing.assert_array_equal(bias2.values, bias.values)


def test_time_budget_ends_mid_run_and_the_same_script_continues(tmp_path):
    path = tmp_path / "run.gbz"
    rules = stopping.TimeBudget(1.5, margin=0.5) | stopping.MaxSteps(10**9)
    started = time.time()
    first, _, _ = simulate(path, rules)
    assert first.decision.rule.startswith("TimeBudget") and 0 < first.step < 10**9
    assert "budget used" in first.decision.reason
    assert time.time() - started < 1.5  # stopped inside the budget, with the final checkpoint written
    meta, _ = read_checkpoint(path, kind=CHECKPOINT_KIND)
    assert meta["stop"]["rule"].startswith("TimeBudget") and meta["step"] == first.step
    # the next queue job: a fresh budget; a run stopped by its budget continues where it stopped
    goal = first.step + 5_000
    second, bias, _ = simulate(path, stopping.TimeBudget(600, margin=1) | stopping.MaxSteps(goal), seed=2)
    assert second.decision.rule == f"MaxSteps({goal})" and second.step == goal
    assert bias.n_hills == goal // STRIDE


def test_time_budget_shortens_the_stretch_to_end_before_the_margin():
    rule = stopping.TimeBudget(100.0, margin=10.0, started=time.time() - 85.0)  # 5 s left
    progress = stopping.Progress(0, 0.0, new_bias(), 85.0, seconds_per_step=0.01)
    assert 400 <= rule.steps_left(progress) <= 500
    assert rule.evaluate(progress) is None
    late = stopping.TimeBudget(100.0, margin=10.0, started=time.time() - 95.0)
    assert "budget used" in late.evaluate(progress)


def test_enters_basin_stops_at_the_first_entry(tmp_path):
    run, bias, _ = simulate(tmp_path / "run.gbz", stopping.EntersBasin(BOXES, "R") | stopping.MaxSteps(10**6))
    assert run.decision.rule == "EntersBasin(R)" and "entered basin R" in run.decision.reason
    cvs = np.array(run._cvs)
    inside = BOXES.assign(cvs) == 1
    assert inside[-1] and not inside[:-1].any()  # stopped at the first frame in R
    assert "(started in L)" in run.decision.reason
    # "any basin other than the start" finds the same first entry
    other, _, _ = simulate(tmp_path / "other.gbz", stopping.EntersBasin(BOXES) | stopping.MaxSteps(10**6))
    assert other.step == run.step


def test_converged_stops_a_well_tempered_run_and_records_the_verdict(tmp_path):
    # this toy MD is so cheap that the default 1 % share of the run would allow hardly any check: allow 10 %,
    # with numba's kernels of the analysis loaded beforehand (the first call of a process loads them)
    warm = new_bias()
    warm.deposit([-1.0], time=1.0)
    assess_convergence(warm, BOXES)
    rule = stopping.Converged(basins=BOXES, max_cost_fraction=0.1)
    run, bias, _ = simulate(tmp_path / "run.gbz", rule | stopping.MaxSteps(3_000_000))
    assert run.decision.rule == "Converged()", run.decision
    assert rule.last_verdict.converged and len(rule.last_verdict.criteria) == 4  # with the cross-check
    assert rule.n_checks >= 2 and rule.cost_seconds > 0


def test_error_below_stops_when_the_named_difference_is_precise_enough(tmp_path):
    rule = stopping.ErrorBelow(BOXES, "R", "L", 1.0, max_cost_fraction=1.0)
    run, _, _ = simulate(tmp_path / "run.gbz", rule | stopping.MaxSteps(1_000_000))
    assert run.decision.rule == "ErrorBelow(R - L <= 1 kJ/mol)", run.decision
    assert 0 < rule.last_error <= 1.0 and "+/-" in run.decision.reason


def test_rules_combine():
    bias = new_bias()
    both = stopping.MaxSteps(100) & stopping.MaxSteps(200)
    assert both.evaluate(stopping.Progress(150, 0.0, bias, 0.0)) is None
    assert both.evaluate(stopping.Progress(200, 0.0, bias, 0.0)) is not None
    either = stopping.MaxSteps(300) | both
    assert either.describe() == "MaxSteps(300) | (MaxSteps(100) & MaxSteps(200))"
    assert either.steps_left(stopping.Progress(150, 0.0, bias, 0.0)) == 50


def test_bad_rules_and_runs_are_refused(tmp_path):
    with pytest.raises(ParameterError, match="n_steps must be an integer >= 1"):
        stopping.MaxSteps(0)
    with pytest.raises(ParameterError, match="margin .* must be shorter than the budget"):
        stopping.TimeBudget(60, margin=60)
    with pytest.raises(ParameterError, match="basin 'X' is not a basin name"):
        stopping.ErrorBelow(BOXES, "X", "L", 0.5)
    with pytest.raises(ParameterError, match="unknown threshold"):
        stopping.Converged(drift=1)
    with pytest.raises(ParameterError, match="max_height_fraction must be in"):
        stopping.Converged(max_height_fraction=1.5)
    with pytest.raises(ParameterError, match="rules must be a StopRule"):
        StoppingRun(new_bias(), "converged", checkpoint=tmp_path / "x.gbz")
    run = StoppingRun(new_bias(), stopping.MaxSteps(10), checkpoint=tmp_path / "y.gbz")
    with pytest.raises(ParameterError, match="cvs must be 1 finite values"):
        run.advance(10, time=1.0, cvs=[np.nan])
    assert run.step == 0  # a refused call changes nothing
    run.advance(10, time=1.0)
    with pytest.raises(ParameterError, match="already stopped"):
        run.advance(10, time=2.0)
