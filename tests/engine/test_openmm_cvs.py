"""CV builders: NumPy values (what the reporter deposits at) == the values the engine applies the bias at.

External references:
- OpenMM's own single-purpose forces compute each CV independently of our code: CustomBondForce "r",
  CustomAngleForce "theta", CustomTorsionForce "theta", CustomExternalForce "x", CustomCentroidBondForce
  "distance(g1,g2)", each with OpenMM's minimum-image convention in a periodic (also triclinic) box.
- The dihedral sign: IUPAC-IUB Commission on Biochemical Nomenclature, Biochemistry 9, 3471 (1970):
  positive when, looking along b->c, the bond a-b turns clockwise by less than 180 deg to eclipse c-d.
- What the engine applies the bias at is read through a power-1 wall, E = k (s - bound) for s > bound
  (the closed form of gridbias.Wall), so s = E/k + bound is the CV inside the bias force itself.
"""

import math

import numpy as np
import pytest

mm = pytest.importorskip("openmm")

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402

pytestmark = [pytest.mark.openmm, pytest.mark.filterwarnings("ignore:axis .* coarser than sigma/2")]
GROUP = gbo.DEFAULT_FORCE_GROUP
K_PROBE = 10.0


def reference_force(cv, periodic_box):
    """An independent OpenMM force whose energy is the CV."""
    kind = cv.describe()["kind"]
    if kind == "distance":
        f = mm.CustomBondForce("r")
        f.addBond(cv.a, cv.b)
    elif kind == "angle":
        f = mm.CustomAngleForce("theta")
        f.addAngle(cv.a, cv.b, cv.c)
    elif kind == "dihedral":
        f = mm.CustomTorsionForce("theta")
        f.addTorsion(cv.a, cv.b, cv.c, cv.d)
    elif kind == "coordinate":
        f = mm.CustomExternalForce(cv.axis)
        f.addParticle(cv.atom)
    elif kind == "centroid_distance":
        f = mm.CustomCentroidBondForce(2, "distance(g1,g2)")
        f.addGroup(list(cv.group1), list(cv.weights1) if cv.weights1 else None)
        f.addGroup(list(cv.group2), list(cv.weights2) if cv.weights2 else None)
        f.addBond([0, 1])
    elif kind == "distance_combination":
        f = mm.CustomBondForce("c*r")
        f.addPerBondParameter("c")
        for (i, j), c in zip(cv.pairs, cv.coefficients, strict=True):
            f.addBond(i, j, [c])
    if kind != "coordinate":
        f.setUsesPeriodicBoundaryConditions(periodic_box)
    f.setForceGroup(3)
    return f


def system_of(n, box=None, masses=None):
    system = mm.System()
    for i in range(n):
        system.addParticle(masses[i] if masses is not None else 12.0)
    if box is not None:
        system.setDefaultPeriodicBoxVectors(*[mm.Vec3(*row) for row in box])
    return system


def probe(cv, system, pos, box, route):
    """(NumPy value, independent OpenMM value, value inside our bias force)."""
    lo, hi = (-math.pi, math.pi) if cv.periodic else (-20.0, 20.0)
    bound = lo - 1.0 if not cv.periodic else -4.0
    bias = gb.GridBias(gb.Grid([lo], [hi], [20], [cv.periodic]), sigma=[0.5], height=1.0, temperature=300.0,
                       walls=[gb.Wall(0, bound, K_PROBE, "above", power=1)])
    resolved_cv = cv.resolved(system)
    system.addForce(reference_force(resolved_cv, box is not None))
    link = gbo.attach(system, [cv], bias, route=route)
    context = mm.Context(system, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName("Reference"))
    if box is not None:
        context.setPeriodicBoxVectors(*[mm.Vec3(*row) for row in box])
    context.setPositions(pos)
    ours = link.cv_values(context)[0]
    ref = context.getState(getEnergy=True, groups={3}).getPotentialEnergy()._value
    applied = context.getState(getEnergy=True, groups={GROUP}).getPotentialEnergy()._value / K_PROBE + bound
    return ours, ref, applied


BUILDERS = {
    "distance": lambda: gbo.distance(0, 3),
    "angle": lambda: gbo.angle(0, 1, 2),
    "dihedral": lambda: gbo.dihedral(0, 1, 2, 3),
    "coordinate": lambda: gbo.coordinate(2, "y"),
    "centroid_distance": lambda: gbo.centroid_distance([0, 1], [2, 3, 4]),
    "distance_combination": lambda: gbo.distance_combination([(0, 1), (1, 4), (2, 3)], [1.0, -1.0, 0.5]),
}


@pytest.mark.parametrize("route", ["compound", "cvforce"])
@pytest.mark.parametrize("kind", sorted(BUILDERS))
def test_cv_values_no_box(kind, route, rng):
    masses = [12.0, 1.0, 16.0, 14.0, 1.0]
    for _ in range(5):
        pos = rng.uniform(-1.0, 1.0, (5, 3))
        cv = BUILDERS[kind]()
        ours, ref, applied = probe(cv, system_of(5, masses=masses), pos, None, route)
        assert ours == pytest.approx(ref, abs=1e-12)
        assert applied == pytest.approx(ref, abs=1e-9)


