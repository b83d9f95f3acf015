"""Numba kernels (private). Plain arrays and scalars in, caller-owned arrays out; no globals, no objects.

Representation of a bias on a ``d``-dimensional grid (``d <= 3``): one array ``coef`` of shape
``(2**d, n0, n1, n2)`` (missing axes padded with size 1). ``coef[0]`` holds the node values;
``coef[m]`` holds the spline derivative of the values along every axis whose bit is set in ``m``, in
index units (dV/di = spacing * dV/ds). Between nodes the bias is the tensor-product cubic Hermite
interpolant of these node values and derivatives. With natural splines on non-periodic axes and
periodic splines on periodic axes, this is the function OpenMM's ``Continuous{1,2,3}DFunction``
applies to the same node values (measured in DESIGN.md; checked against OpenMM in the tests).

Hills are separable products of 1-D factors, and the spline derivative is a linear operator acting on
one axis at a time, so a hill updates every ``coef[m]`` by an outer product of per-axis factors:
the Gaussian factor ``g_a`` on axes not in ``m`` and its spline slope ``S g_a`` on axes in ``m``.
Deposits therefore cost O(footprint) instead of a full-grid spline refresh.
"""

import numpy as np
from numba import njit

# Slope factors below this fraction of their largest entry are dropped. The spline response of a
# Gaussian decays by a factor 2 - sqrt(3) = 0.268 per node outside the footprint, so this keeps
# the increment exact to far below double-precision rounding of the values it is added to.
_SLOPE_TAIL = 1e-18


@njit(cache=True, nogil=True)
def spline_slopes(y, periodic, out):
    """Node slopes (index units) of the natural or periodic cubic spline through ``y``.

    y, out : (n,) float. Natural: second derivative zero at both ends (n >= 3). Periodic: ``y`` holds
    one period of n >= 2 distinct nodes (the node after the last is the first).
    """
    n = y.shape[0]
    rhs = np.empty(n)
    diag = np.full(n, 4.0)
    if periodic:
        if n == 2:
            out[0] = 0.0
            out[1] = 0.0
            return
        # Cyclic system m[i-1] + 4 m[i] + m[i+1] = 3 (y[i+1] - y[i-1]) by Sherman-Morrison:
        # A = B + u v^T with u = (gam, 0, ..., 0, 1), v = (1, 0, ..., 0, 1/gam).
        gam = -4.0
        rhs[0] = 3.0 * (y[1] - y[n - 1])
        for i in range(1, n - 1):
            rhs[i] = 3.0 * (y[i + 1] - y[i - 1])
        rhs[n - 1] = 3.0 * (y[0] - y[n - 2])
        diag[0] = 4.0 - gam
        diag[n - 1] = 4.0 - 1.0 / gam
        inv = _factor_unit_offdiag(diag)
        _solve_unit_offdiag(inv, rhs, out)
        u = np.zeros(n)
        u[0] = gam
        u[n - 1] = 1.0
        zz = np.empty(n)
        _solve_unit_offdiag(inv, u, zz)
        fact = (out[0] + out[n - 1] / gam) / (1.0 + zz[0] + zz[n - 1] / gam)
        for i in range(n):
            out[i] -= fact * zz[i]
    else:
        diag[0] = 2.0
        diag[n - 1] = 2.0
        rhs[0] = 3.0 * (y[1] - y[0])
        for i in range(1, n - 1):
            rhs[i] = 3.0 * (y[i + 1] - y[i - 1])
        rhs[n - 1] = 3.0 * (y[n - 1] - y[n - 2])
        inv = _factor_unit_offdiag(diag)
        _solve_unit_offdiag(inv, rhs, out)


@njit(cache=True, nogil=True)
def _factor_unit_offdiag(diag):
    """Forward-elimination factors of a tridiagonal matrix with unit off-diagonals: inv (n,), where
    inv[i] = 1 / (diag[i] - inv[i-1]) is both the pivot's reciprocal and the modified super-diagonal."""
    n = diag.shape[0]
    inv = np.empty(n)
    inv[0] = 1.0 / diag[0]
    for i in range(1, n):
        inv[i] = 1.0 / (diag[i] - inv[i - 1])
    return inv


