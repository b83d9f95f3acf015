"""Saddle points, barriers and minimum free-energy paths against analytic answers.

References: the Müller-Brown surface and its stationary points (Müller & Brown, Theor. Chim. Acta 53, 75,
1979; the points recomputed in REFERENCES.md §5 and again here with scipy.optimize); the quartic double well
h (x^2 - 1)^2 + t x, whose stationary points are the roots of 4 h x^3 - 4 h x + t (closed form). Runs use
the core's BAOAB Langevin driver (Leimkuhler & Matthews 2013) with fixed seeds.
"""

import numba
import numpy as np
import pytest
from scipy import optimize

import gridbias as gb
from gridbias.analysis import (
    basins_from_boxes,
    find_basins,
    find_crossings,
    offset_weights,
    surface_at,
)
from gridbias.errors import ParameterError
from gridbias.testsystems import DoubleWell, MuellerBrown, run_metadynamics

T = 300.0
KT = gb.KB * T
needs_jit = pytest.mark.skipif(numba.config.DISABLE_JIT, reason="needs compiled dynamics")

# Müller & Brown 1979 stationary points (REFERENCES.md §5, computed from the published coefficients).
MB_MINIMA = {"M_A": (-0.558224, 1.441726), "M_B": (0.623499, 0.028038), "M_C": (-0.050011, 0.466694)}
MB_SADDLES = {"S1": (-0.822002, 0.624313), "S2": (0.212487, 0.292988)}


def mb_energy(points, scale=1.0):
    return MuellerBrown(scale=scale).energy_gradient(np.atleast_2d(points))[0]


def refined(point, saddle):
    """The stationary point near ``point`` (scipy root of the gradient), checked to be the right kind."""
    mb = MuellerBrown(scale=1.0)
    root = optimize.root(lambda p: mb.energy_gradient(p[None, :])[1][0], point, tol=1e-12)
    assert root.success
    return root.x


def test_the_recorded_stationary_points_are_stationary_points_of_the_published_surface():
    # scipy.optimize finds the same points from the recorded values (REFERENCES.md §5 to 1e-5 nm)
    for point in {**MB_MINIMA, **MB_SADDLES}.values():
        assert np.allclose(refined(point, False), point, atol=2e-5)


def test_mueller_brown_exact_surface_saddles_and_barriers():
    grid = gb.Grid([-1.5, -0.5], [1.2, 2.0], [270, 250])  # spacing 0.01 nm
    fes = mb_energy(grid.nodes().reshape(-1, 2)).reshape(grid.shape)
    kT = 3.0  # so that M_C (8.5 deep) is a basin of its own at the default 2 kT depth
    basins = find_basins(grid, fes, kT)
    crossings = find_crossings(grid, fes, kT, basins)
    pairs = {frozenset(c.basins): c for c in crossings}
    # A (M_A) - C (M_C) over S1, C - B (M_B) over S2; A and B are joined only through C
    names = dict(zip(("M_A", "M_B", "M_C"), basins.names, strict=True))
    assert set(pairs) == {frozenset((names["M_A"], names["M_C"])), frozenset((names["M_C"], names["M_B"]))}
    for saddle, (low, high) in (("S1", ("M_A", "M_C")), ("S2", ("M_C", "M_B"))):
        c = pairs[frozenset((names[low], names[high]))]
        assert np.allclose(c.saddle, MB_SADDLES[saddle], atol=0.011)  # one grid spacing
        v_saddle = mb_energy(MB_SADDLES[saddle])[0]
        for side, name in enumerate(c.basins):
            minimum = next(m for m, b in names.items() if b == name)
            exact = v_saddle - mb_energy(MB_MINIMA[minimum])[0]
            # on-grid values: stationary points are off the nodes by <= half a spacing, so the error is
            # second order, (curvature ~ 2000-4000 per nm^2) x (0.005 nm)^2 / 2 ~ 0.05
            assert c.barriers[side] == pytest.approx(exact, abs=0.12)
        # the path runs from one minimum through the saddle to the other, and never climbs above it
        assert np.allclose(c.path[0], c.minima[0]) and np.allclose(c.path[-1], c.minima[1])
        assert any(np.allclose(p, c.saddle) for p in c.path)
        assert c.path_free_energy.max() == pytest.approx(c.barriers[0], abs=1e-9)
        assert c.path_progress[0] == 0 and c.path_progress[-1] == 1 and np.all(np.diff(c.path_progress) > 0)
        assert np.isnan(c.barrier_errors).all()  # no frames: no error bars
    assert "from" in crossings.table() and "saddle at" in crossings.table()


