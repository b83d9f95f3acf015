"""A shortened soak of the core (bench/soak_core.py runs the million-deposit version with timings)."""

import numpy as np

import gridbias as gb


def test_many_deposits_memory_bounded_and_rebuild_identical():
    grid = gb.Grid([-np.pi, -np.pi], [np.pi, np.pi], [64, 64], [True, True])
    bias = gb.GridBias(grid, sigma=4 * grid.spacing, height=1.2, temperature=300.0, bias_factor=10.0)
    grid_bytes = bias.nbytes
    path = np.cumsum(np.random.default_rng(5).normal(0.0, 0.05, (30_000, 2)), axis=0)
    for i, s in enumerate(path):
        bias.deposit(s, time=0.5 * i)
    # Memory: the grid is fixed; the history grows by 8 (d + 2) = 32 bytes per 2-D hill, nothing else.
    assert bias.nbytes == grid_bytes + 32 * 30_000
    assert np.isfinite(bias.values).all()
    again = bias.rebuilt()
    np.testing.assert_array_equal(again.values, bias.values)
    probe = grid.wrap(path[::997])
    np.testing.assert_array_equal(again.evaluate(probe)[0], bias.evaluate(probe)[0])
