"""The engine applies the core's own spline: energy and forces equal GridBias.evaluate at every step.

References:
- The core (``bias.evaluate``, itself checked against scipy and OpenMM's continuous tables in
  tests/test_interpolation.py and tests/test_openmm_tables.py) is the oracle for the cvforce route, whose
  tables are the core's spline coefficients and whose expression is the same tensor-product cubic Hermite
  patch (DESIGN.md, 2026-12-02: equal to rounding).
- Forces: the chain rule F = -(dV/ds) (ds/dx), with dV/ds from ``bias.evaluate`` and ds/dx from OpenMM
  itself (a Context whose only force has the CV as its energy: its force is -ds/dx).
- Platforms: Reference (double precision), CPU, and OpenCL in single, mixed and double precision (on a
  CPU through pocl where no GPU is present; skipped with the reason where no OpenCL device exists). The
  tolerance per precision is the engine-vs-core difference measured here (bench/README.md states it):
  double 1e-10 relative (measured ~1e-15), single and mixed 1e-5 (measured ~1e-7: float32 arithmetic).
  OpenCL accumulates forces in 64-bit fixed point with a resolution of 2**-32 kJ/mol/nm (OpenMM's
  design, from memory), so its double-precision forces are held to 1e-9 instead of 1e-10.
"""

import functools
import math
import warnings

import numpy as np
import pytest

mm = pytest.importorskip("openmm")

from openmm import app  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.openmm import routes  # noqa: E402

pytestmark = [pytest.mark.openmm, pytest.mark.filterwarnings("ignore:axis .* coarser than sigma/2")]

PI = math.pi
GROUP = gbo.DEFAULT_FORCE_GROUP

# (platform, properties, (relative tolerance of engine vs core: energy, forces))
PLATFORMS = {
    "Reference": ("Reference", {}, (1e-10, 1e-10)),
    "CPU": ("CPU", {"Threads": "1"}, (1e-10, 1e-10)),
    "OpenCL-single": ("OpenCL", {"Precision": "single"}, (1e-5, 1e-5)),
    "OpenCL-mixed": ("OpenCL", {"Precision": "mixed"}, (1e-5, 1e-5)),
    "OpenCL-double": ("OpenCL", {"Precision": "double"}, (1e-10, 1e-9)),
}


