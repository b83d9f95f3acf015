"""The bias OpenMM applies equals GridBias.evaluate: tables, pending hills, walls, forces.

External references:
- OpenMM itself (8.x): its Continuous{1,2,3}DFunction evaluated inside a CustomCompoundBondForce or a
  CustomCVForce is the oracle for the core's interpolation (1-D, 2-D and 3-D; periodic, non-periodic and
  mixed axes). Where the engine table is exact (no padding) we ask 1e-10 of the surface's amplitude; a
  mixed-periodicity table (padded, PERIODIC_PADDING = 8 wrapped nodes) 1e-6.
- Forces: central finite differences of the engine's own energy (O(h^2) error), and the chain rule
  F = -(dV/ds) (ds/dx) with dV/ds from bias.evaluate and ds/dx by central differences of the NumPy CVs.
- Wall energies: the closed form k * max(0, +-(s - bound))^p of gridbias.Wall (DESIGN.md).
"""

import math

import numpy as np
import pytest

mm = pytest.importorskip("openmm")

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.openmm.forces import TableLayout  # noqa: E402

pytestmark = [pytest.mark.openmm, pytest.mark.filterwarnings("ignore:axis .* coarser than sigma/2")]

PI = math.pi
GROUP = gbo.DEFAULT_FORCE_GROUP


def free_particles(n):
    system = mm.System()
    for _ in range(n):
        system.addParticle(12.0)
    return system


def context_for(system, platform="Reference"):
    return mm.Context(system, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName(platform))


def engine_energy(context):
    return context.getState(getEnergy=True, groups={GROUP}).getPotentialEnergy()._value


# CV sets by periodicity. Atoms 0..6 of a random cloud of 7 particles inside a 1 nm cube.
CASES = {
    "1d-periodic": ([("dihedral", (0, 1, 2, 3))], [-PI], [PI], [40]),
    "1d-nonperiodic": ([("distance", (0, 4))], [0.0], [2.0], [40]),
    "2d-periodic": ([("dihedral", (0, 1, 2, 3)), ("dihedral", (1, 2, 3, 4))], [-PI, -PI], [PI, PI], [36, 30]),
    "2d-nonperiodic": ([("angle", (0, 1, 2)), ("distance", (0, 4))], [0.0, 0.0], [PI, 2.0], [30, 36]),
    "2d-mixed": ([("distance", (0, 4)), ("dihedral", (0, 1, 2, 3))], [0.0, 0.0], [2.0, 2 * PI], [36, 30]),
    "3d-periodic": ([("dihedral", (0, 1, 2, 3)), ("dihedral", (1, 2, 3, 4)), ("dihedral", (2, 3, 4, 5))],
                    [-PI] * 3, [PI] * 3, [14, 12, 10]),
    "3d-nonperiodic": ([("distance", (0, 4)), ("angle", (0, 1, 2)), ("distance", (5, 6))],
                       [0.0, 0.0, 0.0], [2.0, PI, 2.0], [12, 14, 10]),
    "3d-mixed": ([("dihedral", (0, 1, 2, 3)), ("distance", (0, 4)), ("dihedral", (3, 4, 5, 6))],
                 [-PI, 0.0, -PI], [PI, 2.0, PI], [14, 12, 10]),
}


def make_cvs(spec):
    return [getattr(gbo, kind)(*atoms) for kind, atoms in spec]


def random_bias(rng, cvs, lower, upper, bins, n_hills=40, walls=(), bias_factor=None):
    bias = gbo.make_bias(cvs, lower=lower, upper=upper, bins=bins,
                         sigma=[0.12 * (u - lo) for lo, u in zip(lower, upper, strict=True)], height=1.0,
                         temperature=300.0, bias_factor=bias_factor, walls=walls)
    centers = bias.grid.lower + rng.random((n_hills, len(cvs))) * bias.grid.span
    bias.add_hills(centers, rng.uniform(0.2, 2.0, n_hills))
    return bias


def random_configuration(rng, cvs, bias):
    """Positions (7, 3) whose CVs lie inside the grid (the walls may act)."""
    while True:
        pos = rng.uniform(0.0, 1.0, (7, 3))
        s = np.array([cv.value(pos, None) for cv in cvs])
        if bias.grid.contains(s):
            return pos, s


@pytest.mark.parametrize("route", ["compound", "cvforce"])
@pytest.mark.parametrize("case", sorted(CASES))
def test_engine_energy_equals_core(case, route, rng):
    """OpenMM's tabulated function (the oracle) == GridBias.evaluate at random points."""
    spec, lower, upper, bins = CASES[case]
    cvs = make_cvs(spec)
    bias = random_bias(rng, cvs, lower, upper, bins)
    system = free_particles(7)
    gbo.attach(system, cvs, bias, route=route)
    context = context_for(system)
    mixed = bias.grid.periodic.any() and not bias.grid.periodic.all()
    tolerance = (1e-6 if mixed else 1e-10) * np.abs(bias.values).max()
    worst = 0.0
    for _ in range(60):
        pos, s = random_configuration(rng, cvs, bias)
        context.setPositions(pos)
        worst = max(worst, abs(engine_energy(context) - bias.evaluate(s)[0]))
    assert worst < tolerance, f"{case}/{route}: max |engine - core| = {worst:.3g} (allowed {tolerance:.3g})"