@njit(cache=True, nogil=True)
def _solve_unit_offdiag(inv, rhs, out):
    """Solve with the factors of ``_factor_unit_offdiag`` (Thomas algorithm). rhs, out: (n,)."""
    n = inv.shape[0]
    out[0] = rhs[0] * inv[0]
    for i in range(1, n):
        out[i] = (rhs[i] - out[i - 1]) * inv[i]
    for i in range(n - 2, -1, -1):
        out[i] -= inv[i] * out[i + 1]


@njit(cache=True, nogil=True)
def _hill_window(n, periodic, lower, spacing, center, sigma, cutoff):
    """Footprint of one axis as (first node, node count, centre in index units).

    The first node is unwrapped (may be negative or >= n on a periodic axis); nodes within
    ``cutoff * sigma`` of the centre (minimum image on periodic axes) belong to the footprint.
    """
    u = (center - lower) / spacing
    r = cutoff * sigma / spacing
    if periodic:
        u = u - n * np.floor(u / n)
        first = int(np.ceil(u - r))
        last = int(np.floor(u + r))
        if last - first + 1 >= n:  # the footprint covers the whole period: every node once
            first = int(np.ceil(u - 0.5 * n))
            return first, n, u
        return first, last - first + 1, u
    first = max(0, int(np.ceil(u - r)))
    last = min(n - 1, int(np.floor(u + r)))
    return first, max(0, last - first + 1), u


@njit(cache=True, nogil=True)
def _axis_factors(n, periodic, lower, spacing, center, sigma, cutoff, g_full, s_full, fac, start, length, a):
    """Fill the compact Gaussian factor (order 0) and spline-slope factor (order 1) of axis ``a``.

    fac[a, order, q] holds the factor of node (start[a, order] + q) mod n for q < length[a, order].
    g_full, s_full : (n,) scratch arrays.
    """
    first, count, u = _hill_window(n, periodic, lower, spacing, center, sigma, cutoff)
    r = cutoff * sigma / spacing
    g_full[:] = 0.0
    for q in range(count):
        i = first + q
        d = i - u
        if periodic:
            d -= n * np.floor(d / n + 0.5)  # minimum image
        if abs(d) <= r:
            z = d * spacing / sigma
            val = np.exp(-0.5 * z * z)
        else:
            val = 0.0
        fac[a, 0, q] = val
        g_full[i % n if periodic else i] = val
    start[a, 0] = first % n if periodic else first
    length[a, 0] = count
    spline_slopes(g_full, periodic, s_full)
    # Keep the slope factor where it exceeds _SLOPE_TAIL of its maximum: a window around the centre.
    smax = 0.0
    for i in range(n):
        if abs(s_full[i]) > smax:
            smax = abs(s_full[i])
    tol = _SLOPE_TAIL * smax
    if periodic:
        reach = 0
        centre = int(np.floor(u))
        half = n // 2
        for i in range(n):
            if abs(s_full[i]) > tol:
                d = i - centre
                if d > half:
                    d -= n
                elif d < -half:
                    d += n
                reach = max(reach, abs(d) + 1)
        lo = centre - reach
        cnt = min(2 * reach + 1, n)
    else:
        lo = n
        hi = -1
        for i in range(n):
            if abs(s_full[i]) > tol:
                lo = min(lo, i)
                hi = max(hi, i)
        cnt = max(0, hi - lo + 1)
        lo = min(lo, n - 1)
    for q in range(cnt):
        fac[a, 1, q] = s_full[(lo + q) % n]
    start[a, 1] = lo % n
    length[a, 1] = cnt


