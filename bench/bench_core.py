"""pytest-benchmark suite for the core. Run: pytest bench/bench_core.py --benchmark-only

Each group holds the operation and the baseline it is compared with, so the ratio is read off one run.
"""

import numpy as np
import pytest

import gridbias as gb
from gridbias import _kernels


def _bias(bias_factor=10.0):
    grid = gb.Grid([-np.pi, -np.pi], [np.pi, np.pi], [128, 128], [False, False])
    return gb.GridBias(grid, sigma=4 * grid.spacing, height=1.0, temperature=300.0, bias_factor=bias_factor)


@pytest.fixture
def points():
    return np.random.default_rng(3).uniform(-2.5, 2.5, (100_000, 2))


@pytest.mark.benchmark(group="deposit 2-D 129^2")
def test_deposit_api(benchmark, points):
    bias = _bias()
    it = iter(points)
    benchmark(lambda: bias.deposit(next(it)))


@pytest.mark.benchmark(group="deposit 2-D 129^2")
def test_deposit_bare_kernel(benchmark):
    bias = _bias()
    coef, ndim, lower3, spacing3, bins3, periodic3 = bias._kernel_args()
    centre = np.array([0.3, -0.2])
    benchmark(lambda: _kernels.deposit_hill(coef, ndim, lower3, spacing3, bins3, periodic3, centre,
                                            bias.sigma, 1e-9, bias.cutoff))


@pytest.mark.benchmark(group="evaluate one point")
def test_evaluate_single(benchmark):
    bias = _bias()
    bias.deposit([0.0, 0.0])
    probe = np.array([0.1, 0.2])
    benchmark(lambda: bias.evaluate(probe))


@pytest.mark.benchmark(group="evaluate 10,000 points")
@pytest.mark.parametrize("n_hills", [10, 10_000])
def test_evaluate_batch_vs_hills(benchmark, points, n_hills):
    bias = _bias(None)
    bias.add_hills(points[:n_hills], np.full(n_hills, 0.5))
    probe = points[-10_000:]
    benchmark(lambda: bias.evaluate(probe))


@pytest.mark.benchmark(group="evaluate 10,000 points")
def test_direct_sum_of_100_gaussians_baseline(benchmark, points):
    centres = points[:100]
    sigma = _bias().sigma
    probe = points[-10_000:]

    def direct():
        diff = (probe[:, None, :] - centres[None, :, :]) / sigma
        return np.exp(-0.5 * (diff**2).sum(-1)).sum(-1)

    benchmark(direct)
