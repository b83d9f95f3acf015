"""Soak of the OpenMM adapter: a long dipeptide run with checkpoints and a CV log, file sizes over time.

Run:  python bench/soak_openmm.py [--steps 4000000] [--checkpoint-every 5000]
                                  [--plot bench/figures/soak_openmm.png]   (--quick: 200,000 steps)

The vacuum dipeptide (Reference platform, 2 fs, 300 K) runs under a well-tempered phi/psi bias (129 x 129
grid, default adapter settings) with a reporter that deposits every 500 steps, logs every 500 steps and
writes the checkpoint every ``--checkpoint-every`` steps. After each checkpoint the script records its
size, the CV log's size, the resident memory and the wall time of the interval, and checks:

- checkpoint bytes = constant + 32 B per hill (the history: 2 centres, height, time as float64) + the
  length of the JSON metadata (step, time and hill counters written as decimal text, a few bytes): nothing
  else grows;
- CV log bytes = header + 40 B per record (5 float64 columns: step, time, phi, psi, bias).

It exits with status 1 if either check fails. Timings (steps/s early vs late) are reported, not asserted.
tests/engine/test_openmm_run_faults.py runs the same byte checks on a short run in CI.
"""

import argparse
import json
import math
import os
import resource
import sys
import tempfile
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
import openmm as mm  # noqa: E402
from _timing import markdown_table  # noqa: E402
from openmm import app  # noqa: E402

from gridbias import openmm as gbo  # noqa: E402
from gridbias.checkpoint import read_checkpoint  # noqa: E402
from gridbias.cvlog import read_cvlog  # noqa: E402
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide  # noqa: E402

STRIDE = 500
BYTES_PER_HILL = 8 * (2 + 2)
BYTES_PER_RECORD = 8 * 5


def rss_mib():
    """Resident memory of this process now, MiB (/proc on Linux; elsewhere the peak so far)."""
    try:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20
    except OSError:
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux, bytes on macOS


def make_run(folder, checkpoint_every):
    top, pos, system = build_dipeptide()
    phi, psi = backbone_dihedral_atoms(top)
    cvs = [gbo.dihedral(*phi, name="phi"), gbo.dihedral(*psi, name="psi")]
    bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[128, 128], sigma=[0.35, 0.35],
                         height=1.2, temperature=300.0, bias_factor=10.0)
    link = gbo.attach(system, cvs, bias)
    integrator = mm.LangevinMiddleIntegrator(300, 1, 0.002)
    integrator.setRandomNumberSeed(2026)
    sim = app.Simulation(top, system, integrator, mm.Platform.getPlatformByName("Reference"))
    sim.context.setPositions(pos)
    sim.context.setVelocitiesToTemperature(300, 2026)
    paths = os.path.join(folder, "soak.gbz"), os.path.join(folder, "soak.gbl")
    reporter = link.reporter(STRIDE, checkpoint=paths[0], checkpoint_every=checkpoint_every, log=paths[1])
    sim.reporters.append(reporter)
    return link, sim, reporter, paths