@njit(cache=True, nogil=True, inline="always")
def _axis_cell(x, lower, spacing, nb, periodic):
    """(inside, cell, fraction) of coordinate x on one axis with nb intervals."""
    u = (x - lower) / spacing
    if periodic:
        # For 0 <= u < nb, u / nb rounds to at most 1 - 2**-53 < 1 (correct rounding), so the wrap would
        # return u itself: skipping the division there changes no bit.
        if not (u >= 0.0 and u < nb):
            u = u - nb * np.floor(u / nb)
    elif not (u >= 0.0 and u <= nb):
        return False, 0, 0.0
    c = int(np.floor(u))
    if c >= nb:  # the upper edge, or u rounded up to nb
        c = nb - 1
    return True, c, u - c


@njit(cache=True, nogil=True, inline="always")
def _hermite(t):
    """Cubic Hermite basis on [0, 1] and its t-derivative, indexed [2 * order + corner]:
    order 0 weighs node values, order 1 node slopes; corner 0 is the cell's lower node."""
    t2 = t * t
    t3 = t2 * t
    return ((2.0 * t3 - 3.0 * t2 + 1.0, -2.0 * t3 + 3.0 * t2, t3 - 2.0 * t2 + t, t3 - t2),
            (6.0 * t2 - 6.0 * t, -6.0 * t2 + 6.0 * t, 3.0 * t2 - 4.0 * t + 1.0, 3.0 * t2 - 2.0 * t))


@njit(cache=True, nogil=True, inline="always")
def _upper_corner(c, bins, periodic):
    """Index of the node after cell c on one axis (node 0 again past the last cell of a periodic axis)."""
    i = c + 1
    if periodic and i == bins:
        return 0
    return i


# The three kernels below share one evaluation order (corner = k0 + 2 k1 + 4 k2 outer, derivative order m
# inner, products taken left to right), so a point gives the same bits whichever path evaluates it. The
# upper corner is addressed as c + k * step (step 1, or 1 - bins past a periodic axis' last cell): index
# arithmetic the compiler unrolls, ~1.5x faster than picking it from a tuple.
@njit(cache=True, nogil=True, inline="always")
def _grid_1d(coef4, lower3, spacing3, bins3, periodic3, x0):
    """(energy, dV/ds0) of the grid part of a 1-D bias at x0; zeros outside a non-periodic axis."""
    ok, c0, t0 = _axis_cell(x0, lower3[0], spacing3[0], bins3[0], periodic3[0])
    if not ok:
        return 0.0, 0.0
    h0, d0 = _hermite(t0)
    s0 = _upper_corner(c0, bins3[0], periodic3[0]) - c0
    energy = 0.0
    g0 = 0.0
    for k0 in range(2):
        i0 = c0 + k0 * s0
        for m in range(2):
            c = coef4[m, i0, 0, 0]
            j0 = 2 * m + k0
            energy += c * h0[j0]
            g0 += c * d0[j0]
    return energy, g0 / spacing3[0]


@njit(cache=True, nogil=True, inline="always")
def _grid_2d(coef4, lower3, spacing3, bins3, periodic3, x0, x1):
    """(energy, dV/ds0, dV/ds1) of the grid part of a 2-D bias at (x0, x1)."""
    ok, c0, t0 = _axis_cell(x0, lower3[0], spacing3[0], bins3[0], periodic3[0])
    if not ok:
        return 0.0, 0.0, 0.0
    ok, c1, t1 = _axis_cell(x1, lower3[1], spacing3[1], bins3[1], periodic3[1])
    if not ok:
        return 0.0, 0.0, 0.0
    h0, d0 = _hermite(t0)
    h1, d1 = _hermite(t1)
    s0 = _upper_corner(c0, bins3[0], periodic3[0]) - c0
    s1 = _upper_corner(c1, bins3[1], periodic3[1]) - c1
    energy = 0.0
    g0 = 0.0
    g1 = 0.0
    for k1 in range(2):
        i1 = c1 + k1 * s1
        for k0 in range(2):
            i0 = c0 + k0 * s0
            for m in range(4):
                c = coef4[m, i0, i1, 0]
                j0 = 2 * (m & 1) + k0
                j1 = 2 * (m >> 1) + k1
                v0 = h0[j0]
                v1 = h1[j1]
                energy += c * v0 * v1
                g0 += c * d0[j0] * v1
                g1 += c * v0 * d1[j1]
    return energy, g0 / spacing3[0], g1 / spacing3[1]


