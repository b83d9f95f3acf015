"""Advice from a short unbiased run: measured CV statistics against closed forms, and the rules applied.

Closed forms checked:
- Fluctuation in a harmonic well U = k x^2 / 2: sqrt(kB T / k) (equipartition).
- Integrated autocorrelation time of an Ornstein-Uhlenbeck process with relaxation rate lambda: 1/lambda
  (Uhlenbeck & Ornstein, Phys. Rev. 36, 823, 1930; from memory). For Langevin dynamics in a harmonic well
  (friction gamma, mass m) the position autocorrelation C(t) obeys C'' + gamma C' + (k/m) C = 0 with
  C'(0) = 0, so integral_0^inf C(t)/C(0) dt = gamma m / k at ANY friction (integrate the equation from 0 to
  inf; derived here). In the overdamped limit this is the OU process with lambda = k / (gamma m).
"""

import math

import numpy as np
import pytest

from gridbias import KB, ParameterError
from gridbias import advice as adv
from gridbias.analysis import autocorrelation_time, blocking_curve
from gridbias.testsystems import DoubleWell, HarmonicWell, run_langevin

SEEDS = (101, 202, 303)
T = 300.0
KT = KB * T


def exact_ou(rng, n, tau, interval, sd=1.0, x0=0.0):
    """An exactly sampled OU process (AR(1) with a = exp(-interval / tau)), stationary from the start."""
    a = math.exp(-interval / tau)
    noise = rng.standard_normal(n) * sd * math.sqrt(1.0 - a * a)
    x = np.empty(n)
    x[0] = x0 + sd * rng.standard_normal()
    for i in range(1, n):
        x[i] = x0 + a * (x[i - 1] - x0) + noise[i]
    return x


# ------------------------------------------------------------------------- autocorrelation (exact OU)
@pytest.mark.parametrize("seed", SEEDS)
def test_autocorrelation_time_of_exact_ou_process_is_inverse_relaxation_rate(seed):
    # Uhlenbeck & Ornstein 1930: rho(t) = exp(-lambda t), so tau = integral rho = 1 / lambda.
    tau, interval = 0.4, 0.02
    x = exact_ou(np.random.default_rng(seed), 50_000, tau, interval)
    est = autocorrelation_time(x, interval=interval)
    assert est.decayed
    assert abs(est.time - tau) < 4 * est.error, (est.time, est.error)
    assert est.error / tau < 0.1


def test_autocorrelation_error_matches_spread_over_seeds():
    # The Madras-Sokal error must describe the scatter of independent estimates (within a factor 2).
    tau, interval = 0.4, 0.02
    series = [exact_ou(np.random.default_rng(s), 20_000, tau, interval) for s in range(10)]
    estimates = [autocorrelation_time(x, interval=interval) for x in series]
    spread = np.std([e.time for e in estimates], ddof=1)
    mean_error = np.mean([e.error for e in estimates])
    assert 0.5 < spread / mean_error < 2.0, (spread, mean_error)


def test_autocorrelation_agrees_with_block_analysis():
    # Flyvbjerg & Petersen 1989: at the plateau, var(mean) = var(x) 2 tau / (n interval).
    tau, interval = 0.4, 0.02
    x = exact_ou(np.random.default_rng(7), 65_536, tau, interval)
    curve = blocking_curve(x)
    assert curve.plateau_found
    tau_blocks = curve.standard_error**2 * x.size / x.var() * interval / 2
    est = autocorrelation_time(x, interval=interval)
    assert abs(tau_blocks - est.time) < 0.25 * est.time


def test_uncorrelated_series_has_half_an_interval():
    est = autocorrelation_time(np.random.default_rng(3).normal(size=20_000), interval=2.0)
    assert est.time == pytest.approx(1.0, abs=0.1)


def test_random_walk_does_not_decay():
    est = autocorrelation_time(np.cumsum(np.random.default_rng(4).normal(size=5_000)), interval=1.0)
    assert not est.decayed and math.isnan(est.error)
    assert "did not decay" in est.summary()


