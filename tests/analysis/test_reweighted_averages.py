"""Reweighted averages and region probabilities against exact expectation values (scipy.stats), and their
block errors against the spread of repeated estimates."""

import math

import numpy as np
import pytest
from scipy import stats

from gridbias.analysis import FrameWeights, region_probability, reweighted_average
from gridbias.errors import ParameterError

KT = 2.494


def _biased_ar1(rng, n, *, rho=0.9, scale=1.6):
    """An AR(1) series whose stationary law is N(0, scale^2) (the 'biased' ensemble) and the log-weights
    that turn it into N(0, 1) (the 'unbiased' one): ln w = ln N(x; 0, 1) - ln N(x; 0, scale^2)."""
    x = np.empty(n)
    x[0] = rng.normal(0, scale)
    noise = rng.normal(0, scale * math.sqrt(1 - rho**2), n)
    for i in range(1, n):
        x[i] = rho * x[i - 1] + noise[i]
    log_w = stats.norm.logpdf(x) - stats.norm.logpdf(x, scale=scale)
    return x, FrameWeights.from_log_weights(log_w, KT)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_average_matches_exact_moments_of_the_unbiased_law(seed):
    """<x^2> = 1 and <cos x> = exp(-1/2) under N(0, 1) (closed forms); z-scores within 4."""
    x, w = _biased_ar1(np.random.default_rng(seed), 2**15)
    for values, exact in ((x**2, 1.0), (np.cos(x), math.exp(-0.5))):
        avg = reweighted_average(w, values)
        assert avg.plateau_found
        assert abs(avg.value - exact) < 4 * avg.error, (avg.value, avg.error)


def test_block_error_matches_the_spread_of_repeated_estimates():
    """The reported error of a correlated series is the standard deviation of independent repeats, within
    the sampling error of 60 repeats and the blocking estimate itself (25 %; common practice)."""
    rng = np.random.default_rng(11)
    values, errors = [], []
    for _ in range(60):
        x, w = _biased_ar1(rng, 2**13)
        avg = reweighted_average(w, np.cos(x))
        values.append(avg.value)
        errors.append(avg.error)
    spread = np.std(values, ddof=1)
    assert 0.75 < np.mean(errors) / spread < 1.33, (np.mean(errors), spread)


@pytest.mark.parametrize("seed", [4, 5])
def test_region_probability_matches_the_normal_tail(seed):
    """P(x > 1) under N(0, 1) from scipy.stats.norm.sf; -kT ln p and its error follow."""
    x, w = _biased_ar1(np.random.default_rng(seed), 2**15)
    region = region_probability(w, x > 1.0)
    exact = stats.norm.sf(1.0)
    assert abs(region.probability - exact) < 4 * region.error
    assert region.free_energy == pytest.approx(-KT * math.log(region.probability))
    assert region.free_energy_error == pytest.approx(KT * region.error / region.probability)
    assert region.n_inside == int((x > 1.0).sum())
    assert "p = " in region.summary()


def test_frames_without_weight_are_left_out():
    """Burn-in frames (-inf) do not count: the average is that of the weighted frames."""
    rng = np.random.default_rng(7)
    x = rng.normal(size=400)
    lw = np.zeros(400)
    lw[:100] = -np.inf
    avg = reweighted_average(FrameWeights.from_log_weights(lw, KT), x)
    assert avg.value == pytest.approx(x[100:].mean())
    assert avg.n_frames == 300


def test_bad_input_is_refused_with_the_parameter_named():
    w = FrameWeights.from_log_weights(np.zeros(50), KT)
    with pytest.raises(ParameterError, match="values must be finite, got nan at index 3"):
        reweighted_average(w, np.r_[np.zeros(3), np.nan, np.zeros(46)])
    with pytest.raises(ParameterError, match="one entry per frame: weights has 50, values has 49"):
        reweighted_average(w, np.zeros(49))
    with pytest.raises(ParameterError, match="weights must be FrameWeights"):
        reweighted_average(np.zeros(50), np.zeros(50))
    with pytest.raises(ParameterError, match="inside must be an array of bool"):
        region_probability(w, np.zeros(50))
    with pytest.raises(ParameterError, match="no frame carries weight"):
        reweighted_average(FrameWeights.from_log_weights(np.full(50, -np.inf), KT), np.zeros(50))
