"""The OpenMM adapter's collective variables: how the engine computes each one, how NumPy does, what it is.

Users make CVs with the builders in ``gridbias.openmm``; the classes here are what those return.

Each CV knows three things: how OpenMM computes it (an expression over the "points" of one bond of a
custom force, or an inner force of a CustomCVForce), how to compute the same number from a positions
array in NumPy (the reporter reads CVs this way on every route; the compound route has no engine call
that returns them; cost in bench/README.md, "Figures quoted in the code"),
and a JSON-safe description that a checkpoint compares on restore. Nothing here imports OpenMM at module
level.

Sign and geometry conventions are the engine's: ``dihedral(p1, p2, p3, p4)`` is
``atan2(|b2| b1.(b2 x b3), (b1 x b2).(b2 x b3))`` with ``b1 = p2 - p1``, ``b2 = p3 - p2``,
``b3 = p4 - p3`` (IUPAC), in (-pi, pi]; ``angle(p1, p2, p3)`` is the angle at p2 in [0, pi]; with a
periodic box every difference vector takes the minimum image, and centroids are computed from the
positions as stored (no wrapping inside a group).
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ._units import in_md_units

__all__ = [
    "CollectiveVariable",
    "Distance",
    "Angle",
    "Dihedral",
    "Coordinate",
    "CentroidDistance",
    "DistanceCombination",
    "ForceCV",
]


def _atom_index(name, value):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise ParameterError(f"{name} must be an atom index (integer >= 0), got {value!r}")
    if value < 0:
        raise ParameterError(f"{name} must be an atom index (integer >= 0), got {value}")
    return int(value)


def _distinct(kind, atoms):
    seen = set()
    for a in atoms:
        if a in seen:
            raise ParameterError(f"{kind}: atom {a} is repeated in {list(atoms)}; the atoms must be distinct")
        seen.add(a)


def _label(name):
    if name is None:
        return None
    if not isinstance(name, str) or not name or not name.replace("_", "").isalnum():
        raise ParameterError(f"name must be a non-empty identifier-like str (letters, digits, _), got {name!r}")
    return name


# The reporter reads CVs at every deposit: plain-float arithmetic on 3-vectors costs a few microseconds per
# CV where small NumPy arrays cost tens.
def _diff(p, q, box):
    """q - p as a 3-tuple of floats, minimum image when box (3x3 nested tuples) is given."""
    dx, dy, dz = q[0] - p[0], q[1] - p[1], q[2] - p[2]
    if box is not None:
        (ax, _, _), (bx, by, _), (cx, cy, cz) = box
        n = math.floor(dz / cz + 0.5)
        dx, dy, dz = dx - n * cx, dy - n * cy, dz - n * cz
        n = math.floor(dy / by + 0.5)
        dx, dy = dx - n * bx, dy - n * by
        dx -= math.floor(dx / ax + 0.5) * ax
    return dx, dy, dz


def _cross(u, v):
    return u[1] * v[2] - u[2] * v[1], u[2] * v[0] - u[0] * v[2], u[0] * v[1] - u[1] * v[0]


def _dot(u, v):
    return u[0] * v[0] + u[1] * v[1] + u[2] * v[2]


def _points_of(pos_n3, atoms):
    return pos_n3[list(atoms)].tolist()


def _box_tuple(box):
    return None if box is None else tuple(tuple(float(x) for x in row) for row in box)


@dataclass(frozen=True)
class CollectiveVariable:
    """Base class of the adapter's CVs. Subclasses are frozen dataclasses built by ``gridbias.openmm``."""

    #: "nm" or "rad".
    unit = "nm"
    #: Period in CV units, or None.
    period = None
    #: The range the CV's values can take on a periodic axis (the padded table must cover it).
    value_range = None

    @property
    def periodic(self) -> bool:
        return self.period is not None

    @property
    def atoms(self) -> tuple:
        """Every atom the CV reads (0-based)."""
        raise NotImplementedError

    @property
    def geometric(self) -> bool:
        """True when the CV is computed from positions by an expression (False for ``from_force``)."""
        return True

    @property
    def uses_groups(self) -> bool:
        """True when the CV needs group centroids (a CustomCentroidBondForce)."""
        return False

    def point_groups(self) -> list:
        """The points the expression refers to, each ``(atoms tuple, weights tuple or None)``."""
        return [((a,), None) for a in self.atoms]

    def expression(self, symbol) -> str:
        """The engine expression for this CV; ``symbol(k)`` names the k-th point of ``point_groups()``."""
        raise NotImplementedError

    def value(self, pos_n3, box) -> float:
        """The CV from positions (n, 3) in nm, box (3, 3) nm or None."""
        raise NotImplementedError

    def resolved(self, system):
        """A copy with everything that depends on the System filled in (centroid masses)."""
        return self

    def single_force(self, openmm):
        """A standard OpenMM force whose energy is this CV (an inner force of a CustomCVForce), or None
        when the CV is computed by the generic bond-force expression (``expression``) instead."""
        return None

    def describe(self) -> dict:
        """JSON-safe definition; equal definitions mean the same CV."""
        raise NotImplementedError

    def label(self, index: int) -> str:
        return self.name or f"cv{index}"


