"""Metadynamics advice for an OpenMM system: run a short unbiased simulation, sample the CVs, advise.

The measuring and the rules live in :mod:`gridbias.advice`; this module only drives the user's own
``Simulation`` for a short while, samples the CVs from positions and hands the series over.
"""

from __future__ import annotations

import math
import os

import numpy as np

from ..advice import MIN_FRAMES, advise
from ..errors import ParameterError
from ..progress import ProgressLine
from . import cvs as _cvs
from ._units import cv_unit_name, in_md_units

__all__ = ["advise_from_simulation"]

#: Default time between CV samples, ps: below the autocorrelation times of typical molecular CVs
#: (torsions, distances), so the stride can be resolved (common practice, no source).
DEFAULT_SAMPLE_INTERVAL = 0.05


def _positive(name, value, unit_name):
    """A finite float > 0 in OpenMM's default unit ``unit_name``; quantities converted."""
    x = in_md_units(value, name=name, unit=unit_name)
    if not (math.isfinite(x) and x > 0):
        raise ParameterError(f"{name} must be finite and > 0 ({unit_name}), got {value!r}")
    return x


def _cv_range(cv_range, cvs):
    if cv_range is None:
        return None
    if len(cv_range) != len(cvs):
        raise ParameterError(f"cv_range must have {len(cvs)} entries (one per CV), got {cv_range!r}")
    out = []
    for i, (pair, cv) in enumerate(zip(cv_range, cvs, strict=True)):
        if pair is None:
            out.append(None)
            continue
        try:
            lo, hi = pair
        except (TypeError, ValueError):
            raise ParameterError(f"cv_range[{i}] must be a pair (lowest, highest) or None, "
                                 f"got {pair!r}") from None
        unit_name = cv_unit_name(cv)
        values = [in_md_units(v, name=f"cv_range[{i}]", unit=unit_name) if unit_name else v for v in (lo, hi)]
        out.append(tuple(values))
    return out


