"""MPI worker for tests/walkers/test_walkers_stop_together.py: walkers with different stop rules stop together.

Run as ``mpiexec -n 2 python tests/walkers/mpi/walkers_stopping.py OUT_DIR``. Each walker runs the core's
BAOAB driver on the tilted quartic double well in a Python loop (gridbias.core_run.StoppingRun) and shares
one bias. Walker 1's rules hold after 2,000 steps, walker 0's only after 10^6: both must stop at 2,000
with walker 1's decision. Each rank writes OUT_DIR/stop{rank}.json; run again, nothing more happens.
"""

import json
import sys
from pathlib import Path

import numpy as np

import gridbias as gb
from gridbias import stopping
from gridbias.core_run import StoppingRun
from gridbias.testsystems import DoubleWell, run_langevin
from gridbias.walkers import share

out = Path(sys.argv[1])
T, STRIDE, DT = 300.0, 50, 0.005
bias = share(gb.GridBias(gb.Grid([-2.0], [2.0], [200]), sigma=[0.1], height=2.0, temperature=T,
                         bias_factor=6.0))
rank = bias.walker
rules = stopping.MaxSteps(2_000 if rank == 1 else 1_000_000)
run = StoppingRun(bias, rules, checkpoint=out / f"walker{rank}.gbz")
rng = np.random.default_rng(100 + rank + run.step)
x, v = (run.state["x"], run.state["v"]) if run.state else (np.array([-1.0]), None)
loops = 0
while run.decision is None:
    traj = run_langevin(DoubleWell(barrier=20.0, tilt=3.0), x, v0=v, n_steps=STRIDE, dt=DT, friction=5.0,
                        temperature=T, rng=rng, bias=bias, record_every=STRIDE)
    x, v = traj.positions[-1], traj.velocities[-1]
    t = run.time + STRIDE * DT
    frame_bias = float(traj.bias_energies[-1])
    bias.deposit(x, time=t)
    run.advance(STRIDE, time=t, cvs=x, frame_bias=frame_bias, state={"x": x, "v": v})
    loops += 1
run.close()
(out / f"stop{rank}.json").write_text(json.dumps({"decision": run.decision.to_dict(), "step": run.step,
                                                  "loops": loops, "hills": bias.n_hills}))
