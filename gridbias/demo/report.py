"""The demo's report: surface, basins, free-energy differences with errors, verdict, figures and text.

A client of the library like any user script: it opens the run with gridbias.runs, analyses it with
gridbias.analysis and writes its files with gridbias.exports.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import replace

import numpy as np

from ..progress import REBUILDING, REWEIGHTING
from .settings import (
    BARRIERS,
    CHECKPOINT,
    CONFORMERS,
    CONVERGENCE,
    FRAMES,
    PSI_COMPARISON,
    PSI_PROFILE,
    REPORT,
    START,
    SUBFOLDERS,
    SURFACE,
)

__all__ = ["analyse", "COMPARE_BELOW_KT", "COMPARE_MIN_FRAMES"]


#: The first caution, by mode: what the CVs of that run can and cannot capture.
_CV_CAUTION = {
    "2d": "- The CVs. phi and psi describe this molecule's slow conformational motions in vacuum well; in "
          "other systems a slow motion left out of the CVs shows up as hysteresis, overfilling and "
          "differences that drift instead of settling.",
    "reweight": "- The CV. Only phi is biased; F(psi) comes from reweighting, which is sound only while psi "
                "crosses its own barriers often in the unbiased dynamics (the comparison with the 2d run "
                "checks that here). In other systems a slow motion left out of the CVs shows up as "
                "hysteresis, overfilling and differences that drift instead of settling.",
}

_CAUTIONS = (
    "What these numbers depend on:",
    "- Convergence. The verdict's criteria are necessary, not sufficient: repeat the run with other seeds, "
    "hill widths and bias factors before trusting a number.",
    "- Sampling time. The error bars are block-analysis errors of one run; they assume the run is long "
    "compared with the time between transitions, and they shrink only as the run grows.",
    "- The force field. amber14 (ff14SB) in vacuum, a force field fitted for use with water: these are free "
    "energies of the model molecule in vacuum, not of the dipeptide in solution.",
    "Results need validation before they are relied on.",
)


def _conformers_in(basins) -> list:
    """For each basin, the named conformers whose (phi[, psi]) lies in its catchment."""
    d = basins.grid.ndim
    points = np.radians([ref[:d] for ref in CONFORMERS.values()])
    where = basins.assign(points)
    return [[name for name, b in zip(CONFORMERS, where, strict=True) if b == k]
            for k in range(basins.n_basins)]


def _basin_of(conformers, name) -> int | None:
    for k, names in enumerate(conformers):
        if name in names:
            return k
    return None


def _pm(value, error, kT) -> str:
    if not np.isfinite(value):
        return "not visited"
    if error is None or not np.isfinite(error):
        return f"{value:6.2f} kJ/mol ({value / kT:5.2f} kBT)"
    return f"{value:6.2f} +/- {error:4.2f} kJ/mol ({value / kT:5.2f} +/- {error / kT:4.2f} kBT)"


def _psi_from_surface(folder_2d, edges, kT):
    """F(psi) from the 2d run's final surface, averaged into the given psi bins; None without that run."""
    from .. import analysis
    from ..runs import load_run

    path = os.path.join(folder_2d, CHECKPOINT)
    if not os.path.exists(path):
        return None, path
    run = load_run(path)
    fes = analysis.surface_at(run.bias).free_energy  # (phi, psi) nodes
    grid = run.bias.grid
    # marginal over phi (periodic: every node counts fully), then the Boltzmann average over the psi nodes in
    # each bin: F_bin = -kT ln mean_{nodes in bin} exp(-F(psi)/kT)
    f_psi = -kT * np.log(np.exp(-(fes - fes.min()) / kT).sum(axis=0))
    psi = grid.axes[1]
    bins = np.searchsorted(edges, psi, side="right") - 1
    out = np.full(edges.size - 1, np.nan)
    for j in range(edges.size - 1):
        inside = bins == j
        if inside.any():
            out[j] = -kT * np.log(np.mean(np.exp(-f_psi[inside] / kT)))
    return out - np.nanmin(out), path


