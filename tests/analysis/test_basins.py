"""Basins: found minima and catchments, boxes, basin free energies, core-to-core transitions.

References: minima located independently with scipy.optimize; basin free energies of Gaussian wells against
the closed form int exp(-kappa r^2 / (2 kT)) d^2r = 2 pi kT / kappa; the basin free energy
F_B = -kT ln sum_B exp(-F/kT) (common practice, no source).
"""

import numpy as np
import pytest
from scipy import optimize

import gridbias as gb
from gridbias.analysis import (
    basin_free_energies,
    basins_from_boxes,
    count_transitions,
    find_basins,
)
from gridbias.errors import ParameterError

KT = gb.KB * 300.0

# three periodic wells (centre, depth in kJ/mol, width); the first sits on the corner of the periodic box
WELLS = [((np.pi - 0.1, -np.pi + 0.15), 30.0, 0.5), ((-1.4, 1.2), 24.0, 0.45), ((1.3, -1.0), 18.0, 0.55)]


def periodic_wells(x, y, extra=()):
    """A sum of Gaussian wells in the minimum-image distance; a smooth periodic test surface, kJ/mol."""
    f = np.zeros(np.broadcast(x, y).shape)
    for (cx, cy), depth, width in tuple(WELLS) + tuple(extra):
        dx = np.angle(np.exp(1j * (x - cx)))
        dy = np.angle(np.exp(1j * (y - cy)))
        f = f - depth * np.exp(-(dx**2 + dy**2) / (2 * width**2))
    return f


def torus_grid(bins=90):
    return gb.Grid([-np.pi, -np.pi], [np.pi, np.pi], [bins, bins], periodic=[True, True])


def test_found_minima_are_the_minima_scipy_finds():
    grid = torus_grid()
    x, y = np.meshgrid(*grid.axes, indexing="ij")
    fes = periodic_wells(x, y)
    basins = find_basins(grid, fes - fes.min(), KT)
    assert basins.n_basins == 3 and basins.names == ("A", "B", "C")
    for k, ((cx, cy), _, _) in enumerate(WELLS):  # ordered by depth: deepest first
        exact = optimize.minimize(lambda p: periodic_wells(p[0], p[1]), [cx, cy], tol=1e-12).x
        found = basins.markers[k]
        gap = np.angle(np.exp(1j * (found - exact)))  # minimum image
        assert np.all(np.abs(gap) <= 0.5 * grid.spacing + 1e-12), (k, found, exact)
    assert np.all(basins.depths > 2.0 * KT)


def test_catchment_wraps_through_periodic_edges():
    grid = torus_grid()
    x, y = np.meshgrid(*grid.axes, indexing="ij")
    basins = find_basins(grid, periodic_wells(x, y) + 30.0, KT)
    corners = basins.labels[[0, 0, -1, -1], [0, -1, 0, -1]]
    assert np.all(corners == 0)  # the corner well is one basin across both periodic edges
    assert (basins.labels >= 0).all()  # every node drains somewhere
    # cores lie inside their basins and within 1 kT of the basin minimum
    for k in range(3):
        core = basins.cores == k
        assert core.any() and np.all(basins.labels[core] == k)
    # points outside [-pi, pi) wrap: this one is the corner well's centre shifted by a period on each axis
    assert basins.assign([[-np.pi - 0.1, np.pi + 0.15], [-1.4, 1.2]], core=True).tolist() == [0, 1]


def test_shallow_minima_merge_unless_the_threshold_allows_them():
    grid = torus_grid()
    x, y = np.meshgrid(*grid.axes, indexing="ij")
    dimple = (((0.0, 2.5), 3.0, 0.25),)  # a 3 kJ/mol (1.2 kT) dip on the flat part
    fes = periodic_wells(x, y, dimple)
    assert find_basins(grid, fes, KT).n_basins == 3
    assert find_basins(grid, fes, KT, min_depth_kT=0.5, core_kT=0.2).n_basins == 4


def test_flat_unvisited_plateau_is_not_a_basin():
    # a surface from a short run: two wells and a flat top where no hill ever landed
    grid = gb.Grid([-2.0, -2.0], [2.0, 2.0], [60, 60])
    x, y = np.meshgrid(*grid.axes, indexing="ij")
    fes = np.minimum(20.0, 5.0 * ((x + 1) ** 2 + y**2) * 4) + 0.0
    fes = np.minimum(fes, 3.0 + 20.0 * ((x - 1) ** 2 + y**2))
    basins = find_basins(grid, fes, KT)
    assert basins.n_basins == 2
    np.testing.assert_allclose(basins.markers, [[-1.0, 0.0], [1.0, 0.0]], atol=1e-12)


