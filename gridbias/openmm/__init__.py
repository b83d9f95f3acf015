"""OpenMM adapter: apply a GridBias to an OpenMM System and grow it from a reporter.

Add a few lines to an existing OpenMM script::

    from gridbias import openmm as gbo
    cvs = [gbo.dihedral(1, 6, 7, 8), gbo.dihedral(6, 7, 8, 16)]   # your atoms, 0-based
    link = gbo.attach(system, cvs, bias)            # before the Simulation (or Context) is created
    simulation = app.Simulation(topology, system, integrator, platform)
    simulation.reporters.append(link.reporter(stride=500, checkpoint="run.gbz", checkpoint_every=50_000))
    if os.path.exists("run.gbz"):                   # the same script continues after a crash or a queue limit
        link.restore(simulation, "run.gbz")
    simulation.step(total_steps - simulation.currentStep)

OpenMM is imported only when it is needed (``attach``, ``from_force``, quantities); without it those
calls raise ImportError naming ``pip install 'gridbias[openmm]'``.

Units: bare numbers are OpenMM's defaults (nm, rad, kJ/mol, K, ps); ``openmm.unit`` quantities are
converted wherever a physical value goes in.

How the engine applies the bias (measured in bench/bench_engine.py, figures in bench/README.md) depends
on the route, chosen per platform by ``attach`` (``route="auto"``; gridbias.openmm.routes has the rule):

- ``"cvforce"`` (Reference platform; any ``from_force`` CV): one CustomCVForce whose discrete tables
  hold the core's own spline coefficients, the cubic Hermite written out in its expression. Every
  deposit is pushed (a copy of numbers, no refit), so the engine applies exactly ``bias.evaluate`` at
  every step (to rounding: 1e-15 of the bias's range in double precision).
- ``"compound"`` (CPU and GPU platforms): the CVs inside one custom bond force carrying the grid as a
  continuous table, which OpenMM refits and recompiles at every push (milliseconds); the newest hills are
  exact Gaussians in a second force driven by global parameters (``Context.setParameter``,
  microseconds) and are folded into the table every ``pending_hills + 1`` deposits. Between folds the
  engine differs from ``bias.evaluate`` by the grid's interpolation error of the pending hills (1e-4 of
  a hill's height at sigma = 4 grid spacings, 6e-4 at 3, 4e-3 at 2; ``pending_hills=0`` removes it).
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
from . import routes as _routes
from ._units import cv_unit_name, in_md_units, is_quantity, per_cv
from .advice import advise_from_simulation
from .forces import PERIODIC_PADDING, EngineBias, check_route, require_openmm, same_object
from .link import DEFAULT_MAX_WRITE_FAILURES, BiasLink, BiasReporter

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
    "advise_from_simulation",
    "BiasLink",
    "BiasReporter",
    "DEFAULT_FORCE_GROUP",
    "DEFAULT_MAX_WRITE_FAILURES",
    "PERIODIC_PADDING",
    "CHECKPOINT_KIND",
]

#: Force group of the bias forces: the last of OpenMM's 32 groups, which force fields leave free, so
#: ``context.getState(getEnergy=True, groups={31})`` reads the bias energy alone.
DEFAULT_FORCE_GROUP = 31


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
    if walls is None or isinstance(walls, (str, bytes, dict, Wall)) or not hasattr(walls, "__iter__"):
        raise ParameterError(f"walls must be a sequence of gridbias.Wall or dicts (or () for none), got {walls!r}")
    converted = []
    for w in walls:
        if isinstance(w, Wall):
            converted.append(w)
            continue
        if not isinstance(w, dict) or not isinstance(w.get("cv"), int) or not 0 <= w["cv"] < len(cvs):
            raise ParameterError(f"each wall must be a gridbias.Wall or a dict with 'cv' (0..{len(cvs) - 1}), "
                                 f"'bound', 'k', 'side' and optionally 'power'; got {w!r}")
        spec = dict(w)
        missing = {"bound", "k", "side"} - set(spec)
        if missing:
            raise ParameterError(f"wall {w!r} is missing {sorted(missing)}")
        cv = cvs[spec["cv"]]
        unit_name = cv_unit_name(cv) or "dimensionless"
        spec["bound"] = in_md_units(spec["bound"], name="wall bound", unit=unit_name) \
            if unit_name != "dimensionless" else float(spec["bound"])
        if is_quantity(spec["k"]):
            from openmm import unit

            power = float(spec.get("power", 2.0))
            per = getattr(unit, unit_name) ** power if unit_name != "dimensionless" else unit.dimensionless
            spec["k"] = in_md_units(spec["k"], name="wall k", unit=unit.kilojoule_per_mole / per)
        try:
            converted.append(Wall(**spec))
        except TypeError as exc:  # missing or unknown keys
            raise ParameterError(f"wall {w!r}: {exc}") from None
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


def attach(system, cvs, bias, *, force_group=DEFAULT_FORCE_GROUP, route="auto", platform=None,
           pending_hills=None, name="gridbias"):
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
    route : {"auto", "cvforce", "compound"}, keyword-only
        How the engine applies the bias (module docstring; bench/README.md has the measurements).
        "auto" (default) picks the cheaper one for ``platform``: "cvforce" on Reference (exact at every
        step: the core's spline coefficients as tables, pushed at every deposit), "compound" on CPU and
        GPU platforms (a continuous table + pending exact-Gaussian hills; no inner Context, whose cost
        per step on the CPU platform exceeds what the cheap pushes save). ``from_force`` CVs always use
        "cvforce"; with "auto", ``pending_hills`` > 0 selects "compound" (the only route that holds them).
    platform : str or openmm.Platform, keyword-only
        The platform the Simulation will run on, for ``route="auto"``. Default: the one OpenMM picks
        when none is named (the fastest available). A link bound to another platform than planned logs
        a notice when the other route would have been cheaper there.
    pending_hills : int or None, keyword-only
        Compound route: hills applied as exact Gaussians before they are folded into the table (0: push
        the whole table at every deposit). Default: the count minimising the modelled cost per deposit
        for this table at a stride of 500 steps (4 for a 2-D 129 x 129 table, ~24 for 65^3). The
        cvforce route holds none (it pushes every deposit).
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
    if pending_hills is not None and (isinstance(pending_hills, bool) or not isinstance(
            pending_hills, (int, np.integer)) or not 0 <= pending_hills <= 64):
        raise ParameterError(f"pending_hills must be an integer 0..64 or None, got {pending_hills!r}")
    planned = _platform_name(openmm, platform)
    geometric = all(cv.geometric for cv in cvs)
    auto = route == "auto"
    if auto:
        route = "compound" if pending_hills and geometric else _routes.choose(planned, geometric)
    check_route(route, cvs)
    if route == "cvforce" and pending_hills:
        raise ParameterError(f"pending_hills={pending_hills!r}: the cvforce route holds no pending hills (it "
                             "pushes every deposit and is exact); use pending_hills=None or 0, or "
                             "route='compound'")
    if route == "cvforce":
        pending_hills = 0
    elif pending_hills is None:
        pending_hills = _routes.pending_for(bias.ndim, _table_nodes(bias.grid))
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
    link = BiasLink(system, resolved, bias, engine, int(force_group), name)
    link._plan = (planned, auto and not pending_hills)  # pending hills, not the platform, chose compound
    return link


def _platform_name(openmm, platform):
    """The name of the platform given (a name or an openmm.Platform), or OpenMM's default one."""
    if platform is None:
        return _routes.default_platform(openmm)
    if isinstance(platform, openmm.Platform):
        return platform.getName()
    names = [openmm.Platform.getPlatform(i).getName() for i in range(openmm.Platform.getNumPlatforms())]
    if platform not in names:
        raise ParameterError(f"platform must be an openmm.Platform or one of the available platform names "
                             f"{names}, got {platform!r}")
    return platform


def _table_nodes(grid) -> int:
    """Nodes of the compound route's table (periodic axes closed with one more node)."""
    return int(np.prod([b + 1 for b in grid.bins]))