def test_layout_order_is_x_fastest():
    """values[i + nx*j + nx*ny*k] = F[i, j, k] (OpenMM's documented table order) on a non-periodic grid."""
    grid = gb.Grid([0, 0, 0], [1, 1, 1], [3, 4, 5])
    values = np.arange(grid.size, dtype=float).reshape(grid.shape)
    layout = TableLayout(grid, [None] * 3)
    table = layout.table_values(values)
    nx, ny, nz = grid.shape
    expected = [values[i, j, k] for k in range(nz) for j in range(ny) for i in range(nx)]
    np.testing.assert_array_equal(table, expected)
    assert layout.shape == grid.shape and not layout.periodic


def test_layout_periodic_closed_and_mixed_padded():
    """All-periodic: node 0 repeated at the end. Mixed: periodic axis tiled over its value range + padding."""
    grid = gb.Grid([-PI], [PI], [8], [True])
    layout = TableLayout(grid, [None])
    np.testing.assert_array_equal(layout.table_values(np.arange(8.0)), [0, 1, 2, 3, 4, 5, 6, 7, 0])
    assert layout.periodic and layout.minimum[0] == -PI and layout.maximum[0] == pytest.approx(PI)
    grid = gb.Grid([0.0, 0.0], [2 * PI, 1.0], [8, 2], [True, False])  # axis 0 from 0, CV values in (-pi, pi]
    layout = TableLayout(grid, [(-PI, PI), None], padding=2)
    h = 2 * PI / 8
    assert not layout.periodic
    assert layout.minimum[0] == pytest.approx(-PI - 2 * h) and layout.maximum[0] == pytest.approx(PI + 2 * h)
    values = np.arange(24.0).reshape(8, 3)
    table = layout.table_values(values).reshape(layout.shape, order="F")
    nodes = np.round((layout.minimum[0] + h * np.arange(layout.shape[0])) / h).astype(int) % 8
    np.testing.assert_array_equal(table[:, 1], values[nodes, 1])


def test_dihedral_axis_from_zero_matches_core(rng):
    """A periodic axis [0, 2 pi) is fed dihedrals in (-pi, pi]: the engine wraps them like the core."""
    cvs = [gbo.dihedral(0, 1, 2, 3), gbo.distance(0, 4)]
    bias = random_bias(rng, cvs, [0.0, 0.0], [2 * PI, 2.0], [30, 20])
    system = free_particles(7)
    gbo.attach(system, cvs, bias)
    context = context_for(system)
    for _ in range(30):
        pos, s = random_configuration(rng, cvs, bias)
        context.setPositions(pos)
        assert engine_energy(context) == pytest.approx(bias.evaluate(s)[0], abs=1e-6 * np.abs(bias.values).max())


@pytest.mark.parametrize("route", ["compound", "cvforce"])
def test_walls_applied_by_engine(route, rng):
    """Walls k*max(0, s - bound)^p act in the engine as in Wall.energy_gradient (closed form)."""
    cvs = [gbo.distance(0, 4), gbo.angle(0, 1, 2)]
    walls = [gb.Wall(0, 1.0, 300.0, "above"), gb.Wall(1, 0.8, 50.0, "below", power=3)]
    bias = gbo.make_bias(cvs, lower=[0.0, 0.0], upper=[2.0, PI], bins=[40, 40], sigma=[0.1, 0.2], height=1.0,
                         temperature=300.0, walls=walls)
    system = free_particles(7)
    gbo.attach(system, cvs, bias, route=route)
    context = context_for(system)
    active = 0
    for _ in range(40):
        pos, s = random_configuration(rng, cvs, bias)
        context.setPositions(pos)
        closed = sum(w.k * max(0.0, w.sign * (s[w.cv] - w.bound)) ** w.power for w in walls)
        active += closed > 0
        assert engine_energy(context) == pytest.approx(closed, rel=1e-12, abs=1e-12)
        assert bias.evaluate(s)[0] == pytest.approx(closed, rel=1e-12, abs=1e-12)
    assert active >= 5


def cv_jacobian(cvs, pos, h=1e-6):
    """(d, n, 3) ds/dx by central differences of the NumPy CVs."""
    jac = np.zeros((len(cvs),) + pos.shape)
    for a in range(pos.shape[0]):
        for k in range(3):
            plus, minus = pos.copy(), pos.copy()
            plus[a, k] += h
            minus[a, k] -= h
            for i, cv in enumerate(cvs):
                d = cv.value(plus, None) - cv.value(minus, None)
                if cv.periodic:
                    d = (d + PI) % (2 * PI) - PI
                jac[i, a, k] = d / (2 * h)
    return jac