@functools.lru_cache(maxsize=None)
def _unavailable(name, precision):
    """Why a platform cannot run here ('' when it can): missing from OpenMM, or no OpenCL device."""
    names = [mm.Platform.getPlatform(i).getName() for i in range(mm.Platform.getNumPlatforms())]
    if name not in names:
        return f"OpenMM has no {name} platform here"
    system = mm.System()
    system.addParticle(1.0)
    props = {"Precision": precision} if precision else {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            mm.Context(system, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName(name), props)
        except Exception as exc:  # no device, no ICD loader, or the precision is not supported
            return f"no usable {name} device ({precision or 'default'} precision): {exc}"
    return ""


def platform_or_skip(key):
    name, props, tol = PLATFORMS[key]
    reason = _unavailable(name, props.get("Precision"))
    if reason:
        pytest.skip(reason)
    return mm.Platform.getPlatformByName(name), props, tol


def context_for(system, key):
    platform, props, tol = platform_or_skip(key)
    return mm.Context(system, mm.VerletIntegrator(0.001), platform, props), tol


def free_particles(n):
    system = mm.System()
    for _ in range(n):
        system.addParticle(12.0)
    return system


# CV sets (atoms of a 7-particle cloud), grid limits and bins; walls act near the upper non-periodic limits.
CASES = {
    "1d-periodic": ([("dihedral", (0, 1, 2, 3))], [-PI], [PI], [40]),
    "1d-nonperiodic": ([("distance", (0, 4))], [0.0], [2.0], [40]),
    "2d-periodic": ([("dihedral", (0, 1, 2, 3)), ("dihedral", (1, 2, 3, 4))], [-PI, -PI], [PI, PI], [36, 30]),
    "2d-mixed": ([("distance", (0, 4)), ("dihedral", (0, 1, 2, 3))], [0.0, 0.0], [2.0, 2 * PI], [36, 30]),
    "3d-mixed": ([("dihedral", (0, 1, 2, 3)), ("distance", (0, 4)), ("angle", (4, 5, 6))],
                 [-PI, 0.0, 0.0], [PI, 2.0, PI], [14, 12, 10]),
}


def make_case(name, route="cvforce", pending_hills=None):
    spec, lower, upper, bins = CASES[name]
    cvs = [getattr(gbo, kind)(*atoms) for kind, atoms in spec]
    walls = [gb.Wall(cv=i, bound=lower[i] + 0.8 * (upper[i] - lower[i]), k=30.0, side="above")
             for i, cv in enumerate(cvs) if not cv.periodic]
    bias = gbo.make_bias(cvs, lower=lower, upper=upper, bins=bins,
                         sigma=[0.12 * (u - lo) for lo, u in zip(lower, upper, strict=True)], height=1.0,
                         temperature=300.0, bias_factor=6.0, walls=walls)
    system = free_particles(7)
    link = gbo.attach(system, cvs, bias, route=route, pending_hills=pending_hills)
    return cvs, bias, system, link


class CVJacobians:
    """ds_i/dx (d, n, 3) from OpenMM: the force of a Context whose only force's energy is CV i is -ds/dx."""

    def __init__(self, cvs, n_particles):
        self.contexts = []
        for cv in cvs:
            system = free_particles(n_particles)
            system.addForce(cv.single_force(mm))
            self.contexts.append(context_for(system, "Reference")[0])

    def __call__(self, positions):
        out = []
        for context in self.contexts:
            context.setPositions(positions)
            out.append(-context.getState(getForces=True).getForces(asNumpy=True)._value)
        return np.array(out)


def engine_energy_forces(context):
    state = context.getState(getEnergy=True, getForces=True, groups={GROUP})
    return state.getPotentialEnergy()._value, np.asarray(state.getForces(asNumpy=True)._value)


def check_engine_equals_core(link, context, jacobians, positions, tol):
    """Engine energy and forces vs the core at ``positions``: relative differences (energy against the
    largest |node value| + |energy|, forces against the largest core force + 1)."""
    context.setPositions(positions)
    s = link.cv_values(context)
    core_e, core_g = link.bias.evaluate(s)
    core_f = -np.einsum("i,ink->nk", core_g, jacobians(positions))
    e, f = engine_energy_forces(context)
    scale_e = np.abs(link.bias.values).max() + abs(core_e)
    scale_f = np.abs(core_f).max() + 1.0
    rel_e, rel_f = abs(e - core_e) / scale_e, np.abs(f - core_f).max() / scale_f
    assert rel_e <= tol[0], f"energy: engine {e!r}, core {core_e!r} at s={s.tolist()} (relative {rel_e:.1e})"
    assert rel_f <= tol[1], f"forces differ by {rel_f:.1e} of the largest force at s={s.tolist()}"


def positions_inside(rng, cvs, bias, margin=0.0):
    """Positions (7, 3) whose CVs lie inside the grid's non-periodic limits (extended by ``margin``)."""
    lo = bias.grid.lower - margin * bias.grid.span
    hi = bias.grid.upper + margin * bias.grid.span
    while True:
        pos = rng.uniform(0.0, 1.2, (7, 3))
        s = np.array([cv.value(pos, None) for cv in cvs])
        if all(bias.grid.periodic[i] or lo[i] <= s[i] <= hi[i] for i in range(len(cvs))):
            return pos


# Every platform and precision on the mixed 2-D case; the other cases on the two arithmetics (double on
# Reference, float32 on OpenCL single) and 1-D on CPU: each OpenCL Context compiles for seconds on pocl.
PARITY = ([("2d-mixed", key) for key in PLATFORMS]
          + [(case, key) for case in ("1d-periodic", "1d-nonperiodic", "3d-mixed")
             for key in ("Reference", "OpenCL-single")]
          + [("1d-periodic", "CPU"), ("1d-nonperiodic", "CPU")])


@pytest.mark.parametrize("case, key", PARITY)
def test_cvforce_engine_equals_core_after_every_deposit(case, key, rng):
    """After each of 6 deposits (well-tempered, walls present) the engine's energy and forces equal the
    core's, at the deposit point and at a probe point that may lie beyond the grid (walls only there)."""
    cvs, bias, system, link = make_case(case)
    context, tol = context_for(system, key)
    jacobians = CVJacobians(cvs, system.getNumParticles())
    for _ in range(6):
        pos = positions_inside(rng, cvs, bias)
        context.setPositions(pos)
        link.deposit(context)
        for probe in (pos, positions_inside(rng, cvs, bias, margin=0.15)):
            check_engine_equals_core(link, context, jacobians, probe, tol)
    assert bias.n_hills == 6


@pytest.mark.parametrize("key", ["Reference", "OpenCL-mixed"])
def test_cvforce_follows_every_deposit_of_a_running_simulation(key):
    """The dipeptide with the reporter depositing every 10 steps: after every deposit the engine's bias
    energy equals bias.evaluate at the engine's own CVs (no pending-hill approximation)."""
    from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide

    platform, props, tol = platform_or_skip(key)
    top, pos, system = build_dipeptide()
    phi, psi = backbone_dihedral_atoms(top)
    cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi)]
    bias = gbo.make_bias(cvs, lower=[-PI] * 2, upper=[PI] * 2, bins=[64, 64], sigma=[0.35, 0.35], height=1.2,
                         temperature=300.0, bias_factor=10.0)
    link = gbo.attach(system, cvs, bias, route="cvforce")
    integrator = mm.LangevinMiddleIntegrator(300, 1, 0.002)
    sim = app.Simulation(top, system, integrator, platform, props)
    sim.context.setPositions(pos)
    sim.reporters.append(link.reporter(stride=10))
    for k in range(1, 9):
        sim.step(10)
        assert bias.n_hills == k
        s = link.cv_values(sim)
        core = bias.evaluate(s)[0]
        assert abs(link.bias_energy(sim) - core) <= tol[0] * (np.abs(bias.values).max() + abs(core))