@dataclass(frozen=True)
class Distance(CollectiveVariable):
    """Distance between two atoms, nm."""

    a: int
    b: int
    name: str = None

    def __post_init__(self):
        object.__setattr__(self, "a", _atom_index("distance atom a", self.a))
        object.__setattr__(self, "b", _atom_index("distance atom b", self.b))
        object.__setattr__(self, "name", _label(self.name))
        _distinct("distance", self.atoms)

    atoms = property(lambda self: (self.a, self.b))

    def expression(self, symbol):
        return f"distance({symbol(0)},{symbol(1)})"

    def value(self, pos_n3, box):
        p, q = _points_of(pos_n3, self.atoms)
        d = _diff(p, q, _box_tuple(box))
        return math.sqrt(_dot(d, d))

    def single_force(self, openmm):
        force = openmm.CustomBondForce("r")
        force.addBond(*self.atoms, [])
        return force

    def describe(self):
        return {"kind": "distance", "atoms": list(self.atoms)}


@dataclass(frozen=True)
class Angle(CollectiveVariable):
    """Angle a-b-c at atom b, rad in [0, pi] (not periodic)."""

    a: int
    b: int
    c: int
    name: str = None
    unit = "rad"

    def __post_init__(self):
        for f in ("a", "b", "c"):
            object.__setattr__(self, f, _atom_index(f"angle atom {f}", getattr(self, f)))
        object.__setattr__(self, "name", _label(self.name))
        _distinct("angle", self.atoms)

    atoms = property(lambda self: (self.a, self.b, self.c))

    def expression(self, symbol):
        return f"angle({symbol(0)},{symbol(1)},{symbol(2)})"

    def value(self, pos_n3, box):
        p0, p1, p2 = _points_of(pos_n3, self.atoms)
        box = _box_tuple(box)
        u, v = _diff(p1, p0, box), _diff(p1, p2, box)
        cos = _dot(u, v) / math.sqrt(_dot(u, u) * _dot(v, v))
        return math.acos(min(1.0, max(-1.0, cos)))

    def single_force(self, openmm):
        force = openmm.CustomAngleForce("theta")
        force.addAngle(*self.atoms, [])
        return force

    def describe(self):
        return {"kind": "angle", "atoms": list(self.atoms)}


@dataclass(frozen=True)
class Dihedral(CollectiveVariable):
    """Torsion a-b-c-d, rad in (-pi, pi], periodic with period 2 pi (IUPAC sign, as OpenMM)."""

    a: int
    b: int
    c: int
    d: int
    name: str = None
    unit = "rad"
    period = 2.0 * math.pi
    value_range = (-math.pi, math.pi)

    def __post_init__(self):
        for f in ("a", "b", "c", "d"):
            object.__setattr__(self, f, _atom_index(f"dihedral atom {f}", getattr(self, f)))
        object.__setattr__(self, "name", _label(self.name))
        _distinct("dihedral", self.atoms)

    atoms = property(lambda self: (self.a, self.b, self.c, self.d))

    def expression(self, symbol):
        return f"dihedral({symbol(0)},{symbol(1)},{symbol(2)},{symbol(3)})"

    def value(self, pos_n3, box):
        p0, p1, p2, p3 = _points_of(pos_n3, self.atoms)
        box = _box_tuple(box)
        b1, b2, b3 = _diff(p0, p1, box), _diff(p1, p2, box), _diff(p2, p3, box)
        c23 = _cross(b2, b3)
        return math.atan2(math.sqrt(_dot(b2, b2)) * _dot(b1, c23), _dot(_cross(b1, b2), c23))

    def single_force(self, openmm):
        force = openmm.CustomTorsionForce("theta")
        force.addTorsion(*self.atoms, [])
        return force

    def describe(self):
        return {"kind": "dihedral", "atoms": list(self.atoms)}


