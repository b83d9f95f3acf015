"""Free-energy surfaces from the bias now and at past times.

References: standard metadynamics F = -V (Laio & Parrinello, PNAS 99, 12562, 2002); well-tempered
F = -(gamma/(gamma-1)) V (Barducci, Bussi & Parrinello, PRL 100, 020603, 2008); the bias at a past time is the
sum of the hills deposited by then (the definition of the bias, REFERENCES.md 1).
"""

import numpy as np
import pytest

import gridbias as gb
from gridbias.analysis import (
    evenly_spaced_times,
    hills_deposited_by,
    iter_surfaces,
    surface_at,
    surface_series,
)
from gridbias.errors import ParameterError

T = 300.0


def timed_bias(rng, *, bias_factor=6.0, n=30):
    grid = gb.Grid([-np.pi, -1.0], [np.pi, 1.5], [48, 40], periodic=[True, False])
    bias = gb.GridBias(grid, sigma=[0.35, 0.2], height=1.2, temperature=T, bias_factor=bias_factor)
    for i, s in enumerate(np.column_stack([rng.uniform(-np.pi, np.pi, n), rng.uniform(-0.8, 1.3, n)])):
        bias.deposit(s, time=0.5 * (i + 1))
    return bias


@pytest.mark.parametrize("bias_factor", [None, 6.0])
def test_surface_now_is_the_published_relation(rng, bias_factor):
    bias = timed_bias(rng, bias_factor=bias_factor)
    surface = surface_at(bias)
    factor = 1.0 if bias_factor is None else bias_factor / (bias_factor - 1.0)
    expected = -factor * bias.values
    np.testing.assert_allclose(surface.free_energy, expected - expected.min(), atol=1e-12)
    assert surface.free_energy.min() == 0.0
    assert surface.n_hills == 30 and surface.time == pytest.approx(15.0)
    assert surface.kT == pytest.approx(gb.KB * T) and surface.bias_factor == bias_factor
    assert not surface.free_energy.flags.writeable


def test_surface_at_a_past_time_equals_the_bias_of_the_hills_deposited_by_then(rng):
    bias = timed_bias(rng)
    # hills at 0.5, 1.0, ..., 15.0 ps: at 6.2 ps there were 12; a hill at exactly 6.0 ps counts
    assert hills_deposited_by(bias, [0.0, 0.5, 6.0, 6.2, 99.0]).tolist() == [0, 1, 12, 12, 30]
    past = surface_at(bias, time=6.2)
    assert past.n_hills == 12 and past.time == pytest.approx(6.2)
    np.testing.assert_array_equal(past.free_energy, bias.rebuilt(12).free_energy())
    by_count = surface_at(bias, n_hills=12)
    np.testing.assert_array_equal(by_count.free_energy, past.free_energy)
    assert by_count.time == pytest.approx(6.0)


def test_series_replays_once_and_matches_each_rebuilt_bias(rng):
    bias = timed_bias(rng)
    series = surface_series(bias, times=[9.0, 2.0, 15.0])  # any order
    assert series.n_hills.tolist() == [18, 4, 30]
    for i, n in enumerate([18, 4, 30]):
        np.testing.assert_array_equal(series.free_energy[i], bias.rebuilt(n).free_energy())
        assert series[i].n_hills == n
    # the last surface with every hill is bit-for-bit the current one
    np.testing.assert_array_equal(series.free_energy[2], surface_at(bias).free_energy)
    assert len(series) == 3


def test_default_series_is_evenly_spaced_over_the_run_and_reports_progress(rng):
    bias = timed_bias(rng)
    calls = []
    series = surface_series(bias, n_points=4, progress=lambda done, total: calls.append((done, total)))
    np.testing.assert_allclose(series.times, [0.5, 5.333333333, 10.16666667, 15.0])
    np.testing.assert_allclose(evenly_spaced_times(bias, 4), series.times)
    assert calls == [(1, 4), (2, 4), (3, 4), (4, 4)]


def test_iter_surfaces_yields_in_order(rng):
    bias = timed_bias(rng)
    counts = [s.n_hills for s in iter_surfaces(bias, n_hills=[0, 5, 5, 30])]
    assert counts == [0, 5, 5, 30]
    with pytest.raises(ParameterError, match="non-decreasing order"):
        list(iter_surfaces(bias, n_hills=[5, 2]))


def test_untimed_hills_can_only_be_selected_by_count(rng):
    bias = timed_bias(rng)
    bias.deposit([0.0, 0.0])  # no time given
    assert surface_at(bias, n_hills=31).n_hills == 31
    with pytest.raises(ParameterError, match="no time for hill 30"):
        surface_at(bias, time=3.0)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"time": 1.0, "n_hills": 3}, "not both|exactly one"),
        ({"n_hills": 31}, r"n_hills must lie in 0..30"),
        ({"n_hills": -1}, r"n_hills must lie in 0..30"),
        ({"n_hills": 2.5}, "n_hills must be a non-empty 1-D sequence of integers"),
        ({"time": float("nan")}, "times must be finite"),
    ],
)
def test_bad_moments_are_refused(rng, kwargs, match):
    with pytest.raises(ParameterError, match=match):
        surface_at(timed_bias(rng), **kwargs)