def soak(steps, checkpoint_every):
    """Run and record one row per checkpoint: step, hills, checkpoint bytes, metadata bytes, log bytes,
    log records, resident memory (MiB), wall seconds of the interval."""
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        link, sim, reporter, (ckpt, log) = make_run(folder, checkpoint_every)
        report_every = max(steps // checkpoint_every // 10, 1)
        for k in range(steps // checkpoint_every):
            t0 = time.perf_counter()
            sim.step(checkpoint_every)
            wall = time.perf_counter() - t0
            meta, _ = read_checkpoint(ckpt)
            meta_bytes = len(json.dumps(meta, ensure_ascii=False, allow_nan=False).encode("utf-8"))
            rows.append((meta["step"], meta["bias"]["n_hills"], os.path.getsize(ckpt), meta_bytes,
                         os.path.getsize(log), read_cvlog(log, mmap=True).n_records, rss_mib(), wall))
            if (k + 1) % report_every == 0:
                print(f"  step {meta['step']:>10,}  hills {meta['bias']['n_hills']:>6,}  checkpoint "
                      f"{rows[-1][2]:>9,} B  log {rows[-1][4]:>9,} B  "
                      f"{checkpoint_every / wall:8.0f} steps/s  RSS {rows[-1][6]:6.1f} MiB", flush=True)
        reporter.close()
    return np.array(rows)


def plot(rows, path):
    """Three panels: checkpoint bytes not explained by the history, log bytes not explained by the records,
    throughput per checkpoint interval."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    step, hills, size, meta_bytes, log_size, records, _, wall = rows.T
    ns = step * 0.002 / 1000
    fig, axes = plt.subplots(1, 3, figsize=(12, 3.6))
    ax = axes[0]
    ax.plot(ns, size - size[0] - BYTES_PER_HILL * (hills - hills[0]), "o", color="tab:blue", markersize=3,
            label="checkpoint growth - 32 B x new hills")
    ax.plot(ns, meta_bytes - meta_bytes[0], color="black", linewidth=0.7, label="metadata text growth")
    ax.set_ylabel("bytes")
    kib = f"{size[0] / 2**10:.0f} -> {size[-1] / 2**10:.0f} KiB"
    ax.set_title(f"Checkpoint ({kib}, {int(hills[-1]):,} hills)", fontsize=10)
    ax.legend(frameon=False, fontsize=8)
    ax = axes[1]
    ax.plot(ns, log_size - log_size[0] - BYTES_PER_RECORD * (records - records[0]), color="tab:green")
    ax.set_ylabel("log growth - 40 B x new records (bytes)")
    ax.set_title(f"CV log ({log_size[-1] / 2**10:.0f} KiB, {int(records[-1]):,} records)", fontsize=10)
    ax = axes[2]
    ax.plot(ns, np.diff(np.r_[0, step]) / wall / 1000, color="tab:orange", linewidth=0.8)
    ax.set_ylabel("thousand steps per second")
    ax.set_title("Throughput per checkpoint interval", fontsize=10)
    ax.set_ylim(bottom=0)
    for a in axes:
        a.set_xlabel("simulated time (ns)")
        a.grid(alpha=0.3)
    fig.tight_layout()
    os.makedirs(os.path.dirname(path) or ".", exist_ok=True)
    fig.savefig(path, dpi=110)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=4_000_000, help="MD steps (default 4,000,000 = 8 ns)")
    parser.add_argument("--checkpoint-every", type=int, default=5000, help="steps between checkpoints")
    parser.add_argument("--quick", action="store_true", help="200,000 steps, for a smoke run")
    parser.add_argument("--plot", default=None, help="write the figure (PNG) here")
    args = parser.parse_args(argv)
    steps = 200_000 if args.quick else args.steps
    if args.checkpoint_every % STRIDE or steps < 2 * args.checkpoint_every:
        parser.error(f"--checkpoint-every must be a multiple of {STRIDE} and at most half of --steps")
    warnings.simplefilter("ignore", UserWarning)
    print(f"OpenMM {mm.__version__}; {steps:,} steps, checkpoint every {args.checkpoint_every:,} steps")
    t0 = time.perf_counter()
    rows = soak(steps, args.checkpoint_every)
    total = time.perf_counter() - t0
    step, hills, size, meta_bytes, log_size, records, rss, wall = rows.T
    rest = size - BYTES_PER_HILL * hills - meta_bytes
    log_rest = log_size - BYTES_PER_RECORD * records
    ok_ckpt = bool(np.all(rest == rest[0]))
    ok_log = bool(np.all(log_rest == log_rest[0])) and np.array_equal(records, step // STRIDE)
    rate = (np.diff(np.r_[0, step]) / wall)[1:]  # the first interval includes compiling the kernels
    tenth = max(len(rate) // 10, 1)
    early, late = np.median(rate[:tenth]), np.median(rate[-tenth:])
    early_best, late_best = np.max(rate[:tenth]), np.max(rate[-tenth:])  # other processes only slow us down
    print(f"\n{total:.0f} s in all\n")
    print(markdown_table(
        ["steps (ns)", "checkpoints", "hills", "checkpoint first -> last (bytes)", "growth per hill (B)",
         "bytes besides history and metadata", "metadata JSON (bytes)", "CV log records",
         "log bytes per record", "steps/s first 10% -> last 10%: median; fastest interval", "RSS first -> last (MiB)"],
        [[f"{int(step[-1]):,} ({step[-1] * 0.002 / 1000:g})", len(rows), f"{int(hills[-1]):,}",
          f"{int(size[0]):,} -> {int(size[-1]):,}",
          f"{(size[-1] - size[0] - (meta_bytes[-1] - meta_bytes[0])) / (hills[-1] - hills[0]):.3f}",
          f"{int(rest[0]):,} ({'constant' if ok_ckpt else 'VARIES: ' + str(np.unique(rest))})",
          f"{int(meta_bytes.min())}-{int(meta_bytes.max())}", f"{int(records[-1]):,}",
          f"{(log_size[-1] - log_size[0]) / (records[-1] - records[0]):.3f}"
          + ("" if ok_log else " (header VARIES)"),
          f"{early:,.0f} -> {late:,.0f} (ratio {late / early:.2f}); {early_best:,.0f} -> {late_best:,.0f} "
          f"(ratio {late_best / early_best:.2f})", f"{rss[0]:.1f} -> {rss[-1]:.1f}"]]))
    if args.plot:
        plot(rows, args.plot)
        print(f"\n(figure written to {args.plot})")
    if not (ok_ckpt and ok_log):
        print("\nFAILED: a file grew by more than its history/records", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
