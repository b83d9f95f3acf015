"""Reweighting to the unbiased ensemble: Kish ESS, the time-independent offset c(t), final-bias weights.

Sources named at each check: Kish, Survey Sampling (1965); Tiwary & Parrinello, J. Phys. Chem. B 119, 736
(2015) for c(t); Torrie & Valleau, J. Comput. Phys. 23, 187 (1977) and Branduardi, Bussi & Parrinello,
J. Chem. Theory Comput. 8, 2247 (2012) for final-bias weights; scipy.integrate for exact free energies.
"""

import numba
import numpy as np
import pytest
from scipy import integrate, special

import gridbias as gb
from gridbias.analysis import (
    FrameWeights,
    final_bias_weights,
    free_energy_along,
    kish_effective_sample_size,
    offset_weights,
    surface_at,
    time_independent_offset,
)
from gridbias.errors import ParameterError

T = 300.0
KT = gb.KB * T


# --- Kish effective sample size (Kish 1965: ESS = (sum w)^2 / sum w^2) ---------------------------------
def test_kish_uniform_weights_give_n():
    assert kish_effective_sample_size(np.full(250, -3.7)) == pytest.approx(250.0)


def test_kish_one_dominant_weight_gives_about_one():
    lw = np.zeros(1000)
    lw[17] = 50.0  # e^50 outweighs the other 999 by ~1e18
    assert kish_effective_sample_size(lw) == pytest.approx(1.0, abs=1e-9)


def test_kish_matches_the_direct_formula_and_ignores_zero_weights(rng):
    w = rng.exponential(size=500)
    direct = w.sum() ** 2 / np.sum(w**2)
    lw = np.concatenate([np.log(w), [-np.inf, -np.inf]])
    assert kish_effective_sample_size(lw) == pytest.approx(direct, rel=1e-12)
    # no overflow far beyond exp's range (log space, REFERENCES.md §10)
    assert kish_effective_sample_size(np.log(w) + 5000.0) == pytest.approx(direct, rel=1e-12)
    assert kish_effective_sample_size([-np.inf, -np.inf]) == 0.0


def test_kish_refuses_nan():
    with pytest.raises(ParameterError, match="log_weights must be finite or -inf"):
        kish_effective_sample_size([0.0, np.nan])


# --- c(t) (Tiwary & Parrinello 2015) ---------------------------------------------------------------------
def periodic_test_f(s):
    """A smooth periodic test free energy, kJ/mol."""
    return 3.0 * KT * (1.0 - np.cos(s)) + KT * np.sin(2.0 * s) + 0.5 * KT * np.cos(3.0 * s + 0.4)


def log_z(func, lo, hi):
    return np.log(integrate.quad(lambda s: np.exp(func(s)), lo, hi, limit=200, epsabs=0, epsrel=1e-12)[0])


@pytest.mark.parametrize("gamma", [4.0, 10.0, None])
def test_offset_equals_log_partition_ratio_for_the_well_tempered_limit_bias(gamma):
    # REFERENCES.md 3a check: for V = -(1 - 1/gamma) F + C the formula equals (1/beta) ln(Z_0 / Z_V);
    # Z computed independently with scipy.integrate.quad. gamma = None is standard metadynamics (V = -F + C).
    grid = gb.Grid([-np.pi], [np.pi], [360], periodic=[True])
    factor = 1.0 if gamma is None else 1.0 - 1.0 / gamma
    const = 7.0

    def bias(s):
        return -factor * periodic_test_f(s) + const

    c = time_independent_offset(bias(grid.axes[0]), grid, KT, gamma)
    z0 = log_z(lambda s: -periodic_test_f(s) / KT, -np.pi, np.pi)
    zv = log_z(lambda s: -(periodic_test_f(s) + bias(s)) / KT, -np.pi, np.pi)
    assert c == pytest.approx(KT * (z0 - zv), abs=1e-9)


