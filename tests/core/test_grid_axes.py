import numpy as np
import pytest

import gridbias as gb


def test_contract_shapes_and_axes():
    grid = gb.Grid(lower=[-np.pi, 0.2], upper=[np.pi, 1.5], bins=[128, 100], periodic=[True, False])
    assert grid.ndim == 2
    assert grid.shape == (128, 101)  # periodic: bins nodes; non-periodic: bins + 1
    np.testing.assert_allclose(grid.spacing, [2 * np.pi / 128, 0.013])
    assert grid.axes[0][0] == -np.pi and len(grid.axes[0]) == 128
    np.testing.assert_allclose(grid.axes[1][[0, -1]], [0.2, 1.5])
    assert grid.nodes().shape == (128, 101, 2)


def test_wrap_and_contains():
    grid = gb.Grid([-np.pi, 0.0], [np.pi, 1.0], [64, 10], [True, False])
    np.testing.assert_allclose(grid.wrap([np.pi + 0.5, 0.3]), [-np.pi + 0.5, 0.3])
    np.testing.assert_allclose(grid.wrap([[-np.pi - 0.5, 2.0]]), [[np.pi - 0.5, 2.0]])
    assert grid.contains([100.0, 0.5])
    assert not grid.contains([0.0, 1.01])
    assert grid.contains([[0.0, 0.0], [0.0, -0.1]]).tolist() == [True, False]


def test_round_trip_and_equality():
    grid = gb.Grid([0.0], [1.0], [10])
    assert gb.Grid.from_dict(grid.to_dict()) == grid
    assert grid != gb.Grid([0.0], [1.0], [11])
    assert "bins" in grid.describe_difference(gb.Grid([0.0], [1.0], [11]))


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(lower=[1.0], upper=[0.0], bins=[10]), r"axis 0: upper \(0.0\) must exceed lower \(1.0\)"),
        (dict(lower=[0.0], upper=[0.0], bins=[10]), "must exceed"),
        (dict(lower=[0.0, 0.0], upper=[1.0, 1.0], bins=[10, 1]), r"axis 1: bins must be an integer >= 2, got 1"),
        (dict(lower=[0.0], upper=[1.0], bins=[2.5]), "bins must be an integer"),
        (dict(lower=[0.0], upper=[1.0], bins=[10, 10]), "bins must have 1 entries"),
        (dict(lower=[0.0], upper=[np.inf], bins=[10]), "finite"),
        (dict(lower=[0.0] * 4, upper=[1.0] * 4, bins=[4] * 4), "1 to 3 CVs"),
        (dict(lower=[0.0], upper=[1.0, 2.0], bins=[10]), "upper has 2 entries"),
        (dict(lower=[0.0], upper=[1.0], bins=[10], periodic=["yes"]), "periodic must hold True/False"),
    ],
)
def test_bad_grid(kwargs, match):
    with pytest.raises(gb.GridError, match=match):
        gb.Grid(**kwargs)
