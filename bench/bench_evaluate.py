"""Batched ``GridBias.evaluate`` against a bare numba bicubic lookup (the floor of a 2-D grid evaluation).

Run:  python bench/bench_evaluate.py [--points 1000000] [--repeats 7]

The bare lookup is the least a 2-D evaluation of energy and gradient can do in numba: cell and fraction
from ``floor``, the cubic Hermite weights, the 16 coefficients of the cell (values and spline
derivatives, the core's own ``coef`` array), no input checks, no periodic wrap, no walls, points known to
lie inside. ``bias.evaluate(points)`` does all of that plus the checks, the wrap and the outside test.
Process CPU time of interleaved calls, fastest of the repeats (the machine is shared). 1-D and 3-D
evaluations are listed per point for scale.
"""

import argparse
import os
import sys
import time
import warnings

import numpy as np
from numba import njit

sys.path.insert(0, os.path.dirname(__file__))
from _timing import markdown_table  # noqa: E402

import gridbias as gb  # noqa: E402


@njit(cache=False, nogil=True)
def bare_bicubic(coef, lower0, lower1, inv0, inv1, points, energy_out, grad_out):
    for p in range(points.shape[0]):
        u0 = (points[p, 0] - lower0) * inv0
        u1 = (points[p, 1] - lower1) * inv1
        c0 = int(np.floor(u0))
        c1 = int(np.floor(u1))
        t0 = u0 - c0
        t1 = u1 - c1
        a = (2 * t0 ** 3 - 3 * t0 ** 2 + 1, -2 * t0 ** 3 + 3 * t0 ** 2,
             t0 ** 3 - 2 * t0 ** 2 + t0, t0 ** 3 - t0 ** 2)
        da = (6 * t0 * t0 - 6 * t0, -6 * t0 * t0 + 6 * t0, 3 * t0 * t0 - 4 * t0 + 1, 3 * t0 * t0 - 2 * t0)
        b = (2 * t1 ** 3 - 3 * t1 ** 2 + 1, -2 * t1 ** 3 + 3 * t1 ** 2,
             t1 ** 3 - 2 * t1 ** 2 + t1, t1 ** 3 - t1 ** 2)
        db = (6 * t1 * t1 - 6 * t1, -6 * t1 * t1 + 6 * t1, 3 * t1 * t1 - 4 * t1 + 1, 3 * t1 * t1 - 2 * t1)
        e = 0.0
        g0 = 0.0
        g1 = 0.0
        for k1 in range(2):
            for k0 in range(2):
                for m in range(4):
                    c = coef[m, c0 + k0, c1 + k1, 0]
                    i0 = 2 * (m & 1) + k0
                    i1 = 2 * (m >> 1) + k1
                    e += c * a[i0] * b[i1]
                    g0 += c * da[i0] * b[i1]
                    g1 += c * a[i0] * db[i1]
        energy_out[p] = e
        grad_out[p, 0] = g0 * inv0
        grad_out[p, 1] = g1 * inv1


def periodic_bias(d, bins, rng):
    grid = gb.Grid([-np.pi] * d, [np.pi] * d, [bins] * d, [True] * d)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = gb.GridBias(grid, [4 * 2 * np.pi / bins] * d, 1.0, 300.0, 10.0)
    for s in rng.uniform(-np.pi, np.pi, (200, d)):
        bias.deposit(s)
    return bias


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--points", type=int, default=1_000_000)
    ap.add_argument("--repeats", type=int, default=7)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    n = args.points
    bias = {1: periodic_bias(1, 4096, rng), 2: periodic_bias(2, 128, rng), 3: periodic_bias(3, 32, rng)}
    pts = {d: rng.uniform(-3.0, 3.0, (n, d)) for d in (1, 2, 3)}
    coef, grid = bias[2]._coef, bias[2].grid
    e, g = np.empty(n), np.empty((n, 2))
    args2 = (coef, grid.lower[0], grid.lower[1], 1 / grid.spacing[0], 1 / grid.spacing[1], pts[2], e, g)
    bare_bicubic(*args2)
    calls = {"bare 2-D bicubic": lambda: bare_bicubic(*args2)}
    for d in (1, 2, 3):
        bias[d].evaluate(pts[d][:10])
        calls[f"bias.evaluate {d}-D"] = lambda d=d: bias[d].evaluate(pts[d])
    best = {k: np.inf for k in calls}
    for _ in range(args.repeats):
        for k, f in calls.items():
            t0 = time.process_time()
            f()
            best[k] = min(best[k], time.process_time() - t0)
    energy, grad = bias[2].evaluate(pts[2])
    rows = [[k, f"{best[k] / n * 1e9:.1f}", f"{best[k] / best['bare 2-D bicubic']:.2f}"] for k in calls]
    print(f"numba {__import__('numba').__version__}, {n:,} points, process CPU time, fastest of "
          f"{args.repeats}; load average {os.getloadavg()[0]:.1f}\n")
    print(markdown_table(["call", "ns per point", "ratio to the bare 2-D bicubic"], rows))
    print(f"\nmax |evaluate - bare| over the 2-D points: energy {np.abs(energy - e).max():.1e}, "
          f"gradient {np.abs(grad - g).max():.1e} (different rounding of the same formula)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
