"""Figures of free-energy surfaces, basin differences, CV time series, hill heights and blocking curves.

matplotlib is imported only when a function here is called (``pip install 'gridbias[plot]'``). Figures are
built as ``matplotlib.figure.Figure`` objects without pyplot, so they work headless and never touch a global
figure state. Each function takes an optional ``ax`` to draw into and returns the Figure; ``save_figure``
writes PNG or SVG. Surfaces use the 'cividis' colour map: perceptually uniform, readable in greyscale and by
colour-blind readers.
"""

from __future__ import annotations

import io
import math
import os

import numpy as np

from ._files import write_atomically
from ._plot_marks import _ACCENT, _INK, _SERIES, _closed_periodic, _mark_basins, _mark_crossings
from .errors import OutputError, ParameterError

__all__ = ["new_figure", "save_figure", "plot_free_energy", "plot_basin_differences", "plot_cv_timeseries",
           "plot_hill_heights", "plot_blocking_curve", "plot_crossing_profile"]

COLOUR_MAP = "cividis"
_KT_LABEL = r"$k_\mathrm{B}T$"
_NO_DATA = "#d9d9d9"  # bins without frames: light grey, hatched

#: Bins of a 1-D profile with fewer frames than this are marked as unreliable (common practice).
DEFAULT_MIN_FRAMES = 20


def _figure_class():
    try:
        from matplotlib.figure import Figure
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError("gridbias.plots needs matplotlib: pip install 'gridbias[plot]'") from exc
    return Figure


def new_figure(nrows: int = 1, ncols: int = 1, *, width: float = 6.4, height: float = 4.4, **kwargs):
    """A Figure with a grid of axes, built without pyplot (safe on headless machines).

    Parameters
    ----------
    nrows, ncols : int
    width, height : float, inches, keyword-only
        Size of the whole figure.
    **kwargs
        Passed to ``Figure.subplots`` (e.g. ``sharex=True``).

    Returns
    -------
    (Figure, Axes or array of Axes)
    """
    figure = _figure_class()(figsize=(width, height), layout="constrained")
    return figure, figure.subplots(nrows, ncols, squeeze=True, **kwargs)


def _figure_and_axes(ax, width=6.4, height=4.4):
    if ax is None:
        return new_figure(width=width, height=height)
    return ax.figure, ax


def save_figure(figure, path, *, dpi: int = 150) -> str:
    """Write a figure to ``path`` as PNG or SVG (chosen by the extension), atomically; return the path.

    Raises
    ------
    ParameterError
        If the extension is not .png or .svg, or the folder does not exist.
    OutputError
        If the file could not be written (an older file there is intact).
    """
    path = os.fspath(path)
    extension = os.path.splitext(path)[1].lower()
    if extension not in (".png", ".svg"):
        raise ParameterError(f"path must end in .png or .svg, got {path!r}")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise ParameterError(f"cannot write {path!r}: folder {folder!r} does not exist")
    buffer = io.BytesIO()
    figure.savefig(buffer, format=extension[1:], dpi=dpi)
    write_atomically(path, buffer.getvalue(), what="figure", error=OutputError)
    return path


def _angle_scale(angle_unit):
    if angle_unit == "rad":
        return 1.0, "rad"
    if angle_unit == "deg":
        return 180.0 / math.pi, "deg"
    raise ParameterError(f"angle_unit must be 'rad' or 'deg', got {angle_unit!r}")


def _energy_scale(energy_unit, kT):
    if energy_unit == "kJ/mol":
        return 1.0, "kJ/mol"
    if energy_unit == "kBT":
        return 1.0 / kT, _KT_LABEL
    raise ParameterError(f"energy_unit must be 'kJ/mol' or 'kBT', got {energy_unit!r}")


def _axis_labels(names, ndim, angular, angle_unit):
    """Axis label and coordinate scale per axis: periodic (angular) axes get the chosen angle unit."""
    names = tuple(names) if names else ()
    if names and len(names) != ndim:
        raise ParameterError(f"names must give one label per axis ({ndim}), got {names!r}")
    scale, unit = _angle_scale(angle_unit)
    labels, scales = [], []
    for i in range(ndim):
        base = names[i] if names and names[i] else f"CV {i + 1}"
        if angular[i]:
            labels.append(f"{base} ({unit})")
            scales.append(scale)
        else:
            labels.append(base)
            scales.append(1.0)
    return labels, scales


