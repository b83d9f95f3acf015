"""Free energy along per-frame quantities (weighted histograms) with block errors.

References: exact bin probabilities of normal samples from scipy.stats.norm; the binomial standard error
sqrt(p (1 - p) / n) of a bin fraction from independent samples (closed form).
"""

import numpy as np
import pytest
from scipy import stats

import gridbias as gb
from gridbias.analysis import FrameWeights, free_energy_along
from gridbias.errors import ParameterError

KT = gb.KB * 300.0


def uniform_weights(n):
    return FrameWeights.from_log_weights(np.zeros(n), KT)


def test_unweighted_normal_samples_give_the_exact_bin_free_energy(rng):
    n = 200_000
    x = rng.normal(0.3, 0.5, size=n)
    edges = np.linspace(-0.7, 1.3, 21)
    profile = free_energy_along(uniform_weights(n), x, edges, names=["x (nm)"])
    p_exact = np.diff(stats.norm.cdf(edges, 0.3, 0.5))
    f_exact = -KT * np.log(p_exact / np.diff(edges))
    f_exact -= f_exact.min()
    diff = profile.free_energy - f_exact
    assert np.all(np.abs(diff - diff.mean()) < 4 * profile.error)
    # independent samples: the block error is the binomial error, propagated through the log
    np.testing.assert_allclose(profile.error, KT * np.sqrt(p_exact * (1 - p_exact) / n) / p_exact, rtol=0.15)
    assert profile.plateau_found.all()
    # frames beyond the edges count in the normalisation only
    assert profile.probability.sum() == pytest.approx(np.mean((x >= -0.7) & (x <= 1.3)))
    assert profile.counts.sum() == np.sum((x >= -0.7) & (x <= 1.3))
    assert profile.names == ("x (nm)",) and profile.ndim == 1
    np.testing.assert_allclose(profile.centers[0], 0.5 * (edges[1:] + edges[:-1]))
    assert profile.effective_sample_size == pytest.approx(n)


def test_two_dimensional_profile_of_independent_coordinates_is_the_sum_of_the_marginals(rng):
    n = 400_000
    xy = np.column_stack([rng.normal(0.0, 1.0, n), rng.normal(1.0, 0.5, n)])
    edges = (np.linspace(-2, 2, 9), np.linspace(0, 2, 5))
    profile = free_energy_along(uniform_weights(n), xy, edges)
    assert profile.free_energy.shape == (8, 4) and profile.ndim == 2
    fx = -KT * np.log(np.diff(stats.norm.cdf(edges[0], 0.0, 1.0)) / np.diff(edges[0]))
    fy = -KT * np.log(np.diff(stats.norm.cdf(edges[1], 1.0, 0.5)) / np.diff(edges[1]))
    exact = fx[:, None] + fy[None, :]
    diff = profile.free_energy - exact
    assert np.all(np.abs(diff - diff.mean()) < 4 * profile.error)


def test_weights_shift_the_profile_by_the_log_weight(rng):
    # Frames carrying weight e^{beta V(x)} with V = -F_extra: the profile is the unweighted one plus F_extra.
    n = 100_000
    x = rng.uniform(0.0, 1.0, n)
    extra = 3.0 * KT * x  # kJ/mol
    weighted = free_energy_along(FrameWeights.from_log_weights(-extra / KT, KT), x, np.linspace(0, 1, 11))
    centers = weighted.centers[0]
    exact = -KT * np.log(np.array([np.mean(np.exp(-3.0 * np.linspace(a, a + 0.1, 1001)))
                                   for a in centers - 0.05]))
    np.testing.assert_allclose(weighted.free_energy, exact - exact.min(), atol=5 * weighted.error.max())


def test_empty_bins_are_nan_and_leading_unused_frames_are_skipped(rng):
    x = np.concatenate([rng.uniform(0.0, 0.5, 100), rng.uniform(0.0, 0.5, 900)])
    lw = np.concatenate([np.full(100, -np.inf), np.zeros(900)])
    profile = free_energy_along(FrameWeights.from_log_weights(lw, KT), x, [0.0, 0.25, 0.5, 0.75])
    assert np.isnan(profile.free_energy[2]) and np.isnan(profile.error[2])
    assert profile.counts.tolist()[:2] == [np.sum((x[100:] < 0.25)), np.sum(x[100:] >= 0.25)]


@pytest.mark.parametrize(
    "values, edges, match",
    [
        (np.zeros(10), [0.0, 0.0, 1.0], r"edges\[0\] must be at least 2 finite, strictly increasing"),
        (np.zeros(10), [1.0], r"edges\[0\] must be at least 2"),
        (np.zeros((10, 2)), [0.0, 1.0], "edges must give one array of bin edges per column of values"),
        (np.zeros(9), [0.0, 1.0], "weights has 10, values has 9"),
        (np.full(10, np.nan), [0.0, 1.0], "values must be finite"),
    ],
)
def test_bad_input_is_refused(values, edges, match):
    with pytest.raises(ParameterError, match=match):
        free_energy_along(uniform_weights(10), values, edges)


def test_weights_must_be_frame_weights():
    with pytest.raises(ParameterError, match="weights must be FrameWeights"):
        free_energy_along(np.zeros(10), np.zeros(10), [0.0, 1.0])
