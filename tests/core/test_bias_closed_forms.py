"""GridBias against closed forms and published rules."""

import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import gridbias as gb
from gridbias.bias import DEFAULT_CUTOFF, KB


def exact_hill_sum(points, centers, heights, sigma, period=None):
    """Sum of Gaussian hills h exp(-sum d^2 / 2 sigma^2), minimum image on periodic axes
    (Laio & Parrinello, PNAS 99, 12562, 2002, the unnormalised hill form)."""
    diff = points[:, None, :] - centers[None, :, :]
    if period is not None:
        for a, p in enumerate(period):
            if p:
                diff[..., a] -= p * np.round(diff[..., a] / p)
    return (heights * np.exp(-0.5 * ((diff / sigma) ** 2).sum(-1))).sum(-1)


def make_2d(rng, n_hills=200, periodic=(True, False)):
    grid = gb.Grid([-np.pi, -1.0], [np.pi, 1.0], [128, 64], list(periodic))
    sigma = np.array([0.25, 0.125])  # 5 and 4 spacings
    bias = gb.GridBias(grid, sigma=sigma, height=1.0, temperature=300.0)
    centers = np.column_stack([rng.uniform(-np.pi, np.pi, n_hills), rng.uniform(-0.6, 0.6, n_hills)])
    heights = rng.uniform(0.1, 1.5, n_hills)
    bias.add_hills(centers, heights)
    period = [2 * np.pi if p else 0 for p in periodic]
    return bias, centers, heights, sigma, period


def test_node_values_equal_exact_hill_sum(rng):
    bias, centers, heights, sigma, period = make_2d(rng)
    nodes = bias.grid.nodes().reshape(-1, 2)
    exact = exact_hill_sum(nodes, centers, heights, sigma, period).reshape(bias.grid.shape)
    # Truncation at DEFAULT_CUTOFF widths drops less than 1e-6 of each hill's height.
    bound = 1e-6 * heights.sum()
    assert np.abs(bias.values - exact).max() <= bound


def test_off_node_values_equal_exact_hill_sum_within_spline_error(rng):
    bias, centers, heights, sigma, period = make_2d(rng)
    pts = np.column_stack([rng.uniform(-np.pi, np.pi, 2000), rng.uniform(-0.9, 0.9, 2000)])
    exact = exact_hill_sum(pts, centers, heights, sigma, period)
    energy, grad = bias.evaluate(pts)
    # Cubic-spline error of a Gaussian sampled at 4-5 points per width: ~1e-3 of the peak (measured
    # here: below 2e-3 of the total height); a spacing <= sigma/3 is common practice.
    assert np.abs(energy - exact).max() <= 2e-3 * heights.max() * 10
    rmse = np.sqrt(np.mean((energy - exact) ** 2))
    assert rmse <= 1e-3 * np.abs(exact).max()


def test_single_hill_closed_form():
    # One hill at s0: V(s0) = w and V(s0 +- sigma) = w e^{-1/2}; dV/ds = -w (s - s0)/sigma^2 e^{...}
    # (Laio & Parrinello 2002 hill form). Centre and probes on nodes: exact up to truncation.
    grid = gb.Grid([-2.0], [2.0], [400])
    bias = gb.GridBias(grid, sigma=[0.2], height=1.5, temperature=300.0)
    assert bias.deposit([0.0]) == 1.5
    assert bias.evaluate([0.0])[0] == pytest.approx(1.5, abs=1e-12)
    assert bias.evaluate([0.2])[0] == pytest.approx(1.5 * math.exp(-0.5), abs=1e-12)
    slope = bias.evaluate([0.1])[1][0]
    assert slope == pytest.approx(-1.5 * 0.1 / 0.04 * math.exp(-0.125), rel=1e-4)


def test_well_tempered_second_hill_published_value():
    # Barducci, Bussi & Parrinello, PRL 100, 020603 (2008): w = w0 exp(-V/(kB dT)), dT = (gamma-1) T.
    # T = 300 K, gamma = 10, w0 = 1.2 kJ/mol -> second hill 1.137539 kJ/mol (REFERENCES.md §2, computed).
    grid = gb.Grid([-np.pi], [np.pi], [64], [True])
    bias = gb.GridBias(grid, sigma=[0.3], height=1.2, temperature=300.0, bias_factor=10.0)
    assert bias.deposit([0.0]) == pytest.approx(1.2, abs=0)
    assert bias.deposit([0.0]) == pytest.approx(1.137539, abs=5e-7)