def _surface_data(result):
    """(coordinates per axis, F, error or None, kT, angular per axis, default names) of a result."""
    from .analysis import Profile, Surface

    if isinstance(result, Surface):
        coords, fes = _closed_periodic(result.grid, result.grid.axes, np.asarray(result.free_energy))
        return coords, fes, None, result.kT, [bool(p) for p in result.grid.periodic], ()
    if isinstance(result, Profile):
        return (list(result.centers), np.asarray(result.free_energy), np.asarray(result.error), result.kT,
                [False] * result.ndim, result.names)
    raise ParameterError(f"result must be a Surface (surface_at) or a Profile (free_energy_along), "
                         f"got {type(result).__name__}")


def _sparse_bins(result, min_frames, shape) -> np.ndarray:
    """Bins of a Profile with fewer than ``min_frames`` frames (none for a Surface, of ``shape``)."""
    from .analysis import Profile

    if not isinstance(result, Profile):
        return np.zeros(shape, dtype=bool)
    if isinstance(min_frames, bool) or not isinstance(min_frames, (int, np.integer)) or min_frames < 0:
        raise ParameterError(f"min_frames must be an integer >= 0, got {min_frames!r}")
    return np.isfinite(result.free_energy) & (np.asarray(result.counts) < min_frames)


def _secondary_energy_axis(axis, kT, energy_unit, which):
    """Add an axis in the other energy unit: kBT beside kJ/mol, or kJ/mol beside kBT."""
    if energy_unit == "kJ/mol":
        forward, backward, label = (lambda e: e / kT), (lambda e: e * kT), f"free energy ({_KT_LABEL})"
    else:
        forward, backward, label = (lambda e: e * kT), (lambda e: e / kT), "free energy (kJ/mol)"
    if which == "y":
        extra = axis.secondary_yaxis("right", functions=(forward, backward))
    else:
        extra = axis.secondary_yaxis("left", functions=(forward, backward))
    extra.set_ylabel(label)
    return extra


