"""The specialised 1/2/3-D evaluation kernels give the same bits as the generic kernel they replaced.

Reference: ``_generic_eval_point`` below is the generic d-dimensional kernel gridbias shipped before the
kernels were specialised (gridbias/_kernels.py at commit 4bebb0e), copied verbatim. Its own correctness
against scipy and OpenMM is what tests/test_interpolation.py and the OpenMM table tests check; here only
bit-for-bit identity of the fast paths with it is checked (batched evaluate, one-point evaluate, the
kernel the test dynamics call, walls included), so results and restarts made before the change are
reproduced exactly.
"""

import numpy as np
import pytest
from numba import njit

import gridbias as gb
from gridbias import _kernels

pytestmark = pytest.mark.filterwarnings("ignore:axis .* coarser than sigma/2")


@njit(cache=False)
def _generic_eval_point(coef4, ndim, lower3, spacing3, bins3, periodic3, s, grad_out):
    for a in range(ndim):
        grad_out[a] = 0.0
    ok, c0, t0 = _kernels._axis_cell(s[0], lower3[0], spacing3[0], bins3[0], periodic3[0])
    if not ok:
        return 0.0
    c1, t1, c2, t2 = 0, 0.0, 0, 0.0
    if ndim > 1:
        ok, c1, t1 = _kernels._axis_cell(s[1], lower3[1], spacing3[1], bins3[1], periodic3[1])
        if not ok:
            return 0.0
    if ndim > 2:
        ok, c2, t2 = _kernels._axis_cell(s[2], lower3[2], spacing3[2], bins3[2], periodic3[2])
        if not ok:
            return 0.0
    h0, d0 = _kernels._hermite(t0)
    h1, d1 = _kernels._hermite(t1)
    h2, d2 = _kernels._hermite(t2)
    energy = 0.0
    g0 = 0.0
    g1 = 0.0
    g2 = 0.0
    ncorner = 1 << ndim
    for corner in range(ncorner):
        k0 = corner & 1
        k1 = (corner >> 1) & 1
        k2 = (corner >> 2) & 1
        i0 = c0 + k0
        if periodic3[0] and i0 == bins3[0]:
            i0 = 0
        i1 = c1 + k1
        if ndim > 1 and periodic3[1] and i1 == bins3[1]:
            i1 = 0
        i2 = c2 + k2
        if ndim > 2 and periodic3[2] and i2 == bins3[2]:
            i2 = 0
        for m in range(ncorner):
            c = coef4[m, i0, i1, i2]
            j0 = 2 * (m & 1) + k0
            v0, w0 = h0[j0], d0[j0]
            if ndim == 1:
                energy += c * v0
                g0 += c * w0
                continue
            j1 = 2 * ((m >> 1) & 1) + k1
            v1, w1 = h1[j1], d1[j1]
            if ndim == 2:
                energy += c * v0 * v1
                g0 += c * w0 * v1
                g1 += c * v0 * w1
                continue
            j2 = 2 * ((m >> 2) & 1) + k2
            v2, w2 = h2[j2], d2[j2]
            energy += c * v0 * v1 * v2
            g0 += c * w0 * v1 * v2
            g1 += c * v0 * w1 * v2
            g2 += c * v0 * v1 * w2
    grad_out[0] = g0 / spacing3[0]
    if ndim > 1:
        grad_out[1] = g1 / spacing3[1]
    if ndim > 2:
        grad_out[2] = g2 / spacing3[2]
    return energy


def _reference(bias, points):
    """Energy (n,) and gradient (n, d) from the generic kernel, walls added as the shipped code does."""
    coef, ndim, lower3, spacing3, bins3, periodic3 = bias._kernel_args()
    energy = np.empty(len(points))
    grad = np.empty((len(points), ndim))
    for p, s in enumerate(points):
        energy[p] = _generic_eval_point(coef, ndim, lower3, spacing3, bins3, periodic3, s, grad[p])
        energy[p] += _kernels.wall_point(*bias._wall_args(), s, grad[p])
    return energy, grad


CASES = [
    ([0.0], [2.0], [40], [False]),
    ([-np.pi], [np.pi], [36], [True]),
    ([0.0, -1.0], [2.0, 1.0], [20, 16], [False, False]),
    ([-np.pi, -np.pi], [np.pi, np.pi], [24, 18], [True, True]),
    ([-np.pi, 0.2], [np.pi, 1.5], [24, 15], [True, False]),
    ([0.0, 0.0, 0.0], [1.0, 2.0, 1.0], [7, 6, 5], [False, False, False]),
    ([-np.pi, 0.0, -np.pi], [np.pi, 1.0, np.pi], [8, 6, 10], [True, False, True]),
    ([-np.pi] * 3, [np.pi] * 3, [9, 8, 7], [True, True, True]),
]


@pytest.mark.parametrize("lower, upper, bins, periodic", CASES)
def test_specialised_kernels_reproduce_the_generic_kernel_bit_for_bit(rng, lower, upper, bins, periodic):
    grid = gb.Grid(lower, upper, bins, periodic)
    d = grid.ndim
    walls = [gb.Wall(cv=d - 1, bound=float(grid.lower[-1] + 0.8 * grid.span[-1]), k=50.0, side="above")]
    bias = gb.GridBias(grid, sigma=0.15 * grid.span, height=1.0, temperature=300.0, bias_factor=8.0,
                       walls=walls)
    for s in grid.lower + rng.random((25, d)) * grid.span:
        bias.deposit(s)
    inside = grid.lower + rng.random((400, d)) * grid.span
    nodes = np.stack(np.meshgrid(*grid.axes, indexing="ij"), axis=-1).reshape(-1, d)[:50]
    edges = np.array([grid.lower, grid.upper, grid.lower + grid.spacing * 0.5, grid.upper - 1e-15])
    outside = grid.lower + (rng.random((50, d)) * 1.6 - 0.3) * grid.span  # some beyond non-periodic limits
    points = np.concatenate([inside, nodes, edges, outside])
    ref_e, ref_g = _reference(bias, points)
    energy, grad = bias.evaluate(points)
    np.testing.assert_array_equal(energy, ref_e)
    np.testing.assert_array_equal(grad, ref_g)
    for p in range(0, len(points), 7):
        e1, g1 = bias.evaluate(points[p])
        assert e1 == ref_e[p] and np.array_equal(g1, ref_g[p])
    # the kernel the test dynamics call (grid part only)
    coef, ndim, lower3, spacing3, bins3, periodic3 = bias._kernel_args()
    g_fast, g_ref = np.empty(d), np.empty(d)
    for s in points[::5]:
        e_fast = _kernels.eval_point(coef, ndim, lower3, spacing3, bins3, periodic3, s, g_fast)
        e_ref = _generic_eval_point(coef, ndim, lower3, spacing3, bins3, periodic3, s, g_ref)
        assert e_fast == e_ref and np.array_equal(g_fast, g_ref)
    # grid part and walls alone
    e_grid, g_grid = bias.evaluate_grid(points)
    e_wall, g_wall = bias.wall_energy(points)
    np.testing.assert_array_equal(e_grid + e_wall, energy)
    np.testing.assert_array_equal(g_grid + g_wall, grad)