def test_1d_catchment_boundary_is_the_barrier_top():
    grid = gb.Grid([-2.0], [2.0], [400])
    fes = 15.0 * (grid.axes[0] ** 2 - 1.0) ** 2 + 4.0 * grid.axes[0]
    basins = find_basins(grid, fes - fes.min(), KT)
    top = optimize.minimize_scalar(lambda s: -(15.0 * (s**2 - 1) ** 2 + 4.0 * s), bounds=(-0.5, 0.5),
                                   method="bounded").x
    boundary = grid.axes[0][np.flatnonzero(np.diff(basins.labels))[0]]
    assert abs(boundary - top) <= grid.spacing[0]
    assert basins.labels[0] == 0  # the left well is deeper (tilt +4 kJ/mol/nm)


def test_basin_free_energy_difference_of_two_gaussian_wells_matches_the_closed_form():
    # F = min(f1 + kappa1 r1^2 / 2, f2 + kappa2 r2^2 / 2); each basin integral is 2 pi kT / kappa (wells far
    # narrower than their boxes), so F_2 - F_1 = (f2 - f1) - kT ln(kappa1 / kappa2).
    grid = gb.Grid([-3.0, -2.0], [3.0, 2.0], [600, 400])
    x, y = np.meshgrid(*grid.axes, indexing="ij")
    k1, k2, f1, f2 = 400.0, 1600.0, 0.0, 2.0
    fes = np.minimum(f1 + 0.5 * k1 * ((x + 1.5) ** 2 + y**2), f2 + 0.5 * k2 * ((x - 1.5) ** 2 + y**2))
    boxes = basins_from_boxes(grid, {"left": ([-3.0, -2.0], [0.0, 2.0]), "right": ([0.01, -2.0], [3.0, 2.0])})
    f_b = basin_free_energies(boxes, fes, KT)
    assert f_b[1] - f_b[0] == pytest.approx((f2 - f1) - KT * np.log(k1 / k2), abs=1e-3)
    found = find_basins(grid, fes, KT)
    np.testing.assert_allclose(basin_free_energies(found, fes, KT), f_b, atol=1e-6)


def test_boxes_wrap_on_periodic_axes_and_test_membership_exactly():
    grid = torus_grid(36)
    boxes = basins_from_boxes(grid, {"edge": ([2.5, -1.0], [-2.5, 1.0]),
                                     "middle": ([-1.0, -1.0], [1.0, 1.0])})
    points = [[3.1, 0.0], [-3.1, 0.5], [0.0, 0.0], [2.0, 0.0], [3.1, 1.2]]
    assert boxes.assign(points).tolist() == [0, 0, 1, -1, -1]
    np.testing.assert_array_equal(boxes.cores, boxes.labels)
    np.testing.assert_allclose(boxes.markers[0], [-np.pi, 0.0], atol=1e-12)
    assert np.isnan(boxes.depths).all()


@pytest.mark.parametrize(
    "boxes, match",
    [
        ({"a": ([-1, -1], [1, 1]), "b": ([0.5, 0.5], [2, 2])}, "boxes 'a' and 'b' overlap"),
        ({"a": ([2.5, -1], [-2.5, 1]), "b": ([3.0, 0.0], [3.1, 0.5])}, "boxes 'a' and 'b' overlap"),
        ({"a": ([0.01, 0.01], [0.02, 0.02])}, "box 'a' .* contains no grid node"),
        ({"a": ([0.0], [1.0])}, "corners must be 2 finite numbers each"),
        ({}, "boxes must be a non-empty dict"),
    ],
)
def test_bad_boxes_are_refused(boxes, match):
    with pytest.raises(ParameterError, match=match):
        basins_from_boxes(torus_grid(36), boxes)


def test_reversed_box_on_a_non_periodic_axis_is_refused():
    grid = gb.Grid([0.0], [1.0], [10])
    with pytest.raises(ParameterError, match=r"axis 0: a box's upper \(0.2\) must exceed its lower \(0.8\)"):
        basins_from_boxes(grid, {"a": ([0.8], [0.2])})


def test_find_basins_refuses_bad_input():
    grid = gb.Grid([0.0], [1.0], [10])
    with pytest.raises(ParameterError, match=r"free_energy must have the grid's shape \(11,\), got \(10,\)"):
        find_basins(grid, np.zeros(10), KT)
    with pytest.raises(ParameterError, match="must be finite at every node"):
        find_basins(grid, np.full(11, np.nan), KT)
    with pytest.raises(ParameterError, match=r"core_kT \(3.0\) must be below min_depth_kT \(2.0\)"):
        find_basins(grid, np.zeros(11), KT, core_kT=3.0)


def test_transitions_count_core_to_core_with_hysteresis():
    # -1 = between cores. Leaving core 0 and coming back is no transition; reaching core 1 is one.
    labels = np.array([-1, 0, 0, -1, 0, -1, -1, 1, 1, -1, 1, 0, -1, 2, 2, 0])
    counted = count_transitions(labels, 3)
    assert counted.total == 4
    np.testing.assert_array_equal(counted.matrix, [[0, 1, 1], [1, 0, 0], [1, 0, 0]])
    assert count_transitions(np.array([-1, -1]), 2).total == 0
    with pytest.raises(ParameterError, match=r"core_labels must lie in -1..1, got 0..2"):
        count_transitions(np.array([0, 2]), 2)