def test_autocorrelation_bad_input():
    with pytest.raises(ParameterError, match="at least 16"):
        autocorrelation_time(np.arange(5.0))
    with pytest.raises(ParameterError, match="constant"):
        autocorrelation_time(np.ones(100))
    with pytest.raises(ParameterError, match="interval"):
        autocorrelation_time(np.arange(100.0), interval=0.0)


# --------------------------------------------------------------- Langevin in a harmonic well (core)
@pytest.mark.parametrize("seed", SEEDS)
def test_short_langevin_run_in_harmonic_well(seed):
    k, friction, mass, dt, every = 200.0, 20.0, 1.0, 0.002, 5
    traj = run_langevin(HarmonicWell(stiffness=k), [0.0], n_steps=100_000, dt=dt, friction=friction,
                        temperature=T, rng=np.random.default_rng(seed), record_every=every)
    advice = adv.advise(traj.positions, interval=dt * every, temperature=T, timestep=dt, names=["x"],
                        cv_range=[(-1.0, 1.0)], barrier=25.0)
    s = advice.statistics[0]
    run_length = 100_000 * dt
    tau_exact = friction * mass / k  # gamma m / k (module docstring)
    sd_exact = math.sqrt(KT / k)  # equipartition
    # Standard error of a standard deviation from a run of T_run: about sd sqrt(tau / T_run) (OU).
    assert abs(s.fluctuation - sd_exact) < 4 * sd_exact * math.sqrt(tau_exact / run_length)
    assert s.decayed and abs(s.autocorrelation_time - tau_exact) < 4 * s.autocorrelation_error
    assert s.n_basins == 1 and s.measured_on == "all frames"
    # The rules (common practice) applied to what was measured:
    assert advice.sigma[0] == pytest.approx(0.5 * s.fluctuation, rel=1e-3)
    spacing = (advice.upper[0] - advice.lower[0]) / advice.bins[0]
    assert spacing <= advice.sigma[0] / 3
    assert advice.stride_time == pytest.approx(3 * s.autocorrelation_time, rel=0.05)
    assert advice.height == pytest.approx(0.5 * KT, rel=1e-3)
    assert advice.bias_factor == 5.0  # 25 kJ/mol = 10 kBT -> 2 kBT under the bias
    assert [w.bound for w in advice.walls] == [-1.0, 1.0]
    assert advice.lower[0] == pytest.approx(-1.0 - 3 * advice.sigma[0], rel=1e-3)
    assert not advice.warnings


def test_pasted_code_builds_the_same_bias():
    from gridbias import openmm as gbo

    x = exact_ou(np.random.default_rng(5), 20_000, 0.1, 0.01, sd=0.1)
    phi = exact_ou(np.random.default_rng(6), 20_000, 0.2, 0.01, sd=0.3, x0=3.0)  # wraps through +-pi
    phi = (phi + np.pi) % (2 * np.pi) - np.pi
    advice = adv.advise(np.column_stack([x, phi]), interval=0.01, temperature=T, timestep=0.002,
                        names=["d", "phi"], units=["nm", "rad"], periods=[None, 2 * np.pi],
                        cv_range=[(-0.5, 0.5), None], barrier=30.0)
    assert advice.statistics[1].fluctuation == pytest.approx(0.3, rel=0.1)  # not fooled by the wrap
    assert advice.statistics[1].mean == pytest.approx(3.0, abs=0.05)
    code = advice.code()
    assert "math.pi" in code and "gbo.make_bias(cvs" in code and "link.reporter(stride=" in code
    namespace = {"gbo": gbo, "cvs": [gbo.distance(0, 1), gbo.dihedral(0, 1, 2, 3)]}
    make = code[:code.index("link = gbo.attach")]
    exec(compile(make, "advice", "exec"), namespace)
    bias, core = namespace["bias"], advice.grid_bias()
    assert bias.grid == core.grid and bias.bias_factor == core.bias_factor
    assert np.allclose(bias.sigma, core.sigma) and bias.height == core.height
    assert len(bias.walls) == 2 and bias.walls[1].bound == 0.5
    text = advice.render()
    for needed in ("fluctuation", "autocorrelation time", "sigma", "bias_factor", "stride", "height",
                   "grid[d]", "plan for", "gbo.make_bias"):
        assert needed in text