@njit(cache=True, nogil=True, inline="always")
def _grid_3d(coef4, lower3, spacing3, bins3, periodic3, x0, x1, x2):
    """(energy, dV/ds0, dV/ds1, dV/ds2) of the grid part of a 3-D bias at (x0, x1, x2)."""
    ok, c0, t0 = _axis_cell(x0, lower3[0], spacing3[0], bins3[0], periodic3[0])
    if not ok:
        return 0.0, 0.0, 0.0, 0.0
    ok, c1, t1 = _axis_cell(x1, lower3[1], spacing3[1], bins3[1], periodic3[1])
    if not ok:
        return 0.0, 0.0, 0.0, 0.0
    ok, c2, t2 = _axis_cell(x2, lower3[2], spacing3[2], bins3[2], periodic3[2])
    if not ok:
        return 0.0, 0.0, 0.0, 0.0
    h0, d0 = _hermite(t0)
    h1, d1 = _hermite(t1)
    h2, d2 = _hermite(t2)
    s0 = _upper_corner(c0, bins3[0], periodic3[0]) - c0
    s1 = _upper_corner(c1, bins3[1], periodic3[1]) - c1
    s2 = _upper_corner(c2, bins3[2], periodic3[2]) - c2
    energy = 0.0
    g0 = 0.0
    g1 = 0.0
    g2 = 0.0
    for k2 in range(2):
        i2 = c2 + k2 * s2
        for k1 in range(2):
            i1 = c1 + k1 * s1
            for k0 in range(2):
                i0 = c0 + k0 * s0
                for m in range(8):
                    c = coef4[m, i0, i1, i2]
                    j0 = 2 * (m & 1) + k0
                    j1 = 2 * ((m >> 1) & 1) + k1
                    j2 = 2 * (m >> 2) + k2
                    v0 = h0[j0]
                    v1 = h1[j1]
                    v2 = h2[j2]
                    energy += c * v0 * v1 * v2
                    g0 += c * d0[j0] * v1 * v2
                    g1 += c * v0 * d1[j1] * v2
                    g2 += c * v0 * v1 * d2[j2]
    return energy, g0 / spacing3[0], g1 / spacing3[1], g2 / spacing3[2]


@njit(cache=True, nogil=True)
def eval_point(coef4, ndim, lower3, spacing3, bins3, periodic3, s, grad_out):
    """Grid bias (kJ/mol) at one CV point s (d,); writes dV/ds into grad_out (d,).

    Zero (and zero gradient) outside a non-periodic axis, as OpenMM's tables are. Allocates nothing.
    """
    if ndim == 1:
        energy, grad_out[0] = _grid_1d(coef4, lower3, spacing3, bins3, periodic3, s[0])
    elif ndim == 2:
        energy, grad_out[0], grad_out[1] = _grid_2d(coef4, lower3, spacing3, bins3, periodic3, s[0], s[1])
    else:
        energy, grad_out[0], grad_out[1], grad_out[2] = _grid_3d(coef4, lower3, spacing3, bins3, periodic3,
                                                                 s[0], s[1], s[2])
    return energy


@njit(cache=True, nogil=True)
def wall_point(cv, bound, k, sign, power, s, grad_out):
    """Energy (kJ/mol) of all walls at s (d,); ADDS their gradient into grad_out (d,).

    Wall w acts when sign[w] * (s[cv[w]] - bound[w]) > 0 with energy k[w] * dist**power[w].
    """
    energy = 0.0
    for w in range(cv.shape[0]):
        dist = sign[w] * (s[cv[w]] - bound[w])
        if dist > 0.0:
            energy += k[w] * dist ** power[w]
            grad_out[cv[w]] += sign[w] * k[w] * power[w] * dist ** (power[w] - 1.0)
    return energy