@pytest.mark.parametrize("case", ["2d-mixed", "3d-periodic", "2d-nonperiodic"])
def test_engine_forces(case, rng):
    """Engine forces == -dE/dx by central differences of the engine's energy, and == -(dV/ds)(ds/dx)."""
    spec, lower, upper, bins = CASES[case]
    cvs = make_cvs(spec)
    walls = [gb.Wall(0, 0.8 * upper[0] + 0.2 * lower[0], 40.0, "above")] if not CASES[case][0][0][0] == "dihedral" \
        else []
    bias = random_bias(rng, cvs, lower, upper, bins, walls=walls)
    system = free_particles(7)
    gbo.attach(system, cvs, bias)
    context = context_for(system)
    h = 1e-5
    for _ in range(4):
        pos, s = random_configuration(rng, cvs, bias)
        context.setPositions(pos)
        forces = context.getState(getForces=True, groups={GROUP}).getForces(asNumpy=True)._value
        _, grad = bias.evaluate(s)
        chain = -np.einsum("i,iak->ak", grad, cv_jacobian(cvs, pos))
        scale = np.abs(forces).max() + 1e-3
        assert np.abs(forces - chain).max() < 1e-5 * scale
        fd = np.zeros_like(pos)
        for a in range(7):
            for k in range(3):
                e = []
                for sign in (1, -1):
                    p = pos.copy()
                    p[a, k] += sign * h
                    context.setPositions(p)
                    e.append(engine_energy(context))
                fd[a, k] = -(e[0] - e[1]) / (2 * h)
        assert np.abs(forces - fd).max() < 1e-5 * scale


def test_pending_hills_are_exact_gaussians_then_fold(rng):
    """Not-yet-folded hills act as exact Gaussians (closed form, Laio & Parrinello 2002); after a fold the
    engine equals the core again to rounding. The difference before folding is the grid's own
    interpolation error of those hills (bounded here at 1e-3 of a height for sigma = 4 spacings)."""
    cvs = [gbo.dihedral(0, 1, 2, 3), gbo.distance(0, 4)]
    bias = gbo.make_bias(cvs, lower=[-PI, 0.0], upper=[PI, 2.0], bins=[64, 64], sigma=[4 * 2 * PI / 64, 4 * 2 / 64],
                         height=1.0, temperature=300.0, bias_factor=5.0)
    system = free_particles(7)
    link = gbo.attach(system, cvs, bias, route="compound", pending_hills=3)
    context = context_for(system)
    positions = [random_configuration(rng, cvs, bias)[0] for _ in range(8)]
    for n, pos in enumerate(positions):
        context.setPositions(pos)
        link.deposit(context)
        assert link._n_pending == (n + 1) % 4
        probe_pos, s = random_configuration(rng, cvs, bias)
        context.setPositions(probe_pos)
        core = bias.evaluate(s)[0]
        if link._n_pending == 0:
            assert engine_energy(context) == pytest.approx(core, abs=1e-6)
        else:
            hills = bias.history
            exact = bias.rebuilt(link._n_folded).evaluate(s)[0]
            for c, hgt in zip(hills.centers[link._n_folded:], hills.heights[link._n_folded:], strict=True):
                d = s - c
                d[0] = (d[0] + PI) % (2 * PI) - PI
                exact += hgt * math.exp(-np.sum(d**2 / (2 * bias.sigma**2)))
            assert engine_energy(context) == pytest.approx(exact, abs=1e-6)
            assert abs(engine_energy(context) - core) < 1e-3


class _TwoHillBias(gb.GridBias):
    """A bias whose deposit adds two hills (as a shared bias of two walkers does in one exchange)."""

    def deposit(self, s, *, time=None):
        h = super().deposit(s, time=time)
        self.add_hills([np.asarray(s) + [0.7, 0.2]], [0.5 * h], [time if time is not None else np.nan])
        return h


def test_every_hill_of_a_deposit_is_mirrored(rng):
    """Two hills per deposit, 3 slots: deposit 1 fills 2 slots, deposit 2 does not fit and folds, deposit 3
    fills 2 slots again; the engine follows the core (within the pending-hill spline error) throughout."""
    cvs = [gbo.dihedral(0, 1, 2, 3), gbo.distance(0, 4)]
    base = gbo.make_bias(cvs, lower=[-PI, 0.0], upper=[PI, 2.0], bins=[64, 64], sigma=[0.4, 0.15], height=1.0,
                         temperature=300.0)
    bias = _TwoHillBias(base.grid, base.sigma, 1.0, 300.0)
    system = free_particles(7)
    link = gbo.attach(system, cvs, bias, pending_hills=3)
    context = context_for(system)
    for expected_pending in (2, 0, 2):
        pos, s = random_configuration(rng, cvs, bias)
        context.setPositions(pos)
        link.deposit(context, [s[0], min(s[1], 1.5)])
        assert link._n_pending == expected_pending
        probe, s = random_configuration(rng, cvs, bias)
        context.setPositions(probe)
        assert engine_energy(context) == pytest.approx(bias.evaluate(s)[0], abs=2e-3)
    assert bias.n_hills == 6