#: Bins compared between the reweighted F(psi) and the 2d run's: below this free energy in the 2d run (the
#: threshold of the analytic reweighting checks) and visited by at least this many frames of the phi-only
#: run. psi is not biased there, so its barrier region is visited only a handful of times in 10 ns and
#: those bins are noise, not a test of the method.
COMPARE_BELOW_KT = 8.0
COMPARE_MIN_FRAMES = 20


def _compare_profiles(reweighted, counts, reference, kT):
    """Compare the reweighted profile with the reference on the same bins (see COMPARE_BELOW_KT).

    Their zeros are arbitrary, so the reference is first shifted by the Boltzmann-weighted (weights
    exp(-F_ref/kT)) mean difference over the compared bins. Returns (shift, rmsd, max |difference|, bins
    compared), kJ/mol.
    """
    keep = (np.isfinite(reweighted) & np.isfinite(reference) & (reference < COMPARE_BELOW_KT * kT)
            & (counts >= COMPARE_MIN_FRAMES))
    if keep.sum() < 3:
        return 0.0, math.nan, math.nan, int(keep.sum())
    w = np.exp(-reference[keep] / kT)
    diff = reweighted[keep] - reference[keep]
    shift = float(np.sum(w * diff) / np.sum(w))
    diff = diff - shift
    return shift, float(np.sqrt(np.mean(diff ** 2))), float(np.max(np.abs(diff))), int(keep.sum())


_MAX_DOTS = 5000  # frames drawn per CV panel: more only blacken the panel