def test_affordable_time_implications():
    x = exact_ou(np.random.default_rng(8), 20_000, 0.1, 0.01, sd=0.1)
    advice = adv.advise(x, interval=0.01, temperature=T, timestep=0.002, cv_range=[(-1.0, 1.0)], barrier=25.0,
                        affordable_time=1000.0)
    assert advice.expected_hills == int(1000.0 // advice.stride_time)
    # Late-time mean height kB dT Omega tau_G / (sqrt(2 pi) sigma t) (module docstring of gridbias.advice).
    hill_volume = math.sqrt(2 * math.pi) * advice.sigma[0]
    rate = (advice.bias_factor - 1) * KT * 2.0 * advice.stride_time / hill_volume
    assert advice.expected_final_height == pytest.approx(min(advice.height, rate / 1000.0), rel=1e-9)
    assert advice.time_to_small_hills == pytest.approx(rate / (0.05 * advice.height), rel=1e-9)
    assert advice.planned_time == pytest.approx(adv.PLANNING_FACTOR * advice.time_to_small_hills)
    assert any("affordable time" in w for w in advice.warnings)  # 1 ns is far too short here


# ------------------------------------------------------------------------------- warnings, bad input
def test_hopping_short_run_is_flagged_and_measured_in_its_basin():
    # A 2 kBT barrier: the short run hops. Width and stride must come from the starting basin.
    traj = run_langevin(DoubleWell(barrier=2 * KT), [-1.0], n_steps=400_000, dt=0.002, friction=5.0,
                        temperature=T, rng=np.random.default_rng(9), record_every=10)
    advice = adv.advise(traj.positions, interval=0.02, temperature=T, cv_range=[(-1.6, 1.6)])
    s = advice.statistics[0]
    assert s.n_basins == 2 and "starting basin" in s.measured_on
    assert any("hopped between 2 basins" in w for w in advice.warnings)
    assert s.fluctuation < 0.6 * np.std(traj.positions)  # the basin's spread, not the hop's


def test_drifting_cv_warns_that_autocorrelation_did_not_decay():
    walk = np.cumsum(np.random.default_rng(10).normal(size=3_000)) * 0.01
    advice = adv.advise(walk, interval=0.1, temperature=T, cv_range=[(-5.0, 5.0)], barrier=20.0)
    assert not advice.statistics[0].decayed
    assert any("did not decay" in w for w in advice.warnings)


def test_barely_moving_cv_warns():
    x = 0.15 + 1e-6 * exact_ou(np.random.default_rng(11), 5_000, 0.1, 0.01)
    advice = adv.advise(x, interval=0.01, temperature=T, barrier=20.0)
    assert any("barely moved" in w for w in advice.warnings)


def test_missing_user_inputs_are_warned_about():
    advice = adv.advise(exact_ou(np.random.default_rng(12), 5_000, 0.1, 0.01), interval=0.01, temperature=T)
    text = " ".join(advice.warnings)
    assert "no expected barrier" in text and "no range of interest" in text


@pytest.mark.parametrize("series, options, message", [
    (np.zeros((50, 1)), {}, "too short: 50 frames"),
    (np.ones((500, 1)), {}, "constant"),
    (np.r_[np.zeros(17), np.nan, np.zeros(482)], {}, r"not finite \(nan\) at frame 17"),
    (np.zeros((500, 4)), {}, r"1 <= d <= 3"),
    ("abc", {}, "array of numbers"),
    (np.arange(500.0), {"interval": -1.0}, "interval must be finite and > 0"),
    (np.arange(500.0), {"timestep": 0.1}, "must not exceed the frame interval"),
    (np.arange(500.0), {"cv_range": [(1.0, -1.0)]}, r"cv_range\[0\] must be a finite pair"),
    (np.arange(500.0), {"periods": [6.0], "cv_range": [(0, 1)]}, "periodic"),
    (np.arange(500.0), {"barrier": "high"}, "barrier must be a number"),
])
def test_bad_input_is_refused_with_a_clear_message(series, options, message):
    kwargs = {"interval": 0.01, "temperature": T, **options}
    with pytest.raises(ParameterError, match=message):
        adv.advise(series, **kwargs)