@dataclass(frozen=True)
class Coordinate(CollectiveVariable):
    """One Cartesian coordinate (x, y or z) of an atom, nm. Only for Systems without a periodic box."""

    atom: int
    axis: str
    name: str = None

    def __post_init__(self):
        object.__setattr__(self, "atom", _atom_index("coordinate atom", self.atom))
        if self.axis not in ("x", "y", "z"):
            raise ParameterError(f"coordinate axis must be 'x', 'y' or 'z', got {self.axis!r}")
        object.__setattr__(self, "name", _label(self.name))

    atoms = property(lambda self: (self.atom,))

    def expression(self, symbol):
        return f"{self.axis}{symbol(0)[1:]}"

    def value(self, pos_n3, box):
        return float(pos_n3[self.atom, "xyz".index(self.axis)])

    def describe(self):
        return {"kind": "coordinate", "atoms": [self.atom], "axis": self.axis}


def _group(name, atoms):
    try:
        atoms = tuple(atoms)
    except TypeError:
        raise ParameterError(f"{name} must be a sequence of atom indices, got {atoms!r}") from None
    if not atoms:
        raise ParameterError(f"{name} must hold at least one atom index, got an empty group")
    atoms = tuple(_atom_index(f"{name} entry", a) for a in atoms)
    _distinct(name, atoms)
    return atoms


def _weights(name, weights, n):
    if weights is None:
        return None
    w = tuple(float(x) for x in weights)
    if len(w) != n or not all(math.isfinite(x) and x >= 0 for x in w) or sum(w) <= 0:
        raise ParameterError(f"{name} must hold {n} finite weights >= 0 with a positive sum, got {list(weights)}")
    return w


@dataclass(frozen=True)
class CentroidDistance(CollectiveVariable):
    """Distance between the weighted centroids of two atom groups, nm (mass weights by default)."""

    group1: tuple
    group2: tuple
    weights1: tuple = None
    weights2: tuple = None
    name: str = None

    def __post_init__(self):
        object.__setattr__(self, "group1", _group("centroid_distance group1", self.group1))
        object.__setattr__(self, "group2", _group("centroid_distance group2", self.group2))
        object.__setattr__(self, "weights1", _weights("weights1", self.weights1, len(self.group1)))
        object.__setattr__(self, "weights2", _weights("weights2", self.weights2, len(self.group2)))
        object.__setattr__(self, "name", _label(self.name))

    atoms = property(lambda self: self.group1 + tuple(a for a in self.group2 if a not in self.group1))
    uses_groups = property(lambda self: True)

    def point_groups(self):
        return [(self.group1, self.weights1), (self.group2, self.weights2)]

    def expression(self, symbol):
        return f"distance({symbol(0)},{symbol(1)})"

    def resolved(self, system):
        w = []
        for g, given, label in ((self.group1, self.weights1, "group1"), (self.group2, self.weights2, "group2")):
            if given is not None:
                w.append(given)
                continue
            masses = tuple(float(in_md_units(system.getParticleMass(a))) for a in g)  # dalton
            if sum(masses) <= 0:
                raise ParameterError(
                    f"centroid_distance {label} {list(g)} has total mass 0 (massless particles); "
                    "give explicit weights")
            w.append(masses)
        return CentroidDistance(self.group1, self.group2, w[0], w[1], self.name)

    def value(self, pos_n3, box):
        c1 = np.average(pos_n3[list(self.group1)], axis=0, weights=self.weights1).tolist()
        c2 = np.average(pos_n3[list(self.group2)], axis=0, weights=self.weights2).tolist()
        d = _diff(c1, c2, _box_tuple(box))
        return math.sqrt(_dot(d, d))

    def describe(self):
        return {"kind": "centroid_distance", "group1": list(self.group1), "group2": list(self.group2),
                "weights1": None if self.weights1 is None else list(self.weights1),
                "weights2": None if self.weights2 is None else list(self.weights2)}


