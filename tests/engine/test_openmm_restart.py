"""One checkpoint restarts exactly; it refuses another system; a killed writer never leaves a bad file.

References: OpenMM's own guarantee that ``Context.createCheckpoint``/``loadCheckpoint`` continue a run
bit for bit on a deterministic platform (Reference; CPU with one thread and no PME) is the yardstick:
N steps + checkpoint + restore in a new process + N steps must equal 2N uninterrupted steps exactly
(positions, velocities, grid, hill history), with hills pending as Gaussians at the checkpoint.
"""

import functools
import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

mm = pytest.importorskip("openmm")

from openmm import app  # noqa: E402

import gridbias as gb  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402

pytestmark = pytest.mark.openmm

JOB = textwrap.dedent("""
    import math, sys, warnings
    import numpy as np
    import openmm as mm
    from openmm import app
    from gridbias import openmm as gbo
    from gridbias.demo.dipeptide import build_dipeptide, backbone_dihedral_atoms

    mode, platform, steps, ckpt, out = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4], sys.argv[5]
    top, pos, system = build_dipeptide()
    phi, psi = backbone_dihedral_atoms(top)
    cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[64, 64], sigma=[0.35, 0.35],
                             height=1.2, temperature=300.0, bias_factor=10.0)
    link = gbo.attach(system, cvs, bias, pending_hills=4)
    integrator = mm.LangevinMiddleIntegrator(300, 1, 0.002)
    integrator.setRandomNumberSeed(2024)
    props = {"Threads": "1"} if platform == "CPU" else {}
    sim = app.Simulation(top, system, integrator, mm.Platform.getPlatformByName(platform), props)
    sim.context.setPositions(pos)
    sim.context.setVelocitiesToTemperature(300, 7)
    if mode == "first":
        sim.reporters.append(link.reporter(stride=50, checkpoint=ckpt, checkpoint_every=steps))
    else:
        sim.reporters.append(link.reporter(stride=50))
    if mode == "second":
        link.restore(sim, ckpt)
    sim.step(steps)
    state = sim.context.getState(getPositions=True, getVelocities=True)
    h = link.bias.history
    np.savez(out, positions=state.getPositions(asNumpy=True)._value,
             velocities=state.getVelocities(asNumpy=True)._value, values=np.array(link.bias.values),
             centers=h.centers, heights=h.heights, step=sim.currentStep, pending=link._n_pending)
""")


def run_job(tmp_path, *args):
    script = tmp_path / "job.py"
    script.write_text(JOB)
    res = subprocess.run([sys.executable, str(script), *map(str, args)], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr[-3000:]
    return res


@pytest.mark.parametrize("platform", ["Reference", "CPU"])
def test_restart_in_new_process_is_bit_for_bit(tmp_path, platform):
    """Reference, and CPU with one thread and no PME: N + restore (new process) + N == 2N, bit for bit.
    950 steps at stride 50 = 19 deposits, 4 pending slots: 4 hills are pending at the checkpoint."""
    n = 950
    ckpt = tmp_path / "run.gbz"
    run_job(tmp_path, "full", platform, 2 * n, ckpt, tmp_path / "full.npz")
    run_job(tmp_path, "first", platform, n, ckpt, tmp_path / "first.npz")
    run_job(tmp_path, "second", platform, n, ckpt, tmp_path / "second.npz")
    full, first, second = (np.load(tmp_path / f"{k}.npz") for k in ("full", "first", "second"))
    assert int(first["pending"]) > 0, "the checkpoint should hold pending hills"
    assert int(second["step"]) == int(full["step"]) == 2 * n
    for key in ("positions", "velocities", "values", "centers", "heights"):
        assert np.array_equal(full[key], second[key]), f"{key} differs after the restart"
    assert not np.array_equal(first["positions"], second["positions"])


@functools.lru_cache(maxsize=1)
def _dipeptide():
    from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide

    top, pos, system = build_dipeptide()
    return top, pos, mm.XmlSerializer.serialize(system), backbone_dihedral_atoms(top)


def dipeptide_link(pending=4, bins=64, platform="Reference", **kw):
    top, pos, xml, (phi, psi) = _dipeptide()
    system = mm.XmlSerializer.deserialize(xml)
    cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi)]
    bias = gbo.make_bias(cvs, lower=[-np.pi] * 2, upper=[np.pi] * 2, bins=[bins, bins], sigma=[0.35, 0.35],
                         height=1.2, temperature=300.0, bias_factor=10.0, **kw)
    link = gbo.attach(system, cvs, bias, pending_hills=pending)
    integrator = mm.LangevinMiddleIntegrator(300, 1, 0.002)
    integrator.setRandomNumberSeed(11)
    sim = app.Simulation(top, system, integrator, mm.Platform.getPlatformByName(platform))
    sim.context.setPositions(pos)
    return link, sim


