"""Integrated autocorrelation time of a time series, with its statistical error.

The time is ``tau = integral_0^inf rho(t) dt`` (``rho`` the normalised autocorrelation function), estimated
as ``interval * (1/2 + sum_{k=1}^{M} rho_k)`` (the trapezoid rule over the sampled lags) with the window
``M`` chosen self-consistently as the smallest ``M >= c tau(M)``, c = 5, and the error
``tau * sqrt(2 (2 M + 1) / n)``: the automatic windowing of Madras & Sokal, J. Stat. Phys. 50, 109 (1988)
(window constant and error formula from memory). The variance of the mean of ``n`` samples is then
``var(x) * 2 tau / (n * interval)``, the same quantity block analysis reads from its plateau.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._checks import as_positive, as_series

__all__ = ["AutocorrelationTime", "autocorrelation_time", "WINDOW_CONSTANT", "MIN_RUN_LENGTH"]

#: Window constant c of the self-consistent window M >= c tau (Madras & Sokal 1988; 5 is the value usually
#: quoted with the method, from memory).
WINDOW_CONSTANT = 5.0

#: A run shorter than this many autocorrelation times gives an estimate too uncertain to act on (common
#: practice, no source; the window alone needs 5 of them).
MIN_RUN_LENGTH = 50.0


@dataclass(frozen=True)
class AutocorrelationTime:
    """The integrated autocorrelation time of one series.

    Attributes
    ----------
    time : float
        tau, in the unit of ``interval`` (ps). When ``decayed`` is False it is only a lower bound.
    error : float
        Its standard error (Madras & Sokal), same unit; NaN when ``decayed`` is False.
    window : int
        The window M in samples (the lags summed).
    n_samples : int
    interval : float
        Time between samples.
    decayed : bool
        True when a self-consistent window was found and the run spans at least ``MIN_RUN_LENGTH`` times tau.
    """

    time: float
    error: float
    window: int
    n_samples: int
    interval: float
    decayed: bool

    @property
    def run_length(self) -> float:
        """The series' duration in units of tau."""
        return self.n_samples * self.interval / self.time

    def summary(self) -> str:
        """One sentence: tau with its error, or why it is only a lower bound."""
        if self.decayed:
            return (f"{self.time:.4g} +/- {self.error:.2g} (window {self.window} samples, run = "
                    f"{self.run_length:.0f} autocorrelation times)")
        return (f"at least {self.time:.4g}: the autocorrelation did not decay within the run (it spans "
                f"{self.run_length:.1f} times this; >= {MIN_RUN_LENGTH:g} needed)")


def autocorrelation_time(series, *, interval: float = 1.0) -> AutocorrelationTime:
    """Estimate the integrated autocorrelation time of an equally spaced series.

    Parameters
    ----------
    series : (n,) float
        Values in time order, n >= 16, not constant.
    interval : float, keyword-only, default 1
        Time between samples (ps); ``time`` and ``error`` come out in this unit.

    Returns
    -------
    AutocorrelationTime

    Raises
    ------
    ParameterError
        If the series is too short, not finite or constant, or ``interval`` is not positive.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(3).normal(size=20_000)    # uncorrelated: tau = interval / 2
    >>> round(autocorrelation_time(x, interval=1.0).time, 1)
    0.5
    """
    x = as_series("series", series)
    dt = as_positive("interval", interval, "ps")
    n = x.shape[0]
    if n < 16:
        raise ParameterError(f"series must hold at least 16 values for an autocorrelation time, got {n}")
    y = x - x.mean()
    if not np.any(y):
        raise ParameterError("series is constant: it has no autocorrelation time")
    size = 1 << int(2 * n - 1).bit_length()
    spectrum = np.fft.rfft(y, size)
    acf = np.fft.irfft(spectrum * np.conj(spectrum), size)[:n]
    rho = acf / acf[0]
    tau_m = 0.5 + np.cumsum(rho[1:])  # tau_m[M - 1] = tau with window M, in samples
    window_m = np.arange(1, n)
    good = np.flatnonzero(window_m >= WINDOW_CONSTANT * tau_m)
    if good.size == 0:
        tau = float(max(tau_m.max(), 0.5))
        return AutocorrelationTime(tau * dt, float("nan"), n - 1, n, dt, False)
    window = int(window_m[good[0]])
    tau = float(tau_m[good[0]])
    error = tau * np.sqrt(2.0 * (2 * window + 1) / n)
    decayed = n >= MIN_RUN_LENGTH * tau
    error = float(error * dt) if decayed else float("nan")
    return AutocorrelationTime(tau * dt, error, window, n, dt, decayed)
