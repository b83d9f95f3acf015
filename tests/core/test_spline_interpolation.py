"""The core evaluates the function OpenMM's tabulated functions apply to the node values.

References: 1-D natural and periodic cubic splines are checked against scipy.interpolate.CubicSpline.
2-D and 3-D are checked against an independent slow reference written here: node derivatives from
scipy CubicSpline along each axis (mixed derivatives: the spline derivative of the lower one along the
next axis), then the tensor-product cubic Hermite patch (the construction measured to equal OpenMM's
Continuous2DFunction / Continuous3DFunction in DESIGN.md; tests/test_openmm_* check OpenMM itself).
"""

import itertools

import numpy as np
import pytest

scipy_interpolate = pytest.importorskip("scipy.interpolate")

import gridbias as gb  # noqa: E402

# Coarse grids keep the slow reference fast; the coarse-spacing advice is not under test here.
pytestmark = pytest.mark.filterwarnings("ignore:axis .* coarser than sigma/2")


def _random_bias(rng, lower, upper, bins, periodic, n_hills=30, sigma_frac=0.12):
    grid = gb.Grid(lower, upper, bins, periodic)
    sigma = sigma_frac * grid.span
    bias = gb.GridBias(grid, sigma=sigma, height=1.0, temperature=300.0)
    centers = grid.lower + rng.random((n_hills, grid.ndim)) * grid.span
    heights = rng.uniform(0.2, 2.0, n_hills)
    bias.add_hills(centers, heights)
    return bias


def _spline_derivative(values, axis, coords, periodic):
    """Node derivative (physical units) of the 1-D splines along ``axis`` (scipy CubicSpline)."""
    v = np.moveaxis(values, axis, 0)
    if periodic:
        step = coords[1] - coords[0]
        x = np.append(coords, coords[-1] + step)
        v = np.concatenate([v, v[:1]], axis=0)
        spline = scipy_interpolate.CubicSpline(x, v, axis=0, bc_type="periodic")
        out = spline(x[:-1], 1)
    else:
        spline = scipy_interpolate.CubicSpline(coords, v, axis=0, bc_type="natural")
        out = spline(coords, 1)
    return np.moveaxis(out, 0, axis)


def _reference_hermite(grid, values, points):
    """Slow tensor-product cubic Hermite evaluation from scipy node derivatives."""
    d = grid.ndim
    derivs = {(): values}
    for subset_size in range(1, d + 1):
        for subset in itertools.combinations(range(d), subset_size):
            lower_subset = subset[:-1]
            derivs[subset] = _spline_derivative(derivs[lower_subset], subset[-1], grid.axes[subset[-1]],
                                                grid.periodic[subset[-1]])
    out = []
    for p in points:
        cell, t = [], []
        for a in range(d):
            u = (p[a] - grid.lower[a]) / grid.spacing[a]
            if grid.periodic[a]:
                u %= grid.bins[a]
            c = min(int(np.floor(u)), grid.bins[a] - 1)
            cell.append(c)
            t.append(u - c)
        total = 0.0
        for corner in itertools.product((0, 1), repeat=d):
            node = []
            for a in range(d):
                k = cell[a] + corner[a]
                if grid.periodic[a]:
                    k %= grid.bins[a]
                node.append(k)
            for subset, arr in derivs.items():
                w = 1.0
                for a in range(d):
                    ta, cb = t[a], corner[a]
                    if a in subset:
                        basis = (ta**3 - 2 * ta**2 + ta) if cb == 0 else (ta**3 - ta**2)
                        w *= basis * grid.spacing[a]
                    else:
                        w *= (2 * ta**3 - 3 * ta**2 + 1) if cb == 0 else (-2 * ta**3 + 3 * ta**2)
                total += arr[tuple(node)] * w
        out.append(total)
    return np.array(out)