@dataclass(frozen=True)
class DistanceCombination(CollectiveVariable):
    """sum_k c_k |r_j(k) - r_i(k)|: a linear combination of atom-pair distances, nm."""

    pairs: tuple
    coefficients: tuple
    name: str = None

    def __post_init__(self):
        try:
            pairs = tuple(tuple(p) for p in self.pairs)
        except TypeError:
            raise ParameterError(f"pairs must be a sequence of (i, j) atom pairs, got {self.pairs!r}") from None
        if not pairs or any(len(p) != 2 for p in pairs):
            raise ParameterError(f"pairs must be a non-empty sequence of (i, j) atom pairs, got {self.pairs!r}")
        pairs = tuple((_atom_index("pair atom", i), _atom_index("pair atom", j)) for i, j in pairs)
        for p in pairs:
            _distinct("distance_combination pair", p)
        if len(set(pairs)) != len(pairs):
            raise ParameterError(f"distance_combination: a pair is repeated in {list(pairs)}")
        coef = tuple(float(c) for c in np.atleast_1d(np.asarray(self.coefficients, dtype=float)))
        if len(coef) != len(pairs) or not all(math.isfinite(c) for c in coef):
            raise ParameterError(
                f"coefficients must hold {len(pairs)} finite numbers (one per pair), got {self.coefficients!r}")
        object.__setattr__(self, "pairs", pairs)
        object.__setattr__(self, "coefficients", coef)
        object.__setattr__(self, "name", _label(self.name))

    @property
    def atoms(self):
        out = []
        for p in self.pairs:
            out.extend(a for a in p if a not in out)
        return tuple(out)

    def expression(self, symbol):
        index = {a: k for k, a in enumerate(self.atoms)}
        return "+".join(f"({c!r})*distance({symbol(index[i])},{symbol(index[j])})"
                        for (i, j), c in zip(self.pairs, self.coefficients, strict=True))

    def value(self, pos_n3, box):
        box = _box_tuple(box)
        total = 0.0
        for (i, j), c in zip(self.pairs, self.coefficients, strict=True):
            p, q = _points_of(pos_n3, (i, j))
            d = _diff(p, q, box)
            total += c * math.sqrt(_dot(d, d))
        return total

    def describe(self):
        return {"kind": "distance_combination", "pairs": [list(p) for p in self.pairs],
                "coefficients": list(self.coefficients)}


@dataclass(frozen=True, eq=False)
class ForceCV(CollectiveVariable):
    """A CV equal to the energy of an OpenMM Force (RMSDForce, any custom force...), through CustomCVForce.

    ``force`` is copied when the bias is attached; the caller's object is never added to the System.
    """

    force: object
    periodic_axis: bool = False
    cv_unit: str = "nm"
    name: str = None

    def __post_init__(self):
        if not (hasattr(self.force, "getForceGroup") and hasattr(self.force, "usesPeriodicBoundaryConditions")):
            raise ParameterError(f"from_force needs an openmm.Force, got {type(self.force).__name__}")
        if not isinstance(self.periodic_axis, (bool, np.bool_)):
            raise ParameterError(f"periodic must be True or False, got {self.periodic_axis!r}")
        if not isinstance(self.cv_unit, str) or not self.cv_unit:
            raise ParameterError(f"unit must be a non-empty str naming the CV's unit, got {self.cv_unit!r}")
        object.__setattr__(self, "name", _label(self.name))

    unit = property(lambda self: self.cv_unit)
    atoms = property(lambda self: ())
    geometric = property(lambda self: False)
    # A periodic force CV takes its period and value range from its grid axis (set by the adapter).
    period = property(lambda self: math.nan if self.periodic_axis else None)

    def serialized(self) -> str:
        import openmm

        return openmm.XmlSerializer.serialize(self.force)

    def single_force(self, openmm):
        return openmm.XmlSerializer.deserialize(self.serialized())  # a copy: the caller's force stays out

    def describe(self):
        digest = hashlib.sha256(self.serialized().encode("utf-8")).hexdigest()
        return {"kind": "force", "class": type(self.force).__name__, "periodic": bool(self.periodic_axis),
                "unit": self.cv_unit, "sha256": digest}

    def value(self, pos_n3, box):
        raise TypeError("a from_force CV is computed by the engine, not from positions")