def _convergence_figure(plots, differences, bias, t, cvs, names, window_fraction, max_height_fraction):
    """Basin differences against time, hill heights, and each biased CV along the run, one panel each."""
    d = cvs.shape[1]
    figure, axes = plots.new_figure(2 + d, 1, width=7.0, height=6.4 + 2.0 * d)
    plots.plot_basin_differences(differences, ax=axes[0], window_fraction=window_fraction)
    # The first hills make the estimates jump; scale the axis to the rest of the run.
    late = np.concatenate([s.differences[s.times >= 0.1 * s.times[-1]].ravel() for s in differences])
    late = late[np.isfinite(late)]
    if late.size:
        margin = max(0.15 * (late.max() - late.min()), bias.kT)
        low, high = min(late.min(), 0.0) - margin, late.max() + 3 * margin
        axes[0].set_ylim(low, high)
        # estimates beyond the scale are not dropped: each is marked at the edge it crosses, and counted
        n_off = 0
        for series in differences:
            for column in series.differences.T:
                for mask, edge, marker in ((column > high, high, "^"), (column < low, low, "v")):
                    if mask.any():
                        n_off += int(mask.sum())
                        axes[0].plot(series.times[mask], np.full(int(mask.sum()), edge), linestyle="none",
                                     marker=marker, markersize=6, color="#b5532b", clip_on=False)
        if n_off:
            axes[0].text(0.01, 0.03, f"{n_off} early estimate{'s' if n_off > 1 else ''} off this scale "
                         "(marked at the edge)", transform=axes[0].transAxes, fontsize="small", color="#b5532b")
    axes[0].legend(frameon=False, ncols=2, loc="upper right", fontsize="small")
    axes[0].set_title("basin free-energy differences (the bias estimate, and reweighted frames with errors)",
                      loc="left", fontsize="medium")
    times, heights = np.asarray(bias.history.times), np.asarray(bias.history.heights)
    step = max(1, times.size // _MAX_DOTS)
    plots.plot_hill_heights(times[::step], heights[::step], ax=axes[1], initial_height=bias.height,
                            max_height_fraction=max_height_fraction)
    axes[1].legend(frameon=True, framealpha=1.0, edgecolor="none", loc="lower left", fontsize="small")
    axes[1].set_title("hill heights" + (f" (every {step}th hill)" if step > 1 else ""), loc="left",
                      fontsize="medium")
    every = max(1, t.size // _MAX_DOTS)
    for i in range(d):
        plots.plot_cv_timeseries(t[::every], cvs[::every, i], ax=axes[2 + i], names=[names[i]],
                                 angular=[True], angle_unit="deg")
        axes[2 + i].set_ylim(-180, 180)
        axes[2 + i].set_yticks([-180, -90, 0, 90, 180])
    axes[2].set_title("biased CVs along the run" + (f" (every {every}th frame)" if every > 1 else ""),
                      loc="left", fontsize="medium")
    return figure


def analyse(folder, settings, info, progress):
    """Surface, basins, differences with errors, verdict, figures and the report; returns (text, files)."""
    from .. import analysis
    from ..analysis.convergence import DEFAULT_MAX_HEIGHT_FRACTION, DEFAULT_N_POINTS, DEFAULT_WINDOW_FRACTION
    from ..exports import profile_bytes, require_plots, shown_profile, surface_bytes, write_file
    from ..runs import load_run, read_log, run_frames
    from .dipeptide import TIMESTEP

    started = time.monotonic()
    run = load_run(os.path.join(folder, CHECKPOINT))
    bias = run.bias
    kT = bias.kT
    log = read_log(os.path.join(folder, FRAMES))
    t, cvs, logged_bias, _ = run_frames(run, log)
    surface = analysis.surface_at(bias)
    basins = analysis.find_basins(bias.grid, surface.free_energy, kT, min_depth_kT=settings.min_depth_kT)
    conformers = _conformers_in(basins)
    # Name each basin after the conformers in its catchment (e.g. "C7eq", or "C7eq/C5" along phi alone).
    named = tuple("/".join(held) or name for held, name in zip(conformers, basins.names, strict=True))
    basins = replace(basins, names=named)
    reference = _basin_of(conformers, "C7eq")
    reference = 0 if reference is None else reference
    weights = analysis.offset_weights(bias, t, frame_bias=logged_bias,
                                      progress=progress.counter(REWEIGHTING, "moments"))
    from_bias = analysis.basin_differences_from_bias(bias, basins, n_points=DEFAULT_N_POINTS, reference=reference,
                                                     progress=progress.counter(REBUILDING, "moments"))
    from_frames = analysis.basin_differences_from_frames(weights, t, cvs, basins, n_points=20,
                                                         reference=reference)
    verdict = analysis.assess_convergence(bias, basins, frame_times=t, frame_cvs=cvs, weights=weights,
                                          differences=from_bias)
    crossings = analysis.find_crossings(bias.grid, surface.free_energy, kT, basins, weights=weights,
                                        frame_cvs=cvs, names=run.names)
    plots = require_plots()
    files = []

    def put(name, data):
        path = os.path.join(folder, name)
        write_file(path, data)
        files.append(path)

    for name in SURFACE:
        put(name, surface_bytes(surface, name.rsplit(".", 1)[1], names=run.names, units=run.units,
                                angle_unit="deg", basins=basins, crossings=crossings))
    if len(crossings):
        put(BARRIERS, _figure_png(_barriers_figure(plots, crossings)))
    put(CONVERGENCE, _figure_png(_convergence_figure(plots, [from_bias, from_frames], bias, t, cvs, run.names,
                                                     DEFAULT_WINDOW_FRACTION, DEFAULT_MAX_HEIGHT_FRACTION)))
    psi_lines = []
    if settings.mode == "reweight":
        psi = np.asarray(log.column("psi"))[: t.size]
        edges = np.linspace(-math.pi, math.pi, settings.bins // 2 + 1)  # two 2d-grid nodes per bin
        profile = analysis.free_energy_along(weights, psi, edges, names=("psi",))
        for name in PSI_PROFILE:
            put(name, profile_bytes(profile, name.rsplit(".", 1)[1], units=("rad",), angle_unit="deg"))
        reference_psi, path_2d = _psi_from_surface(os.path.join(os.path.dirname(folder), SUBFOLDERS["2d"]),
                                                   edges, kT)
        figure, ax = plots.new_figure()
        plots.plot_free_energy(shown_profile(profile, ("rad",), "deg"), ax=ax)
        sparse = np.isfinite(profile.free_energy) & (profile.counts < COMPARE_MIN_FRAMES)
        if sparse.any():
            ax.plot(np.degrees(profile.centers[0][sparse]), profile.free_energy[sparse], linestyle="none",
                    marker="o", markersize=6, markerfacecolor="white", markeredgecolor="#1d2b36",
                    label=f"bins with fewer than {COMPARE_MIN_FRAMES} frames")
        if reference_psi is not None:
            shift, rmsd, worst, n = _compare_profiles(profile.free_energy, profile.counts, reference_psi, kT)
            ax.plot(np.degrees(profile.centers[0]), reference_psi + shift, color="#b5532b", linestyle="--",
                    linewidth=1.5, label="from the 2d run's surface")
            psi_lines.append(f"compared with the 2d run ({path_2d}): over the {n} psi bins below "
                             f"{COMPARE_BELOW_KT:g} kBT there and visited at least {COMPARE_MIN_FRAMES} "
                             f"times here, the two profiles differ by {rmsd:.2f} kJ/mol rms "
                             f"({rmsd / kT:.2f} kBT), {worst:.2f} kJ/mol at most (after aligning their zero)")
            psi_lines.append("psi was not biased in this run: its barrier region (psi near -120 deg) is "
                             "visited rarely, so F(psi) there is noisy and its error bars are unreliable")
        else:
            psi_lines.append(f"no 2d run to compare with ({path_2d} is missing): run 'gridbias demo' with "
                             "the same --out first")
        ax.legend(frameon=False, loc="upper center")
        ax.set_title("free energy along psi, recovered by reweighting (psi was not biased)", loc="left",
                     fontsize="medium")
        put(PSI_COMPARISON, _figure_png(figure))
        finite = np.isfinite(profile.free_energy)
        errors = profile.error[finite & np.isfinite(profile.error)]
        spread = f"median error {np.median(errors):.2f} kJ/mol" if errors.size else "no error estimate yet"
        psi_lines.insert(0, f"F(psi) by reweighting the {t.size:,} logged frames ({weights.summary()}); "
                            f"{spread}, {finite.sum()} of {finite.size} bins reached")
    text = _report_text(settings, run, info, basins, conformers, surface, from_bias, from_frames, verdict,
                        psi_lines, files, t.size, TIMESTEP, time.monotonic() - started, crossings)
    put(REPORT, (text + "\n").encode("utf-8"))
    return text, tuple(files)


def _barriers_figure(plots, crossings):
    """The free energy along each minimum free-energy path, one panel per crossing."""
    figure, axes = plots.new_figure(len(crossings), 1, width=6.4, height=3.4 * len(crossings))
    for ax, crossing in zip(np.atleast_1d(axes), crossings, strict=True):
        plots.plot_crossing_profile(crossing, ax=ax, kT=crossings.kT)
    return figure


def _figure_png(figure) -> bytes:
    from ..exports import figure_bytes

    return figure_bytes(figure, "png")


def _report_text(settings, run, info, basins, conformers, surface, from_bias, from_frames, verdict, psi_lines,
                 files, n_frames, timestep, analysis_seconds, crossings) -> str:
    from ..progress import format_duration

    bias = run.bias
    kT = bias.kT
    ns = run.step * timestep / 1000.0
    biased = " and ".join(settings.biased)
    lines = [f"gridbias demo report: alanine dipeptide in vacuum, well-tempered metadynamics on {biased}", ""]
    lines.append(f"run          {ns:g} ns ({run.step:,} steps of {timestep * 1000:g} fs), "
                 f"{settings.temperature:g} K, Langevin (1/ps), amber14 (ff14SB), no cutoff, H-bond "
                 "constraints")
    lines.append(f"bias         initial hill height {settings.height:g} kJ/mol every {settings.stride} steps "
                 f"({settings.stride * timestep:g} ps), width {math.degrees(settings.sigma):.1f} deg, "
                 f"bias factor {settings.bias_factor:g}, grid {' x '.join([str(settings.bins)] * bias.ndim)} "
                 f"({360 / settings.bins:g} deg)")
    rate = info.get("steps_per_second", math.nan)
    session = (f"; this session {rate:,.0f} steps/s ({rate * timestep * 86400 / 1000:,.0f} ns/day), "
               f"{format_duration(info.get('wall_seconds', math.nan))}" if np.isfinite(rate) else "")
    lines.append(f"platform     {info.get('platform') or run.platform}{session}; analysis "
                 f"{format_duration(analysis_seconds)}")
    heights = np.asarray(bias.history.heights)
    recent = heights[-10:].mean()
    lines.append(f"hills        {bias.n_hills:,}; the last 10 average {recent:.3g} kJ/mol "
                 f"({100 * recent / bias.height:.2g}% of the initial); {n_frames:,} frames logged")
    if info.get("decision"):
        lines.append(f"stop         {info['decision']}")
    lines.append("")
    lines.append("basins: catchment regions of the minima of the final surface (each node belongs to the "
                 "minimum it flows down to); F_basin = -kBT ln of the Boltzmann sum over its nodes")
    ref = from_frames.reference
    head = "".join(f"{n + ' (deg)':>12}" for n in run.names)
    lines.append(f"  basin     {head}   F from the bias   F from reweighted frames (relative to "
                 f"{basins.names[ref]})")
    for k, name in enumerate(basins.names):
        where = "".join(f"{math.degrees(x):>12.1f}" for x in basins.markers[k])
        f_bias = from_bias.differences[-1, k]
        rw = ("0 (reference)" if k == ref
              else _pm(from_frames.differences[-1, k], from_frames.errors[-1, k], kT))
        lines.append(f"  {name:<9} {where}   {f_bias:8.2f} kJ/mol   {rw}")
    lines.append("  (basins are named after the conformers whose minima (CONFORMERS in gridbias/demo/settings.py) "
                 "lie in their catchment)")
    lines.append(f"  (a minimum counts as a basin only if it lies at least {settings.min_depth_kT:g} kBT below the "
                 "lowest saddle to a deeper one (--min-depth); a shallower one merges into that neighbour, so "
                 "the set of basins can change as a run grows)")
    merged = [held for held in conformers if len(held) > 1]
    if merged:
        lines.append("  (here " + "; ".join(f"{' and '.join(held[1:])} merged into {held[0]}" for held in merged)
                     + ": its free energy counts in that basin. Compare runs basin by basin under the same "
                       "names, or rerun the analysis with a smaller --min-depth to separate them)")
    axial, equatorial = _basin_of(conformers, "C7ax"), _basin_of(conformers, "C7eq")
    lines.append("")
    if axial is not None and equatorial is not None and axial != equatorial:
        k = axial
        label = f"{basins.names[k]} - {basins.names[ref]}:"
        lines.append(f"{label} {_pm(from_frames.differences[-1, k], from_frames.errors[-1, k], kT)} from "
                     "reweighted frames;")
        lines.append(f"{'':{len(label)}} {from_bias.differences[-1, k]:.2f} kJ/mol from the final bias "
                     "(no error bar of its own)")
        if not from_frames.plateau_found[-1, k]:
            lines.append(f"{'':{len(label)}} (the blocking curve had no plateau: the error is a lower bound)")
    else:
        lines.append("C7ax - C7eq: not available yet: C7eq and C7ax are not in two different basins of this "
                     "surface (too little sampling)")
    lines.append("errors: one standard error from block analysis of the reweighted frames (Flyvbjerg & "
                 "Petersen 1989); weights with the time-independent offset c(t) (Tiwary & Parrinello 2015)")
    lines.append("")
    lines.append(crossings.table(format_point=lambda p: "(" + ", ".join(
        f"{name} {math.degrees(x):.1f} deg" for name, x in zip(run.names, p, strict=True)) + ")"))
    lines.append("  (the minimum free-energy paths are drawn on surface.png and as profiles in barriers.png)")
    if psi_lines:
        lines.append("")
        lines.extend(psi_lines)
    lines.append("")
    lines.append(verdict.render())
    lines.append("")
    lines.extend([_CAUTIONS[0], _CV_CAUTION[settings.mode], *_CAUTIONS[1:]])
    lines.append("")
    folder = os.path.dirname(files[0])
    lines.append(f"files in {folder}: " + ", ".join(os.path.basename(f) for f in files)
                 + f", {REPORT}, {CHECKPOINT} (checkpoint), {FRAMES} (CV log), {START} (starting structure)")
    checkpoint, frames = os.path.join(folder, CHECKPOINT), os.path.join(folder, FRAMES)
    lines.append(f"look further: gridbias inspect {checkpoint} --log {frames}")
    lines.append(f"              gridbias reweight {checkpoint} {frames} --along psi")
    return "\n".join(lines)