@njit(cache=True, nogil=True)
def _bias_at(coef4, ndim, lower3, spacing3, bins3, periodic3,
             wall_cv, wall_bound, wall_k, wall_sign, wall_power, use_grid, use_walls, s, grad_out):
    """Grid part and/or walls at s (d,); writes the gradient into grad_out (d,), returns the energy."""
    e = 0.0
    if use_grid:
        e = eval_point(coef4, ndim, lower3, spacing3, bins3, periodic3, s, grad_out)
    else:
        for a in range(ndim):
            grad_out[a] = 0.0
    if use_walls:
        e += wall_point(wall_cv, wall_bound, wall_k, wall_sign, wall_power, s, grad_out)
    return e


@njit(cache=True, nogil=True)
def evaluate_points(coef4, ndim, lower3, spacing3, bins3, periodic3,
                    wall_cv, wall_bound, wall_k, wall_sign, wall_power,
                    use_grid, use_walls, points, energy_out, grad_out):
    """Batched bias at points (n, d): energy_out (n,), grad_out (n, d). Grid and/or walls.

    One loop per dimension around the specialised grid kernel (the same bits as ``eval_point``).
    """
    n = points.shape[0]
    if not use_grid:
        energy_out[:] = 0.0
        grad_out[:, :] = 0.0
    elif ndim == 1:
        for p in range(n):
            energy_out[p], grad_out[p, 0] = _grid_1d(coef4, lower3, spacing3, bins3, periodic3, points[p, 0])
    elif ndim == 2:
        for p in range(n):
            energy_out[p], grad_out[p, 0], grad_out[p, 1] = _grid_2d(
                coef4, lower3, spacing3, bins3, periodic3, points[p, 0], points[p, 1])
    else:
        for p in range(n):
            energy_out[p], grad_out[p, 0], grad_out[p, 1], grad_out[p, 2] = _grid_3d(
                coef4, lower3, spacing3, bins3, periodic3, points[p, 0], points[p, 1], points[p, 2])
    if use_walls:
        for p in range(n):
            energy_out[p] += wall_point(wall_cv, wall_bound, wall_k, wall_sign, wall_power, points[p],
                                        grad_out[p])


@njit(cache=True, nogil=True)
def evaluate_one(coef4, ndim, lower3, spacing3, bins3, periodic3,
                 wall_cv, wall_bound, wall_k, wall_sign, wall_power, use_grid, use_walls, s, grad_out):
    """Bias at one point s (d,) into grad_out (d,); returns the energy, or NaN if s is not finite."""
    for a in range(ndim):
        if not np.isfinite(s[a]):
            return np.nan
    return _bias_at(coef4, ndim, lower3, spacing3, bins3, periodic3, wall_cv, wall_bound, wall_k, wall_sign,
                    wall_power, use_grid, use_walls, s, grad_out)


@njit(cache=True, nogil=True)
def inside_grid(ndim, lower3, upper3, periodic3, s):
    """True when s (d,) lies within the limits of every non-periodic axis."""
    for a in range(ndim):
        if not periodic3[a] and not (lower3[a] <= s[a] <= upper3[a]):
            return False
    return True


@njit(cache=True, nogil=True)
def _axpy(y, a, x):
    """y += a * x for contiguous 1-D slices of equal length."""
    for q in range(y.shape[0]):
        y[q] += a * x[q]


