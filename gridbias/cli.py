"""The ``gridbias`` command (also ``python -m gridbias``): parse the arguments, call the library, print.

Subcommands:

- ``demo``: well-tempered metadynamics of a dipeptide in vacuum, with a report (gridbias.demo.run).
- ``inspect``: summarise a checkpoint: grid, CVs, hills, simulated time, height decay, basins, saddle
  points and barriers, verdict.
- ``export``: write the free-energy surface of a checkpoint as CSV, NumPy .npz, PNG, SVG or PDF.
- ``reweight``: the free energy along chosen columns of a CV log, reweighted to the unbiased ensemble.
- ``advise``: metadynamics parameters from a short unbiased run (CV log, CSV or .npy), with reasons.

Exit codes: 0 success; 1 the work itself failed or was interrupted (the simulation blew up, a disk filled,
another run holds the checkpoint, Ctrl-C); 2 bad usage or bad input (unknown option, missing or
unreadable file, a file of the wrong kind, an unknown column, a value out of range). Every error is one
line on stderr; ``--traceback`` adds the Python traceback for bug reports.

Units are OpenMM's: kJ/mol, nm, rad, ps, K. Angles are shown in degrees unless ``--angle-unit rad``.

This module only parses, calls the library (gridbias.runs, gridbias.analysis, gridbias.exports,
gridbias.demo) and prints; nothing in the package imports it except ``gridbias.__main__``.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import traceback
from dataclasses import replace

import numpy as np

from ._advise_command import add_advise_command
from ._cli_options import (
    _UNITS,
    _UNITS_NOTE,
    EXIT_BAD_INPUT,
    EXIT_FAILED,
    EXIT_OK,
    MAX_BINS,
    MAX_BINS_TOTAL,
    MAX_LENGTH_NS,
    MAX_POINTS,
    MAX_SEED,
    CommandError,
    _add_angle_unit,
    _add_frames,
    _burn_in,
    _check_outputs,
    _count,
    _count_upto,
    _finite,
    _Formatter,
    _fraction,
    _min_depth,
    _names,
    _option_type,
    _Parser,
    _positive,
    _UsageError,
)
from .analysis.reweighting import DEFAULT_BURN_IN_FRACTION
from .exports import (
    FIGURE_FORMATS,
    SURFACE_NPZ_KEYS,
    TABLE_FORMATS,
    CVDisplay,
    profile_bytes,
    surface_bytes,
    write_files,
)
from .frame_values import read_frame_values
from .progress import REBUILDING, REWEIGHTING, ProgressLine
from .runs import load_run, log_column, read_log, run_frames

__all__ = ["main", "build_parser", "CommandError"]


#: Bins of a reweighted profile with fewer frames than this are flagged: a handful of visits gives
#: neither a value nor an error bar to trust (common practice, no source).
FEW_FRAMES = 20


# -------------------------------------------------------------------------------------------- display
def _fmt(x, digits=4) -> str:
    return "nan" if not np.isfinite(x) else f"{x:.{digits}g}"


# ------------------------------------------------------------------------------------------------ inspect
def _cmd_inspect(args) -> int:
    from . import analysis

    run = load_run(args.checkpoint)
    bias = run.bias
    frames, notes = None, []
    if args.log is not None:
        log = read_log(args.log)
        t, cvs, logged_bias, note = run_frames(run, log, args.columns, args.time_column)
        frames = (t, cvs, logged_bias)
        notes += [note] if note else []
        if not any(run.units):  # a bare bias checkpoint: the log knows the CVs' units
            run = replace(run, units=tuple(log.unit(c) for c in (args.columns or run.names)))
    show = CVDisplay(run.names, run.units, args.angle_unit)
    out = []
    add = out.append
    add(f"checkpoint   {run.path}")
    if run.step is not None:
        platform = f", written on the {run.platform} platform" if run.platform else ""
        add(f"contents     {run.source} (step {run.step:,}, {_fmt(run.time, 8)} ps simulated{platform})")
    else:
        last = f", last hill at {_fmt(run.time, 8)} ps" if np.isfinite(run.time) else ""
        add(f"contents     {run.source} (no MD state{last})")
    if bias.bias_factor is None:
        add(f"method       standard metadynamics, {bias.temperature:g} K (kBT = {bias.kT:.4g} kJ/mol)")
    else:
        add(f"method       well-tempered metadynamics, bias factor {bias.bias_factor:g}, "
            f"{bias.temperature:g} K (kBT = {bias.kT:.4g} kJ/mol)")
    grid = bias.grid
    for i in range(bias.ndim):
        head = "CVs" if i == 0 else ""
        definition = f"{run.definitions[i]}, " if run.definitions[i] else ""
        unit = run.units[i] or "units not recorded"
        add(f"{head:<12} {run.names[i]}: {definition}{unit}")
    for i in range(bias.ndim):
        head = "grid" if i == 0 else ""
        kind = "periodic" if grid.periodic[i] else "not periodic"
        add(f"{head:<12} {run.names[i]}: {show.value(i, grid.lower[i])} .. {show.value(i, grid.upper[i])}"
            f"{show.suffix(i)}, {int(grid.bins[i])} bins of {show.value(i, grid.spacing[i])}, {kind}")
    widths = ", ".join(f"{run.names[i]} {show.value(i, bias.sigma[i])}{show.suffix(i)}"
                       for i in range(bias.ndim))
    add(f"hills        {bias.n_hills:,} deposited ({bias.n_outside} outside the grid); widths {widths}")
    heights = np.asarray(bias.history.heights)
    times = np.asarray(bias.history.times)
    if heights.size:
        recent = heights[-10:].mean()
        decay = ""
        if bias.bias_factor is not None:
            decay = (f"; the last {min(10, heights.size)} average {recent:.4g} kJ/mol "
                     f"({100 * recent / bias.height:.3g}% of the initial)")
        add(f"height       initial {bias.height:g} kJ/mol{decay}")
        if np.isfinite(times).all():
            add(f"deposits     from {times[0]:g} to {times[-1]:g} ps")
    else:
        add(f"height       {bias.height:g} kJ/mol (no hills yet)")
    if bias.walls:
        for k, w in enumerate(bias.walls):
            head = "walls" if k == 0 else ""
            op = ">" if w.side == "above" else "<"
            add(f"{head:<12} {run.names[w.cv]} {op} {show.value(w.cv, w.bound)}{show.suffix(w.cv)}: "
                f"{w.k:g} kJ/mol per {run.units[w.cv] or 'unit'}^{w.power:g}")
    else:
        add("walls        none")
    if bias.n_hills == 0:
        add("")
        add("No hills yet: there is no surface, no basin and no verdict to report.")
        print("\n".join(out))
        return EXIT_OK

    surface = analysis.surface_at(bias)
    basins = analysis.find_basins(grid, surface.free_energy, bias.kT, min_depth_kT=args.min_depth)
    f_b = analysis.basin_free_energies(basins, surface.free_energy, bias.kT)
    add("")
    add(f"basins on the final surface (catchments of minima at least {args.min_depth:g} kBT deep):")
    cols = "".join(f"{show.label(i):>14}" for i in range(bias.ndim))
    add(f"  name{cols}{'F (kJ/mol)':>13}{'F (kBT)':>10}{'depth (kBT)':>13}")
    for b, name in enumerate(basins.names):
        pos = "".join(f"{show.value(i, basins.markers[b, i]):>14}" for i in range(bias.ndim))
        depth = basins.depths[b] / bias.kT
        add(f"  {name:<4}{pos}{f_b[b]:>13.3f}{f_b[b] / bias.kT:>10.3f}{_fmt(depth, 4):>13}")

    progress = ProgressLine()
    differences = analysis.basin_differences_from_bias(bias, basins, n_points=args.points,
                                                        progress=progress.counter(REBUILDING, "moments"))
    if basins.n_basins > 1:
        add("")
        add(differences.table())
    weights = None
    if frames is not None and basins.n_basins > 1:
        t, cvs, logged_bias = frames
        kwargs = {"frame_bias": logged_bias} if logged_bias is not None else {"frame_cvs": cvs}
        weights = analysis.offset_weights(bias, t, progress=progress.counter(REWEIGHTING, "moments"),
                                          **kwargs)
        reweighted = analysis.basin_differences_from_frames(weights, t, cvs, basins, times=[t[-1]])
        add("")
        add(reweighted.table())
        add(f"  ({weights.summary()})")
    elif basins.n_basins > 1:
        add("  (no error bars from the bias alone: add --log with the run's CV log for reweighted "
            "differences with block-analysis errors)")
    if basins.n_basins > 1:
        with_frames = {} if weights is None else {"weights": weights, "frame_cvs": frames[1]}
        crossings = analysis.find_crossings(grid, surface.free_energy, bias.kT, basins, names=run.names,
                                            **with_frames)
        add("")
        add(crossings.table(format_point=lambda p: "(" + ", ".join(
            f"{run.names[i]} {show.value(i, p[i])}{show.suffix(i)}" for i in range(bias.ndim)) + ")"))
    verdict = analysis.assess_convergence(
        bias, basins, frame_times=None if frames is None else frames[0],
        frame_cvs=None if frames is None else frames[1], weights=weights, differences=differences,
        window_fraction=args.window, tolerance_kT=args.drift, min_transitions=args.transitions,
        max_height_fraction=args.max_height)
    add("")
    add(verdict.render())
    for note in notes:
        add(f"  note: {note}")
    print("\n".join(out))
    return EXIT_OK


# ------------------------------------------------------------------------------------------------ export
def _cmd_export(args) -> int:
    from . import analysis

    outputs = _check_outputs(args.outputs, TABLE_FORMATS + FIGURE_FORMATS, "output", [args.checkpoint])
    run = load_run(args.checkpoint)
    bias = run.bias
    if bias.n_hills == 0:
        raise CommandError(f"checkpoint {run.path!r} holds no hills yet: its free-energy surface is flat "
                           "zero")
    if args.time is not None:
        end = run.time if np.isfinite(run.time) else float(bias.history.times[-1])
        if np.isfinite(end) and args.time > end:
            raise CommandError(f"--time {args.time:g} ps is after the end of the run ({end:g} ps in "
                               f"{run.path!r}): give a time up to {end:g} ps")
        surface = analysis.surface_at(bias, time=args.time)
        if surface.n_hills == 0:
            first = float(bias.history.times[0])
            raise CommandError(f"--time {args.time:g} ps is before the first hill ({first:g} ps): there is "
                               "no surface yet at that time")
    elif args.hills is not None:
        if not 0 < args.hills <= bias.n_hills:
            raise CommandError(f"--hills must be 1..{bias.n_hills} (the hills in the checkpoint), got "
                               f"{args.hills}")
        surface = analysis.surface_at(bias, n_hills=args.hills)
    else:
        surface = analysis.surface_at(bias)
    basins = None
    if any(fmt in FIGURE_FORMATS for _, fmt in outputs):
        basins = analysis.find_basins(bias.grid, surface.free_energy, bias.kT)
    write_files([(path, surface_bytes(surface, fmt, names=run.names, units=run.units, angle_unit=args.angle_unit,
                                      basins=basins)) for path, fmt in outputs])  # all or none
    for path, _ in outputs:
        print(f"wrote {path}")
    what = f"{surface.n_hills:,} hills" + (f", t = {surface.time:g} ps" if np.isfinite(surface.time) else "")
    print(f"free-energy surface of {run.path} ({what}), kJ/mol, minimum 0")
    return EXIT_OK


# ---------------------------------------------------------------------------------------------- reweight
def _dihedral_columns(log, run) -> set:
    """Log columns known to hold a dihedral (-pi..pi): biased dihedral CVs, and observables the log's
    metadata describes as dihedrals."""
    meta = log.metadata if isinstance(log.metadata, dict) else {}
    found = set()
    for name, spec in zip(run.names, meta.get("cvs") or [], strict=False):  # a log may describe none
        if isinstance(spec, dict) and spec.get("kind") == "dihedral":
            found.add(name)
    for spec in meta.get("observables") or []:
        if isinstance(spec, dict) and spec.get("kind") == "dihedral":
            found.add(spec.get("name"))
    return found


def _edges(values, column, dihedral, bins, given, show_scale):
    """Bin edges (column units) for one column: the range given (shown unit), a full turn for a dihedral,
    else the data's range."""
    if given is not None:
        low, high = (x / show_scale for x in given)
        if not high > low:
            raise CommandError(f"--range for column {column!r}: the upper end ({given[1]}) must exceed the "
                               f"lower end ({given[0]})")
        return np.linspace(low, high, bins + 1)
    if dihedral:
        return np.linspace(-math.pi, math.pi, bins + 1)
    low, high = float(values.min()), float(values.max())
    if not high > low:
        raise CommandError(f"column {column!r} has the same value {low:g} in every used frame; give --range")
    return np.linspace(low, high, bins + 1)