def plot_free_energy(result, *, ax=None, basins=None, crossings=None, names=(), angular=None,
                     angle_unit: str = "rad", energy_unit: str = "kJ/mol",
                     max_free_energy: float | None = None, level_step=None,
                     min_frames: int = DEFAULT_MIN_FRAMES):
    """Plot a free-energy profile (1-D curve with error band) or surface (2-D filled contours).

    Parameters
    ----------
    result : Surface or Profile
        From ``analysis.surface_at`` / ``surface_series(...)[i]`` or ``analysis.free_energy_along``.
    ax : matplotlib Axes, keyword-only, optional
        Draw here; default a new Figure.
    basins : Basins, keyword-only, optional
        Marked by name at their minimum (or box centre); boxes outlined, catchment borders dotted (2-D).
    crossings : Crossings, keyword-only, optional
        From ``analysis.find_crossings`` on the same grid: saddle points marked with a cross, minimum
        free-energy paths drawn (2-D).
    names : sequence of str, keyword-only
        Axis labels (default the Profile's names, else "CV 1", "CV 2"); give units for non-angular axes.
    angular : sequence of bool, keyword-only, optional
        Which axes are angles (drawn in ``angle_unit``); default a Surface's periodic axes, none for a
        Profile.
    angle_unit : {"rad", "deg"}, keyword-only
        Unit of the angular axes.
    energy_unit : {"kJ/mol", "kBT"}, keyword-only
        Main energy unit; the other one is shown on a second axis.
    max_free_energy : float, keyword-only, optional
        Highest level shown, in ``energy_unit``; default the top of the data, at most 12 kBT (2-D).
    level_step : float, keyword-only, optional
        Spacing of the 2-D contour levels in ``energy_unit``; default 1 kBT.
    min_frames : int, keyword-only
        1-D Profile: bins with fewer frames are drawn as open circles off the curve, and the energy axis is
        scaled to the other bins (a bin of a few frames can sit far above the rest).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.ticker import MaxNLocator

    from .analysis import Surface

    coords, fes, error, kT, periodic, default_names = _surface_data(result)
    ndim = fes.ndim
    if ndim not in (1, 2):
        raise ParameterError(f"only 1-D and 2-D results can be plotted, got {ndim}-D")
    angular = periodic if angular is None else [bool(a) for a in angular]
    if len(angular) != ndim:
        raise ParameterError(f"angular must give one True/False per axis ({ndim}), got {angular!r}")
    labels, scales = _axis_labels(names or default_names, ndim, angular, angle_unit)
    factor, unit = _energy_scale(energy_unit, kT)
    figure, ax = _figure_and_axes(ax, 6.4, 4.4 if ndim == 1 else 5.0)
    if ndim == 1:
        x = np.asarray(coords[0]) * scales[0]
        y = fes * factor
        sparse = _sparse_bins(result, min_frames, fes.shape)
        solid = np.where(sparse, np.nan, y)
        if error is not None:
            band = np.where(sparse, np.nan, error * factor)
            ax.fill_between(x, solid - band, solid + band, color=_SERIES[2], alpha=0.3,
                            linewidth=0, label="± 1 standard error")
        ax.plot(x, solid, color=_INK, linewidth=1.8, label="free energy")
        if sparse.any():
            ax.plot(x[sparse], y[sparse], linestyle="none", marker="o", markersize=4, markerfacecolor="none",
                    markeredgecolor=_INK, alpha=0.6, label=f"bins with fewer than {min_frames} frames")
        ax.set_xlabel(labels[0])
        ax.set_ylabel(f"free energy ({unit})")
        if max_free_energy is not None:
            ax.set_ylim(top=max_free_energy)
        elif sparse.any() and np.isfinite(solid).any():
            # a few frames in a bin give a point far above the rest: scale the axis to the sound bins
            low, high = np.nanmin(solid), np.nanmax(solid + (0 if error is None else np.nan_to_num(band)))
            margin = 0.08 * max(high - low, kT * factor)
            ax.set_ylim(low - margin, high + margin)
        _secondary_energy_axis(ax, kT, energy_unit, "y")
        if error is not None or sparse.any():
            ax.legend(frameon=False, loc="upper center")
        if basins is not None:
            _mark_basins(ax, basins, scales, 1, (np.asarray(coords[0]), y))
        if crossings is not None:
            _mark_crossings(ax, crossings, None, scales, 1, (np.asarray(coords[0]), y))
        return figure
    x, y = (np.asarray(c) * s for c, s in zip(coords, scales, strict=True))
    data = fes * factor
    step = level_step if level_step is not None else kT * factor
    if max_free_energy is None:
        top = max(min(np.nanmax(data), 12.0 * kT * factor), step)
    else:
        top = max_free_energy
    if not (np.isfinite(top) and top > 0 and step > 0):
        raise ParameterError(f"max_free_energy ({top}) and level_step ({step}) must be finite and > 0")
    levels = np.arange(0.0, top + 0.5 * step, step)
    if levels.size < 2:
        levels = np.array([0.0, top])
    masked = np.ma.masked_invalid(data.T)
    if masked.mask.any():  # bins no frame reached: hatched grey with a key, never plain white
        from matplotlib.patches import Patch

        ax.set_facecolor(_NO_DATA)
        ax.patch.set_hatch("////")
        ax.patch.set_edgecolor("white")
        ax.legend(handles=[Patch(facecolor=_NO_DATA, edgecolor="white", hatch="////", label="no frames")],
                  loc="upper right", framealpha=0.9)
    filled = ax.contourf(x, y, masked, levels=levels, cmap=COLOUR_MAP, extend="max")
    ax.contour(x, y, masked, levels=levels, colors=_INK, linewidths=0.35, alpha=0.6)
    colour_bar = figure.colorbar(filled, ax=ax)
    colour_bar.set_ticks(MaxNLocator(7).tick_values(0.0, levels[-1]))
    colour_bar.set_label(f"free energy ({unit})")
    _secondary_energy_axis(colour_bar.ax, kT, energy_unit, "colorbar")
    ax.set_xlabel(labels[0])
    ax.set_ylabel(labels[1])
    if basins is not None:
        same_grid = isinstance(result, Surface) and result.grid == basins.grid
        _mark_basins(ax, basins, scales, 2, shown=(data <= top) if same_grid else None)
    if crossings is not None:
        if not isinstance(result, Surface):
            raise ParameterError("crossings can be drawn on a Surface only (they live on its grid)")
        _mark_crossings(ax, crossings, result.grid, scales, 2)
    return figure


def plot_basin_differences(differences, *, ax=None, energy_unit: str = "kJ/mol",
                           window_fraction: float | None = None):
    """Plot basin free-energy differences against simulated time, with error bars where known.

    Parameters
    ----------
    differences : BasinDifferences or sequence of them
        Several (e.g. from the bias and from reweighted frames) are overlaid.
    ax : matplotlib Axes, keyword-only, optional
    energy_unit : {"kJ/mol", "kBT"}, keyword-only
    window_fraction : float, keyword-only, optional
        Shade the last part of the run that the drift criterion examines.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from .analysis import BasinDifferences

    series = [differences] if isinstance(differences, BasinDifferences) else list(differences)
    if not series or not all(isinstance(s, BasinDifferences) for s in series):
        raise ParameterError("differences must be BasinDifferences or a non-empty sequence of them")
    figure, ax = _figure_and_axes(ax)
    # One colour per difference, one marker and line style per estimator: the two estimates of one
    # difference read as a pair.
    markers = ("o", "s", "^", "D", "v")
    styles = ("-", "--", ":", "-.")
    colours = {}
    for n, result in enumerate(series):
        factor, unit = _energy_scale(energy_unit, result.kT)
        ref = result.names[result.reference]
        for b, name in enumerate(result.names):
            if b == result.reference:
                continue
            label = f"{name} − {ref}"
            colour = colours.setdefault(label, _SERIES[len(colours) % len(_SERIES)])
            y = result.differences[:, b] * factor
            err = None if result.errors is None else result.errors[:, b] * factor
            ax.errorbar(result.times, y, yerr=err, marker=markers[n % len(markers)], markersize=4,
                        linewidth=1.2, linestyle=styles[n % len(styles)], capsize=2, color=colour,
                        markerfacecolor=colour if n == 0 else "white", label=f"{label} ({result.source})")
    ax.axhline(0.0, color=_INK, linewidth=0.6, alpha=0.4)
    if window_fraction is not None:
        times = series[0].times
        start = times[-1] - window_fraction * (times[-1] - times[0])
        ax.axvspan(start, times[-1], color=_ACCENT, alpha=0.08, linewidth=0,
                   label=f"last {100 * window_fraction:.0f}% of the run")
    ax.set_xlabel("simulated time (ps)")
    ax.set_ylabel(f"free-energy difference ({_energy_scale(energy_unit, series[0].kT)[1]})")
    ax.legend(frameon=False)
    return figure