@njit(cache=True, nogil=True)
def deposit_hill(coef4, ndim, lower3, spacing3, bins3, periodic3, center, sigma, height, cutoff):
    """Add one Gaussian hill of peak ``height`` at ``center`` (d,) with widths ``sigma`` (d,).

    Updates the values and every spline-derivative array of ``coef4`` in place: coef[m] gets the
    outer product of the per-axis factors (Gaussian on axes not in m, its spline slope on axes in m).
    """
    n0, n1, n2 = coef4.shape[1], coef4.shape[2], coef4.shape[3]
    nmax = max(n0, max(n1, n2))
    fac = np.zeros((3, 2, nmax))
    start = np.zeros((3, 2), dtype=np.int64)
    length = np.ones((3, 2), dtype=np.int64)
    g_full = np.empty(nmax)
    s_full = np.empty(nmax)
    for a in range(3):
        if a < ndim:
            n = coef4.shape[1 + a]
            _axis_factors(n, periodic3[a], lower3[a], spacing3[a], center[a], sigma[a], cutoff,
                          g_full[:n], s_full[:n], fac, start, length, a)
        else:  # padded axis of size 1: factor 1 at node 0
            fac[a, 0, 0] = 1.0
    flat = coef4.reshape(coef4.shape[0], n0 * n1 * n2)
    last = ndim - 1
    n_last = coef4.shape[1 + last]
    # Outer axes: the real axes before the last one (padded ones have a single node).
    ax_a = 0 if last >= 1 else 2
    ax_b = 1 if last >= 2 else 2
    stride = np.array([n1 * n2, n2, 1])
    for m in range(1 << ndim):
        oa = (m >> ax_a) & 1 if ax_a < ndim else 0
        ob = (m >> ax_b) & 1 if ax_b < ndim else 0
        ol = (m >> last) & 1
        la = length[ax_a, oa] if ax_a < ndim else 1
        lb = length[ax_b, ob] if ax_b < ndim else 1
        na = coef4.shape[1 + ax_a]
        nb = coef4.shape[1 + ax_b]
        j0 = start[last, ol]
        lq = length[last, ol]
        first_piece = min(lq, n_last - j0)
        row = flat[m]
        for qa in range(la):
            ia = (start[ax_a, oa] + qa) % na
            fa = height * fac[ax_a, oa, qa]
            for qb in range(lb):
                ib = (start[ax_b, ob] + qb) % nb
                f = fa * fac[ax_b, ob, qb]
                if f == 0.0:
                    continue
                base = ia * stride[ax_a] + ib * stride[ax_b] if last >= 1 else 0
                off = base + j0
                _axpy(row[off:off + first_piece], f, fac[last, ol, :first_piece])
                if lq > first_piece:
                    _axpy(row[base:base + lq - first_piece], f, fac[last, ol, first_piece:lq])


@njit(cache=True, nogil=True)
def hill_height(coef4, ndim, lower3, spacing3, bins3, periodic3, center, height, wt_inverse_energy):
    """Height of a hill at ``center`` now: ``height * exp(-V(center) * wt_inverse_energy)``
    (well-tempered), or ``height`` when wt_inverse_energy is 0 (standard)."""
    if wt_inverse_energy > 0.0:
        g = np.empty(ndim)
        v = eval_point(coef4, ndim, lower3, spacing3, bins3, periodic3, center, g)
        return height * np.exp(-v * wt_inverse_energy)
    return height


@njit(cache=True, nogil=True)
def deposit_point(coef4, ndim, lower3, upper3, spacing3, bins3, periodic3, center, sigma,
                  height, cutoff, wt_inverse_energy):
    """One deposit step: the height rule plus the hill. Returns the height used, or -1.0 if outside.

    wt_inverse_energy : 1 / (kB (gamma - 1) T) in mol/kJ for well-tempered, 0.0 for standard.
    Returns -2.0 (and deposits nothing) if the centre is not finite.
    """
    for a in range(ndim):
        if not np.isfinite(center[a]):
            return -2.0
    if not inside_grid(ndim, lower3, upper3, periodic3, center):
        return -1.0
    h = hill_height(coef4, ndim, lower3, spacing3, bins3, periodic3, center, height, wt_inverse_energy)
    deposit_hill(coef4, ndim, lower3, spacing3, bins3, periodic3, center, sigma, h, cutoff)
    return h


@njit(cache=True, nogil=True)
def add_hills(coef4, ndim, lower3, upper3, spacing3, bins3, periodic3, centers, sigma, heights,
              cutoff, deposited_out):
    """Add given hills (k, d) with heights (k,) in order; deposited_out (k,) bool marks those inside."""
    for h in range(centers.shape[0]):
        inside = inside_grid(ndim, lower3, upper3, periodic3, centers[h])
        deposited_out[h] = inside
        if inside:
            deposit_hill(coef4, ndim, lower3, spacing3, bins3, periodic3, centers[h], sigma,
                         heights[h], cutoff)
