"""The convergence verdict cannot be fooled by its own run: estimator cross-check and drift against noise.

Both directions on analytic models driven by the core's BAOAB Langevin driver (Leimkuhler & Matthews 2013):
- hidden flip: a double well in x whose tilt is set by a slow, unbiased double well in y
  (SwitchingDoubleWell); y flips once during the run, so the surface changes under the CV. The final bias
  adapts to the new state while the frames reweighted with c(t) (Tiwary & Parrinello, J. Phys. Chem. B 119,
  736, 2015) remember the old one: the verdict must fail and name the cross-check.
- easy runs: the tilted quartic double well biased along its only coordinate, well-tempered (Barducci, Bussi
  & Parrinello, PRL 100, 020603, 2008) at bias factors 4, 8 and 15: the verdict must pass, and the surface
  is within 0.5 kBT of the exact basin difference (closed-form potential, scipy quadrature).
"""

import numba
import numpy as np
import pytest
from scipy import integrate

import gridbias as gb
from gridbias.analysis import (
    BasinDifferences,
    agreement_criterion,
    assess_convergence,
    basin_differences_from_bias,
    basins_from_boxes,
)
from gridbias.errors import ParameterError
from gridbias.testsystems import DoubleWell, SwitchingDoubleWell, run_metadynamics

T = 300.0
KT = gb.KB * T
GRID = gb.Grid([-2.0], [2.0], [200])
BASINS = basins_from_boxes(GRID, {"L": ([-1.5], [-0.05]), "R": ([0.05], [1.5])})
needs_jit = pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics")


def run(potential, gamma, seed, n_deposits=20_000):
    """5 ns of well-tempered metadynamics along x (hills of 2 kJ/mol every 0.25 ps, sigma 0.1 nm)."""
    walls = [gb.Wall(0, 1.6, 500.0, "above"), gb.Wall(0, -1.6, 500.0, "below")]
    bias = gb.GridBias(GRID, sigma=[0.1], height=2.0, temperature=T, bias_factor=gamma, walls=walls)
    start = [-1.0, 1.0][: potential.ndim]
    traj = run_metadynamics(potential, bias, start, n_deposits=n_deposits, stride=50, dt=0.005, friction=5.0,
                            rng=np.random.default_rng(seed), record_every=10, cv=[0])
    verdict = assess_convergence(bias, BASINS, frame_times=traj.times, frame_cvs=traj.positions[:, :1],
                                 frame_bias=traj.bias_energies)
    return bias, traj, verdict


def by_name(verdict):
    return {c.name: c for c in verdict.criteria}


# --- hidden flip: must fail ----------------------------------------------------------------------------
@needs_jit
@pytest.mark.parametrize("seed", [0, 4, pytest.param(5, marks=pytest.mark.slow),
                                  pytest.param(6, marks=pytest.mark.slow)])
def test_hidden_flip_fails_the_verdict_by_the_estimator_cross_check(seed):
    bias, traj, verdict = run(SwitchingDoubleWell(), 8.0, seed)
    # precondition: y flipped exactly once, in the middle part of the run (these seeds were chosen so)
    y = traj.positions[:, 1]
    flips = np.flatnonzero(np.diff(np.sign(y)) != 0)
    assert flips.size == 1 and 0.25 < traj.times[flips[0]] / traj.times[-1] < 0.75
    criteria = by_name(verdict)
    assert not verdict.converged
    check = criteria["estimators agree"]
    assert not check.passed and check.measured > 1.5  # kBT: the two estimates differ by ~2-3 kBT
    text = verdict.render()
    assert "FAILS ] estimators agree" in text and "slow degree of freedom the CVs miss" in text
    if seed == 0:
        # the case that motivated the cross-check: every other criterion holds
        assert all(c.passed for name, c in criteria.items() if name != "estimators agree")


# --- easy runs: must pass -----------------------------------------------------------------------------
def exact_difference(potential):
    def boltzmann(a, b):
        return integrate.quad(lambda s: np.exp(-potential.free_energy([[s]], temperature=T)[0] / KT), a, b)[0]

    return -KT * np.log(boltzmann(0.05, 1.5) / boltzmann(-1.5, -0.05))


@needs_jit
@pytest.mark.parametrize("gamma", [4.0, 8.0, 15.0])
@pytest.mark.parametrize("seed", [0] + [pytest.param(s, marks=pytest.mark.slow) for s in range(1, 6)])
def test_easy_double_well_passes_at_bias_factors_4_8_15(gamma, seed):
    potential = DoubleWell(barrier=20.0, tilt=3.0)
    bias, _, verdict = run(potential, gamma, seed)
    final = basin_differences_from_bias(bias, BASINS, times=[bias.history.times[-1]]).differences[-1, 1]
    assert abs(final - exact_difference(potential)) < 0.5 * KT  # the run is right: "easy"
    assert verdict.converged, verdict.render()
    assert [c.name for c in verdict.criteria] == ["basin differences stable", "transitions between basins",
                                                  "hill height decayed", "estimators agree"]


# --- the cross-check itself ----------------------------------------------------------------------------
def table(values_kt, errors_kt=None, source="bias"):
    values = np.asarray(values_kt, dtype=float) * KT
    diffs = np.column_stack([np.zeros_like(values), values])
    errors = None
    if errors_kt is not None:
        errors = np.column_stack([np.zeros_like(values), np.asarray(errors_kt) * KT])
    plateau = None if errors is None else np.ones_like(diffs, dtype=bool)
    return BasinDifferences(("A", "B"), 0, np.linspace(0.0, 100.0, values.size), diffs, errors, plateau, KT,
                            source)


def test_agreement_within_the_combined_error_passes_and_beyond_it_fails():
    from_bias = table(np.full(40, 2.0))
    agree = agreement_criterion(from_bias, table([2.4], [0.2], "reweighted frames"))
    # allowed: 0.5 kBT + 3 x 0.2 kBT (the bias estimate is flat, so its own error is 0)
    assert agree.passed and agree.threshold == pytest.approx(1.1) and agree.measured == pytest.approx(0.4)
    differ = agreement_criterion(from_bias, table([4.0], [0.2], "reweighted frames"))
    assert not differ.passed and differ.measured == pytest.approx(2.0)
    assert "slow degree of freedom" in differ.detail
    missing = agreement_criterion(from_bias, table([np.nan], [np.nan], "reweighted frames"))
    assert not missing.passed and np.isnan(missing.measured)


def test_agreement_refuses_tables_of_other_basins():
    other = BasinDifferences(("A", "C"), 0, np.zeros(1), np.zeros((1, 2)), None, None, KT, "bias")
    with pytest.raises(ParameterError, match="same basins and reference"):
        agreement_criterion(table(np.full(10, 1.0)), other)
    with pytest.raises(ParameterError, match="frame_bias and weights need frame_times"):
        bias = gb.GridBias(GRID, sigma=[0.1], height=1.0, temperature=T, bias_factor=5.0)
        bias.deposit([0.0], time=1.0)
        assess_convergence(bias, BASINS, frame_bias=[0.0])
