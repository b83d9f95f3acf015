"""OpenMM adapter: apply a GridBias to an OpenMM System and grow it from a reporter.

Add a few lines to an existing OpenMM script::

    from gridbias import openmm as gbo
    cvs = [gbo.dihedral(4, 6, 8, 14), gbo.dihedral(6, 8, 14, 16)]
    link = gbo.attach(system, cvs, bias)            # before the Simulation (or Context) is created
    simulation = app.Simulation(topology, system, integrator, platform)
    simulation.reporters.append(link.reporter(stride=500, checkpoint="run.gbz", checkpoint_every=50_000))
    simulation.step(5_000_000)
    # after a crash, the same script plus one line continues exactly where the checkpoint left off:
    link.restore(simulation, "run.gbz")

OpenMM is imported only when it is needed (``attach``, ``from_force``, quantities); without it those
calls raise ImportError naming ``pip install 'gridbias[openmm]'``.

Units: bare numbers are OpenMM's defaults (nm, rad, kJ/mol, K, ps); ``openmm.unit`` quantities are
converted wherever a physical value goes in.

How the engine applies the bias (measured in bench/bench_engine.py, figures in bench/README.md): the grid
is an OpenMM tabulated function of the CVs in a force of its own whose expression holds nothing else,
because re-sending a table (``updateParametersInContext``, milliseconds) recompiles that force's
expression. The newest hills are exact Gaussians in a second force whose heights and centres are global
parameters (``Context.setParameter``, microseconds); every ``pending_hills + 1`` deposits they are folded
into the table with one push. Walls live in that second force too, which is never re-sent, so they cost
nothing per push (on the CustomCVForce route both are terms of the one outer expression, whose recompile
is cheap). The engine's bias equals ``bias.evaluate`` up to the difference between an exact
Gaussian and its splined image on the grid for the hills not yet folded (measured with 8 pending hills:
1e-4 of a hill's height at sigma = 4 grid spacings, 6e-4 at 3, 4e-3 at 2; ``pending_hills=0`` removes
it), and to rounding right after a fold (or to the padding error of a mixed-periodicity table, ~1e-7 of
the surface's amplitude).
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from ..bias import GridBias
from ..errors import ParameterError
from ..grid import Grid
from ..runs import CHECKPOINT_KIND
from ..walls import Wall
from . import cvs as _cvs
from ._units import cv_unit_name, in_md_units, is_quantity, per_cv
from .forces import PERIODIC_PADDING, EngineBias, check_route, require_openmm, same_object
from .link import DEFAULT_MAX_CHECKPOINT_FAILURES, BiasLink, BiasReporter

__all__ = [
    "distance",
    "angle",
    "dihedral",
    "coordinate",
    "centroid_distance",
    "distance_combination",
    "from_force",
    "make_bias",
    "attach",
    "BiasLink",
    "BiasReporter",
    "DEFAULT_FORCE_GROUP",
    "DEFAULT_PENDING_HILLS",
    "DEFAULT_MAX_CHECKPOINT_FAILURES",
    "PERIODIC_PADDING",
    "CHECKPOINT_KIND",
]

#: Force group of the bias forces: the last of OpenMM's 32 groups, which force fields leave free, so
#: ``context.getState(getEnergy=True, groups={31})`` reads the bias energy alone.
DEFAULT_FORCE_GROUP = 31

#: Hills held as exact Gaussians between two table pushes. A push costs P once per K + 1 deposits, but every
#: pending-hill slot costs c at every step (both measured in bench/README.md, "The deposit path"), so the
#: cost per deposit is P / (K + 1) + K c stride; K = 4 is near the optimum sqrt(P / (c stride)) on the CPU
#: and Reference platforms for strides of 250-1000 steps (bench/README.md). On GPUs, where c is tiny,
#: a larger K pays.
DEFAULT_PENDING_HILLS = 4


# ---------------------------------------------------------------------------------------------- CV builders
def distance(i, j, *, name=None):
    """Distance between atoms i and j (nm). Not periodic; minimum image in a periodic box."""
    return _cvs.Distance(i, j, name)


def angle(i, j, k, *, name=None):
    """Angle i-j-k at atom j (rad, [0, pi]). Not periodic."""
    return _cvs.Angle(i, j, k, name)


def dihedral(i, j, k, l, *, name=None):  # noqa: E741 (the usual name of the fourth atom)
    """Torsion i-j-k-l (rad, (-pi, pi], OpenMM's/IUPAC sign). Periodic: its grid axis must span 2 pi."""
    return _cvs.Dihedral(i, j, k, l, name)


def coordinate(i, axis, *, name=None):
    """The x, y or z coordinate of atom i (nm). Only for Systems without a periodic box."""
    return _cvs.Coordinate(i, axis, name)


def centroid_distance(group1, group2, *, weights1=None, weights2=None, name=None):
    """Distance (nm) between the centroids of two atom groups, mass-weighted unless weights are given.

    Centroids are computed from positions as stored, so a group must not straddle a periodic boundary
    in unwrapped coordinates (one molecule, or molecules kept whole, as OpenMM keeps them).
    """
    return _cvs.CentroidDistance(group1, group2, weights1, weights2, name)


def distance_combination(pairs, coefficients, *, name=None):
    """sum_k c_k d(pairs[k]) (nm): e.g. ``distance_combination([(a, b), (b, c)], [1, -1])`` for an
    exchange coordinate d(a,b) - d(b,c). Not periodic."""
    return _cvs.DistanceCombination(pairs, coefficients, name)


def from_force(force, *, periodic=False, unit="nm", name=None):
    """A CV equal to the energy of any OpenMM Force (RMSDForce, a CustomBondForce "r", ...).

    The force must not be in the System (its energy would be added to the dynamics); it is copied into a
    CustomCVForce when the bias is attached. ``periodic=True`` takes the period from its grid axis and
    requires the force to return values inside that axis. ``unit`` labels the CV in logs.
    """
    require_openmm()
    return _cvs.ForceCV(force, periodic, unit, name)


# -------------------------------------------------------------------------------------------------- bias
def make_bias(cvs, *, lower, upper, bins, sigma, height, temperature, bias_factor=None, walls=()):
    """A GridBias over ``cvs`` with each axis' periodicity taken from its CV, accepting quantities.

    Parameters
    ----------
    cvs : list of CVs from this module
    lower, upper : (d,) float or quantities, CV units (nm, rad)
        Grid limits. A periodic CV (dihedral) needs ``upper - lower == 2 pi``.
    bins : (d,) int
    sigma : (d,) float or quantities, CV units
    height : float (kJ/mol) or energy quantity
    temperature : float (K) or temperature quantity
    bias_factor : float or None
    walls : sequence of gridbias.Wall (MD units) or dicts ``{"cv", "bound", "k", "side", "power"}``
        whose ``bound`` may be a quantity in the CV's unit and ``k`` one in kJ/mol per unit**power.

    Returns
    -------
    GridBias
    """
    cvs = list(cvs)
    grid = Grid(per_cv("lower", lower, cvs), per_cv("upper", upper, cvs), bins,
                [bool(cv.periodic) for cv in cvs])
    converted = []
    for w in walls:
        if isinstance(w, Wall):
            converted.append(w)
            continue
        spec = dict(w)
        cv = cvs[int(spec["cv"])]
        unit_name = cv_unit_name(cv) or "dimensionless"
        spec["bound"] = in_md_units(spec["bound"], name="wall bound", unit=unit_name) \
            if unit_name != "dimensionless" else float(spec["bound"])
        if is_quantity(spec["k"]):
            from openmm import unit

            power = float(spec.get("power", 2.0))
            per = getattr(unit, unit_name) ** power if unit_name != "dimensionless" else unit.dimensionless
            spec["k"] = in_md_units(spec["k"], name="wall k", unit=unit.kilojoule_per_mole / per)
        converted.append(Wall(**spec))
    return GridBias(grid, per_cv("sigma", sigma, cvs),
                    in_md_units(height, name="height", unit="kilojoule_per_mole"),
                    in_md_units(temperature, name="temperature", unit="kelvin"), bias_factor, converted)


# ------------------------------------------------------------------------------------------------ attach
def _check_grid(cvs, grid):
    if grid.ndim != len(cvs):
        raise ParameterError(f"the bias has {grid.ndim} CV axes but {len(cvs)} CVs were given")
    for i, cv in enumerate(cvs):
        if cv.periodic and not grid.periodic[i]:
            raise ParameterError(
                f"CV {i} ({cv.describe()['kind']}) is periodic but grid axis {i} is not: make axis {i} "
                f"periodic (periodic[{i}]=True)" + (" spanning 2*pi, e.g. lower=-pi, upper=pi"
                                                      if cv.period == 2 * math.pi else ""))
        if not cv.periodic and grid.periodic[i]:
            raise ParameterError(
                f"CV {i} ({cv.describe()['kind']}) is not periodic but grid axis {i} is periodic; "
                f"use periodic[{i}]=False")
        if cv.periodic and not math.isnan(cv.period) and not math.isclose(grid.span[i], cv.period, rel_tol=1e-9):
            raise ParameterError(
                f"CV {i} ({cv.describe()['kind']}) has period {cv.period!r} but grid axis {i} spans "
                f"{float(grid.span[i])!r} ({float(grid.lower[i])!r} .. {float(grid.upper[i])!r}); use an "
                "axis spanning exactly one period, e.g. lower=-pi, upper=pi")


def attach(system, cvs, bias, *, force_group=DEFAULT_FORCE_GROUP, pending_hills=DEFAULT_PENDING_HILLS,
           route="compound", name="gridbias"):
    """Add the forces that apply ``bias`` as a function of ``cvs`` to ``system``.

    Call it once the System is complete (its periodicity is read here) and before the Simulation (or
    Context) is created: a Context only sees the forces its System had when it was made.

    Parameters
    ----------
    system : openmm.System
    cvs : sequence of CVs from this module, one per grid axis
    bias : GridBias
        Its grid axes must match the CVs' periodicity (a dihedral needs a periodic axis spanning 2 pi).
    force_group : int, keyword-only
        0..31 (default 31, the last group, which force fields leave free). The bias energy is
        ``getState(getEnergy=True, groups={force_group})``. An integrator that integrates selected
        groups only (multiple time steps) must include this one.
    pending_hills : int, keyword-only
        Hills applied as exact Gaussians before they are folded into the table (0: push the whole
        table at every deposit). See bench/README.md for the trade-off.
    route : {"compound", "cvforce"}, keyword-only
        "compound" (default): the CVs are computed inside one CustomCompoundBondForce (or
        CustomCentroidBondForce); no extra Context, so the cheapest per step on the CPU platform and the
        natural choice for GPUs. "cvforce": one CustomCVForce with the CVs as inner forces; on the
        Reference platform (the fastest for systems of a few dozen atoms) it is cheaper both per step and
        per push (bench/README.md, "The deposit path"), but its inner Context costs time at every step on the
        CPU platform. Required for ``from_force`` CVs (chosen automatically then).
    name : str, keyword-only
        Prefix of the forces' names and of the global parameters (attach two biases with two names).

    Returns
    -------
    BiasLink
    """
    openmm = require_openmm()
    if not isinstance(system, openmm.System):
        raise ParameterError(f"system must be an openmm.System, got {type(system).__name__}")
    if not isinstance(bias, GridBias):
        raise ParameterError(f"bias must be a gridbias.GridBias, got {type(bias).__name__}")
    cvs = list(cvs) if not isinstance(cvs, _cvs.CollectiveVariable) else [cvs]
    for i, cv in enumerate(cvs):
        if not isinstance(cv, _cvs.CollectiveVariable):
            raise ParameterError(f"cvs[{i}] must be a CV built by gridbias.openmm (dihedral, distance, ...), "
                                 f"got {type(cv).__name__}")
    _check_grid(cvs, bias.grid)
    n = system.getNumParticles()
    for i, cv in enumerate(cvs):
        bad = [a for a in cv.atoms if a >= n]
        if bad:
            raise ParameterError(f"CV {i} ({cv.describe()['kind']}) uses atom index {bad[0]} but the System "
                                 f"has {n} particles (valid indices 0..{n - 1})")
        if isinstance(cv, _cvs.Coordinate) and system.usesPeriodicBoundaryConditions():
            raise ParameterError(f"CV {i} (coordinate) needs a System without a periodic box: with a box, "
                                 "positions are not unique; use a distance or centroid_distance instead")
        if not cv.geometric:
            for k in range(system.getNumForces()):
                if same_object(system.getForce(k), cv.force):
                    raise ParameterError(
                        f"CV {i} (from_force): this {type(cv.force).__name__} is force {k} of the System; "
                        "a CV force must not be in the System (its energy would act on the dynamics). "
                        "Pass a force that is not added to the System")
    if isinstance(force_group, bool) or not isinstance(force_group, (int, np.integer)) \
            or not 0 <= force_group <= 31:
        raise ParameterError(f"force_group must be an integer 0..31, got {force_group!r}")
    if isinstance(pending_hills, bool) or not isinstance(pending_hills, (int, np.integer)) \
            or not 0 <= pending_hills <= 64:
        raise ParameterError(f"pending_hills must be an integer 0..64, got {pending_hills!r}")
    if not all(cv.geometric for cv in cvs):
        route = "cvforce"
    check_route(route, cvs)
    if not isinstance(name, str) or not name.isidentifier():
        raise ParameterError(f"name must be an identifier (letters, digits, _), got {name!r}")
    prefix = name + "_"
    for k in range(system.getNumForces()):
        f = system.getForce(k)
        if f.getName().startswith(prefix):
            raise ParameterError(f"a bias named {name!r} is already attached to this System (force {k}, "
                                 f"{f.getName()!r}); pass another name=")
        if f.getForceGroup() == force_group:
            warnings.warn(f"force {k} ({f.getName()}) is already in force group {force_group}: the group's "
                          "energy will not be the bias alone; choose another force_group", stacklevel=2)
    resolved = [cv.resolved(system) for cv in cvs]
    engine = EngineBias(openmm, system, resolved, bias, route=route, pending=int(pending_hills),
                        group=int(force_group), prefix=prefix)
    return BiasLink(system, resolved, bias, engine, int(force_group), name)