def test_offset_on_a_non_periodic_2d_grid_uses_the_trapezoid_rule():
    # Same identity on a non-periodic 2-D grid; trapezoid error O(h^2) against scipy.integrate.dblquad.
    grid = gb.Grid([-2.0, -1.5], [2.5, 1.5], [180, 120])
    gamma = 6.0

    def f(x, y):
        return 4.0 * (x**2 - 1.0) ** 2 + 3.0 * y**2 + 0.5 * x * y

    x, y = np.meshgrid(*grid.axes, indexing="ij")
    v = -(1.0 - 1.0 / gamma) * f(x, y) + 3.0
    c = time_independent_offset(v, grid, KT, gamma)
    z0 = integrate.dblquad(lambda y, x: np.exp(-f(x, y) / KT), -2.0, 2.5, -1.5, 1.5, epsrel=1e-10)[0]
    zv = integrate.dblquad(lambda y, x: np.exp(-(f(x, y) / gamma + 3.0) / KT), -2.0, 2.5, -1.5, 1.5,
                           epsrel=1e-10)[0]
    assert c == pytest.approx(KT * np.log(z0 / zv), abs=2e-3)


def test_offset_of_zero_bias_is_zero():
    grid = gb.Grid([0.0], [1.0], [10])
    assert time_independent_offset(np.zeros(11), grid, KT, 5.0) == 0.0
    assert time_independent_offset(np.zeros(11), grid, KT, None) == 0.0


def make_bias(**kwargs):
    grid = gb.Grid([-2.0], [2.0], [160])
    walls = [gb.Wall(cv=0, bound=1.6, k=300.0, side="above")]
    options = dict(sigma=[0.15], height=1.5, temperature=T, bias_factor=8.0, walls=walls)
    options.update(kwargs)
    return gb.GridBias(grid, **options)


def test_frames_see_the_hills_deposited_strictly_before_them(rng):
    # A frame logged at a deposition time was sampled before that hill existed (it is built from the frame).
    bias = make_bias()
    for i, s in enumerate(rng.uniform(-1.2, 1.2, size=6)):
        bias.deposit([s], time=1.0 + i)
    frame_times = np.array([0.0, 0.5, 1.0, 1.5, 3.0, 3.2, 6.0, 9.0])
    hills_seen = [0, 0, 0, 1, 2, 3, 5, 6]
    cvs = rng.uniform(-1.5, 1.8, size=(frame_times.size, 1))
    logged = np.array([bias.rebuilt(k).evaluate(cv)[0] for k, cv in zip(hills_seen, cvs, strict=True)])
    weights = offset_weights(bias, frame_times, frame_bias=logged)
    expected_c = [time_independent_offset(bias.rebuilt(k).values, bias.grid, KT, 8.0) for k in hills_seen]
    np.testing.assert_allclose(weights.offsets, expected_c, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(weights.log_weights, (logged - expected_c) / KT, rtol=1e-12, atol=1e-12)
    assert weights.method == "time-independent offset"
    # recomputing the applied bias (grid + walls) from the frame CVs gives the same weights
    again = offset_weights(bias, frame_times, frame_cvs=cvs)
    np.testing.assert_allclose(again.log_weights, weights.log_weights, rtol=1e-12, atol=1e-12)


def test_offset_weights_need_timed_hills(rng):
    bias = make_bias()
    bias.deposit([0.1])
    with pytest.raises(ParameterError, match="no time for hill 0"):
        offset_weights(bias, [0.0, 1.0], frame_bias=[0.0, 0.0])


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({}, "give exactly one of frame_bias"),
        ({"frame_bias": [0.0], "frame_cvs": [[0.0]]}, "give exactly one of frame_bias"),
        ({"frame_bias": [0.0, 1.0, 2.0]}, "frame_times has 2, frame_bias has 3"),
        ({"frame_bias": [0.0, np.inf]}, "frame_bias must be finite, got inf at index 1"),
        ({"frame_cvs": [[0.0, 1.0], [0.0, 1.0]]}, r"frame_cvs must have shape \(n, 1\), got shape \(2, 2\)"),
    ],
)
def test_offset_weights_bad_input(kwargs, match):
    bias = make_bias()
    bias.deposit([0.0], time=0.5)
    with pytest.raises(ParameterError, match=match):
        offset_weights(bias, [0.0, 1.0], **kwargs)


