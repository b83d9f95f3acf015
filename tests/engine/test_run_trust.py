"""Runs keep their identity, survive failing writes under one policy, and never save a blown-up state.

- Run identity: the reporter writes the bias's run id into the CV log; a checkpoint carries it; a restore
  adopts it, so the files of one run share it across restarts.
- One write-failure policy for every file the run writes: an injected failing writer under the CV log
  (the issue's case) keeps the run going, keeps the rows, and stops after the limit with WriteError
  carrying the bias and naming the last good checkpoint.
- A state the run declared blown up (or finite but absurd positions) is never written.
"""

import errno
import math
import os

import numpy as np
import pytest

mm = pytest.importorskip("openmm")
from openmm import app, unit  # noqa: E402

import gridbias as gb  # noqa: E402
import gridbias.cvlog as gbl  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.checkpoint import read_checkpoint, write_checkpoint  # noqa: E402
from gridbias.cvlog import read_cvlog  # noqa: E402
from gridbias.runs import CHECKPOINT_KIND, read_run_checkpoint  # noqa: E402

pytestmark = [pytest.mark.openmm, pytest.mark.filterwarnings("ignore:axis .* coarser than sigma/2")]


def make_run(seed=1):
    """A 4-particle torsion chain with a 1-D dihedral bias on the Reference platform (cheap, stable)."""
    system, topology = mm.System(), app.Topology()
    residue = topology.addResidue("CHN", topology.addChain())
    for _ in range(4):
        system.addParticle(12.0)
        topology.addAtom("C", app.element.carbon, residue)
    bonds, angles, torsions = mm.HarmonicBondForce(), mm.HarmonicAngleForce(), mm.PeriodicTorsionForce()
    for i in range(3):
        bonds.addBond(i, i + 1, 0.15, 2e5)
    for i in range(2):
        angles.addAngle(i, i + 1, i + 2, 1.9, 400.0)
    torsions.addTorsion(0, 1, 2, 3, 3, 0.0, 2.0)
    for f in (bonds, angles, torsions):
        system.addForce(f)
    cvs = [gbo.dihedral(0, 1, 2, 3)]
    bias = gbo.make_bias(cvs, lower=[-math.pi], upper=[math.pi], bins=[48], sigma=[0.3], height=1.0,
                         temperature=300.0, bias_factor=6.0)
    link = gbo.attach(system, cvs, bias)
    integrator = mm.LangevinMiddleIntegrator(300 * unit.kelvin, 2 / unit.picosecond, 0.002 * unit.picoseconds)
    integrator.setRandomNumberSeed(seed)
    sim = app.Simulation(topology, system, integrator, mm.Platform.getPlatformByName("Reference"))
    sim.context.setPositions(np.array([[0.0, 0.0, 0.0], [0.15, 0.0, 0.0], [0.2, 0.14, 0.0], [0.35, 0.15, 0.05]]))
    sim.context.setVelocitiesToTemperature(300 * unit.kelvin, seed)
    return link, sim


def test_one_run_one_id_across_restarts(tmp_path):
    ckpt, log = tmp_path / "run.gbz", tmp_path / "run.gbl"
    link, sim = make_run()
    rep = link.reporter(10, checkpoint=ckpt, checkpoint_every=50, log=log)
    sim.reporters.append(rep)
    sim.step(100)
    rep.close()
    run_id = link.bias.run_id
    assert len(run_id) == 32 and int(run_id, 16) >= 0
    assert read_cvlog(log).metadata["run_id"] == run_id
    assert read_run_checkpoint(ckpt).bias_state["run_id"] == run_id
    # A restart: a fresh script makes a new bias (a new id), restores, and continues the same log.
    link2, sim2 = make_run(seed=2)
    assert link2.bias.run_id != run_id
    rep2 = link2.reporter(10, checkpoint=ckpt, checkpoint_every=50, log=log)
    sim2.reporters.append(rep2)
    link2.restore(sim2, ckpt)
    assert link2.bias.run_id == run_id
    sim2.step(50)
    rep2.close()
    assert read_cvlog(log).metadata["run_id"] == run_id
    np.testing.assert_array_equal(read_cvlog(log).column("step"), np.arange(10, 151, 10))


