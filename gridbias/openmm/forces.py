"""The OpenMM adapter's engine forces: table layout, force construction, pushing the bias into a Context.

Two forces carry a bias (both in the link's force group):

- the *table force* applies the grid as a ``Continuous{1,2,3}DFunction`` of the CVs. Its expression is
  nothing but the table call plus the CV definitions, because OpenMM recompiles a force's expression on
  every ``updateParametersInContext`` (DESIGN.md: every extra term costs time at every push);
- the *hill force* applies the walls and up to ``pending`` recent hills as exact Gaussians whose
  heights and centres are global parameters (``Context.setParameter``: no recompile, about a microsecond,
  bench/README.md). It is never pushed, so its expression may be long. Every ``pending + 1`` deposits the
  pending hills are folded into the table with one push.

On the CustomCVForce route both live in one CustomCVForce (its push refits the tables but recompiles
cheaply), with the CVs as inner forces.

Table layout. The core stores a periodic axis as ``bins`` distinct nodes; OpenMM wants periodic tables
closed (first node == last node) and has one periodic flag per table. All axes periodic: a periodic table
closed by repeating node 0. Otherwise a non-periodic table in which each periodic axis is tiled from the
grid's nodes so that it covers the CV's whole value range plus ``PERIODIC_PADDING`` wrapped nodes on both
sides; its natural end conditions then differ from the periodic spline only by terms that decay
~3.7x per node (measured, DESIGN.md), which is the price of mixed periodicity.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ParameterError
from .hermite import HermiteTables, index_coordinate

__all__ = ["PERIODIC_PADDING", "TableLayout", "EngineBias", "require_openmm", "same_object"]

#: Wrapped nodes added on each side of a periodic axis inside a mixed-periodicity table. DESIGN.md
#: measured the padded-vs-periodic spline difference at k=4: 2e-5 (energy) / 1e-3 (force) of a surface's
#: amplitude, k=8: 3e-7 / 2e-5. k=8 keeps the engine within 1e-6 (relative) of the core's periodic spline,
#: the agreement the tests check, for 16 more nodes per periodic axis (+12% nodes on a 129-node axis).
PERIODIC_PADDING = 8


class TableLayout:
    """How the core's node values map onto one OpenMM tabulated function.

    Parameters
    ----------
    grid : Grid
    value_ranges : list of (lo, hi) or None, one per axis
        For a periodic axis in a mixed table, the values the CV can take (the table must cover them).
    padding : int
        Wrapped nodes beyond the value range on each side of a periodic axis of a mixed table.

    Attributes
    ----------
    shape : tuple of int
        Table node counts (x, y, z).
    minimum, maximum : (d,) float
        Table ranges, CV units.
    periodic : bool
        The table's periodic flag.
    index_t : (prod(shape),) int64
        Flat (C-order) indices into the core's values, in the table's order (x fastest).
    """

    def __init__(self, grid, value_ranges, padding=PERIODIC_PADDING):
        d = grid.ndim
        self.periodic = bool(grid.periodic.all())
        node_index = []
        minimum, maximum = [], []
        for i in range(d):
            n, h, lo = int(grid.shape[i]), float(grid.spacing[i]), float(grid.lower[i])
            if not grid.periodic[i]:
                m = np.arange(n)
            elif self.periodic:
                m = np.arange(n + 1)  # closed: node n is node 0 again
            else:
                vlo, vhi = value_ranges[i]
                m_lo = math.floor((vlo - lo) / h + 1e-9) - padding
                m_hi = math.ceil((vhi - lo) / h - 1e-9) + padding
                m = np.arange(m_lo, m_hi + 1)
            node_index.append(np.mod(m, n) if grid.periodic[i] else m)
            minimum.append(lo + h * m[0])
            maximum.append(lo + h * m[-1])
        self.shape = tuple(len(a) for a in node_index)
        self.minimum = np.array(minimum)
        self.maximum = np.array(maximum)
        strides = np.cumprod((1,) + tuple(grid.shape[::-1]))[:-1][::-1]  # C-order strides of the core array
        mesh = np.meshgrid(*node_index, indexing="ij")
        flat = sum(np.asarray(a, dtype=np.int64) * int(s) for a, s in zip(mesh, strides, strict=True))
        self.index_t = np.ascontiguousarray(flat.ravel(order="F"))
        self.ndim = d

    @property
    def size(self) -> int:
        return int(self.index_t.size)

    def table_values(self, values) -> np.ndarray:
        """(prod(shape),) float: the core's values (grid.shape) in the table's order."""
        return np.ascontiguousarray(values).reshape(-1)[self.index_t]

    def function_arguments(self, values) -> list:
        """Arguments of ``Continuous{d}DFunction(...)`` / ``setFunctionParameters(...)``, without the flag."""
        v = self.table_values(values)
        lims = [x for i in range(self.ndim) for x in (float(self.minimum[i]), float(self.maximum[i]))]
        if self.ndim == 1:
            return [v, *lims]
        return [*self.shape, v, *lims]

    def make_function(self, openmm, values):
        cls = (openmm.Continuous1DFunction, openmm.Continuous2DFunction, openmm.Continuous3DFunction)[self.ndim - 1]
        return cls(*self.function_arguments(values), self.periodic)


def require_openmm():
    """The openmm module, or ImportError naming the pip extra."""
    try:
        import openmm
    except ImportError as exc:
        raise ImportError(
            "gridbias.openmm needs the OpenMM package; install it with: pip install 'gridbias[openmm]' "
            "(or conda install -c conda-forge openmm)") from exc
    return openmm


def same_object(a, b) -> bool:
    """True when two OpenMM proxies wrap the same C++ object."""
    try:
        return a.this == b.this
    except AttributeError:
        return a is b


def _wall_terms(walls):
    terms = []
    for w in walls:
        dist = f"max(0,{w.sign!r}*(cv{w.cv}-({w.bound!r})))"
        power = "2" if w.power == 2.0 else repr(w.power)
        terms.append(f"({w.k!r})*{dist}^{power}")
    return terms


def _hill_terms(bias, pending, prefix):
    """Slot Gaussians: sum_j h_j exp(-sum_i d_ij^2 / (2 sigma_i^2)), d minimum-image on periodic axes,
    masked to the grid on non-periodic axes (the core's grid part is zero outside)."""
    grid = bias.grid
    if pending == 0:
        return "", []
    slots = []
    for j in range(pending):
        parts = []
        for i in range(grid.ndim):
            d = f"(cv{i}-{prefix}c{j}_{i})"
            if grid.periodic[i]:
                period = float(grid.span[i])
                d = f"({d}-({period!r})*floor({d}/({period!r})+0.5))"
            parts.append(f"{d}^2*({1.0 / (2.0 * float(bias.sigma[i]) ** 2)!r})")
        slots.append(f"{prefix}h{j}*exp(-({'+'.join(parts)}))")
    mask = [f"step(cv{i}-({float(grid.lower[i])!r}))*step(({float(grid.upper[i])!r})-cv{i})"
            for i in range(grid.ndim) if not grid.periodic[i]]
    body = "+".join(slots)
    term = f"({'*'.join(mask)})*({body})" if mask else f"({body})"
    names = [f"{prefix}h{j}" for j in range(pending)]
    names += [f"{prefix}c{j}_{i}" for j in range(pending) for i in range(grid.ndim)]
    return term, names


def _points(cvs):
    """Points of one bond: (list of (atoms, weights)), per-CV lists of point indices."""
    points, where, per_cv = [], {}, []
    for cv in cvs:
        idx = []
        for atoms, weights in cv.point_groups():
            key = (atoms, weights)
            if key not in where:
                where[key] = len(points)
                points.append(key)
            idx.append(where[key])
        per_cv.append(idx)
    return points, per_cv


class EngineBias:
    """The forces that apply one GridBias in OpenMM, and the calls that update them in a Context.

    Parameters
    ----------
    openmm : module
    system : openmm.System
        The forces are added to it.
    cvs : list of CollectiveVariable (resolved)
    bias : GridBias
    route : {"compound", "cvforce"}
    pending : int
        Hills held as exact Gaussians before a fold (0: push the table at every deposit).
    group : int
        Force group of every force added.
    prefix : str
        Prefix of the global parameter names and force names.
    """

    def __init__(self, openmm, system, cvs, bias, *, route, pending, group, prefix):
        self.route = route
        self.pending = int(pending)
        self.prefix = prefix
        grid = bias.grid
        hill_term, self.parameter_names = _hill_terms(bias, self.pending, prefix)
        wall_terms = _wall_terms(bias.walls)
        extra = ([hill_term] if hill_term else []) + wall_terms
        periodic_box = self.periodic_box = system.usesPeriodicBoundaryConditions()
        self.hill_force = None
        self.layout = self.hermite = None
        if route == "cvforce":
            # The core's spline coefficients as discrete tables, the Hermite patch written out (exact).
            # A geometric CV's inner force returns its index coordinate (0 at the grid's lower limit, 1 per
            # spacing), which keeps the expression OpenMM compiles and differentiates short (3-D: 2.3 s ->
            # see bench/README.md); the CV itself, for walls, is defined from it.
            self.hermite = HermiteTables(grid, prefix)
            body, _, definitions = self.hermite.energy.partition("; ")
            coordinates = []
            for i, cv in enumerate(cvs):
                lo, h = float(grid.lower[i]), float(grid.spacing[i])
                if cv.geometric:
                    coordinates.append(f"cv{i}={lo!r}+({h!r})*{prefix}u{i}")
                else:
                    coordinates.append(f"{prefix}u{i}={index_coordinate(f'cv{i}', grid, i)}")
            force = openmm.CustomCVForce("; ".join(["+".join([body] + extra), definitions] + coordinates))
            for i, cv in enumerate(cvs):
                affine = (float(grid.lower[i]), float(grid.spacing[i])) if cv.geometric else None
                force.addCollectiveVariable(f"{prefix}u{i}" if cv.geometric else f"cv{i}",
                                            _inner_force(openmm, cv, periodic_box, affine))
            functions = self.hermite.make_functions(openmm, bias._coef)
            for name, function in zip(self.hermite.names, functions, strict=True):
                force.addTabulatedFunction(name, function)
            self._add_parameters(force)
            self.table_force = force
            forces = [force]
        else:
            ranges = [(cv.value_range if cv.value_range is not None
                       else (float(grid.lower[i]), float(grid.upper[i]))) if grid.periodic[i] else None
                      for i, cv in enumerate(cvs)]
            self.layout = TableLayout(grid, ranges)
            table = f"{prefix}table"
            call = f"{table}({','.join(f'cv{i}' for i in range(grid.ndim))})"
            self.table_force = self._bond_force(openmm, cvs, call, periodic_box)
            self.table_force.addTabulatedFunction(table, self.layout.make_function(openmm, bias.values))
            forces = [self.table_force]
            if extra:
                self.hill_force = self._bond_force(openmm, cvs, "+".join(extra), periodic_box)
                self._add_parameters(self.hill_force)
                forces.append(self.hill_force)
        names = ["table", "hills and walls"]
        for k, force in enumerate(forces):
            force.setForceGroup(group)
            force.setName(f"{prefix}{names[k] if route != 'cvforce' else 'bias'}")
            system.addForce(force)
        self.forces = forces

    def _add_parameters(self, force):
        for name in self.parameter_names:
            force.addGlobalParameter(name, 0.0)

    @staticmethod
    def _bond_force(openmm, cvs, energy, periodic_box):
        points, per_cv = _points(cvs)
        groups = any(cv.uses_groups for cv in cvs)
        letter = "g" if groups else "p"
        definitions = []
        for i, cv in enumerate(cvs):
            idx = per_cv[i]
            definitions.append(f"cv{i}={cv.expression(lambda k, idx=idx: f'{letter}{idx[k] + 1}')}")
        expression = "; ".join([energy] + definitions)
        if groups:
            force = openmm.CustomCentroidBondForce(len(points), expression)
            for atoms, weights in points:
                force.addGroup(list(atoms), list(weights) if weights is not None else [1.0] * len(atoms))
            force.addBond(list(range(len(points))), [])
        else:
            force = openmm.CustomCompoundBondForce(len(points), expression)
            force.addBond([atoms[0] for atoms, _ in points], [])
        force.setUsesPeriodicBoundaryConditions(periodic_box)
        return force

    # -- updates ----------------------------------------------------------------------------------
    def push_table(self, context, values, coef=None):
        """Copy the bias into the table(s) and into the Context (the expensive call).

        values : grid.shape float, the node values (the continuous table of the compound route);
        coef : the core's coefficient array (``GridBias._coef``) whose ``coef[0]`` is ``values``, needed by
        the cvforce route, whose tables hold every coefficient.
        """
        if self.hermite is not None:
            self.hermite.set_values(self.table_force, 0, coef)
        else:
            fn = self.table_force.getTabulatedFunction(0)
            fn.setFunctionParameters(*self.layout.function_arguments(values))
        self.table_force.updateParametersInContext(context)

    def set_slot(self, context, j, center, height):
        for i, c in enumerate(center):
            context.setParameter(f"{self.prefix}c{j}_{i}", float(c))
        context.setParameter(f"{self.prefix}h{j}", float(height))

    def clear_slots(self, context, n_used):
        for j in range(n_used):
            context.setParameter(f"{self.prefix}h{j}", 0.0)


def _inner_force(openmm, cv, periodic_box, affine):
    """A force whose energy is the geometric CV mapped by ``affine = (lower, spacing)`` to
    ``(cv - lower) / spacing``, or a copy of a ``from_force`` CV's force (``affine`` None)."""
    def mapped(x):
        return f"({x}-({affine[0]!r}))/({affine[1]!r})"

    force = cv.single_force(openmm)
    if force is None:
        return EngineBias._bond_force(openmm, [cv], mapped("cv0"), periodic_box)
    if cv.geometric:
        force.setEnergyFunction(mapped(force.getEnergyFunction()))
        force.setUsesPeriodicBoundaryConditions(periodic_box)
    return force


def check_route(route, cvs):
    if route not in ("compound", "cvforce"):
        raise ParameterError(f"route must be 'auto', 'compound' or 'cvforce', got {route!r}")
    if route == "compound" and not all(cv.geometric for cv in cvs):
        raise ParameterError("route='compound' needs geometric CVs only; from_force CVs need route='cvforce'")