def test_well_tempered_schedule_follows_the_rule(rng):
    # Every height equals w0 exp(-V(s)/(kB (gamma-1) T)) with V the grid bias at the centre just before.
    grid = gb.Grid([-np.pi, -np.pi], [np.pi, np.pi], [64, 64], [True, True])
    gamma, temperature, w0 = 6.0, 310.0, 2.0
    bias = gb.GridBias(grid, sigma=[0.3, 0.3], height=w0, temperature=temperature, bias_factor=gamma)
    for _ in range(100):
        s = rng.normal(0.0, 0.4, 2)
        v_before = bias.evaluate_grid(s)[0]
        expected = w0 * math.exp(-v_before / (KB * (gamma - 1) * temperature))
        assert bias.hill_height(s) == pytest.approx(expected, rel=1e-14)
        assert bias.deposit(s) == pytest.approx(expected, rel=1e-14)
    assert bias.history.heights[-1] < 0.5 * w0  # heights decay as the bias grows


def test_free_energy_scaling():
    grid = gb.Grid([0.0], [1.0], [50])
    for gamma, factor in ((None, 1.0), (5.0, 5.0 / 4.0)):
        bias = gb.GridBias(grid, sigma=[0.1], height=1.0, temperature=300.0, bias_factor=gamma)
        bias.deposit([0.5])
        fes = bias.free_energy()
        assert fes.min() == 0.0
        expected = -factor * bias.values
        np.testing.assert_allclose(fes, expected - expected.min(), atol=1e-14)


def test_walls_closed_form():
    # Closed form: k (s - bound)^p above, k (bound - s)^p below; zero on the allowed side.
    grid = gb.Grid([0.0, 0.0], [2.0, 2.0], [20, 20])
    walls = [gb.Wall(cv=0, bound=1.5, k=300.0, side="above"), gb.Wall(cv=1, bound=0.4, k=50.0, side="below", power=4)]
    bias = gb.GridBias(grid, sigma=[0.3, 0.3], height=1.0, temperature=300.0, walls=walls)
    pts = np.array([[1.0, 1.0], [1.7, 1.0], [1.0, 0.1], [1.8, 0.2]])
    energy, grad = bias.evaluate(pts)  # no hills: walls only
    expected = [0.0, 300 * 0.2**2, 50 * 0.3**4, 300 * 0.3**2 + 50 * 0.2**4]
    np.testing.assert_allclose(energy, expected, rtol=1e-12)
    np.testing.assert_allclose(grad[3], [2 * 300 * 0.3, -4 * 50 * 0.2**3], rtol=1e-12)
    e_walls, _ = bias.wall_energy(pts)
    np.testing.assert_allclose(e_walls, expected, rtol=1e-12)
    # Walls are not part of the grid, of the WT height or of the free energy.
    bias.deposit([1.8, 0.2])
    assert bias.free_energy().max() == pytest.approx(bias.values.max())


def test_outside_deposit_counts_and_warns_once():
    grid = gb.Grid([0.0], [1.0], [20])
    bias = gb.GridBias(grid, sigma=[0.1], height=1.0, temperature=300.0)
    with pytest.warns(UserWarning, match="outside the grid"):
        assert bias.deposit([1.5]) == 0.0
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert bias.deposit([-0.5]) == 0.0
    assert bias.n_outside == 2 and bias.n_hills == 0
    assert not bias.values.any()


def test_history_records_hills(rng):
    grid = gb.Grid([0.0, 0.0], [1.0, 1.0], [20, 20])
    bias = gb.GridBias(grid, sigma=[0.1, 0.1], height=1.0, temperature=300.0, bias_factor=4.0)
    for i in range(10):
        bias.deposit(rng.random(2), time=0.5 * i)
    assert len(bias.history) == bias.n_hills == 10
    np.testing.assert_array_equal(bias.history.times, 0.5 * np.arange(10))
    assert bias.history.nbytes == 10 * 8 * 4  # 32 bytes per 2-D hill
    with pytest.raises(ValueError):
        bias.history.heights[0] = 3.0  # read-only view


def test_rebuilt_is_bitwise_identical(rng):
    grid = gb.Grid([-np.pi, 0.0], [np.pi, 1.0], [40, 30], [True, False])
    bias = gb.GridBias(grid, sigma=[0.5, 0.1], height=1.0, temperature=300.0, bias_factor=8.0)
    for _ in range(300):
        bias.deposit([rng.uniform(-np.pi, np.pi), rng.uniform(0.2, 0.8)])
    again = bias.rebuilt()
    np.testing.assert_array_equal(again.values, bias.values)
    pts = rng.random((50, 2))
    np.testing.assert_array_equal(bias.evaluate(pts)[0], again.evaluate(pts)[0])
    np.testing.assert_array_equal(bias.evaluate(pts)[1], again.evaluate(pts)[1])
    partial = bias.rebuilt(100)
    assert partial.n_hills == 100


def test_copy_is_independent():
    grid = gb.Grid([0.0], [1.0], [20])
    bias = gb.GridBias(grid, sigma=[0.1], height=1.0, temperature=300.0)
    bias.deposit([0.5])
    other = bias.copy()
    other.deposit([0.2])
    assert bias.n_hills == 1 and other.n_hills == 2