@pytest.mark.parametrize("key", ["Reference", "CPU", "OpenCL-single", "OpenCL-mixed"])
def test_compound_route_runs_on_every_platform(key, rng):
    """The compound route (continuous table + pending hills) on each platform: after a fold it equals the
    core within the mixed-periodicity padding error (1e-6 of the surface, tests/test_openmm_tables.py)
    or the precision's own rounding."""
    cvs, bias, system, link = make_case("2d-mixed", route="compound", pending_hills=2)
    context, tol = context_for(system, key)
    folds = 0
    for _ in range(6):
        pos = positions_inside(rng, cvs, bias)
        context.setPositions(pos)
        link.deposit(context)
        if link._n_pending == 0:
            s = link.cv_values(context)
            e = engine_energy_forces(context)[0]
            core = bias.evaluate(s)[0]
            assert abs(e - core) <= max(tol[0], 1e-6) * (np.abs(bias.values).max() + abs(core))
            folds += 1
    assert folds == 2 and bias.n_hills == 6


def test_auto_route_follows_the_platform():
    """The documented rule (gridbias.openmm.routes): cvforce on Reference, compound elsewhere; pending hills
    only on the compound route, their count from the table size."""
    def attach(**kw):
        cvs, bias, system, _ = make_case("2d-periodic", route="compound", pending_hills=0)
        system = free_particles(7)
        return gbo.attach(system, cvs, bias, **kw)

    assert attach(platform="Reference").route == "cvforce"
    assert attach(platform="Reference").pending_hills == 0
    assert attach(platform="CPU").route == "compound"
    assert attach(platform=mm.Platform.getPlatformByName("CPU")).route == "compound"
    assert attach(platform="Reference", pending_hills=3).route == "compound"
    assert attach().route == routes.choose(routes.default_platform(mm), True)
    with pytest.raises(gb.ParameterError, match="pending_hills=2: the cvforce route holds no pending hills"):
        attach(route="cvforce", pending_hills=2)
    with pytest.raises(gb.ParameterError, match="platform must be an openmm.Platform or one of"):
        attach(platform="Quantum")
    # from_force CVs need a CustomCVForce whatever the platform
    force = mm.CustomBondForce("r")
    force.addBond(0, 1, [])
    cv = gbo.from_force(force)
    bias = gb.GridBias(gb.Grid([0.0], [2.0], [40]), [0.1], 1.0, 300.0)
    assert gbo.attach(free_particles(3), [cv], bias, platform="CPU").route == "cvforce"


def test_pending_count_minimises_the_modelled_cost():
    """K = argmin push / (K + 1) + K c stride (bench/README.md): 4 for a 2-D 129^2 table (the measured
    optimum, bench/README.md), more for 3-D 65^3 tables whose push costs ~0.3 s."""
    assert routes.pending_for(2, 129**2) == 4
    assert 20 <= routes.pending_for(3, 65**3) <= 30
    assert routes.pending_for(1, 101) >= 1
    for nodes in (101, 129**2, 65**3):
        k = routes.pending_for(2, nodes)
        push = routes.compound_push_seconds(2, nodes)
        cost = [push / (j + 1) + j * 1e-6 * routes.TYPICAL_STRIDE for j in range(1, 65)]
        assert cost[k - 1] == min(cost)


def test_a_link_on_another_platform_than_planned_says_so(caplog):
    cvs, bias, system, link = make_case("1d-periodic", route="auto")
    link._plan = ("CPU", True)  # planned for CPU (compound) but run on Reference, where cvforce is cheaper
    link._engine.route = "compound"
    context, _ = context_for(system, "Reference")
    with caplog.at_level("WARNING", logger="gridbias.openmm"):
        link._check_plan(context.getPlatform().getName())
    assert "chosen for the CPU platform, but this Context runs on Reference" in caplog.text
    # pending hills asked for: the compound route is the user's choice, not the platform's, so no notice
    cvs, bias, system, _ = make_case("1d-periodic", route="compound", pending_hills=0)
    chosen = gbo.attach(free_particles(7), cvs, bias, platform="CPU", pending_hills=3)
    caplog.clear()
    with caplog.at_level("WARNING", logger="gridbias.openmm"):
        chosen._check_plan("Reference")
    assert "chosen for" not in caplog.text


def test_table_size_limit_is_refused_clearly():
    cvs = [gbo.distance(0, 1), gbo.distance(1, 2), gbo.distance(2, 3)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = gbo.make_bias(cvs, lower=[0.0] * 3, upper=[1.0] * 3, bins=[260] * 3, sigma=[0.1] * 3,
                             height=1.0, temperature=300.0)
    with pytest.raises(gb.ParameterError, match="cvforce route's tables hold at most 16777216 nodes"):
        gbo.attach(free_particles(4), cvs, bias, route="cvforce")
