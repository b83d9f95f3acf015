"""The convergence verdict: each criterion's value, threshold and outcome; "converged" only if all hold.

Thresholds are common practice (no source): drift < 0.5 kBT over the last 25% of the run, >= 10 core-to-core
transitions, well-tempered hills <= 5% of the initial height (REFERENCES.md 9). Well-tempered heights decay
as w0 exp(-V/(kB dT)) (Barducci, Bussi & Parrinello, PRL 100, 020603, 2008).
"""

import numba
import numpy as np
import pytest

import gridbias as gb
from gridbias.analysis import (
    BasinDifferences,
    ConvergenceVerdict,
    assess_convergence,
    basins_from_boxes,
    drift_criterion,
    find_basins,
    height_criterion,
    surface_at,
    transition_criterion,
)
from gridbias.errors import ParameterError

T = 300.0
KT = gb.KB * T


def differences(values_kt, times=None):
    values = np.asarray(values_kt, dtype=float) * KT
    times = np.linspace(0.0, 100.0, values.size) if times is None else np.asarray(times, dtype=float)
    table = np.column_stack([np.zeros_like(values), values])
    return BasinDifferences(("A", "B"), 0, times, table, None, None, KT, "bias")


def test_drift_passes_when_the_late_values_stay_within_the_tolerance():
    # early wandering does not matter; over the last 25 % (t >= 75: the last 11 values) the estimates
    # scatter by 0.1 kT about a flat line
    late = [2.05, 2.0, 1.9, 2.1, 2.0, 1.95, 2.05, 2.1, 1.9, 2.0, 2.0]
    values = [5.0, 3.0, 1.0, 2.5] + [2.0] * 26 + late
    criterion = drift_criterion(differences(values))
    assert criterion.passed and criterion.comparison == "<" and criterion.threshold > 0.5
    # the drift is the change of a least-squares line over the window (numpy.polyfit as the reference)
    t = np.linspace(0.0, 100.0, len(values))[-11:]
    slope = np.polyfit(t, late, 1)[0]
    assert criterion.measured == pytest.approx(abs(slope) * (t[-1] - t[0]))
    assert "+/-" in criterion.detail and "standard errors" in criterion.detail


def test_drift_fails_on_a_steady_trend():
    values = np.linspace(0.0, 4.0, 17)  # 1 kT over the last quarter, no noise
    criterion = drift_criterion(differences(values))
    assert not criterion.passed and criterion.measured == pytest.approx(1.0)
    assert criterion.threshold == pytest.approx(0.5)


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5, 6])
def test_drift_is_compared_with_its_own_noise(seed):
    # 100 estimates with independent Gaussian noise (0.4 kT): a flat series passes although single values
    # stray by up to ~1 kT from the last one; the same noise on a 1.5 kT trend over the window fails.
    rng = np.random.default_rng(seed)
    noise = rng.normal(0.0, 0.4, 100)
    flat = drift_criterion(differences(2.0 + noise))
    window = noise[-25:]
    assert np.max(np.abs(window - window[-1])) > 0.5  # the old max-change rule would have failed it
    assert flat.passed, flat.detail
    trend = np.concatenate([np.full(75, 2.0), 2.0 + np.linspace(0.0, 1.5, 25)])
    assert not drift_criterion(differences(trend + noise)).passed


def test_drift_too_noisy_to_tell_fails():
    noise = np.random.default_rng(7).normal(0.0, 3.0, 100)
    criterion = drift_criterion(differences(2.0 + noise))
    assert not criterion.passed and "cannot be told from noise" in criterion.detail


@pytest.mark.parametrize(
    "result, reason",
    [
        (differences([1.0, 1.0, 1.0], times=[0.0, 10.0, 100.0]), "fewer than four estimates"),
        (differences([np.nan] + [1.0] * 34 + [np.nan, 1.0, 1.0, 1.0]), "no estimate somewhere"),
        (BasinDifferences(("A",), 0, np.arange(3.0), np.zeros((3, 1)), None, None, KT, "bias"),
         "fewer than two"),
    ],
)
def test_drift_that_cannot_be_measured_fails(result, reason):
    criterion = drift_criterion(result)
    assert not criterion.passed and np.isnan(criterion.measured) and reason in criterion.detail


def test_transitions_criterion():
    labels = np.tile([0, -1, 1, -1], 6)  # 11 transitions A -> B -> A ...
    assert transition_criterion(labels, 2).passed
    failing = transition_criterion(labels, 2, min_transitions=12)
    assert not failing.passed and failing.measured == 11.0 and "needed >= 12" in failing.detail