def plot_cv_timeseries(times, cvs, *, ax=None, names=(), angular=None, angle_unit: str = "rad", basins=None):
    """Plot each CV against simulated time, as dots (no lines across periodic jumps).

    Parameters
    ----------
    times : (n,) float, ps
    cvs : (n,) or (n, d) float, CV units
    ax : matplotlib Axes, keyword-only, optional
        All CVs on this one axes; default a new Figure with one panel per CV.
    names : sequence of str, keyword-only
    angular : sequence of bool, keyword-only, optional
        Which CVs are angles (shown in ``angle_unit``); default none, or the periodic axes of ``basins.grid``.
    angle_unit : {"rad", "deg"}, keyword-only
    basins : Basins, keyword-only, optional
        1-D only: the basins' minima or box centres are drawn as horizontal guides.

    Returns
    -------
    matplotlib.figure.Figure
    """
    t = np.asarray(times, dtype=float)
    values = np.asarray(cvs, dtype=float)
    values = values[:, None] if values.ndim == 1 else values
    if values.ndim != 2 or values.shape[0] != t.shape[0]:
        raise ParameterError(
            f"cvs must have shape (n,) or (n, d) with n = {t.shape[0]} frames, got {values.shape}")
    d = values.shape[1]
    if angular is None:
        angular = [bool(p) for p in basins.grid.periodic] if basins is not None else [False] * d
    if len(angular) != d:
        raise ParameterError(f"angular must give one True/False per CV ({d}), got {angular!r}")
    labels, scales = _axis_labels(names, d, angular, angle_unit)
    if ax is None:
        figure, axes = new_figure(d, 1, width=7.0, height=2.2 * d + 0.6, sharex=True)
        axes = np.atleast_1d(axes)
    else:
        figure, axes = ax.figure, [ax] * d
    for i in range(d):
        axes[i].plot(t, values[:, i] * scales[i], linestyle="none", marker=".", markersize=1.5,
                     color=_SERIES[i % len(_SERIES)], label=labels[i])
        axes[i].set_ylabel(labels[i])
        if basins is not None and basins.grid.ndim == d:
            for k, name in enumerate(basins.names):
                level = basins.markers[k][i] * scales[i]
                axes[i].axhline(level, color=_ACCENT, linewidth=0.7, alpha=0.6)
                axes[i].annotate(name, (1.0, level), xycoords=("axes fraction", "data"), xytext=(3, 0),
                                 textcoords="offset points", va="center", color=_ACCENT)
    axes[-1].set_xlabel("simulated time (ps)")
    return figure


