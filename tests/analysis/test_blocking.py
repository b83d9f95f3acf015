"""Block analysis (Flyvbjerg & Petersen, J. Chem. Phys. 91, 461, 1989) against closed forms.

Reference for the AR(1) process x_t = phi x_{t-1} + e_t (unit Gaussian noise): var(x) = 1/(1 - phi^2) and,
for long series, var(mean) = var(x) (1 + phi)/(1 - phi) / n (the integrated autocorrelation time of an
AR(1) process; standard time-series result, e.g. the blocking literature's own test case).
"""

import numpy as np
import pytest
from scipy.signal import lfilter

from gridbias.analysis import blocking_curve
from gridbias.analysis.blocking import ratio_standard_errors
from gridbias.errors import ParameterError


def ar1(phi, n, rng):
    """A stationary AR(1) series: x_0 drawn from the stationary law, then x_t = phi x_{t-1} + e_t."""
    e = rng.standard_normal(n)
    e[0] /= np.sqrt(1.0 - phi**2)
    return lfilter([1.0], [1.0, -phi], e)


@pytest.mark.parametrize("phi", [0.5, 0.9, 0.97])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_ar1_standard_error_matches_closed_form_within_20_percent(phi, seed):
    # Flyvbjerg & Petersen 1989 plateau vs the AR(1) closed form sigma_x^2 (1+phi)/(1-phi)/n.
    n = 2**17
    x = ar1(phi, n, np.random.default_rng(seed))
    curve = blocking_curve(x)
    exact = np.sqrt(1.0 / (1.0 - phi**2) * (1.0 + phi) / (1.0 - phi) / n)
    assert curve.plateau_found
    assert curve.standard_error == pytest.approx(exact, rel=0.20)
    # the unblocked estimate underestimates the error of correlated data by sqrt(tau)
    assert curve.standard_errors[0] == pytest.approx(exact * np.sqrt((1 - phi) / (1 + phi)), rel=0.05)


def test_white_noise_plateau_is_the_naive_error(rng):
    # Independent data: every level estimates sigma/sqrt(n) (closed form).
    x = rng.normal(size=2**14)
    curve = blocking_curve(x)
    assert curve.plateau_found
    assert curve.standard_error == pytest.approx(1.0 / np.sqrt(x.size), rel=0.1)


def test_curve_shapes_and_error_bars():
    x = np.arange(100, dtype=float)
    curve = blocking_curve(x)
    # 100 -> 50 -> 25 -> 12 -> 6 -> 3 (odd tails dropped)
    np.testing.assert_array_equal(curve.n_blocks, [100, 50, 25, 12, 6, 3])
    np.testing.assert_array_equal(curve.block_sizes, 2 ** np.arange(6))
    expected_bars = curve.standard_errors / np.sqrt(2.0 * (curve.n_blocks - 1))  # F&P 1989, eq. for the bar
    np.testing.assert_allclose(curve.standard_error_bars, expected_bars)
    # level 0 is the naive error: population variance / (n - 1)
    assert curve.standard_errors[0] == pytest.approx(np.sqrt(np.var(x) / 99))
    assert curve.mean == pytest.approx(49.5)


def test_short_correlated_series_is_flagged_not_given_a_silent_number(rng):
    # tau ~ 200 frames with only 256 frames: the curve is still rising when fewer than 30 blocks remain.
    x = ar1(0.99, 256, rng)
    curve = blocking_curve(x)
    assert not curve.plateau_found
    assert curve.plateau_level is None
    assert "too short" in curve.summary()
    usable = curve.n_blocks >= 30
    assert curve.standard_error == pytest.approx(curve.standard_errors[usable].max())


def test_ratio_errors_equal_blocking_of_the_linearised_series(rng):
    # The sparse (block, bin) bookkeeping must give exactly what blocking the dense linearised series gives.
    n, m = 3000, 5
    bins = rng.integers(-1, m, size=n)
    bins[: n // 3] = np.where(bins[: n // 3] >= 0, 0, -1)  # correlated: a stretch stuck in bin 0
    w = rng.exponential(size=n)
    p, se, plateau = ratio_standard_errors(bins, w, m)
    for j in range(m):
        assert p[j] == pytest.approx(w[bins == j].sum() / w.sum())
        z = w * ((bins == j) - p[j]) / w.mean()
        curve = blocking_curve(z)
        assert se[j] == pytest.approx(curve.standard_error, rel=1e-9)
        assert plateau[j] == curve.plateau_found


def test_ratio_errors_of_independent_draws_match_the_binomial_error(rng):
    # Independent categorical draws with equal weights: se(p) = sqrt(p (1 - p) / n) (binomial closed form).
    n = 100_000
    bins = rng.choice(3, size=n, p=[0.2, 0.3, 0.5])
    p, se, plateau = ratio_standard_errors(bins, np.ones(n), 3)
    assert plateau.all()
    np.testing.assert_allclose(se, np.sqrt(p * (1 - p) / n), rtol=0.1)


@pytest.mark.parametrize(
    "series, kwargs, match",
    [
        ([1.0, 2.0, 3.0], {}, "at least 4 values"),
        ([1.0, np.nan, 3.0, 4.0], {}, "series must be finite, got nan at index 1"),
        (np.ones((4, 2)), {}, r"series must be a 1-D array \(n,\), got shape \(4, 2\)"),
        (np.ones(10), {"min_blocks": 1}, "min_blocks must be an integer >= 2, got 1"),
    ],
)
def test_bad_input_is_refused(series, kwargs, match):
    with pytest.raises(ParameterError, match=match):
        blocking_curve(series, **kwargs)