@pytest.mark.parametrize("periodic", [False, True])
def test_1d_equals_scipy_cubic_spline(rng, periodic):
    # Reference: scipy.interpolate.CubicSpline, bc_type "natural" / "periodic".
    lower, upper = (-np.pi, np.pi) if periodic else (0.0, 2.0)
    bias = _random_bias(rng, [lower], [upper], [50], [periodic])
    x = bias.grid.axes[0]
    y = bias.values
    if periodic:
        spline = scipy_interpolate.CubicSpline(np.append(x, upper), np.append(y, y[0]), bc_type="periodic")
    else:
        spline = scipy_interpolate.CubicSpline(x, y, bc_type="natural")
    pts = rng.uniform(lower, upper, 400)
    energy, grad = bias.evaluate_grid(pts[:, None])
    np.testing.assert_allclose(energy, spline(pts), atol=1e-10, rtol=0)
    np.testing.assert_allclose(grad[:, 0], spline(pts, 1), atol=1e-9, rtol=0)


@pytest.mark.parametrize(
    "lower, upper, bins, periodic",
    [
        ([0.0, -1.0], [2.0, 1.0], [20, 16], [False, False]),
        ([-np.pi, -np.pi], [np.pi, np.pi], [24, 18], [True, True]),
        ([-np.pi, 0.2], [np.pi, 1.5], [24, 15], [True, False]),
        ([0.0, 0.0, 0.0], [1.0, 2.0, 1.0], [7, 6, 5], [False, False, False]),
        ([-np.pi, 0.0, -np.pi], [np.pi, 1.0, np.pi], [8, 6, 10], [True, False, True]),
    ],
)
def test_nd_equals_independent_hermite_reference(rng, lower, upper, bins, periodic):
    bias = _random_bias(rng, lower, upper, bins, periodic, n_hills=15, sigma_frac=0.2)
    pts = bias.grid.lower + rng.random((60, bias.ndim)) * bias.grid.span
    energy, _ = bias.evaluate_grid(pts)
    reference = _reference_hermite(bias.grid, np.asarray(bias.values), pts)
    np.testing.assert_allclose(energy, reference, atol=1e-10 * np.abs(reference).max(), rtol=0)


def test_nodes_hold_values_exactly(rng):
    bias = _random_bias(rng, [0.0, 0.0], [1.0, 1.0], [10, 12], [False, True])
    nodes = bias.grid.nodes().reshape(-1, 2)
    energy, _ = bias.evaluate_grid(nodes)
    np.testing.assert_allclose(energy, np.asarray(bias.values).ravel(), atol=1e-13, rtol=0)


def test_linear_field_axes_are_not_swapped():
    # A single narrow hill at a known off-centre node: the maximum is found at that node's coordinates,
    # so any transposed axis shows (style of scipy's RegularGridInterpolator tests).
    grid = gb.Grid([0.0, 0.0, 0.0], [1.0, 2.0, 3.0], [10, 20, 30])
    bias = gb.GridBias(grid, sigma=[0.1, 0.1, 0.1], height=1.0, temperature=300.0)
    bias.deposit([0.3, 1.1, 2.6])
    peak = np.unravel_index(np.argmax(bias.values), grid.shape)
    assert peak == (3, 11, 26)
    assert bias.evaluate([0.3, 1.1, 2.6])[0] == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("periodic", [(False, False), (True, False), (True, True)])
def test_gradient_matches_central_differences(rng, periodic):
    bias = _random_bias(rng, [-np.pi, -np.pi], [np.pi, np.pi], [40, 36], list(periodic), n_hills=20)
    pts = rng.uniform(-2.8, 2.8, (50, 2))
    _, grad = bias.evaluate(pts)
    eps = 1e-6
    for a in range(2):
        step = np.zeros(2)
        step[a] = eps
        fd = (bias.evaluate(pts + step)[0] - bias.evaluate(pts - step)[0]) / (2 * eps)
        np.testing.assert_allclose(grad[:, a], fd, atol=1e-6, rtol=1e-6)


def test_outside_non_periodic_axis_is_zero_grid():
    grid = gb.Grid([0.0, -np.pi], [1.0, np.pi], [10, 16], [False, True])
    bias = gb.GridBias(grid, sigma=[0.3, 0.5], height=2.0, temperature=300.0,
                       walls=[gb.Wall(0, 0.9, 100.0, "above")])
    bias.deposit([0.95, 0.0])
    e_grid, g_grid = bias.evaluate_grid([1.2, 0.0])
    assert e_grid == 0.0 and not g_grid.any()
    e, g = bias.evaluate([1.2, 0.0])  # walls still act beyond the grid
    assert e == pytest.approx(100.0 * 0.3**2)
    assert g[0] == pytest.approx(2 * 100.0 * 0.3)
