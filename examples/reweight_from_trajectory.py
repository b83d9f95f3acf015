"""
A quantity computed after the run, from the trajectory
======================================================

A free-energy profile of a quantity nobody thought of before the run, from the run's DCD trajectory.

Well-tempered metadynamics of the alanine dipeptide in vacuum, biased along phi only. Beside the bias
reporter, OpenMM's own DCDReporter writes the coordinates every 1,000 steps (a multiple of the CV log's 250).
After the run, mdtraj computes a quantity the run never logged: the length of the hydrogen bond that
closes the seven-membered C7 ring (ACE carbonyl O to NME amide H). gridbias lines the frames up with the
CV log by step (checking the logged phi against the frames' coordinates), gives each frame the weight of
its record (time-independent offset c(t)), and returns the unbiased free energy along the distance with
block-analysis error bars, its unbiased average, and the probability that the bond is formed.

Run:  python examples/reweight_from_trajectory.py [--steps 1000000] [--folder trajectory_run]
      (1,000,000 steps = 2 ns, about a minute on 2 cores; needs mdtraj: pip install "gridbias[traj]")

The profile is that of the model (amber14 in vacuum) and of one short run: check it against longer runs
and other seeds before relying on it.
"""

import argparse
import math
import os

import numpy as np
import openmm as mm
from openmm import app, unit

from gridbias import analysis, trajectories
from gridbias import openmm as gbo
from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide
from gridbias.runs import load_run, read_log, run_frames

parser = argparse.ArgumentParser()
parser.add_argument("--steps", type=int, default=1_000_000, help="length of the run (2 fs steps)")
parser.add_argument("--folder", default="trajectory_run", help="where the run's files go")
args = parser.parse_args()
os.makedirs(args.folder, exist_ok=True)
files = {name: os.path.join(args.folder, name) for name in ("run.gbz", "run.gbl", "run.dcd", "start.pdb")}
for path in files.values():  # a new run each time: the DCD and the log must come from the same run
    if os.path.exists(path):
        os.unlink(path)

# --- the biased run: phi biased, the log every 250 steps, the DCD every 1,000 --------------------------
topology, positions, system = build_dipeptide()
phi, _ = backbone_dihedral_atoms(topology)
cvs = [gbo.dihedral(*phi, name="phi")]
bias = gbo.make_bias(cvs, lower=[-math.pi], upper=[math.pi], bins=[96], sigma=[0.35], height=1.5,
                     temperature=300.0, bias_factor=6.0)
link = gbo.attach(system, cvs, bias, route="cvforce")  # the cheap route on the Reference platform
integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 1 / unit.picosecond, 0.002 * unit.picoseconds)
integrator.setRandomNumberSeed(7)
simulation = app.Simulation(topology, system, integrator, mm.Platform.getPlatformByName("Reference"))
simulation.context.setPositions(positions)
simulation.minimizeEnergy()
simulation.context.setVelocitiesToTemperature(300 * unit.kelvin, 7)
with open(files["start.pdb"], "w") as f:
    app.PDBFile.writeFile(topology, simulation.context.getState(getPositions=True).getPositions(), f)
reporter = link.reporter(250, checkpoint=files["run.gbz"], checkpoint_every=50_000, log=files["run.gbl"])
simulation.reporters.append(reporter)
simulation.reporters.append(app.DCDReporter(files["run.dcd"], 1000))
simulation.step(args.steps)
link.save(simulation, files["run.gbz"])
reporter.close()

# --- afterwards: a new quantity from the trajectory, reweighted ------------------------------------------
run, log = load_run(files["run.gbz"]), read_log(files["run.gbl"])
times, _, frame_bias, _ = run_frames(run, log)
weights = analysis.offset_weights(run.bias, times, frame_bias=frame_bias)
frames = trajectories.load_frames(files["run.dcd"], log, top=files["start.pdb"])
frame_weights = analysis.weights_at_steps(weights, log.column("step")[: times.size], frames.steps)

import mdtraj  # noqa: E402  (the traj extra; imported where it is first needed)

oxygen = frames.trajectory.topology.select("resname ACE and name O")[0]
hydrogen = frames.trajectory.topology.select("resname NME and name H")[0]
hbond = mdtraj.compute_distances(frames.trajectory, [[oxygen, hydrogen]])[:, 0]  # nm, one per frame
edges = np.linspace(0.15, 0.55, 21)
profile = analysis.free_energy_along(frame_weights, hbond, edges, names=["O...H distance (nm)"])
average = analysis.reweighted_average(frame_weights, hbond)
formed = analysis.region_probability(frame_weights, hbond < 0.25)  # H...O under 0.25 nm (common practice)

print(f"{frames.steps.size} frames from {files['run.dcd']}, lined up with {files['run.gbl']} "
      f"(checked: {', '.join(frames.checked)}); {frame_weights.summary()}")
print(f"unbiased average O...H distance: {average.summary('nm')}")
print(f"C7 hydrogen bond formed (O...H < 0.25 nm): {formed.summary()}")
print(f"{'O...H (nm)':>12}{'F (kJ/mol)':>12}{'error':>8}{'frames':>8}")
for x, f, e, n in zip(profile.centers[0], profile.free_energy, profile.error, profile.counts, strict=True):
    print(f"{x:12.3f}{f:12.2f}{e:8.2f}{int(n):8d}")
np.savetxt(os.path.join(args.folder, "hbond.csv"),
           np.column_stack([profile.centers[0], profile.free_energy, profile.error, profile.counts]),
           delimiter=",", header="distance[nm],free_energy[kJ/mol],error[kJ/mol],frames", comments="")
try:
    from gridbias import plots

    figure = plots.plot_free_energy(profile)  # needs matplotlib (the plot extra)
except ImportError:
    figure = None
if figure is not None:
    figure.savefig(os.path.join(args.folder, "hbond.png"), dpi=150)
print(f"wrote {os.path.join(args.folder, 'hbond.csv')}" + (" and hbond.png" if figure is not None else ""))