def test_single_point_and_batch_agree(rng):
    bias, *_ = make_2d(rng, n_hills=50)
    pts = rng.uniform(-0.9, 0.9, (10, 2))
    energy, grad = bias.evaluate(pts)
    for p, e, g in zip(pts, energy, grad, strict=True):
        e1, g1 = bias.evaluate(p)
        assert isinstance(e1, float) and g1.shape == (2,)
        assert e1 == e and np.array_equal(g1, g)


def test_1d_scalar_input():
    grid = gb.Grid([0.0], [1.0], [20])
    bias = gb.GridBias(grid, sigma=[0.1], height=1.0, temperature=300.0)
    bias.deposit(0.5)
    e, g = bias.evaluate(0.5)
    assert e == pytest.approx(1.0) and g.shape == (1,)
    energy, grad = bias.evaluate([[0.5], [0.6]])
    assert energy.shape == (2,) and grad.shape == (2, 1)


# --- bad input ------------------------------------------------------------------------------------
GRID2 = gb.Grid([0.0, 0.0], [1.0, 1.0], [20, 20])


@pytest.mark.parametrize(
    "kwargs, error, match",
    [
        (dict(sigma=[0.1]), gb.ParameterError, r"sigma must have 2 entries"),
        (dict(sigma=[0.1, 0.0]), gb.ParameterError, r"sigma\[1\] must be finite and > 0"),
        (dict(sigma=[0.1, -1]), gb.ParameterError, r"sigma\[1\]"),
        (dict(height=0.0), gb.ParameterError, r"height must be finite and > 0 kJ/mol, got 0.0"),
        (dict(height=float("nan")), gb.ParameterError, r"height"),
        (dict(height="big"), gb.ParameterError, r"height must be a number"),
        (dict(temperature=-5), gb.ParameterError, r"temperature must be finite and > 0 K, got -5"),
        (dict(bias_factor=1.0), gb.ParameterError, r"bias_factor must be > 1.*None for standard metadynamics"),
        (dict(bias_factor=0.5), gb.ParameterError, r"bias_factor"),
        (dict(walls=[gb.Wall(cv=2, bound=0.5, k=1.0, side="above")]), gb.ParameterError,
         r"Wall cv=2 does not exist: the grid has 2 CVs"),
        (dict(walls=["wall"]), gb.ParameterError, r"walls must hold gridbias.Wall"),
    ],
)
def test_bad_bias_parameters(kwargs, error, match):
    args = dict(grid=GRID2, sigma=[0.1, 0.1], height=1.0, temperature=300.0)
    args.update(kwargs)
    with pytest.raises(error, match=match):
        gb.GridBias(**args)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(k=-1.0), r"Wall k must be >= 0"),
        (dict(side="left"), r"Wall side must be one of \['above', 'below'\], got 'left'"),
        (dict(power=0.5), r"Wall power must be >= 1, got 0.5"),
        (dict(cv=-1), r"Wall cv must be a CV index"),
        (dict(bound=float("nan")), r"Wall bound must be finite"),
    ],
)
def test_bad_walls(kwargs, match):
    args = dict(cv=0, bound=0.5, k=10.0, side="above")
    args.update(kwargs)
    with pytest.raises(gb.ParameterError, match=match):
        gb.Wall(**args)


def test_coarse_grid_warns_with_rule_of_thumb():
    with pytest.warns(UserWarning, match=r"axis 1: grid spacing .* coarser than sigma/2.*sigma/3"):
        gb.GridBias(GRID2, sigma=[0.2, 0.05], height=1.0, temperature=300.0)


@pytest.mark.parametrize("bad", [[0.5], [0.1, 0.2, 0.3], [[0.1, 0.2, 0.3]], np.zeros((2, 2, 2))])
def test_wrong_point_shapes(bad):
    bias = gb.GridBias(GRID2, sigma=[0.1, 0.1], height=1.0, temperature=300.0)
    with pytest.raises(gb.GridError, match=r"shape"):
        bias.evaluate(bad)
    with pytest.raises(gb.GridError, match=r"shape"):
        bias.deposit(np.asarray(bad)[..., :3] if np.ndim(bad) else bad)


@pytest.mark.parametrize("bad", [[np.nan, 0.5], [0.5, np.inf]])
def test_nan_is_refused_and_never_poisons_the_grid(bad):
    bias = gb.GridBias(GRID2, sigma=[0.1, 0.1], height=1.0, temperature=300.0, bias_factor=5.0)
    bias.deposit([0.5, 0.5])
    before = bias.values.copy()
    with pytest.raises(gb.ParameterError, match=r"must be finite"):
        bias.deposit(bad)
    with pytest.raises(gb.ParameterError, match=r"must be finite"):
        bias.evaluate([[0.1, 0.1], bad])
    with pytest.raises(gb.ParameterError, match=r"heights must be finite"):
        bias.add_hills([[0.5, 0.5]], [np.nan])
    np.testing.assert_array_equal(bias.values, before)
    assert bias.n_hills == 1


