"""
Drive the core from your own integrator
=======================================

Drive the gridbias core from your own integrator: a particle in a tilted double well.

The scenario is made up for the example: one coordinate x (nm) in U(x) = h (x^2 - 1)^2 + e x, integrated with
a hand-written Langevin (BAOAB) step in plain NumPy. The core needs only two calls: evaluate() for the bias
force every step and deposit() every `stride` steps. Halfway through, the bias is saved and loaded again, as
after a crash, and the run continues. At the end the well-tempered estimate -(gamma/(gamma-1)) V is compared
with the exact free energy, which for a 1-D system is the potential itself.

Run:  python examples/core_langevin.py      (a few seconds)
"""

import os
import tempfile

import numpy as np

import gridbias as gb

BARRIER, TILT = 20.0, 2.0  # kJ/mol; barrier ~8 kBT at 300 K
TEMPERATURE, MASS, FRICTION, DT = 300.0, 10.0, 5.0, 0.002  # K, g/mol, 1/ps, ps


def potential_force(x):
    energy = BARRIER * (x**2 - 1.0) ** 2 + TILT * x
    force = -(4.0 * BARRIER * x * (x**2 - 1.0) + TILT)
    return energy, force


def run(bias, x, v, n_steps, stride, rng, step0=0):
    """BAOAB Langevin (Leimkuhler & Matthews 2013) with the bias force -dV/dx from the core."""
    kt = gb.KB * TEMPERATURE
    c1 = np.exp(-FRICTION * DT)
    c2 = np.sqrt((1.0 - c1**2) * kt / MASS)
    _, f = potential_force(x)
    f -= bias.evaluate([x])[1][0]
    for step in range(step0, step0 + n_steps):
        v += 0.5 * DT * f / MASS
        x += 0.5 * DT * v
        v = c1 * v + c2 * rng.normal()
        x += 0.5 * DT * v
        _, f = potential_force(x)
        f -= bias.evaluate([x])[1][0]          # the only per-step call into gridbias
        v += 0.5 * DT * f / MASS
        if (step + 1) % stride == 0:
            bias.deposit([x], time=(step + 1) * DT)
    return x, v


def main():
    rng = np.random.default_rng(1)
    grid = gb.Grid(lower=[-2.0], upper=[2.0], bins=[200])
    walls = [gb.Wall(cv=0, bound=-1.6, k=500.0, side="below"), gb.Wall(cv=0, bound=1.6, k=500.0, side="above")]
    bias = gb.GridBias(grid, sigma=[0.08], height=1.5, temperature=TEMPERATURE, bias_factor=8.0, walls=walls)
    x, v = -1.0, 0.0
    x, v = run(bias, x, v, 100_000, 100, rng)
    with tempfile.TemporaryDirectory() as tmp:  # a restart, as after a crash
        path = os.path.join(tmp, "double_well.gbz")
        bias.save(path)
        bias = gb.GridBias.load(path)
    x, v = run(bias, x, v, 100_000, 100, rng, step0=100_000)

    xs = grid.axes[0]
    inner = np.abs(xs) < 1.4  # away from the walls (about 2 sigma; common practice)
    estimate = bias.free_energy()[inner]
    exact = potential_force(xs)[0][inner]
    kt = gb.KB * TEMPERATURE
    region = exact - exact.min() < 8 * kt
    offset = np.mean((estimate - exact)[region])
    rmse = np.sqrt(np.mean((estimate - exact - offset)[region] ** 2))
    print(f"{bias.n_hills} hills, last height {bias.history.heights[-1]:.3f} kJ/mol")
    print(f"RMSE of the free energy vs the exact one (F < 8 kBT): {rmse:.2f} kJ/mol = {rmse / kt:.2f} kBT")
    return rmse / kt


if __name__ == "__main__":
    main()
