"""The ``gridbias advise`` subcommand: parameters from a short unbiased run (parse, call gridbias.advice, print).

Kept apart from ``gridbias.cli`` so that the command-line module stays small; ``gridbias.cli`` registers it.
"""

from __future__ import annotations

import math

from .errors import ParameterError

__all__ = ["add_advise_command"]


def add_advise_command(sub, *, formatter_class, positive, names, add_angle_unit, units):
    """Add the ``advise`` subparser to ``sub`` with the CLI's shared option types and help texts."""
    p = sub.add_parser(
        "advise", help="metadynamics parameters from a short unbiased run, with the reason for each",
        formatter_class=formatter_class,
        description="Measure the CVs of a short unbiased run (fluctuation, range visited, autocorrelation "
                    "time with its error, basins seen) and propose hill width, grid, stride, initial height, "
                    "bias factor and walls, each with its reason, warnings where the run cannot support a "
                    "choice, what the time you can afford implies, and make_bias(...) and reporter lines to "
                    "paste. RUN is a CV log (.gbl, e.g. written by gridbias.openmm.advise_from_simulation), "
                    "a CSV file with one header line of names (name or name[unit]; a 'time' column in ps; "
                    "[deg] columns are read as angles) or a NumPy .npy array (n, d).",
        epilog=units + "; the advice is printed in CV units (nm, rad), as make_bias takes them; --range "
               "values of angle CVs are typed in degrees unless --angle-unit rad.")
    p.add_argument("run", metavar="RUN", help="the short unbiased run: .gbl, .csv or .npy")
    p.add_argument("--columns", type=names, metavar="NAME[,NAME...]",
                   help="the CV columns (default: all but step, time and bias; .npy columns are cv0, cv1...)")
    p.add_argument("--temperature", type=positive, metavar="K",
                   help="the run's temperature (default: the one recorded in a CV log)")
    p.add_argument("--interval", type=positive, metavar="PS",
                   help="time between frames (default: from the time column; required for .npy)")
    p.add_argument("--timestep", type=positive, metavar="PS",
                   help="the MD time step, to give the stride in steps (default: from a CV log's step column)")
    p.add_argument("--periodic", type=names, metavar="NAME[,NAME...]",
                   help="CVs with period 2 pi (default: the dihedrals recorded in a CV log)")
    p.add_argument("--barrier", type=positive, metavar="KJMOL",
                   help="the highest barrier you expect to cross, kJ/mol: sets the bias factor")
    p.add_argument("--range", nargs=3, action="append", metavar=("NAME", "LOW", "HIGH"),
                   help="range of interest of a non-periodic CV (walls go at its ends); once per CV")
    p.add_argument("--budget", type=positive, metavar="PS",
                   help="the simulated time you can afford for the biased run, ps")
    add_angle_unit(p)
    p.set_defaults(handler=run_advise)


def _number(option, text) -> float:
    try:
        return float(text)
    except ValueError:
        raise ParameterError(f"{option}: expected a number, got {text!r}") from None


def run_advise(args) -> int:
    """Print the advice for ``args`` (parsed by the ``advise`` subparser); returns the exit code 0."""
    from .advice import advise_from_series, read_series

    series = read_series(args.run, columns=args.columns)
    cv_range = {}
    for name, low, high in args.range or ():
        if name not in series.names:
            raise ParameterError(f"--range {name}: no such CV; the CVs are {', '.join(series.names)}")
        in_degrees = series.units[series.names.index(name)] == "rad" and args.angle_unit == "deg"
        scale = math.pi / 180.0 if in_degrees else 1.0
        cv_range[name] = (_number("--range", low) * scale, _number("--range", high) * scale)
    for name in args.periodic or ():
        if name not in series.names:
            raise ParameterError(f"--periodic {name}: no such CV; the CVs are {', '.join(series.names)}")
    periods = None if args.periodic is None else [2 * math.pi if n in args.periodic else None
                                                  for n in series.names]
    advice = advise_from_series(series, temperature=args.temperature, interval=args.interval,
                                timestep=args.timestep, periods=periods, cv_range=cv_range or None,
                                barrier=args.barrier, affordable_time=args.budget)
    print(advice.render())
    return 0