# --- properties (hypothesis) ----------------------------------------------------------------------
PERIODIC_GRID = gb.Grid([-np.pi, -np.pi], [np.pi, np.pi], [48, 40], [True, True])
coords = st.floats(-np.pi, np.pi, allow_nan=False)
hill_lists = st.lists(st.tuples(coords, coords, st.floats(0.01, 3.0)), min_size=1, max_size=12)


@settings(max_examples=40, deadline=None)
@given(hill_lists, st.randoms(use_true_random=False))
def test_deposit_order_does_not_matter(hills, random):
    arr = np.array(hills)
    order = list(range(len(arr)))
    random.shuffle(order)
    shuffled = arr[order]
    a = gb.GridBias(PERIODIC_GRID, sigma=[0.4, 0.5], height=1.0, temperature=300.0)
    b = gb.GridBias(PERIODIC_GRID, sigma=[0.4, 0.5], height=1.0, temperature=300.0)
    a.add_hills(arr[:, :2], arr[:, 2])
    b.add_hills(shuffled[:, :2], shuffled[:, 2])
    np.testing.assert_allclose(a.values, b.values, atol=1e-12 * arr[:, 2].sum(), rtol=0)
    pts = arr[:, :2] + 0.01
    np.testing.assert_allclose(a.evaluate(pts)[0], b.evaluate(pts)[0], atol=1e-12 * arr[:, 2].sum(), rtol=0)


@settings(max_examples=40, deadline=None)
@given(hill_lists, st.integers(-3, 3), st.integers(-3, 3))
def test_periodic_shift_by_one_period_changes_nothing(hills, kx, ky):
    arr = np.array(hills)
    shift = 2 * np.pi * np.array([kx, ky])
    a = gb.GridBias(PERIODIC_GRID, sigma=[0.4, 0.5], height=1.0, temperature=300.0)
    b = gb.GridBias(PERIODIC_GRID, sigma=[0.4, 0.5], height=1.0, temperature=300.0)
    a.add_hills(arr[:, :2], arr[:, 2])
    b.add_hills(arr[:, :2] + shift, arr[:, 2])
    tol = 1e-9 * arr[:, 2].sum()
    np.testing.assert_allclose(a.values, b.values, atol=tol, rtol=0)
    pts = arr[:, :2] * 0.7
    np.testing.assert_allclose(a.evaluate(pts)[0], a.evaluate(pts + shift)[0], atol=tol, rtol=0)


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.tuples(st.floats(-1e3, 1e3), st.floats(-1e3, 1e3)), min_size=1, max_size=8),
    st.floats(1e-3, 1e3),
    st.one_of(st.none(), st.floats(1.001, 1e3)),
)
def test_no_valid_input_produces_nan(points, height, gamma):
    grid = gb.Grid([-np.pi, 0.0], [np.pi, 5.0], [30, 25], [True, False])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = gb.GridBias(grid, sigma=[0.5, 0.5], height=height, temperature=300.0, bias_factor=gamma,
                           walls=[gb.Wall(1, 4.0, 10.0, "above")])
        for p in points:
            bias.deposit(p)
    assert np.isfinite(bias.values).all()
    energy, grad = bias.evaluate(np.array(points))
    assert np.isfinite(energy).all() and np.isfinite(grad).all()


def test_default_cutoff_truncates_below_one_millionth():
    assert math.exp(-0.5 * DEFAULT_CUTOFF**2) == pytest.approx(1e-6, rel=1e-12)


def test_load_state_in_place_and_refusal(rng):
    grid = gb.Grid([0.0, 0.0], [1.0, 1.0], [20, 20])
    source = gb.GridBias(grid, sigma=[0.1, 0.1], height=1.0, temperature=300.0, bias_factor=5.0)
    for _ in range(20):
        source.deposit(rng.random(2))
    target = gb.GridBias(grid, sigma=[0.1, 0.1], height=1.0, temperature=300.0, bias_factor=5.0)
    same_object = target
    target.load_state(*source.to_state())
    assert target is same_object and target.n_hills == 20
    np.testing.assert_array_equal(target.values, source.values)
    other = gb.GridBias(grid, sigma=[0.1, 0.2], height=1.0, temperature=300.0, bias_factor=5.0)
    with pytest.raises(gb.CheckpointError, match=r"sigma differs: \[0.1, 0.2\] vs \[0.1, 0.1\]"):
        other.load_state(*source.to_state())
    assert other.n_hills == 0