def _cmd_reweight(args) -> int:
    from . import analysis

    outputs = _check_outputs(args.outputs or [], TABLE_FORMATS + FIGURE_FORMATS, "--output",
                             [args.checkpoint, args.log] + ([args.values] if args.values else []))
    along = list(args.along or [])
    d = len(along) + (args.values is not None)
    if not 1 <= d <= 2:
        raise CommandError(f"--along, --values: give one or two columns in all (log columns, and the "
                           f"quantity of a --values file), got {d}")
    bins = args.bins or ([60] if d == 1 else [36, 36])
    if len(bins) == 1:
        bins = bins * d
    if len(bins) != d or min(bins) < 2:
        raise CommandError(f"--bins: give one number >= 2, or one per --along column ({d}), got {args.bins}")
    if math.prod(bins) > MAX_BINS_TOTAL:
        raise CommandError(f"--bins {' '.join(map(str, bins))} gives {math.prod(bins):,} bins; at most "
                           f"{MAX_BINS_TOTAL:,} in all")
    if args.burn_in is not None and args.method != "final":
        raise CommandError("--burn-in applies to --method final only (the 'offset' method uses every "
                           f"frame); add --method final or leave out --burn-in {args.burn_in:g}")
    ranges = args.range or []
    if ranges and len(ranges) != d:
        raise CommandError(f"--range: give it once per --along column ({d}), in order; got {len(ranges)}")
    run = load_run(args.checkpoint)
    log = read_log(args.log)
    t, cvs, logged_bias, note = run_frames(run, log, args.columns, args.time_column)
    # run_frames keeps a prefix of the (time-ordered) frames: the ones within the checkpoint's time.
    columns = [log_column(log, c, "--along")[: t.size] for c in along]
    units = [log.unit(c) for c in along]
    names = list(along)
    given = None
    if args.values is not None:  # values of the frames at the file's steps, a subset of the records
        given = read_frame_values(args.values, log.column("step")[: t.size])
        columns = [c[given.records] for c in columns] + [given.values]
        units.append(given.unit)
        names.append(given.name)
    values = np.column_stack(columns)
    show = CVDisplay(names, units, args.angle_unit)
    bias = run.bias
    progress = ProgressLine()
    if args.method == "offset":
        kwargs = {"frame_bias": logged_bias} if logged_bias is not None else {"frame_cvs": cvs}
        weights = analysis.offset_weights(bias, t, progress=progress.counter(REWEIGHTING, "moments"),
                                          **kwargs)
    else:
        burn_in = DEFAULT_BURN_IN_FRACTION if args.burn_in is None else args.burn_in
        weights = analysis.final_bias_weights(bias, t, cvs, burn_in_fraction=burn_in)
    if given is not None:
        weights = analysis.weights_at_steps(weights, log.column("step")[: t.size], given.steps)
    used = weights.used
    dihedrals = _dihedral_columns(log, run)
    edges = [_edges(values[used, i], c, c in dihedrals, bins[i], ranges[i] if ranges else None, show.scale(i))
             for i, c in enumerate(names)]
    profile = analysis.free_energy_along(weights, values, edges, names=names)
    source = f" and {args.values} ({values.shape[0]} frames)" if given is not None else ""
    print(f"free energy along {', '.join(names)} from {run.path}, {log.path}{source}")
    print(f"  {weights.summary()}")
    if note:
        print(f"  note: {note}")
    reached = np.isfinite(profile.free_energy)
    no_plateau = int((~profile.plateau_found & reached).sum())
    if no_plateau:
        print(f"  note: {no_plateau} bins had no blocking plateau; their errors are lower bounds")
    sparse = int((reached & (profile.counts < FEW_FRAMES)).sum())
    if sparse:
        print(f"  note: {sparse} bins hold fewer than {FEW_FRAMES} frames (marked *): their values and "
              "errors rest on a few visits and are not reliable")
    for i, name in enumerate(names):
        if name in dihedrals:
            continue  # the arithmetic mean of a periodic angle means nothing
        average = analysis.reweighted_average(weights, values[:, i])
        bound = "" if average.plateau_found else " (no blocking plateau: the error is a lower bound)"
        print(f"  unbiased average of {name}: {average.value * show.scale(i):.6g} +/- "
              f"{average.error * show.scale(i):.2g}{show.suffix(i)}{bound}")
    if d == 1:
        print(f"  {show.label(0):>14}{'F (kJ/mol)':>13}{'error':>10}{'frames':>9}")
        for x, f, e, n in zip(profile.centers[0], profile.free_energy, profile.error, profile.counts,
                              strict=True):
            mark = " *" if np.isfinite(f) and n < FEW_FRAMES else ""
            print(f"  {show.value(0, x):>14}{_fmt(f, 5):>13}{_fmt(e, 3):>10}{int(n):>9}{mark}")
    else:
        finite = np.isfinite(profile.free_energy)
        print(f"  {finite.sum()} of {finite.size} bins reached; F up to {np.nanmax(profile.free_energy):.4g} "
              f"kJ/mol, median error {np.nanmedian(profile.error[finite]):.3g} kJ/mol")
    write_files([(path, profile_bytes(profile, fmt, units=units, angle_unit=args.angle_unit))
                 for path, fmt in outputs])  # all or none
    for path, _ in outputs:
        print(f"wrote {path}")
    return EXIT_OK