def plot_hill_heights(times, heights, *, ax=None, initial_height: float | None = None,
                      max_height_fraction: float | None = None):
    """Plot hill heights against simulated time on a log scale.

    Parameters
    ----------
    times : (n,) float, ps
    heights : (n,) float, kJ/mol
        E.g. ``bias.history.times`` and ``bias.history.heights``.
    ax : matplotlib Axes, keyword-only, optional
    initial_height : float, kJ/mol, keyword-only, optional
        Drawn as a reference line.
    max_height_fraction : float, keyword-only, optional
        With ``initial_height``: the height-decay threshold of the convergence verdict, drawn as a line.

    Returns
    -------
    matplotlib.figure.Figure
    """
    t = np.asarray(times, dtype=float)
    h = np.asarray(heights, dtype=float)
    if t.shape != h.shape or t.ndim != 1:
        raise ParameterError(
            f"times and heights must be 1-D arrays of one length, got {t.shape} and {h.shape}")
    figure, ax = _figure_and_axes(ax, 6.4, 3.6)
    positive = h > 0
    ax.plot(t[positive], h[positive], linestyle="none", marker=".", markersize=2.5, color=_INK, label="hills")
    if initial_height is not None:
        ax.axhline(initial_height, color=_INK, linewidth=0.8, alpha=0.5, linestyle="--",
                   label="initial height")
        if max_height_fraction is not None:
            ax.axhline(max_height_fraction * initial_height, color=_ACCENT, linewidth=1.0,
                       label=f"{100 * max_height_fraction:g}% of the initial height")
    ax.set_yscale("log")
    if initial_height is not None and initial_height > 0:
        ax.set_ylim(top=2.0 * max(initial_height, h[positive].max(initial=initial_height)))
    ax.set_xlabel("simulated time (ps)")
    ax.set_ylabel("hill height (kJ/mol)")
    # heights fall from the top left: the lower left is the one corner the data leaves free
    ax.legend(frameon=False, loc="lower left")
    return figure


