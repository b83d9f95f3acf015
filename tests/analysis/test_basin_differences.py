"""Basin free-energy differences against simulated time, from the bias and from reweighted frames.

References: for independent two-state samples the log-ratio ln(p_B / p_A) has the closed-form standard error
sqrt(1 / (n p_A) + 1 / (n p_B)) when p_A + p_B = 1 (binomial error propagated through the log); the exact
basin free energies of the double well come from scipy.integrate.quad; well-tempered limit as in
Barducci, Bussi & Parrinello, PRL 100, 020603 (2008).
"""

import numba
import numpy as np
import pytest
from scipy import integrate

import gridbias as gb
from gridbias.analysis import (
    FrameWeights,
    basin_differences_from_bias,
    basin_differences_from_frames,
    basin_free_energies,
    basins_from_boxes,
    offset_weights,
    surface_at,
)
from gridbias.errors import ParameterError

T = 300.0
KT = gb.KB * T
GRID = gb.Grid([-2.0], [2.0], [200])
BOXES = {"left": ([-1.5], [-0.05]), "right": ([0.05], [1.5])}


def test_independent_two_state_frames_give_the_closed_form_difference_and_error(rng):
    n = 50_000
    p_right = 0.2
    x = np.where(rng.uniform(size=n) < p_right, rng.normal(1.0, 0.1, n), rng.normal(-1.0, 0.1, n))
    basins = basins_from_boxes(GRID, BOXES)
    weights = FrameWeights.from_log_weights(np.zeros(n), KT)
    result = basin_differences_from_frames(weights, np.arange(n, dtype=float), x, basins, n_points=5)
    exact_error = KT * np.sqrt(1.0 / (n * p_right) + 1.0 / (n * (1.0 - p_right)))
    assert result.errors[-1, 1] == pytest.approx(exact_error, rel=0.1)
    expected = -KT * np.log(p_right / (1 - p_right))
    assert result.differences[-1, 1] == pytest.approx(expected, abs=4 * exact_error)
    assert result.differences[-1, 0] == 0.0 and result.errors[-1, 0] == 0.0
    assert result.plateau_found[-1].all()
    # earlier times use fewer frames: larger errors
    assert np.all(np.diff(result.errors[1:, 1]) < 0)
    assert result.source == "reweighted frames" and result.names == ("left", "right")
    assert "right - left" in result.table()


def test_unvisited_basin_has_no_estimate_yet():
    x = np.concatenate([np.full(50, -1.0), np.full(50, 1.0)])
    basins = basins_from_boxes(GRID, BOXES)
    weights = FrameWeights.from_log_weights(np.zeros(100), KT)
    result = basin_differences_from_frames(weights, np.arange(100.0), x, basins, times=[10.0, 99.0],
                                           reference="left")
    assert np.isnan(result.differences[0, 1])
    assert result.differences[1, 1] == pytest.approx(0.0)


def test_frames_must_be_in_time_order():
    basins = basins_from_boxes(GRID, BOXES)
    weights = FrameWeights.from_log_weights(np.zeros(3), KT)
    with pytest.raises(ParameterError, match=r"frame 2 \(1.0 ps\) comes after frame 1 \(2.0 ps\)"):
        basin_differences_from_frames(weights, [0.0, 2.0, 1.0], np.zeros(3), basins)
    with pytest.raises(ParameterError, match="reference 'middle' is not a basin name"):
        basin_differences_from_frames(weights, [0.0, 1.0, 2.0], np.zeros(3), basins, reference="middle")


def test_bias_estimate_at_past_times_equals_the_basin_free_energies_of_each_rebuilt_surface(rng):
    bias = gb.GridBias(GRID, sigma=[0.1], height=1.0, temperature=T, bias_factor=5.0)
    for i, s in enumerate(rng.uniform(-1.4, 1.4, size=40)):
        bias.deposit([s], time=float(i + 1))
    basins = basins_from_boxes(GRID, BOXES)
    result = basin_differences_from_bias(bias, basins, times=[10.0, 40.0])
    assert result.errors is None and result.source == "bias"
    for row, n in enumerate([10, 40]):
        fes = -(5.0 / 4.0) * bias.rebuilt(n).values
        f_b = basin_free_energies(basins, fes, KT)
        assert result.differences[row, 1] == pytest.approx(f_b[1] - f_b[0], abs=1e-10)
    with pytest.raises(ParameterError, match="basins were defined on another grid"):
        basin_differences_from_bias(bias, basins_from_boxes(gb.Grid([-2.0], [2.0], [100]), BOXES))


@pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics")
def test_both_estimates_of_a_well_tempered_run_agree_with_the_exact_basin_difference():
    from gridbias.testsystems import DoubleWell, run_metadynamics

    potential = DoubleWell(barrier=20.0, tilt=3.0)
    walls = [gb.Wall(0, 1.6, 500.0, "above"), gb.Wall(0, -1.6, 500.0, "below")]
    bias = gb.GridBias(GRID, sigma=[0.1], height=2.0, temperature=T, bias_factor=6.0, walls=walls)
    traj = run_metadynamics(potential, bias, [-1.0], n_deposits=20_000, stride=50, dt=0.005, friction=5.0,
                            rng=np.random.default_rng(3), record_every=10)
    basins = basins_from_boxes(GRID, BOXES)

    def boltzmann(a, b):
        return integrate.quad(lambda s: np.exp(-potential.free_energy([[s]], temperature=T)[0] / KT), a, b)[0]

    exact = -KT * np.log(boltzmann(0.05, 1.5) / boltzmann(-1.5, -0.05))
    weights = offset_weights(bias, traj.times, frame_bias=traj.bias_energies)
    from_frames = basin_differences_from_frames(weights, traj.times, traj.positions, basins)
    from_bias = basin_differences_from_bias(bias, basins)
    error = from_frames.errors[-1, 1]
    assert 0.0 < error < 0.5 * KT
    assert from_frames.differences[-1, 1] == pytest.approx(exact, abs=max(4 * error, 0.5 * KT))
    assert from_bias.differences[-1, 1] == pytest.approx(exact, abs=0.5 * KT)
    # the bias-based value at the end is the one from the final surface
    f_b = basin_free_energies(basins, surface_at(bias).free_energy, KT)
    assert from_bias.differences[-1, 1] == pytest.approx(f_b[1] - f_b[0], abs=1e-9)
