"""Result files: free-energy surfaces and profiles as CSV, NumPy .npz or figure bytes, written atomically.

Used by the ``gridbias`` command and the demo, and by scripts that want the same files::

    from gridbias import analysis, exports
    surface = analysis.surface_at(run.bias)
    exports.write_file("fes.csv", exports.surface_bytes(surface, "csv", names=run.names, units=run.units))

Angles (CVs with unit "rad") are written in ``angle_unit``: "rad" (default, OpenMM's unit) or "deg".
"""

from __future__ import annotations

import io
import math
from dataclasses import replace

import numpy as np

from .errors import OutputError, ParameterError

__all__ = ["TABLE_FORMATS", "FIGURE_FORMATS", "SURFACE_NPZ_KEYS", "CVDisplay", "surface_bytes",
           "surface_figure", "profile_bytes", "shown_profile", "figure_bytes", "require_plots", "write_file",
           "write_files"]

#: Arrays of a surface's .npz file besides ``axis0, axis1, ...`` (the node coordinates, CV units).
SURFACE_NPZ_KEYS = ("free_energy", "names", "units", "periodic", "lower", "upper", "kT", "bias_factor",
                    "time_ps", "n_hills")

#: File types (extensions) of tables and of figures.
TABLE_FORMATS = ("csv", "npz")
FIGURE_FORMATS = ("png", "svg", "pdf")


class CVDisplay:
    """How CV values are shown: angles (unit "rad") in degrees or radians, other units as they are.

    Parameters
    ----------
    names, units : sequence of str
        CV names and units ("rad", "nm", "" when unknown).
    angle_unit : {"rad", "deg"}
    """

    def __init__(self, names, units, angle_unit: str = "rad"):
        if angle_unit not in ("rad", "deg"):
            raise ParameterError(f"angle_unit must be 'rad' or 'deg', got {angle_unit!r}")
        self.names = tuple(names)
        self.cv_units = tuple(units)
        self.degrees = tuple(u == "rad" and angle_unit == "deg" for u in units)

    def unit(self, i) -> str:
        return "deg" if self.degrees[i] else self.cv_units[i]

    def scale(self, i) -> float:
        return 180.0 / math.pi if self.degrees[i] else 1.0

    def suffix(self, i) -> str:
        """' deg', ' nm', ... or '' when the unit is unknown."""
        unit = self.unit(i)
        return f" {unit}" if unit else ""

    def label(self, i) -> str:
        unit = self.unit(i)
        return f"{self.names[i]} ({unit})" if unit else self.names[i]

    def value(self, i, x) -> str:
        return f"{x * self.scale(i):.4g}"

    def to_cv(self, i, x) -> float:
        """A value typed by the user in the display unit, in CV units."""
        return x / self.scale(i)


def _csv_bytes(header, columns) -> bytes:
    buffer = io.StringIO()
    np.savetxt(buffer, np.column_stack(columns), delimiter=",", header=",".join(header), comments="",
               fmt="%.10g")
    return buffer.getvalue().encode("utf-8")