def test_restore_on_other_platform_uses_portable_state(tmp_path, caplog):
    """A Reference checkpoint restored on CPU: positions, velocities, box, step and time are set from the
    portable state (logged), and the engine applies the restored bias."""
    link, sim = dipeptide_link()
    sim.reporters.append(link.reporter(stride=20))
    sim.step(170)
    path = tmp_path / "run.gbz"
    link.save(sim, path)
    state = sim.context.getState(getPositions=True, getVelocities=True)
    other, sim_cpu = dipeptide_link(platform="CPU")
    with caplog.at_level("WARNING", logger="gridbias.openmm"):
        meta = other.restore(sim_cpu, path)
    assert "portable state" in caplog.text
    after = sim_cpu.context.getState(getPositions=True, getVelocities=True)
    assert np.array_equal(after.getPositions(asNumpy=True)._value, state.getPositions(asNumpy=True)._value)
    assert np.array_equal(after.getVelocities(asNumpy=True)._value, state.getVelocities(asNumpy=True)._value)
    assert sim_cpu.currentStep == meta.step == 170
    assert after.getTime()._value == pytest.approx(state.getTime()._value)
    assert other.bias.n_hills == link.bias.n_hills == 8
    s = other.cv_values(sim_cpu)
    assert other.bias_energy(sim_cpu) == pytest.approx(link.bias_energy(sim), abs=1e-5)
    assert other.bias_energy(sim_cpu) == pytest.approx(other.bias.evaluate(s)[0], abs=1e-3)


def test_refuses_other_system(tmp_path):
    """Particle count, CVs, grid, widths and walls must match; the error says which differs."""
    link, sim = dipeptide_link()
    path = tmp_path / "run.gbz"
    link.save(sim, path)
    other, sim2 = dipeptide_link(bins=48)
    with pytest.raises(gb.CheckpointError, match="grid differs.*bins"):
        other.restore(sim2, path)
    other, sim2 = dipeptide_link(walls=[gb.Wall(0, 3.0, 100.0, "above")])
    with pytest.raises(gb.CheckpointError, match="walls differs"):
        other.restore(sim2, path)
    # other CVs: psi's last atom replaced
    top, pos, xml, (phi, psi) = _dipeptide()
    system = mm.XmlSerializer.deserialize(xml)
    cvs = [gbo.dihedral(*phi), gbo.dihedral(*psi[:3], psi[3] + 1)]
    bias = gbo.make_bias(cvs, lower=[-np.pi] * 2, upper=[np.pi] * 2, bins=[64, 64], sigma=[0.35, 0.35], height=1.2,
                         temperature=300.0, bias_factor=10.0)
    link3 = gbo.attach(system, cvs, bias)
    sim3 = app.Simulation(top, system, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName("Reference"))
    with pytest.raises(gb.CheckpointError, match="CV 1 differs"):
        link3.restore(sim3, path)
    # other particle count
    small = mm.System()
    for _ in range(23):
        small.addParticle(1.0)
    link4 = gbo.attach(small, [gbo.dihedral(*phi), gbo.dihedral(*psi)], bias.copy())
    ctx = mm.Context(small, mm.VerletIntegrator(0.001), mm.Platform.getPlatformByName("Reference"))
    with pytest.raises(gb.CheckpointError, match="22 particles; this System has 23"):
        link4.restore(ctx, path)


def test_checkpoint_does_not_change_the_trajectory(tmp_path):
    """Saving (with hills pending) leaves the engine's bias untouched: two runs, one saving every 100
    steps, stay bit-for-bit equal (Reference)."""
    results = []
    for save in (False, True):
        link, sim = dipeptide_link()
        sim.context.setVelocitiesToTemperature(300, 3)
        rep = link.reporter(stride=30, checkpoint=tmp_path / f"s{save}.gbz", checkpoint_every=100) if save else \
            link.reporter(stride=30)
        sim.reporters.append(rep)
        sim.step(400)
        results.append(sim.context.getState(getPositions=True).getPositions(asNumpy=True)._value)
        rep.close()
    assert np.array_equal(results[0], results[1])


def test_kill_while_saving_always_restorable(tmp_path):
    """SIGKILL a process that saves checkpoints in a loop, at random moments, 12 times: every time the
    file restores (the old or the new checkpoint, never a damaged one)."""
    path = tmp_path / "run.gbz"
    link, sim = dipeptide_link()
    rng = np.random.default_rng(5)
    steps_seen = set()
    for _ in range(12):
        ready_r, ready_w = os.pipe()
        pid = os.fork()
        if pid == 0:  # child: save as fast as possible, say when the first save is on disk
            try:
                os.close(ready_r)
                child, child_sim = dipeptide_link()
                if path.exists():
                    child.restore(child_sim, path)
                n = 0
                while True:
                    child_sim.step(5)
                    child.deposit(child_sim)
                    child.save(child_sim, path)
                    n += 1
                    if n == 1:
                        os.write(ready_w, b"1")
            finally:
                os._exit(1)
        os.close(ready_w)
        assert os.read(ready_r, 1) == b"1"
        os.close(ready_r)
        time.sleep(rng.uniform(0.0, 0.25))
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)
        meta = link.restore(sim, path)
        steps_seen.add(meta.step)
        assert link.bias.n_hills == meta.step // 5
    assert len(steps_seen) >= 6


def test_restore_loads_into_the_users_own_bias_object(tmp_path):
    """``link.restore`` fills the very GridBias the user passed to ``attach`` (no stale references)."""
    link, sim = dipeptide_link()
    sim.reporters.append(link.reporter(stride=20))
    sim.step(100)
    path = tmp_path / "run.gbz"
    link.save(sim, path)
    other, sim2 = dipeptide_link()
    users_bias = other.bias
    other.restore(sim2, path)
    assert other.bias is users_bias
    assert users_bias.n_hills == link.bias.n_hills == 5
    np.testing.assert_array_equal(users_bias.values, link.bias.values)
