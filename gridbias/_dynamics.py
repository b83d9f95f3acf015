"""Numba kernels of the test dynamics (private): analytic potentials by id and the BAOAB Langevin loop.

Used by ``gridbias.testsystems``; the bias enters through ``gridbias._kernels.eval_point`` / ``wall_point``.
"""

import math

import numpy as np
from numba import njit

from ._kernels import eval_point, wall_point

# Integer ids that select a potential inside the numba kernel.
HARMONIC, DOUBLE_WELL, MUELLER_BROWN, COUPLED_DOUBLE_WELL, SWITCHING_DOUBLE_WELL = 0, 1, 2, 3, 4


@njit(cache=True, nogil=True)
def potential_point(kind, params, x, grad_out):
    """Energy at one point x (d,); writes dU/dx into grad_out (d,)."""
    if kind == HARMONIC:
        d = x[0] - params[1]
        grad_out[0] = params[0] * d
        return 0.5 * params[0] * d * d
    if kind == DOUBLE_WELL:
        u = x[0] * x[0] - 1.0
        grad_out[0] = 4.0 * params[0] * u * x[0] + params[1]
        return params[0] * u * u + params[1] * x[0]
    if kind == MUELLER_BROWN:
        scale = params[0]
        energy = 0.0
        grad_out[0] = 0.0
        grad_out[1] = 0.0
        for k in range(4):
            big_a = params[1 + k]
            a = params[5 + k]
            b = params[9 + k]
            c = params[13 + k]
            dx = x[0] - params[17 + k]
            dy = x[1] - params[21 + k]
            term = scale * big_a * math.exp(a * dx * dx + b * dx * dy + c * dy * dy)
            energy += term
            grad_out[0] += term * (2.0 * a * dx + b * dy)
            grad_out[1] += term * (b * dx + 2.0 * c * dy)
        return energy
    if kind == SWITCHING_DOUBLE_WELL:
        h, h_y, tilt_y, coupling = params[0], params[1], params[2], params[3]
        u = x[0] * x[0] - 1.0
        w = x[1] * x[1] - 1.0
        grad_out[0] = 4.0 * h * u * x[0] + coupling * x[1]
        grad_out[1] = 4.0 * h_y * w * x[1] + tilt_y + coupling * x[0]
        return h * u * u + h_y * w * w + tilt_y * x[1] + coupling * x[0] * x[1]
    # _COUPLED_DOUBLE_WELL
    h, tilt, ky, c = params[0], params[1], params[2], params[3]
    u = x[0] * x[0] - 1.0
    k_transverse = ky * math.exp(c * x[0])
    transverse = 0.5 * k_transverse * x[1] * x[1]
    grad_out[0] = 4.0 * h * u * x[0] + tilt + c * transverse
    grad_out[1] = k_transverse * x[1]
    return h * u * u + tilt * x[0] + transverse


@njit(cache=True, nogil=True)
def baoab(kind, params, use_bias, coef, grid_ndim, lower3, spacing3, bins3, periodic3,
           wall_cv, wall_bound, wall_k, wall_sign, wall_power, cv_index,
           x, v, noise, step0, record_every, dt, friction, mass,
           pos_out, vel_out, epot_out, ebias_out):
    """Advance x, v (d,) in place by noise.shape[0] BAOAB steps; record every ``record_every`` steps.

    noise : (n_steps, d) Gaussian numbers with variance kT/m (nm^2/ps^2), one row per step; the thermostat's
    temperature enters only through them. step0 is the global step count before this call; frame r of the
    outputs is global step (r + 1) * record_every. The bias (grid part + walls) acts on s = x[cv_index].
    """
    d = x.shape[0]
    k = cv_index.shape[0]
    n_steps = noise.shape[0]
    force = np.empty(d)
    grad_x = np.empty(d)
    s = np.empty(k)
    grad_s = np.empty(k)
    c1 = math.exp(-friction * dt)
    c2 = math.sqrt(1.0 - c1 * c1)
    half_dt_m = 0.5 * dt / mass
    half_dt = 0.5 * dt
    # Pass 0 only evaluates the force at the start; pass p > 0 completes step p. The force code appears
    # once, inline: a helper call taking all these arrays cost ~4x the whole step.
    for p in range(n_steps + 1):
        if p > 0:
            for i in range(d):
                v[i] += half_dt_m * force[i]  # B
                x[i] += half_dt * v[i]  # A
                v[i] = c1 * v[i] + c2 * noise[p - 1, i]  # O
                x[i] += half_dt * v[i]  # A
        energy = potential_point(kind, params, x, grad_x)
        for i in range(d):
            force[i] = -grad_x[i]
        bias = 0.0
        if use_bias:
            for j in range(k):
                s[j] = x[cv_index[j]]
            bias = eval_point(coef, grid_ndim, lower3, spacing3, bins3, periodic3, s, grad_s)
            bias += wall_point(wall_cv, wall_bound, wall_k, wall_sign, wall_power, s, grad_s)
            for j in range(k):
                force[cv_index[j]] -= grad_s[j]
        if p > 0:
            for i in range(d):
                v[i] += half_dt_m * force[i]  # B
            done = step0 + p
            if done % record_every == 0:
                r = done // record_every - 1
                for i in range(d):
                    pos_out[r, i] = x[i]
                    vel_out[r, i] = v[i]
                epot_out[r] = energy
                ebias_out[r] = bias