# --- final-bias weights (Torrie & Valleau 1977; Branduardi, Bussi & Parrinello 2012) ---------------------
def double_well(x):
    return 8.0 * (x**2 - 1.0) ** 2 + 2.0 * x


def exact_bin_free_energy(edges):
    """-kT ln of the bin-averaged Boltzmann factor of the double well (scipy.integrate.quad)."""
    out = np.array([integrate.quad(lambda x: np.exp(-double_well(x) / KT), a, b)[0] / (b - a)
                    for a, b in zip(edges[:-1], edges[1:], strict=True)])
    return -KT * np.log(out)


def test_final_bias_weights_recover_the_unbiased_density_from_exact_biased_samples(rng):
    # Samples drawn exactly (inverse CDF on a fine mesh) from exp(-beta (U + V_bias + V_walls)): the
    # umbrella-sampling identity <O>_0 = <O e^{beta V}>_b / <e^{beta V}>_b (Torrie & Valleau 1977) must
    # return the unbiased F within the block errors.
    bias = make_bias()
    for i, s in enumerate(rng.uniform(-1.4, 1.4, size=40)):
        bias.deposit([s], time=float(i))
    mesh = np.linspace(-2.0, 2.0, 200_001)
    biased = np.exp(-(double_well(mesh) + bias.evaluate(mesh[:, None])[0]) / KT)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (biased[1:] + biased[:-1]) * np.diff(mesh))])
    samples = np.interp(rng.uniform(0, cdf[-1], size=40_000), cdf, mesh)
    weights = final_bias_weights(bias, np.arange(samples.size, dtype=float), samples[:, None],
                                 burn_in_fraction=0.0)
    assert weights.used.all() and weights.method == "final bias"
    edges = np.linspace(-1.5, 1.5, 31)
    profile = free_energy_along(weights, samples, edges)
    exact = exact_bin_free_energy(edges)
    diff = profile.free_energy - exact
    shift = np.average(diff, weights=1.0 / profile.error**2)
    z = (diff - shift) / profile.error
    assert np.all(np.abs(z) < 4.0), f"max |z| = {np.abs(z).max():.2f}"
    assert np.mean(z**2) < 2.0  # the block errors are neither much too small ...
    assert np.mean(z**2) > 0.2  # ... nor much too large
    rmse = np.sqrt(np.mean((diff - shift) ** 2))
    assert rmse < 0.1 * KT
    # and without reweighting the biased histogram is clearly wrong (the check has teeth)
    flat = free_energy_along(FrameWeights.from_log_weights(np.zeros(samples.size), KT), samples, edges)
    raw = flat.free_energy - exact
    assert np.sqrt(np.mean((raw - raw.mean()) ** 2)) > max(0.5 * KT, 5.0 * rmse)


def test_final_bias_burn_in_drops_the_early_frames(rng):
    bias = make_bias()
    bias.deposit([0.0], time=0.0)
    times = np.linspace(0.0, 100.0, 101)
    weights = final_bias_weights(bias, times, rng.uniform(-1, 1, size=(101, 1)), burn_in_fraction=0.3)
    np.testing.assert_array_equal(weights.used, times >= 30.0)
    assert weights.burn_in_time == pytest.approx(30.0)
    assert weights.normalized()[weights.used].sum() == pytest.approx(1.0)
    with pytest.raises(ParameterError, match=r"burn_in_fraction must be in \[0, 1\), got 1.0"):
        final_bias_weights(bias, times, np.zeros((101, 1)), burn_in_fraction=1.0)