def plot_blocking_curve(curve, *, ax=None, unit: str = ""):
    """Plot a blocking curve: the standard error against block size, with its error bars and plateau.

    Parameters
    ----------
    curve : BlockingCurve
    ax : matplotlib Axes, keyword-only, optional
    unit : str, keyword-only
        Unit of the series, for the axis label.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from .analysis import BlockingCurve

    if not isinstance(curve, BlockingCurve):
        raise ParameterError(
            f"curve must be a BlockingCurve (analysis.blocking_curve), got {type(curve).__name__}")
    figure, ax = _figure_and_axes(ax, 6.4, 3.8)
    few = curve.n_blocks < curve.min_blocks
    ax.errorbar(curve.block_sizes[~few], curve.standard_errors[~few], yerr=curve.standard_error_bars[~few],
                marker="o", markersize=4, capsize=2, color=_INK, linestyle="-", linewidth=1.0,
                label="standard error of the mean")
    if few.any():
        ax.errorbar(curve.block_sizes[few], curve.standard_errors[few], yerr=curve.standard_error_bars[few],
                    marker="o", markersize=4, capsize=2, color=_INK, alpha=0.35, linestyle="none",
                    label=f"fewer than {curve.min_blocks} blocks")
    if curve.plateau_found:
        level = curve.plateau_level
        ax.axhline(curve.standard_error, color=_ACCENT, linewidth=1.0, linestyle="--",
                   label=f"plateau: {curve.standard_error:.3g}")
        ax.plot(curve.block_sizes[level], curve.standard_errors[level], marker="o", markersize=9,
                markerfacecolor="none", markeredgecolor=_ACCENT, markeredgewidth=1.5)
    else:
        ax.text(0.02, 0.95, "no plateau: the series is too short for a reliable error",
                transform=ax.transAxes, va="top", color=_ACCENT)
    ax.set_xscale("log", base=2)
    ax.set_xlabel("block size (frames)")
    ax.set_ylabel(f"standard error{f' ({unit})' if unit else ''}")
    ax.legend(frameon=False, loc="lower right")
    return figure


def plot_crossing_profile(crossing, *, ax=None, kT: float | None = None, energy_unit: str = "kJ/mol"):
    """Plot the free energy along the minimum free-energy path of one crossing, with error bars.

    Parameters
    ----------
    crossing : Crossing
        One element of ``analysis.find_crossings(...)``.
    ax : matplotlib Axes, keyword-only, optional
    kT : float, kJ/mol, keyword-only
        Needed for the second energy axis (``Crossings.kT``).
    energy_unit : {"kJ/mol", "kBT"}, keyword-only

    Returns
    -------
    matplotlib.figure.Figure
        The surface along the path (line), the reweighted frames with one standard error (points and
        bars, where frames were given), the saddle point (dashed line) and the barrier from each side.
    """
    from .analysis import Crossing

    if not isinstance(crossing, Crossing):
        raise ParameterError(f"crossing must be a Crossing (analysis.find_crossings), got "
                             f"{type(crossing).__name__}")
    if kT is None or not (math.isfinite(kT) and kT > 0):
        raise ParameterError(f"kT must be given as a number > 0 (kJ/mol; Crossings.kT), got {kT!r}")
    factor, unit = _energy_scale(energy_unit, kT)
    figure, ax = _figure_and_axes(ax, 6.4, 4.0)
    x = np.asarray(crossing.path_progress)
    ax.plot(x, crossing.path_free_energy * factor, color=_INK, linewidth=1.8, label="surface along the path")
    if np.isfinite(crossing.path_errors).any():
        ok = np.isfinite(crossing.path_reweighted)
        ax.errorbar(x[ok], crossing.path_reweighted[ok] * factor, yerr=crossing.path_errors[ok] * factor,
                    marker="o", markersize=3, linestyle="none", capsize=2, color=_SERIES[2], alpha=0.8,
                    label="reweighted frames ± 1 standard error")
    top = crossing.barriers[0]  # the saddle, relative to the minimum of a
    at = x[int(np.argmax(np.all(np.isclose(crossing.path, crossing.saddle), axis=1)))]
    ax.axvline(at, color=_ACCENT, linewidth=1.0, linestyle="--", label="saddle point")
    a, b = crossing.basins
    # basin names just above the path's ends, inside the axes (below them they would sit on the axis line)
    ax.annotate(a, (0.0, 0.0), xytext=(2, 9), textcoords="offset points", ha="left", color=_ACCENT,
                fontweight="bold")
    ax.annotate(b, (1.0, (top - crossing.barriers[1]) * factor), xytext=(-2, 9), textcoords="offset points",
                ha="right", color=_ACCENT, fontweight="bold")
    ax.set_title(f"{a} - {b}: barrier {crossing.barriers[0] * factor:.3g} {unit} from {a}, "
                 f"{crossing.barriers[1] * factor:.3g} from {b}", loc="left", fontsize="medium")
    ax.set_xlabel(f"progress along the minimum free-energy path ({a} = 0, {b} = 1)")
    ax.set_ylabel(f"free energy relative to {a} ({unit})")
    ax.set_xlim(-0.04, 1.04)
    _secondary_energy_axis(ax, kT, energy_unit, "y")
    ax.legend(frameon=True, framealpha=0.85, edgecolor="none", loc="best", fontsize="small")
    return figure