# -------------------------------------------------------------------------------------------------- demo
def _cmd_demo(args) -> int:
    from .demo.run import DemoSettings, run_demo

    settings = DemoSettings.from_options(mode=args.mode, quick=args.quick, length_ns=args.length,
                                         platform=args.platform, seed=args.seed, min_depth_kT=args.min_depth)
    result = run_demo(args.out, settings, fresh=args.fresh)
    return EXIT_OK if result.completed else EXIT_FAILED


# ------------------------------------------------------------------------------------------------ parser
def _demo_epilog() -> str:
    """The demo's help epilog, written from its settings so that the two never disagree."""
    from .demo.settings import MAX_LENGTH_NS, QUICK_LENGTH_NS, DemoSettings

    d = DemoSettings()
    return ("Modes: '2d' biases phi and psi; 'reweight' biases phi only and recovers the free energy along psi "
            "by reweighting the CV log, compared with the 2d run's surface when that run is in the same --out "
            "folder.\n"
            f"Length: without --length the run stops when the convergence verdict holds (at most "
            f"{MAX_LENGTH_NS:g} ns; a 2d run here stopped after 3.6 ns, about a minute on 2 cores); --quick runs "
            f"{QUICK_LENGTH_NS:g} ns (under a minute), --length NS exactly that long.\n"
            f"The run: {d.temperature:g} K, Langevin, 2 fs steps; hills of {d.height:g} kJ/mol (initial height) "
            f"and {math.degrees(d.sigma):.0f} deg width every {d.stride} steps ({d.stride * 0.002:g} ps), bias "
            f"factor {d.bias_factor:g}, a {d.bins}-bin grid per dihedral. gridbias/demo/settings.py says why.\n"
            + _UNITS + "; angles in degrees.")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``gridbias`` command."""
    from . import __version__

    parser = _Parser(prog="gridbias", formatter_class=_Formatter,
                     description="Grid-stored metadynamics: run the demo, look at a run's checkpoint, export "
                                 "its free-energy surface, reweight its CV log, get parameters from a short "
                                 "unbiased run.",
                     epilog="Exit codes: 0 success, 1 the work failed or was interrupted, 2 bad usage or bad "
                            "input.\n" + _UNITS_NOTE)
    parser.add_argument("--version", action="version", version=f"gridbias {__version__}")
    parser.add_argument("--traceback", action="store_true",
                        help="on an error, also print the Python traceback (for bug reports)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser(
        "demo", help="well-tempered metadynamics of a dipeptide in vacuum, with a report",
        formatter_class=_Formatter,
        description="Well-tempered metadynamics of the blocked alanine dipeptide (ACE-ALA-NME, amber14 "
                    "force field, vacuum, 300 K) biased on its backbone dihedrals phi and psi, on the "
                    "fastest OpenMM platform found. It shows its progress, checkpoints as it goes (press "
                    "Ctrl-C, then run the same command again to continue) and ends with a folder holding "
                    "the free-energy surface (npz, csv, png), convergence plots, the checkpoint, the CV log "
                    "and a text report.",
        epilog=_demo_epilog())
    p.add_argument("--mode", choices=("2d", "reweight"), default="2d",
                   help="'2d': bias phi and psi; 'reweight': bias phi only and reweight to psi (default 2d)")
    p.add_argument("--quick", action="store_true", help="a shorter run (about a fifth of the length)")
    p.add_argument("--out", default="gridbias-demo", metavar="DIR",
                   help="results folder (default ./gridbias-demo); each mode writes its own subfolder")
    p.add_argument("--length", metavar="NS",
                   type=_option_type(float, lambda x: 0 < x <= MAX_LENGTH_NS,
                                     f"a number of ns in (0, {MAX_LENGTH_NS:g}]", "a number"),
                   help="simulated time in ns, instead of the mode's default (e.g. 0.002 for a smoke test)")
    p.add_argument("--platform", default="auto",
                   choices=("auto", "Reference", "CPU", "CUDA", "OpenCL", "HIP"),
                   help="OpenMM platform; 'auto' times the available ones briefly and takes the fastest")
    p.add_argument("--seed", type=_count_upto(MAX_SEED, "a 32-bit seed"), default=2024, metavar="N",
                   help="random seed for velocities and the thermostat (default 2024)")
    p.add_argument("--fresh", action="store_true",
                   help="discard this mode's earlier results in --out and start again")
    p.add_argument("--min-depth", type=_min_depth, default=2.0, metavar="KBT",
                   help="a minimum of the surface counts as a basin if it is this many kBT below its lowest "
                        "saddle, else it merges into that neighbour (default 2; a finished run is analysed "
                        "again with the new value)")
    p.set_defaults(handler=_cmd_demo)

    p = sub.add_parser(
        "inspect", help="summarise a checkpoint: grid, CVs, hills, time, basins, convergence verdict",
        formatter_class=_Formatter,
        description="Summarise a checkpoint (.gbz, from the OpenMM adapter or GridBias.save): grid, CVs, "
                    "hill count and height decay, simulated time, the basins of the final free-energy "
                    "surface, their free-energy differences and the convergence verdict. With --log, "
                    "transitions are counted along the logged CVs and the differences also come from "
                    "reweighted frames, with block-analysis errors.",
        epilog=_UNITS_NOTE)
    p.add_argument("checkpoint", metavar="CHECKPOINT", help="the checkpoint file (.gbz)")
    p.add_argument("--log", metavar="CVLOG", help="the run's CV log (.gbl)")
    _add_frames(p)
    _add_angle_unit(p)
    p.add_argument("--min-depth", type=_min_depth, default=2.0, metavar="KBT",
                   help="a minimum counts as a basin if it is this many kBT below its lowest saddle "
                        "(default 2)")
    p.add_argument("--drift", type=_positive, default=0.5, metavar="KBT",
                   help="largest change of the basin differences allowed over the window, kBT (default 0.5)")
    p.add_argument("--window", type=_fraction, default=0.25, metavar="FRACTION",
                   help="last part of the run the drift is measured over (default 0.25)")
    p.add_argument("--transitions", type=_count, default=10, metavar="N",
                   help="core-to-core transitions between basins needed (default 10)")
    p.add_argument("--max-height", type=_fraction, default=0.05, metavar="FRACTION",
                   help="well-tempered: recent hills must be at most this fraction of the initial height "
                        "(default 0.05)")
    p.add_argument("--points", type=_count_upto(MAX_POINTS, "each one is a replay of the hills"), default=100,
                   metavar="N",
                   help="moments of the run at which the basin differences are computed (default 100)")
    p.set_defaults(handler=_cmd_inspect)

    p = sub.add_parser(
        "export", help="write a checkpoint's free-energy surface as CSV, .npz, PNG, SVG or PDF",
        formatter_class=_Formatter,
        description="Write the free-energy surface of a checkpoint (kJ/mol, minimum 0, on the bias grid's "
                    "nodes) to one or more files; the extension chooses the format. CSV: one row per node, "
                    "CV columns then free_energy[kJ/mol]. NPZ: axis0.. (node coordinates, CV units), "
                    f"{', '.join(SURFACE_NPZ_KEYS)}; free_energy has the grid's shape, bias_factor is NaN "
                    "for standard metadynamics. PNG/SVG/PDF: a filled-contour (2 CVs) or curve (1 CV) "
                    "figure titled with the time and hill count it shows.",
        epilog=_UNITS_NOTE)
    p.add_argument("checkpoint", metavar="CHECKPOINT", help="the checkpoint file (.gbz)")
    p.add_argument("outputs", nargs="+", metavar="OUTPUT",
                   help="files to write: .csv, .npz, .png, .svg, .pdf")
    when = p.add_mutually_exclusive_group()
    when.add_argument("--time", type=_finite, metavar="PS",
                      help="the surface as it was at this simulated time, ps (default: the end)")
    when.add_argument("--hills", type=_count, metavar="N", help="the surface from the first N hills")
    _add_angle_unit(p)
    p.set_defaults(handler=_cmd_export)

    p = sub.add_parser(
        "reweight", help="free energy along chosen CV-log columns, reweighted, with errors",
        formatter_class=_Formatter,
        description="Reweight the frames of a CV log (.gbl) to the unbiased ensemble with the bias of its "
                    "checkpoint and histogram them along one or two columns (biased CVs or any other logged "
                    "quantity). Errors are one standard error from block analysis. Method 'offset' uses the "
                    "time-independent offset c(t) (Tiwary & Parrinello 2015) with the bias each frame felt "
                    "(every frame counts); 'final' weights the late frames by the final bias (well-tempered "
                    "runs, after --burn-in).",
        epilog=_UNITS_NOTE + " Free energies in kJ/mol, minimum 0; --range in the column's shown unit.")
    p.add_argument("checkpoint", metavar="CHECKPOINT", help="the run's checkpoint (.gbz)")
    p.add_argument("log", metavar="CVLOG", help="the run's CV log (.gbl)")
    p.add_argument("--along", nargs="+", metavar="COLUMN",
                   help="one or two log columns to compute the free energy along (biased CVs or observables)")
    p.add_argument("--values", metavar="FILE",
                   help="per-frame values of a quantity computed after the run: .npy (one value per log "
                        "record, or (step, value) rows) or .csv with a 'step' column and one value column; "
                        "every step must be a log record's. Alone, or with one --along column (2-D profile)")
    p.add_argument("--bins", type=_count_upto(MAX_BINS, "bins per column"), nargs="+", metavar="N",
                   help="bins per column (default 60 for one column, 36 x 36 for two)")
    p.add_argument("--range", type=_finite, nargs=2, action="append", metavar=("LOW", "HIGH"),
                   help="histogram range of a column, once per column in --along order (default: -180..180 "
                        "deg for a dihedral CV, else the data's range)")
    p.add_argument("--method", choices=("offset", "final"), default="offset",
                   help="'offset': c(t) weights (default); 'final': final-bias weights")
    p.add_argument("--burn-in", type=_burn_in, metavar="FRACTION",
                   help=f"with --method final only: fraction of the run left out at its start (default "
                        f"{DEFAULT_BURN_IN_FRACTION:g})")
    p.add_argument("--output", dest="outputs", nargs="+", metavar="FILE",
                   help="files to write: .csv, .npz, .png, .svg, .pdf")
    _add_frames(p)
    _add_angle_unit(p)
    p.set_defaults(handler=_cmd_reweight)

    add_advise_command(sub, formatter_class=_Formatter, positive=_positive, names=_names,
                       add_angle_unit=_add_angle_unit, units=_UNITS)
    return parser


# -------------------------------------------------------------------------------------------------- main
def _one_line(text) -> str:
    return " ".join(str(text).split())


def main(argv=None) -> int:
    """Run the ``gridbias`` command; returns the exit code (0 ok, 1 failed, 2 bad usage or input)."""
    parser = build_parser()
    argv = sys.argv[1:] if argv is None else list(argv)
    show_traceback = "--traceback" in argv  # accepted anywhere on the line, not only before the command
    argv = [a for a in argv if a != "--traceback"]
    try:
        args = parser.parse_args(argv)
    except _UsageError as exc:
        print(f"gridbias: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except SystemExit as exc:  # --help and --version
        return int(exc.code or 0)
    prefix = f"gridbias {args.command}: error:"
    try:
        return args.handler(args)
    except BrokenPipeError:  # the reader went away (e.g. "| head"): stop quietly, as command-line tools do
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_FAILED
    except Exception as exc:  # noqa: BLE001 - every failure becomes one line and an exit code
        message, code = _classify(exc)
        error = exc
    except KeyboardInterrupt as exc:
        message, code, error = "interrupted", EXIT_FAILED, exc
    if show_traceback:
        traceback.print_exception(type(error), error, error.__traceback__)
    print(f"{prefix} {_one_line(message)}", file=sys.stderr)
    return code


def _classify(exc) -> tuple[str, int]:
    """The one-line message and exit code for an exception raised by a command."""
    from .errors import GridBiasError

    if isinstance(exc, CommandError):
        return str(exc), exc.code
    if isinstance(exc, GridBiasError):
        # The library's ValueError kinds are bad input (files, columns, values); the others (another run
        # holds the checkpoint, the simulation blew up) are failures of the work itself.
        return str(exc), EXIT_BAD_INPUT if isinstance(exc, ValueError) else EXIT_FAILED
    if isinstance(exc, ImportError):
        return str(exc), EXIT_FAILED
    if isinstance(exc, OSError):
        where = f" ({exc.filename})" if exc.filename else ""
        return f"{exc.strerror or exc}{where}", EXIT_FAILED
    return (f"unexpected {type(exc).__name__}: {exc} (this is a bug in gridbias; rerun with --traceback and "
            "report it)"), EXIT_FAILED