class FailingLogWrites:
    """Replaces the CV log's record writer: while armed, half the bytes land, then ENOSPC."""

    def __init__(self, monkeypatch):
        self.armed = 0
        real = gbl.write_all

        def write_all(fd, data):
            if self.armed:
                self.armed -= 1
                view = memoryview(data).cast("B")
                real(fd, view[: len(view) // 2])
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            return real(fd, data)

        monkeypatch.setattr(gbl, "write_all", write_all)


def test_a_full_disk_under_the_cv_log_follows_the_checkpoint_policy(tmp_path, monkeypatch, caplog):
    """The issue's case: a failed CV-log append used to stop the run at once with another error type."""
    ckpt, log = tmp_path / "run.gbz", tmp_path / "run.gbl"
    link, sim = make_run()
    rep = link.reporter(10, checkpoint=ckpt, checkpoint_every=100, log=log)
    sim.reporters.append(rep)
    sim.step(20)
    disk = FailingLogWrites(monkeypatch)
    disk.armed = 2
    with caplog.at_level("ERROR", logger="gridbias.openmm"):
        sim.step(30)  # the appends of steps 30 and 40 fail; the run goes on
    assert sim.currentStep == 50 and rep.write_failures == 0  # step 50 wrote all three rows
    assert [str(log) in r.getMessage() and "ENOSPC" in r.getMessage() for r in caplog.records] == [True, True]
    rep.close()
    np.testing.assert_array_equal(read_cvlog(log).column("step"), np.arange(10, 51, 10))  # nothing lost


def test_a_disk_that_stays_full_stops_with_write_error_carrying_the_bias(tmp_path, monkeypatch):
    ckpt, log = tmp_path / "run.gbz", tmp_path / "run.gbl"
    link, sim = make_run()
    rep = link.reporter(10, checkpoint=ckpt, checkpoint_every=20, log=log, max_write_failures=3)
    sim.reporters.append(rep)
    sim.step(40)
    FailingLogWrites(monkeypatch).armed = 10**6
    with pytest.raises(gb.WriteError) as info:
        sim.step(100)
    err = info.value
    assert not isinstance(err, ValueError) and sim.currentStep == 70
    assert err.path == str(log) and err.bias is link.bias and err.last_checkpoint == str(ckpt)
    assert err.last_checkpoint_step == 60  # checkpoints kept being written while only the log failed
    assert "could not be written 3 times in a row (steps 50, 60, 70)" in str(err)
    monkeypatch.undo()
    err.bias.save(tmp_path / "rescued.gbz")
    assert gb.GridBias.load(tmp_path / "rescued.gbz").n_hills == link.bias.n_hills == 6  # steps 10..60
    rep.close()


def test_a_state_declared_blown_up_is_never_written(tmp_path):
    ckpt = tmp_path / "run.gbz"
    link, sim = make_run()
    link.save(sim, ckpt)
    good = ckpt.read_bytes()
    positions = sim.context.getState(getPositions=True).getPositions(asNumpy=True)
    sim.context.setPositions(positions * 1e8)  # finite but absurd: a blown-up run's last frame
    with pytest.raises(gb.BlownUpError, match=r"a coordinate is .* nm, beyond 1e\+06 nm at step 0"):
        link.save(sim, ckpt)
    sim.context.setPositions(positions)  # even a sane-looking state after the declaration is refused
    with pytest.raises(gb.BlownUpError, match="declared blown up at step 0.*restore a good checkpoint first"):
        link.save(sim, tmp_path / "other.gbz")
    assert ckpt.read_bytes() == good and not (tmp_path / "other.gbz").exists()
    link.restore(sim, ckpt)  # a restore clears the declaration
    link.save(sim, tmp_path / "other.gbz")


def test_absurd_velocities_are_a_blow_up(tmp_path):
    link, sim = make_run()
    sim.context.setVelocities(np.full((4, 3), 5e4))
    with pytest.raises(gb.BlownUpError, match="a velocity is 5e\\+04 nm/ps"):
        link.save(sim, tmp_path / "run.gbz")
    assert not (tmp_path / "run.gbz").exists()


def test_a_refused_adapter_call_changes_nothing(tmp_path):
    link, sim = make_run()
    link.deposit(sim)
    before = link.bias.to_state()
    for s, time in [(["x"], None), ([np.nan], None), ([0.1, 0.2], None), (None, "soon"), (None, float("inf"))]:
        with pytest.raises(gb.GridBiasError):
            link.deposit(sim, s, time=time)
    after = link.bias.to_state()
    assert before[0] == after[0]
    for name in before[1]:
        np.testing.assert_array_equal(before[1][name], after[1][name])


def test_an_engine_table_that_is_not_the_replay_of_its_hills_is_refused(tmp_path):
    link, sim = make_run()
    for _ in range(3):
        sim.step(10)
        link.deposit(sim)
    link.save(sim, tmp_path / "run.gbz")
    meta, arrays = read_checkpoint(tmp_path / "run.gbz")
    arrays["engine.folded_values"] = arrays["engine.folded_values"] + 0.5
    write_checkpoint(tmp_path / "forged.gbz", meta, arrays, kind=CHECKPOINT_KIND)
    other, sim2 = make_run(seed=3)
    match = r"engine table differs by 0.5 kJ/mol from the replay of its \d+ folded"
    with pytest.raises(gb.CheckpointError, match=match):
        other.restore(sim2, tmp_path / "forged.gbz")
    assert other.bias.n_hills == 0


def test_a_log_from_before_run_ids_is_continued(tmp_path):
    """A run and log written before run ids existed: the restored run appends to its old log."""
    ckpt, log = tmp_path / "run.gbz", tmp_path / "run.gbl"
    link, sim = make_run()
    rep = link.reporter(10, checkpoint=ckpt, checkpoint_every=50, log=log)
    sim.reporters.append(rep)
    sim.step(50)
    rep.close()
    old = read_cvlog(log)
    metadata = {k: v for k, v in old.metadata.items() if k != "run_id"}
    log.unlink()
    with gbl.CVLogWriter(log, list(old.columns), list(old.units), metadata) as writer:
        writer.write(old.data)
    meta, arrays = read_checkpoint(ckpt)
    del meta["bias"]["run_id"]
    write_checkpoint(ckpt, meta, arrays, kind=CHECKPOINT_KIND)
    link2, sim2 = make_run(seed=2)
    rep2 = link2.reporter(10, checkpoint=ckpt, checkpoint_every=50, log=log)
    sim2.reporters.append(rep2)
    link2.restore(sim2, ckpt)
    sim2.step(20)
    rep2.close()
    np.testing.assert_array_equal(read_cvlog(log).column("step"), np.arange(10, 71, 10))


@pytest.mark.parametrize("change, match", [
    (dict(walls=None), "walls must be a sequence"),
    (dict(walls=[None]), "each wall must be"),
    (dict(walls=[{"cv": 0, "bound": 1.0}]), "wall .* missing"),
    (dict(temperature="300"), "temperature must be a number"),
    (dict(bins=[10**9]), "memory budget"),
    (dict(lower=[-1e308], upper=[1e308]), "overflows a float"),
    (dict(sigma="wide"), "sigma"),
])
def test_make_bias_refuses_parameters_that_cannot_work_by_name(change, match):
    args = dict(lower=[-math.pi], upper=[math.pi], bins=[48], sigma=[0.3], height=1.0, temperature=300.0)
    args.update(change)
    with pytest.raises(gb.GridBiasError, match=match):
        gbo.make_bias([gbo.dihedral(0, 1, 2, 3)], **args)