def test_periodic_axis_wraps_the_saddle_and_the_path():
    # F = A (1 - cos 2 phi) on a periodic axis: minima at 0 and pi, saddles at +-pi/2. With the minima at
    # -pi/2 + ... shifted so the lower saddle sits across the boundary, the path must wrap.
    grid = gb.Grid([-np.pi], [np.pi], [120], periodic=[True])
    phi = grid.axes[0]
    fes = 10.0 * (1 - np.cos(2 * (phi - 1.2))) + 2.0 * np.sin(phi - 1.2 - np.pi / 2)
    basins = find_basins(grid, fes, KT)
    crossings = find_crossings(grid, fes, KT, basins)
    assert len(crossings) == 1
    c = crossings[0]
    # exact: the lowest of the two maxima of the 1-D function (a dense evaluation)
    dense = np.linspace(-np.pi, np.pi, 200001)
    f_dense = 10.0 * (1 - np.cos(2 * (dense - 1.2))) + 2.0 * np.sin(dense - 1.2 - np.pi / 2)
    maxima = [i for i in range(1, dense.size - 1)
              if f_dense[i] > f_dense[i - 1] and f_dense[i] >= f_dense[i + 1]]
    lowest = min(maxima, key=lambda i: f_dense[i])
    assert abs((c.saddle[0] - dense[lowest] + np.pi) % (2 * np.pi) - np.pi) <= grid.spacing[0]
    steps = np.abs(np.diff(c.path[:, 0]))
    assert (steps > np.pi).any() or abs(dense[lowest]) < 0.5  # the path crosses the periodic boundary


@needs_jit
@pytest.mark.parametrize("seed", [1, 2])
def test_double_well_barrier_through_a_run(seed):
    # U = h (x^2 - 1)^2 + t x with h = 20 kJ/mol, t = 3 kJ/mol/nm: the stationary points are the roots of
    # 4 h x^3 - 4 h x + t = 0 (closed form). Well-tempered run, gamma 6.
    potential = DoubleWell(barrier=20.0, tilt=3.0)
    left, top, right = np.sort(np.roots([4 * 20.0, 0.0, -4 * 20.0, 3.0]).real)
    u = potential.energy_gradient(np.array([[left], [top], [right]]))[0]
    grid = gb.Grid([-2.0], [2.0], [200])
    walls = [gb.Wall(0, 1.6, 500.0, "above"), gb.Wall(0, -1.6, 500.0, "below")]
    bias = gb.GridBias(grid, sigma=[0.1], height=2.0, temperature=T, bias_factor=6.0, walls=walls)
    traj = run_metadynamics(potential, bias, [-1.0], n_deposits=8000, stride=50, dt=0.005, friction=5.0,
                            rng=np.random.default_rng(seed), record_every=10)
    surface = surface_at(bias)
    basins = find_basins(grid, surface.free_energy, KT)
    weights = offset_weights(bias, traj.times, frame_bias=traj.bias_energies)
    crossings = find_crossings(grid, surface.free_energy, KT, basins, weights=weights,
                               frame_cvs=traj.positions)
    assert len(crossings) == 1
    c = crossings[0]
    exact = np.array([u[1] - u[0], u[1] - u[2]])  # from the left and from the right well
    if c.minima[0, 0] > 0:
        exact = exact[::-1]
    error = c.barrier_errors
    assert np.all(np.isfinite(error)) and np.all(error > 0) and np.all(error < 0.5 * KT)
    # the saddle: within one hill width (the resolution of the bias)
    assert abs(c.saddle[0] - top) <= bias.sigma[0]
    # the reweighted frames: the exact barrier between the same node cells (3 nodes wide) within 3 errors
    q = np.ones(grid.size)
    q[[0, -1]] = 0.5

    def cell(x):
        i = int(np.rint((x - grid.lower[0]) / grid.spacing[0]))
        nodes = np.arange(i - 1, i + 2)
        f = potential.energy_gradient(grid.axes[0][nodes][:, None])[0]
        return -KT * np.log(np.sum(q[nodes] * np.exp(-f / KT)) / np.sum(q[nodes]))

    same_cells = np.array([cell(c.saddle[0]) - cell(c.minima[k, 0]) for k in (0, 1)])
    assert np.all(np.abs(c.barriers_reweighted - same_cells) <= 3 * error), (
        c.barriers_reweighted, same_cells)
    # the surface: the analytic barrier within 3 frames errors + 0.5 kBT (hills of width sigma round the
    # top and the minima off; common practice, no source)
    assert np.all(np.abs(c.barriers - exact) <= 3 * error + 0.5 * KT), (c.barriers, exact, error)