def wt_bias(final_fraction, n=40):
    grid = gb.Grid([-2.0], [2.0], [100])
    bias = gb.GridBias(grid, sigma=[0.1], height=2.0, temperature=T, bias_factor=6.0)
    heights = 2.0 * np.geomspace(1.0, final_fraction, n)
    bias.add_hills(np.linspace(-1, 1, n)[:, None], heights, np.arange(n, dtype=float))
    return bias


def test_height_criterion_uses_the_mean_of_the_recent_hills():
    passing = height_criterion(wt_bias(0.01))
    assert passing.passed and passing.measured < 0.05
    expected = np.mean(2.0 * np.geomspace(1.0, 0.01, 40)[-10:]) / 2.0
    assert passing.measured == pytest.approx(expected)
    failing = height_criterion(wt_bias(0.3))
    assert not failing.passed and failing.measured > 0.3
    standard = gb.GridBias(gb.Grid([-2.0], [2.0], [100]), sigma=[0.1], height=2.0, temperature=T)
    with pytest.raises(ParameterError, match="well-tempered runs only"):
        height_criterion(standard)


def test_verdict_says_converged_only_when_every_criterion_holds():
    holds = drift_criterion(differences([2.0] * 20))
    fails = transition_criterion(np.zeros(10, dtype=int), 2)
    good = ConvergenceVerdict((holds,))
    bad = ConvergenceVerdict((holds, fails))
    assert good.converged and "converged" in good.render()
    assert not bad.converged and "converged" not in bad.render().lower()
    assert "1 of 2 criteria hold" in bad.render()
    assert not ConvergenceVerdict(()).converged
    for line in (holds.line(), fails.line()):
        assert line in bad.render()


@pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics")
@pytest.mark.parametrize("n_deposits, expected", [(1_000, False), (40_000, True)])
def test_verdict_on_real_well_tempered_runs(n_deposits, expected):
    # A short run fails (hills still high, differences moving); a long one passes every criterion.
    from gridbias.testsystems import DoubleWell, run_metadynamics

    potential = DoubleWell(barrier=20.0, tilt=3.0)
    grid = gb.Grid([-2.0], [2.0], [200])
    walls = [gb.Wall(0, 1.6, 500.0, "above"), gb.Wall(0, -1.6, 500.0, "below")]
    bias = gb.GridBias(grid, sigma=[0.1], height=2.0, temperature=T, bias_factor=6.0, walls=walls)
    traj = run_metadynamics(potential, bias, [-1.0], n_deposits=n_deposits, stride=50, dt=0.005, friction=5.0,
                            rng=np.random.default_rng(3), record_every=10)
    found = find_basins(grid, surface_at(bias).free_energy, KT)
    verdict = assess_convergence(bias, found, frame_times=traj.times, frame_cvs=traj.positions)
    assert [c.name for c in verdict.criteria] == ["basin differences stable", "transitions between basins",
                                                  "hill height decayed"]
    assert verdict.converged is expected
    assert ("converged" in verdict.render().lower()) is expected
    # without frames the CV at each deposit is used for the transitions
    assert "the CV at each deposit" in assess_convergence(bias, found).render()


def test_standard_runs_skip_the_height_criterion_and_say_so(rng):
    grid = gb.Grid([-2.0], [2.0], [100])
    bias = gb.GridBias(grid, sigma=[0.1], height=1.0, temperature=T)
    for i, s in enumerate(rng.uniform(-1.5, 1.5, 50)):
        bias.deposit([s], time=float(i))
    basins = basins_from_boxes(grid, {"L": ([-1.5], [-0.5]), "R": ([0.5], [1.5])})
    verdict = assess_convergence(bias, basins)
    assert len(verdict.criteria) == 2
    assert any("does not apply to standard metadynamics" in note for note in verdict.notes)
    with pytest.raises(ParameterError, match="give both frame_times and frame_cvs"):
        assess_convergence(bias, basins, frame_times=[0.0])


def test_hills_without_time_are_assessed_in_deposition_order(rng):
    grid = gb.Grid([-2.0], [2.0], [100])
    bias = gb.GridBias(grid, sigma=[0.1], height=1.0, temperature=T, bias_factor=5.0)
    for s in rng.uniform(-1.5, 1.5, 80):
        bias.deposit([s])  # no time recorded
    basins = basins_from_boxes(grid, {"L": ([-1.5], [-0.5]), "R": ([0.5], [1.5])})
    verdict = assess_convergence(bias, basins, n_points=20)
    drift = verdict.criteria[0]
    assert np.isfinite(drift.measured) and "no simulated time recorded" in drift.detail
