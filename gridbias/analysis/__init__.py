"""Analysis of a metadynamics run: free-energy surfaces, reweighting, errors, basins and convergence.

Every function works on plain arrays and on the core objects (``GridBias``, ``Grid``) and returns small
frozen result objects. Free-energy results depend on the CV choice (hidden slow modes cause hysteresis),
on convergence, on sampling time and on the force field: validate them before relying on them.

Modules, one job each:

- ``surfaces``: the surface from the bias now or at past times (replaying the hills).
- ``reweighting``: frame weights to the unbiased ensemble (time-independent offset, final bias), Kish ESS.
- ``histograms``: free energy along any per-frame quantity, with block errors.
- ``averages``: unbiased averages of any per-frame quantity and probabilities of regions, with block errors.
- ``frames``: frames saved apart from the CV log (trajectories) lined up with its records by step.
- ``blocking``: block analysis of a correlated series.
- ``autocorrelation``: integrated autocorrelation time of a series, with its error.
- ``basins``: basins from boxes or from the surface's minima; transitions between their cores.
- ``differences``: basin free-energy differences against simulated time.
- ``convergence``: the convergence verdict (drift against its noise, transitions, heights, estimator
  cross-check).
- ``barriers``: saddle points, barriers and minimum free-energy paths between adjacent basins.
"""

from .autocorrelation import AutocorrelationTime, autocorrelation_time
from .averages import Average, RegionProbability, region_probability, reweighted_average
from .barriers import Crossing, Crossings, find_crossings
from .basins import (
    Basins,
    Transitions,
    basin_free_energies,
    basins_from_boxes,
    count_transitions,
    find_basins,
)
from .blocking import BlockingCurve, blocking_curve
from .convergence import (
    ConvergenceVerdict,
    Criterion,
    agreement_criterion,
    assess_convergence,
    drift_criterion,
    height_criterion,
    transition_criterion,
)
from .differences import BasinDifferences, basin_differences_from_bias, basin_differences_from_frames
from .frames import record_index, weights_at_steps, weights_at_times
from .histograms import Profile, free_energy_along
from .reweighting import (
    FrameWeights,
    final_bias_weights,
    kish_effective_sample_size,
    offset_weights,
    time_independent_offset,
)
from .surfaces import (
    Surface,
    SurfaceSeries,
    evenly_spaced_times,
    hills_deposited_by,
    iter_surfaces,
    surface_at,
    surface_series,
)

__all__ = [
    "Surface", "SurfaceSeries", "surface_at", "surface_series", "iter_surfaces", "hills_deposited_by",
    "evenly_spaced_times",
    "FrameWeights", "offset_weights", "final_bias_weights", "time_independent_offset",
    "kish_effective_sample_size",
    "Profile", "free_energy_along",
    "Average", "RegionProbability", "reweighted_average", "region_probability",
    "record_index", "weights_at_steps", "weights_at_times",
    "BlockingCurve", "blocking_curve", "AutocorrelationTime", "autocorrelation_time",
    "Basins", "Transitions", "basins_from_boxes", "find_basins", "basin_free_energies", "count_transitions",
    "BasinDifferences", "basin_differences_from_bias", "basin_differences_from_frames",
    "Criterion", "ConvergenceVerdict", "drift_criterion", "transition_criterion", "height_criterion",
    "agreement_criterion", "assess_convergence",
    "Crossing", "Crossings", "find_crossings",
]