@needs_jit
@pytest.mark.parametrize("seed", [1, pytest.param(2, marks=pytest.mark.slow)])
def test_mueller_brown_stationary_points_through_a_run(seed):
    # Müller-Brown scaled so M_A -> S1 is 20 kT; M_C is 1.6 kT deep, kept as a basin with min_depth 1 kT.
    # gamma 6, sigma 0.05 nm, spacing sigma / 2.
    surface_model = MuellerBrown.for_barrier(20.0, T)
    scale = surface_model.scale
    grid = gb.Grid([-2.0, -1.0], [1.6, 2.6], [144, 144])
    walls = [gb.Wall(cv=0, bound=-1.5, k=5000.0, side="below"),
             gb.Wall(cv=1, bound=2.2, k=5000.0, side="above")]
    bias = gb.GridBias(grid, sigma=[0.05, 0.05], height=0.5 * KT, temperature=T, bias_factor=6.0, walls=walls)
    traj = run_metadynamics(surface_model, bias, [-0.558, 1.442], n_deposits=10000, stride=100, dt=0.004,
                            friction=10.0, rng=np.random.default_rng(seed), record_every=20)
    surface = surface_at(bias)
    basins = find_basins(grid, surface.free_energy, KT, min_depth_kT=1.0, core_kT=0.5)
    weights = offset_weights(bias, traj.times, frame_bias=traj.bias_energies)
    crossings = find_crossings(grid, surface.free_energy, KT, basins, weights=weights,
                               frame_cvs=traj.positions)
    nearest = {name: min(MB_MINIMA, key=lambda m: np.hypot(*(np.array(MB_MINIMA[m]) - basins.markers[b])))
               for b, name in enumerate(basins.names)}
    assert sorted(nearest.values()) == ["M_A", "M_B", "M_C"]
    assert len(crossings) == 2
    for c in crossings:
        saddle = min(MB_SADDLES, key=lambda s: np.hypot(*(np.array(MB_SADDLES[s]) - c.saddle)))
        assert {nearest[n] for n in c.basins} == ({"M_A", "M_C"} if saddle == "S1" else {"M_B", "M_C"})
        error = c.barrier_errors
        assert np.all(np.isfinite(error)) and np.all(error < 0.6 * KT)
        # the saddle: within three hill widths (the bias's resolution; a shallow ridge is flat along itself),
        # and the exact surface there as high as at the true saddle within the barrier's errors
        assert np.hypot(*(c.saddle - np.array(MB_SADDLES[saddle]))) <= 3 * bias.sigma[0]
        rise = scale * (mb_energy(c.saddle)[0] - mb_energy(MB_SADDLES[saddle])[0])
        assert abs(rise) <= 3 * error.max() + 0.75 * KT
        for side, name in enumerate(c.basins):
            exact = scale * (mb_energy(MB_SADDLES[saddle])[0] - mb_energy(MB_MINIMA[nearest[name]])[0])
            # the surface against the analytic barrier: 3 frames errors + 0.75 kBT (hill smoothing and a
            # shallow minimum located on a noisy surface; common practice, no source)
            assert abs(c.barriers[side] - exact) <= 3 * error[side] + 0.75 * KT, (
                saddle, name, c.barriers, exact)
            # the reweighted frames against the exact surface between the same node cells, within 3 errors
            exact_cells = []
            for point in (c.saddle, c.minima[side]):
                i = np.rint((point - grid.lower) / grid.spacing).astype(int)
                block = np.stack(np.meshgrid(*[grid.axes[a][i[a] - 1 : i[a] + 2] for a in range(2)],
                                             indexing="ij"), axis=-1).reshape(-1, 2)
                f = scale * mb_energy(block)
                exact_cells.append(-KT * np.log(np.mean(np.exp(-(f - f.min()) / KT))) + f.min())
            same_cells = exact_cells[0] - exact_cells[1]
            assert abs(c.barriers_reweighted[side] - same_cells) <= 3 * error[side] + 1e-9, (
                saddle, name, c.barriers_reweighted[side], same_cells, error[side])


def test_bad_input_is_refused():
    grid = gb.Grid([-2.0], [2.0], [40])
    fes = (grid.axes[0] ** 2 - 1) ** 2 * 10
    basins = basins_from_boxes(grid, {"L": ([-1.5], [-0.5]), "R": ([0.5], [1.5])})
    with pytest.raises(ParameterError, match="free_energy must be finite"):
        find_crossings(grid, np.full(grid.shape, np.nan), KT, basins)
    with pytest.raises(ParameterError, match="give both weights and frame_cvs"):
        find_crossings(grid, fes, KT, basins, frame_cvs=np.zeros((3, 1)))
    with pytest.raises(ParameterError, match="another grid"):
        find_crossings(gb.Grid([-2.0], [2.0], [41]), np.zeros(42), KT, basins)
    with pytest.raises(ParameterError, match="no crossing between basins 'L' and 'X'"):
        find_crossings(grid, fes, KT, basins).between("L", "X")
    # boxes: one crossing, at the top of the barrier
    c = find_crossings(grid, fes, KT, basins).between("R", "L")
    assert c.saddle[0] == pytest.approx(0.0, abs=1e-12) and np.allclose(c.barriers, 10.0)