# --- the full statistical check: a 2-D analytic potential biased along x only ----------------------------
def exact_bin_free_energy_along_y(potential, edges):
    """-kT ln of the bin-averaged marginal exp(-F(y)/kT), F(y) = -kT ln int exp(-U(x, y)/kT) dx.

    U = h (x^2 - 1)^2 + tilt x + (k/2) exp(c x) y^2 (CoupledDoubleWell): the y integral over a bin is a
    difference of error functions (closed form), the x integral is done by scipy.integrate.quad.
    """
    h, tilt, k, c = potential.barrier, potential.tilt, potential.stiffness, potential.coupling

    def integrand(x, a, b):
        stiff = k * np.exp(c * x) / KT
        along = np.exp(-(h * (x**2 - 1.0) ** 2 + tilt * x) / KT)
        root = np.sqrt(stiff / 2.0)
        return along * np.sqrt(np.pi / (2.0 * stiff)) * (special.erf(b * root) - special.erf(a * root))

    out = [integrate.quad(integrand, -2.5, 2.5, args=(a, b), limit=200)[0] / (b - a)
           for a, b in zip(edges[:-1], edges[1:], strict=True)]
    return -KT * np.log(out)


@pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics")
def test_reweighted_free_energy_along_an_unbiased_coordinate_matches_the_exact_marginal():
    # CoupledDoubleWell (gridbias.testsystems) biased along x only by well-tempered metadynamics. The
    # frames reweighted with c(t) (Tiwary & Parrinello 2015) must give F(y) = -kT ln int exp(-U/kT) dx
    # (scipy.integrate) with RMSE <= 0.5 kT over F < 8 kT (the criterion), and F(x) must match
    # -(gamma/(gamma-1)) V of the bias (Barducci, Bussi & Parrinello, PRL 100, 020603, 2008).
    from gridbias.testsystems import CoupledDoubleWell, run_metadynamics

    potential = CoupledDoubleWell()
    # the closed form used for the reference is the potential the dynamics integrates
    u = potential.energy_gradient(np.array([[0.3, -0.2]]))[0][0]
    assert u == pytest.approx(25.0 * (0.09 - 1.0) ** 2 + 0.5 * 200.0 * np.exp(0.3) * 0.04)
    grid = gb.Grid([-2.5], [2.5], [250])
    walls = [gb.Wall(0, 1.9, 500.0, "above"), gb.Wall(0, -1.9, 500.0, "below")]
    bias = gb.GridBias(grid, sigma=[0.1], height=2.0, temperature=T, bias_factor=8.0, walls=walls)
    traj = run_metadynamics(potential, bias, [-1.0, 0.0], n_deposits=32_000, stride=50, dt=0.005,
                            friction=5.0, rng=np.random.default_rng(7), record_every=5)
    weights = offset_weights(bias, traj.times, frame_bias=traj.bias_energies)
    assert weights.effective_sample_size > 0.3 * weights.n_frames

    edges_y = np.linspace(-0.8, 0.8, 33)
    profile_y = free_energy_along(weights, traj.positions[:, 1], edges_y, names=["y"])
    exact_y = exact_bin_free_energy_along_y(potential, edges_y)
    exact_y -= exact_y.min()
    compared = exact_y < 8.0 * KT
    assert compared.sum() >= 28 and np.isfinite(profile_y.free_energy[compared]).all()
    diff = profile_y.free_energy[compared] - exact_y[compared]
    rmse_y = np.sqrt(np.mean((diff - diff.mean()) ** 2))
    assert rmse_y <= 0.5 * KT, f"F(y) RMSE {rmse_y / KT:.3f} kT"
    # the block errors cover the scatter (aligned by inverse-variance weights; 8 seeds gave max |z| <= 3.5)
    error = profile_y.error[compared]
    z = (diff - np.average(diff, weights=error**-2)) / error
    assert np.all(np.abs(z) < 4.5), f"max |z| = {np.abs(z).max():.2f}"

    # F(x) from the same frames vs the bias estimate, away from the walls (2 sigma, common practice)
    edges_x = np.linspace(-1.6, 1.6, 33)
    profile_x = free_energy_along(weights, traj.positions[:, 0], edges_x)
    from_bias = np.interp(profile_x.centers[0], grid.axes[0], surface_at(bias).free_energy)
    compared = np.isfinite(profile_x.free_energy) & (from_bias - from_bias.min() < 8.0 * KT)
    diff = profile_x.free_energy[compared] - from_bias[compared]
    rmse_x = np.sqrt(np.mean((diff - diff.mean()) ** 2))
    assert rmse_x <= 0.5 * KT, f"F(x) RMSE {rmse_x / KT:.3f} kT"