BOXES = {
    "rectangular": np.diag([2.0, 2.5, 3.0]),
    "triclinic": np.array([[2.5, 0.0, 0.0], [0.6, 2.4, 0.0], [-0.5, 0.7, 2.6]]),  # OpenMM's reduced form
}


@pytest.mark.parametrize("box_name", sorted(BOXES))
@pytest.mark.parametrize("kind", ["distance", "angle", "dihedral", "centroid_distance", "distance_combination"])
def test_cv_values_minimum_image(kind, box_name, rng):
    """Atoms spread over neighbouring images: every difference vector takes OpenMM's minimum image."""
    box = BOXES[box_name]
    for _ in range(5):
        frac = rng.uniform(-0.6, 1.6, (5, 3))
        pos = frac @ box
        cv = BUILDERS[kind]()
        ours, ref, applied = probe(cv, system_of(5, box), pos, box, "compound")
        assert ours == pytest.approx(ref, abs=1e-10)
        assert applied == pytest.approx(ref, abs=1e-9)


def test_dihedral_sign_is_iupac():
    """a=(1,0,0), b=0, c=(0,0,1), d=(cos p, sin p, 1): looking along b->c, a-b turns clockwise by p to
    eclipse c-d, so the torsion is +p (IUPAC-IUB 1970)."""
    for p in (0.3, 1.2, 2.9, -0.7, -2.5):
        pos = np.array([[1, 0, 0], [0, 0, 0], [0, 0, 1], [math.cos(p), math.sin(p), 1]], dtype=float)
        assert gbo.dihedral(0, 1, 2, 3).value(pos, None) == pytest.approx(p, abs=1e-14)


def test_centroid_uses_masses():
    """Mass-weighted centroid (default) vs explicit weights: the distance follows the heavier atom."""
    system = system_of(3, masses=[1.0, 15.0, 16.0])
    pos = np.array([[0.0, 0, 0], [1.0, 0, 0], [3.0, 0, 0]])
    cv = gbo.centroid_distance([0, 1], [2]).resolved(system)
    assert cv.value(pos, None) == pytest.approx(3.0 - 15.0 / 16.0)
    equal = gbo.centroid_distance([0, 1], [2], weights1=[1, 1], weights2=[1]).resolved(system)
    assert equal.value(pos, None) == pytest.approx(2.5)


def test_from_force_cv(rng):
    """from_force: the CV is the energy of any Force (here a CustomBondForce r^2) through CustomCVForce."""
    inner = mm.CustomBondForce("r^2")
    inner.addBond(0, 1)
    cv = gbo.from_force(inner, name="r2")
    bias = gb.GridBias(gb.Grid([0.0], [10.0], [50]), sigma=[0.2], height=1.0, temperature=300.0,
                       walls=[gb.Wall(0, -1.0, K_PROBE, "above", power=1)])
    system = system_of(2)
    link = gbo.attach(system, [cv], bias)
    assert link.route == "cvforce" and system.getNumForces() == 1
    context = mm.Context(system, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName("Reference"))
    pos = rng.uniform(0, 1, (2, 3))
    context.setPositions(pos)
    r2 = float(np.sum((pos[1] - pos[0]) ** 2))
    assert link.cv_values(context)[0] == pytest.approx(r2, abs=1e-12)
    energy = context.getState(getEnergy=True, groups={GROUP}).getPotentialEnergy()._value
    assert energy / K_PROBE - 1.0 == pytest.approx(r2, abs=1e-10)
    assert link.labels() == ["r2"]


def test_mixed_route_from_force_and_dihedral(rng):
    """A geometric CV next to a from_force CV: both in one CustomCVForce, the table applied in it."""
    inner = mm.CustomBondForce("r")
    inner.addBond(0, 4)
    cvs = [gbo.dihedral(0, 1, 2, 3), gbo.from_force(inner)]
    bias = gbo.make_bias(cvs, lower=[-math.pi, 0.0], upper=[math.pi, 3.0], bins=[30, 30], sigma=[0.3, 0.15],
                         height=1.0, temperature=300.0)
    bias.add_hills(rng.uniform([-3, 0.2], [3, 2.0], (20, 2)), np.full(20, 1.0))
    system = system_of(5)
    link = gbo.attach(system, cvs, bias)
    context = mm.Context(system, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName("Reference"))
    for _ in range(10):
        pos = rng.uniform(0, 1, (5, 3))
        context.setPositions(pos)
        s = link.cv_values(context)
        assert s[1] == pytest.approx(np.linalg.norm(pos[4] - pos[0]), abs=1e-12)
        assert link.bias_energy(context) == pytest.approx(bias.evaluate(s)[0], abs=1e-6)
