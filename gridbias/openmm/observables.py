"""Quantities logged beside the biased CVs, never biased (private; users pass them to ``link.reporter``).

Any CV the adapter builds can be an observable. Geometric ones (distance, angle, dihedral, ...) are computed
from the positions the reporter already reads, with the same formulas as the biased CVs (microseconds).
``from_force`` ones are the energies of copies of their forces in a Context of their own, evaluated only
at log records: they add nothing to the dynamics and cost nothing between records.
"""

from __future__ import annotations

import logging

import numpy as np

from ..errors import ParameterError
from . import cvs as _cvs
from ._units import in_md_units

__all__ = ["Observables", "RESERVED_COLUMNS"]

#: Log columns the reporter writes itself.
RESERVED_COLUMNS = ("step", "time", "bias")

_log = logging.getLogger("gridbias.openmm")


class Observables:
    """The observables of one reporter: names, units, descriptions, and their values at a record.

    Parameters
    ----------
    system : openmm.System
        The simulated System (atom indices are checked against it; ``from_force`` copies see its particles
        and box).
    observables : sequence of CVs from ``gridbias.openmm``, each with ``name=``
    taken : sequence of str
        Column names already in the log (the biased CVs' labels); an observable may not reuse one.
    """

    def __init__(self, system, observables, taken):
        if isinstance(observables, _cvs.CollectiveVariable):
            observables = [observables]
        try:
            items = list(observables)
        except TypeError:
            raise ParameterError("observables must be a sequence of CVs built by gridbias.openmm (distance, "
                                 f"dihedral, from_force, ...), got {type(observables).__name__}") from None
        owners = {name: "a column the reporter writes" for name in RESERVED_COLUMNS}
        owners.update({name: f"the biased CV {name!r}" for name in taken})
        n = system.getNumParticles()
        for k, cv in enumerate(items):
            if not isinstance(cv, _cvs.CollectiveVariable):
                raise ParameterError(f"observables[{k}] must be a CV built by gridbias.openmm (distance, "
                                     f"dihedral, from_force, ...), got {type(cv).__name__}")
            if cv.name is None:
                raise ParameterError(f"observables[{k}] ({cv.describe()['kind']}) has no name: give it "
                                     "name=..., which becomes its column in the CV log")
            if cv.name in owners:
                raise ParameterError(f"observables[{k}] is named {cv.name!r}, already the name of "
                                     f"{owners[cv.name]}: every CV-log column needs its own name")
            owners[cv.name] = f"observables[{k}]"
            bad = [a for a in cv.atoms if a >= n]
            if bad:
                raise ParameterError(f"observables[{k}] ({cv.name}) uses atom index {bad[0]} but the System "
                                     f"has {n} particles (valid indices 0..{n - 1})")
        self.cvs = tuple(cv.resolved(system) for cv in items)
        self._system = system
        self._forces = [i for i, cv in enumerate(self.cvs) if not cv.geometric]
        if len(self._forces) > 32:
            raise ParameterError(f"at most 32 from_force observables per reporter, got {len(self._forces)}")
        self._context = None
        self._warned_nonfinite = False

    names = property(lambda self: [cv.name for cv in self.cvs], doc="Column names, in order.")
    units = property(lambda self: [cv.unit for cv in self.cvs], doc="Column units, in order.")
    needs_positions = property(lambda self: bool(self.cvs), doc="True when values() reads positions.")

    def __len__(self):
        return len(self.cvs)

    def describe(self) -> list:
        """JSON-safe definitions stored in the log's metadata: ``{"name": ..., "kind": ..., ...}`` each."""
        return [{"name": cv.name, **cv.describe()} for cv in self.cvs]

    def values(self, simulation_context, pos_n3, box, step) -> list:
        """The observables (floats, their units) at positions (n, 3) nm and box (3, 3) nm or None."""
        out = [cv.value(pos_n3, box) if cv.geometric else 0.0 for cv in self.cvs]
        if self._forces:
            context = self._force_context(simulation_context)
            if box is not None:
                context.setPeriodicBoxVectors(*[tuple(float(x) for x in row) for row in box])
            context.setPositions(pos_n3)
            for group, i in enumerate(self._forces):
                state = context.getState(getEnergy=True, groups={group})
                out[i] = float(in_md_units(state.getPotentialEnergy()))
        if not self._warned_nonfinite and not np.isfinite(out).all():
            self._warned_nonfinite = True
            bad = [name for name, v in zip(self.names, out, strict=True) if not np.isfinite(v)]
            _log.warning("observable(s) %s are not finite at step %d; they are logged as they are (analysis "
                         "refuses non-finite values). Further occurrences are not reported", bad, step)
        return out

    def _force_context(self, simulation_context):
        """The Context holding copies of the from_force observables' forces, one force group each (made at
        the first record, on the simulation's platform with its properties)."""
        if self._context is not None:
            return self._context
        import openmm

        system = openmm.System()
        for a in range(self._system.getNumParticles()):
            system.addParticle(self._system.getParticleMass(a))
        system.setDefaultPeriodicBoxVectors(*self._system.getDefaultPeriodicBoxVectors())
        for group, i in enumerate(self._forces):
            force = openmm.XmlSerializer.deserialize(openmm.XmlSerializer.serialize(self.cvs[i].force))
            force.setForceGroup(group)
            system.addForce(force)
        platform = simulation_context.getPlatform()
        properties = {name: platform.getPropertyValue(simulation_context, name)
                      for name in platform.getPropertyNames()}
        self._context = openmm.Context(system, openmm.VerletIntegrator(0.001), platform, properties)
        return self._context