def _npz_bytes(arrays) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def figure_bytes(figure, fmt: str) -> bytes:
    """A matplotlib figure as the bytes of a ``fmt`` file ("png", "svg", "pdf"), at 150 dpi."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format=fmt, dpi=150)
    return buffer.getvalue()


def require_plots():
    """The gridbias.plots module, or ImportError naming the pip extra when matplotlib is missing."""
    try:
        import matplotlib  # noqa: F401 - only to say clearly what is missing

        from . import plots
    except ImportError as exc:
        raise ImportError(f"figures need matplotlib ({exc}); install it with: pip install 'gridbias[plot]'") \
            from exc
    return plots


def _plot_names(names, units):
    """Axis names for gridbias.plots: angles get their unit from the plot; other axes carry theirs."""
    return tuple(f"{n} ({u})" if u and u != "rad" else n for n, u in zip(names, units, strict=True))


def _moment(surface) -> str:
    """'t = 1200 ps, 2,400 hills' (the time only where the hills carry one)."""
    hills = f"{surface.n_hills:,} hills"
    return f"t = {surface.time:g} ps, {hills}" if np.isfinite(surface.time) else hills


def surface_bytes(surface, fmt, *, names, units, angle_unit="rad", basins=None, crossings=None) -> bytes:
    """A free-energy surface (analysis.Surface) as the bytes of a .csv, .npz or figure file.

    CSV: one row per grid node, the CV columns (angles in ``angle_unit``) then ``free_energy[kJ/mol]``.
    NPZ: ``free_energy`` (grid shape, kJ/mol), ``axis0..`` node coordinates in CV units, ``names``,
    ``units``, ``periodic``, ``lower``, ``upper``, ``kT``, ``bias_factor`` (NaN: standard), ``time_ps``,
    ``n_hills``. Figures (png, svg, pdf): filled contours (2 CVs) or a curve (1 CV) by gridbias.plots,
    with ``basins`` marked if given, ``crossings`` (saddle points, minimum free-energy paths), angles in
    ``angle_unit`` and a title naming the time and hill count.
    """
    grid = surface.grid
    show = CVDisplay(names, units, angle_unit)
    if fmt == "csv":
        nodes = grid.nodes().reshape(-1, grid.ndim)
        header = [f"{names[i]}[{show.unit(i)}]" if show.unit(i) else names[i] for i in range(grid.ndim)]
        header.append("free_energy[kJ/mol]")
        columns = [nodes[:, i] * show.scale(i) for i in range(grid.ndim)]
        columns.append(surface.free_energy.reshape(-1))
        return _csv_bytes(header, columns)
    if fmt == "npz":
        arrays = {f"axis{i}": np.asarray(grid.axes[i]) for i in range(grid.ndim)}
        gamma = math.nan if surface.bias_factor is None else surface.bias_factor
        arrays.update(free_energy=surface.free_energy, names=np.array(names), units=np.array(units),
                      periodic=np.asarray(grid.periodic), lower=np.asarray(grid.lower),
                      upper=np.asarray(grid.upper), kT=np.float64(surface.kT), bias_factor=np.float64(gamma),
                      time_ps=np.float64(surface.time), n_hills=np.int64(surface.n_hills))
        assert set(arrays) == {f"axis{i}" for i in range(grid.ndim)} | set(SURFACE_NPZ_KEYS)
        return _npz_bytes(arrays)
    return figure_bytes(surface_figure(surface, names=names, units=units, angle_unit=angle_unit,
                                       basins=basins, crossings=crossings), fmt)


def surface_figure(surface, *, names, units, angle_unit="rad", basins=None, crossings=None):
    """The figure ``surface_bytes`` writes: every angle (periodic or not) in ``angle_unit``, as in the
    tables, and a title naming the moment shown (time and hill count)."""
    plots = require_plots()
    figure = plots.plot_free_energy(surface, basins=basins, crossings=crossings, names=_plot_names(names, units),
                                    angular=[u == "rad" for u in units], angle_unit=angle_unit)
    figure.axes[0].set_title(f"free-energy surface at {_moment(surface)}", fontsize="medium")
    return figure


def profile_bytes(profile, fmt, *, units, angle_unit="rad") -> bytes:
    """A reweighted profile (analysis.Profile) as the bytes of a .csv, .npz or figure file.

    CSV: one row per bin, the bin centres (angles in ``angle_unit``), ``free_energy[kJ/mol]``,
    ``error[kJ/mol]``, ``frames``. NPZ: ``edges0..``, ``centers0..`` (column units), ``free_energy``,
    ``error``, ``probability``, ``counts``, ``plateau_found``, ``names``, ``units``, ``kT``,
    ``effective_sample_size``. Figures (png, svg, pdf): made by gridbias.plots.
    """
    show = CVDisplay(profile.names, units, angle_unit)
    if fmt == "csv":
        mesh = np.meshgrid(*profile.centers, indexing="ij")
        header = [f"{c}[{show.unit(i)}]" if show.unit(i) else c for i, c in enumerate(profile.names)]
        header += ["free_energy[kJ/mol]", "error[kJ/mol]", "frames"]
        columns = [m.reshape(-1) * show.scale(i) for i, m in enumerate(mesh)]
        columns += [profile.free_energy.reshape(-1), profile.error.reshape(-1), profile.counts.reshape(-1)]
        return _csv_bytes(header, columns)
    if fmt == "npz":
        arrays = {f"edges{i}": e for i, e in enumerate(profile.edges)}
        arrays.update({f"centers{i}": c for i, c in enumerate(profile.centers)})
        arrays.update(free_energy=profile.free_energy, error=profile.error, probability=profile.probability,
                      counts=profile.counts, plateau_found=profile.plateau_found,
                      names=np.array(profile.names), units=np.array(units), kT=np.float64(profile.kT),
                      effective_sample_size=np.float64(profile.effective_sample_size))
        return _npz_bytes(arrays)
    plots = require_plots()
    return figure_bytes(plots.plot_free_energy(shown_profile(profile, units, angle_unit)), fmt)


def shown_profile(profile, units, angle_unit="rad"):
    """The profile with its axes in the shown units (angles in degrees if asked) and named with them,
    ready for gridbias.plots (which shows a profile's axes as they are)."""
    show = CVDisplay(profile.names, units, angle_unit)
    edges = tuple(e * show.scale(i) for i, e in enumerate(profile.edges))
    names = tuple(show.label(i) for i in range(profile.ndim))
    return replace(profile, edges=edges, names=names)


def write_file(path, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically: a failure leaves an older file there intact.

    Raises
    ------
    OutputError
        The file could not be written (disk full, no permission, missing folder); the message names the
        path and the cause.
    """
    from ._files import write_atomically

    write_atomically(path, data, what="file", error=OutputError)


def write_files(items) -> None:
    """Write every ``(path, data)`` atomically, or none: when one fails, the files this call created are
    removed again (files that existed before keep their old content or the new one, whole), and the
    OutputError of the failure is raised."""
    import os

    created = []
    try:
        for path, data in items:
            existed = os.path.exists(path)
            write_file(path, data)
            if not existed:
                created.append(path)
    except BaseException:
        for path in created:
            try:
                os.unlink(path)
            except OSError:
                pass
        raise