def advise_from_simulation(simulation, cvs, *, duration, sample_interval=DEFAULT_SAMPLE_INTERVAL,
                           temperature=None, barrier=None, cv_range=None, affordable_time=None, log=None,
                           progress=True):
    """Run ``simulation`` unbiased for ``duration``, sample ``cvs`` and advise metadynamics parameters.

    The simulation is advanced (its state changes, as after an equilibration); call this before
    attaching any bias. Only geometric CVs (distance, angle, dihedral, coordinate, centroid_distance,
    distance_combination) can be sampled from positions; for a ``from_force`` CV, record its values
    yourself and call :func:`gridbias.advice.advise`.

    Parameters
    ----------
    simulation : openmm.app.Simulation
        The user's own system, minimised and at the run temperature.
    cvs : list of CVs from :mod:`gridbias.openmm`
    duration : float (ps) or time quantity, keyword-only
        Length of the short run: many autocorrelation times of the slowest CV (tens of ps for torsions).
    sample_interval : float (ps) or time quantity, keyword-only, default 0.05 ps
        Time between CV samples (rounded to whole steps).
    temperature : float (K) or quantity, keyword-only, optional
        Default: the integrator's temperature.
    barrier, cv_range, affordable_time : keyword-only, optional
        As in :func:`gridbias.advice.advise`; quantities accepted (kJ/mol, CV units, ps).
    log : str or os.PathLike, keyword-only, optional
        Also write the samples to this new CV log (``step, time, CVs``), which ``gridbias advise`` reads.
    progress : bool, keyword-only, default True
        Show one progress line on stderr (rewritten in place on a terminal; in a log, a line every 15 s).

    Returns
    -------
    gridbias.advice.Advice
    """
    cvs = list(cvs) if not isinstance(cvs, _cvs.CollectiveVariable) else [cvs]
    if not cvs:
        raise ParameterError("cvs must list at least one CV")
    for i, cv in enumerate(cvs):
        if not isinstance(cv, _cvs.CollectiveVariable):
            raise ParameterError(f"cvs[{i}] must be a CV built by gridbias.openmm, got {type(cv).__name__}")
        if not cv.geometric:
            raise ParameterError(f"cvs[{i}] is a from_force CV, which cannot be computed from positions "
                                 "here: record its values yourself and call gridbias.advice.advise")
    if not hasattr(simulation, "context") or not hasattr(simulation, "step"):
        raise ParameterError(f"simulation must be an openmm.app.Simulation, got {type(simulation).__name__}")
    context, integrator = simulation.context, simulation.integrator
    system = context.getSystem()
    n_atoms = system.getNumParticles()
    for i, cv in enumerate(cvs):
        if any(a >= n_atoms for a in cv.atoms):
            raise ParameterError(f"cvs[{i}] uses atom {max(cv.atoms)} but the System has {n_atoms} particles")
    resolved = [cv.resolved(system) for cv in cvs]
    dt = _positive("the integrator's step size", integrator.getStepSize(), "picosecond")
    duration = _positive("duration", duration, "picosecond")
    every = max(1, int(round(_positive("sample_interval", sample_interval, "picosecond") / dt)))
    n_samples = int(duration / (every * dt))
    if n_samples < MIN_FRAMES:
        raise ParameterError(f"duration {duration:g} ps gives {n_samples} samples every {every * dt:g} ps; "
                             f"at least {MIN_FRAMES} are needed: run longer or sample more often")
    if temperature is None:
        if not hasattr(integrator, "getTemperature"):
            raise ParameterError(f"{type(integrator).__name__} has no temperature: give temperature= (K)")
        temperature = integrator.getTemperature()
    temperature = _positive("temperature", temperature, "kelvin")
    periodic_box = system.usesPeriodicBoundaryConditions()
    labels = [cv.label(i) for i, cv in enumerate(cvs)]
    writer = None
    if log is not None and os.path.exists(log):
        raise ParameterError(f"log {os.fspath(log)!r} already exists: remove it or choose another path (the "
                             "samples of one short run go into one new log)")
    if log is not None:
        from ..cvlog import CVLogWriter

        writer = CVLogWriter(log, ["step", "time"] + labels, ["1", "ps"] + [cv.unit for cv in cvs],
                             {"cvs": [cv.describe() for cv in resolved], "temperature": temperature,
                              "unbiased": True})
    series = np.empty((n_samples, len(cvs)))
    shown = ProgressLine() if progress else None
    try:
        for r in range(n_samples):
            simulation.step(every)
            state = context.getState(getPositions=True)
            pos = np.asarray(in_md_units(state.getPositions(asNumpy=True)))
            box = np.asarray(in_md_units(state.getPeriodicBoxVectors(asNumpy=True))) if periodic_box else None
            series[r] = [cv.value(pos, box) for cv in resolved]
            if not np.isfinite(series[r]).all():
                raise ParameterError(f"CV values are not finite after {(r + 1) * every} steps: "
                                     f"{series[r].tolist()}; the simulation has blown up")
            if writer is not None:
                writer.write([[float(simulation.currentStep), in_md_units(state.getTime(), name="time",
                                                                          unit="picosecond"), *series[r]]])
            if shown is not None:
                shown.update(f"advice run: {(r + 1) * every * dt:.1f} of {n_samples * every * dt:.1f} ps")
    finally:
        if writer is not None:
            writer.close()
        if shown is not None:
            shown.finish()
    return advise(series, interval=every * dt, temperature=temperature, timestep=dt, names=labels,
                  units=[cv.unit for cv in cvs], periods=[cv.period for cv in cvs],
                  barrier=None if barrier is None else _positive("barrier", barrier, "kilojoule_per_mole"),
                  cv_range=_cv_range(cv_range, cvs),
                  affordable_time=None if affordable_time is None
                  else _positive("affordable_time", affordable_time, "picosecond"))
