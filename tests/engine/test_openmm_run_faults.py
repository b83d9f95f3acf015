"""Faults of a real OpenMM run: full disks, two runs on one checkpoint, blow-ups, damaged and planted files.

Every test drives the adapter the way a user's script does (vacuum dipeptide, Reference platform, reporter
with checkpoints and a CV log) and checks the guarantees stated in the docstrings of ``BiasReporter``,
``BiasLink.restore``, ``gridbias.checkpoint`` and ``gridbias.cvlog``: the last good checkpoint survives
every failure, nothing is deposited from non-finite coordinates, a damaged or foreign file is refused with
a CheckpointError/CVLogError before anything is changed, and nothing in a file is ever executed. The
reader-level cases (every truncation and byte flip of a checkpoint or log, hypothesis fuzzing, hard kills
while writing) are in tests/core/test_checkpoint_files.py and tests/core/test_cvlog_files.py; here they are
repeated only on files the adapter itself wrote. A shortened bench/soak_openmm.py (file sizes over a run) is at the top.
"""

import errno
import functools
import hashlib
import io
import json
import math
import os
import pickle
import re
import select
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import textwrap
import warnings
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

mm = pytest.importorskip("openmm")
from openmm import app  # noqa: E402

import gridbias as gb  # noqa: E402
import gridbias._files as gbf  # noqa: E402
import gridbias.checkpoint as gbc  # noqa: E402
from gridbias import openmm as gbo  # noqa: E402
from gridbias.checkpoint import read_checkpoint, write_checkpoint  # noqa: E402
from gridbias.cvlog import read_cvlog  # noqa: E402

pytestmark = pytest.mark.openmm
REPO = Path(__file__).resolve().parents[2]
STRIDE = 20  # deposit (and log) every 20 steps
BYTES_PER_2D_HILL = 8 * (2 + 2)  # centre (2 float64) + height + time: gridbias/history.py
LOG_RECORD_BYTES = 8 * 5  # step, time, phi, psi, bias: 5 float64 per record (gridbias/cvlog.py layout)


# ---------------------------------------------------------------------------------------------- the run
@functools.lru_cache(maxsize=1)
def _dipeptide():
    from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide

    top, pos, system = build_dipeptide()
    return top, pos, mm.XmlSerializer.serialize(system), backbone_dihedral_atoms(top)


def make_run(seed=1):
    """A fresh vacuum-dipeptide Simulation (Reference) with a well-tempered phi/psi bias attached."""
    top, pos, xml, (phi, psi) = _dipeptide()
    system = mm.XmlSerializer.deserialize(xml)
    cvs = [gbo.dihedral(*phi, name="phi"), gbo.dihedral(*psi, name="psi")]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[64, 64],
                             sigma=[0.35, 0.35], height=1.2, temperature=300.0, bias_factor=10.0)
    link = gbo.attach(system, cvs, bias)
    integrator = mm.LangevinMiddleIntegrator(300, 1, 0.002)
    integrator.setRandomNumberSeed(seed)
    sim = app.Simulation(top, system, integrator, mm.Platform.getPlatformByName("Reference"))
    sim.context.setPositions(pos)
    sim.context.setVelocitiesToTemperature(300, seed)
    return link, sim


def snapshot(link, sim):
    """What must not change when a restore is refused: hills, grid, step and coordinates."""
    state = sim.context.getState(getPositions=True)
    return (link.bias.n_hills, np.array(link.bias.values), sim.currentStep,
            np.array(state.getPositions(asNumpy=True)._value), link.bias_energy(sim))


def assert_unchanged(before, after):
    assert before[0] == after[0] and before[2] == after[2] and before[4] == after[4]
    np.testing.assert_array_equal(before[1], after[1])
    np.testing.assert_array_equal(before[3], after[3])


@functools.lru_cache(maxsize=1)
def run_checkpoint_bytes():
    """The bytes of a checkpoint (and CV log) written by the reporter of a 200-step run: 10 hills."""
    with tempfile.TemporaryDirectory() as folder:
        link, sim = make_run()
        rep = link.reporter(STRIDE, checkpoint=os.path.join(folder, "run.gbz"), checkpoint_every=100,
                            log=os.path.join(folder, "run.gbl"))
        sim.reporters.append(rep)
        sim.step(200)
        rep.close()
        return Path(folder, "run.gbz").read_bytes(), Path(folder, "run.gbl").read_bytes()


def rehash(raw: bytes) -> bytes:
    """Recompute a checkpoint image's SHA-256 field (bytes 32..63 over the rest; gridbias/checkpoint.py)."""
    return raw[:32] + hashlib.sha256(raw[:32] + raw[64:]).digest() + raw[64:]


def payload_of(raw: bytes) -> bytes:
    return raw[gbc.HEADER_SIZE + struct.unpack("<I", raw[20:24])[0]:]


def with_payload(raw: bytes, payload: bytes) -> bytes:
    """The same header and kind around another payload, with a valid checksum (a crafted file)."""
    kind_len = struct.unpack("<I", raw[20:24])[0]
    head = raw[:24] + struct.pack("<Q", len(payload)) + bytes(32) + raw[64:64 + kind_len]
    return rehash(head + payload)


# --------------------------------------------------------------------------------------------- soak (short)
def test_soak_checkpoint_grows_by_the_history_only_and_log_by_fixed_records(tmp_path):
    """Shortened bench/soak_openmm.py: 12 checkpoints of one run. Each checkpoint is the previous one plus
    32 bytes per new 2-D hill (gridbias/history.py: centre, height, time) plus the change in length of its
    JSON metadata (step, time and hill counters as decimal text); every other byte count (grid, engine
    table, OpenMM state, container) stays constant. The CV log grows by exactly 40 bytes per record."""
    link, sim = make_run()
    ckpt, log = tmp_path / "run.gbz", tmp_path / "run.gbl"
    rep = link.reporter(STRIDE, checkpoint=ckpt, checkpoint_every=500, log=log)
    sim.reporters.append(rep)
    rows = []
    for _ in range(12):
        sim.step(500)
        meta, _ = read_checkpoint(ckpt)
        meta_bytes = len(json.dumps(meta, ensure_ascii=False, allow_nan=False).encode("utf-8"))
        rows.append((meta["bias"]["n_hills"], ckpt.stat().st_size, meta_bytes, log.stat().st_size,
                     read_cvlog(log).n_records))
    rep.close()
    hills, size, meta_bytes, log_size, records = (np.array(c) for c in zip(*rows, strict=True))
    np.testing.assert_array_equal(hills, np.arange(1, 13) * 500 // STRIDE)
    rest = size - BYTES_PER_2D_HILL * hills - meta_bytes
    assert np.all(rest == rest[0]), f"checkpoint bytes besides history and metadata changed: {rest}"
    assert np.all(np.abs(np.diff(meta_bytes)) <= 8)  # a few digits of counters
    np.testing.assert_array_equal(records, hills)
    log_rest = log_size - LOG_RECORD_BYTES * records
    assert np.all(log_rest == log_rest[0]), f"log bytes besides the records changed: {log_rest}"


# ------------------------------------------------------------------------------------ disk full, I/O errors
class FailingWrites:
    """Replaces the atomic writer's chunk writer (gridbias._files): while armed, half a chunk lands, then ENOSPC."""

    def __init__(self, monkeypatch):
        self.armed = 0  # number of checkpoint writes still to fail
        self.failed = 0
        real = gbf.write_all

        def write_all(fd, data):
            if self.armed:
                self.armed -= 1
                self.failed += 1
                view = memoryview(data).cast("B")
                real(fd, view[: len(view) // 2])
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            return real(fd, data)

        monkeypatch.setattr(gbf, "write_all", write_all)


def test_failed_checkpoint_is_logged_and_retried(tmp_path, monkeypatch, caplog):
    """Disk full for one checkpoint: the file keeps the previous checkpoint, the error is logged with the
    path, step and cause, the run goes on with every hill in memory, and the next checkpoint has them all."""
    link, sim = make_run()
    ckpt = tmp_path / "run.gbz"
    rep = link.reporter(STRIDE, checkpoint=ckpt, checkpoint_every=100, log=tmp_path / "run.gbl")
    sim.reporters.append(rep)
    sim.step(200)
    good = ckpt.read_bytes()
    disk = FailingWrites(monkeypatch)
    disk.armed = 1
    with caplog.at_level("ERROR", logger="gridbias.openmm"):
        sim.step(100)  # the checkpoint of step 300 fails; the run does not stop
    assert disk.failed == 1 and sim.currentStep == 300
    assert ckpt.read_bytes() == good and read_checkpoint(ckpt)[0]["step"] == 200
    assert [p.name for p in tmp_path.iterdir() if ".tmp-" in p.name] == []
    assert rep.checkpoint_failures == 1 and rep.last_checkpoint_step == 200
    message = caplog.records[-1].getMessage()
    assert caplog.records[-1].levelname == "ERROR"
    for part in (str(ckpt), "at step 300", "No space left on device", "ENOSPC", "failure 1 of at most 3",
                 "tries again at step 400", "still the checkpoint of step 200", "keeps all 15 hills"):
        assert part in message, (part, message)
    assert link.bias.n_hills == 15
    sim.step(100)  # the next checkpoint is written and holds every hill
    assert rep.checkpoint_failures == 0 and rep.last_checkpoint_step == 400
    other, sim2 = make_run(seed=2)
    assert other.restore(sim2, ckpt).step == 400
    assert other.bias.n_hills == link.bias.n_hills == 20
    np.testing.assert_array_equal(other.bias.history.centers, link.bias.history.centers)
    np.testing.assert_array_equal(other.bias.values, link.bias.values)
    rep.close()


def test_failed_log_flush_counts_as_a_failed_checkpoint(tmp_path, monkeypatch, caplog):
    """On file systems that allocate space late, a full disk shows first when the CV log is synced just
    before a checkpoint: the same policy applies (logged, retried, nothing lost)."""
    link, sim = make_run()
    ckpt, log = tmp_path / "run.gbz", tmp_path / "run.gbl"
    rep = link.reporter(STRIDE, checkpoint=ckpt, checkpoint_every=100, log=log)
    sim.reporters.append(rep)
    sim.step(100)
    real_fsync, calls = os.fsync, []

    def fsync_once_full(fd):
        calls.append(fd)
        if len(calls) == 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_fsync(fd)

    monkeypatch.setattr(os, "fsync", fsync_once_full)
    with caplog.at_level("ERROR", logger="gridbias.openmm"):
        sim.step(100)
    assert rep.checkpoint_failures == 1 and read_checkpoint(ckpt)[0]["step"] == 100
    assert "could not flush CV log" in caplog.text and str(log) in caplog.text and "ENOSPC" in caplog.text
    sim.step(100)
    assert rep.checkpoint_failures == 0 and read_checkpoint(ckpt)[0]["step"] == 300
    rep.close()
    np.testing.assert_array_equal(read_cvlog(log).column("step"), np.arange(20, 301, 20))


def test_repeated_failures_stop_the_run_and_the_bias_can_still_be_saved(tmp_path, monkeypatch, caplog):
    """max_checkpoint_failures=2 failures in a row stop the run with a CheckpointError that names the path,
    the failed steps, the cause and the last good checkpoint; the bias in memory is intact and saves
    elsewhere."""
    link, sim = make_run()
    ckpt = tmp_path / "run.gbz"
    rep = link.reporter(STRIDE, checkpoint=ckpt, checkpoint_every=100, max_checkpoint_failures=2)
    sim.reporters.append(rep)
    sim.step(100)
    disk = FailingWrites(monkeypatch)
    disk.armed = 10**6  # the disk stays full
    with caplog.at_level("ERROR", logger="gridbias.openmm"), pytest.raises(gb.CheckpointError) as info:
        sim.step(500)
    message = str(info.value)
    for part in (str(ckpt), "could not be written 2 times in a row (steps 200, 300)", "No space left on",
                 "Stopping the run at step 300", "still the checkpoint of step 100", "keeps all 15 hills",
                 "link.save(simulation, path)"):
        assert part in message, (part, message)
    assert isinstance(info.value.__cause__, gb.CheckpointError)
    root = info.value.__cause__.__cause__
    assert isinstance(root, OSError) and root.errno == errno.ENOSPC
    assert len([r for r in caplog.records if r.levelname == "ERROR"]) == 1  # the first failure was logged
    assert sim.currentStep == 300 and link.bias.n_hills == 15
    assert read_checkpoint(ckpt)[0]["step"] == 100
    monkeypatch.undo()  # space is freed: what was in memory is saved to another file and restores
    link.save(sim, tmp_path / "rescued.gbz")
    other, sim2 = make_run(seed=3)
    assert other.restore(sim2, tmp_path / "rescued.gbz").step == 300
    assert other.bias.n_hills == 15
    np.testing.assert_array_equal(other.bias.values, link.bias.values)
    rep.close()


def test_first_checkpoint_failing_says_none_was_written(tmp_path, monkeypatch):
    link, sim = make_run()
    rep = link.reporter(STRIDE, checkpoint=tmp_path / "run.gbz", checkpoint_every=40,
                        max_checkpoint_failures=1)
    sim.reporters.append(rep)
    FailingWrites(monkeypatch).armed = 1
    with pytest.raises(gb.CheckpointError, match=r"could not be written 1 time in a row \(step 40\).*"
                                                 "no checkpoint has been written by this run"):
        sim.step(40)
    assert not (tmp_path / "run.gbz").exists()
    rep.close()


@pytest.mark.parametrize("value", [0, -1, 2.5, True, "3"])
def test_bad_max_checkpoint_failures(value):
    link, _ = make_run()
    with pytest.raises(gb.ParameterError, match=rf"max_checkpoint_failures must be an integer >= 1.*{value}"):
        link.reporter(STRIDE, checkpoint="x.gbz", checkpoint_every=100, max_checkpoint_failures=value)


# ------------------------------------------------------------------------------- two runs, one checkpoint
CHILD = textwrap.dedent("""
    import math, warnings
    import openmm as mm
    from openmm import app
    from gridbias import openmm as gbo
    from gridbias.demo.dipeptide import backbone_dihedral_atoms, build_dipeptide
    warnings.simplefilter("ignore")
    top, pos, system = build_dipeptide()
    cvs = [gbo.dihedral(*quad) for quad in backbone_dihedral_atoms(top)]
    bias = gbo.make_bias(cvs, lower=[-math.pi] * 2, upper=[math.pi] * 2, bins=[64, 64], sigma=[0.35, 0.35],
                         height=1.2, temperature=300.0, bias_factor=10.0)
    link = gbo.attach(system, cvs, bias)
    sim = app.Simulation(top, system, mm.LangevinMiddleIntegrator(300, 1, 0.002),
                         mm.Platform.getPlatformByName("Reference"))
    sim.context.setPositions(pos)
    sim.reporters.append(link.reporter(20, checkpoint={path!r}, checkpoint_every=20))
    sim.step(20)
    print("HELD", flush=True)
    while True:
        sim.step(20)
""")


def test_second_run_is_refused_and_a_killed_runs_lock_is_taken_over(tmp_path):
    """A second run on the same checkpoint path refuses to start, naming the live holder's pid and host;
    once the holder is killed (SIGKILL, possibly while writing), a new run takes the lock over and
    continues from the dead run's checkpoint."""
    path = tmp_path / "run.gbz"
    script = CHILD.format(path=str(path))
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    with open(tmp_path / "child.err", "w") as err:
        child = subprocess.Popen([sys.executable, "-c", script], env=env, stdout=subprocess.PIPE, stderr=err,
                                 text=True)
    try:
        started, _, _ = select.select([child.stdout], [], [], 120)  # never hang the suite on a stuck child
        held = bool(started) and child.stdout.readline().strip() == "HELD"
        assert held, (tmp_path / "child.err").read_text()[-3000:]
        link, sim = make_run()
        with pytest.raises(gb.LockError, match=rf"in use by process {child.pid} on host "
                                               rf"'{socket.gethostname()}'"):
            link.reporter(STRIDE, checkpoint=path, checkpoint_every=100)
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait()
        child.stdout.close()
    assert Path(str(path) + ".lock").exists()  # left behind by the killed run
    rep = link.reporter(STRIDE, checkpoint=path, checkpoint_every=STRIDE)
    assert json.loads(Path(str(path) + ".lock").read_text())["pid"] == os.getpid()
    assert [p.name for p in tmp_path.iterdir() if ".tmp-" in p.name] == []
    sim.reporters.append(rep)
    meta = link.restore(sim, path)
    assert meta.step >= 20 and link.bias.n_hills == meta.step // 20
    sim.step(100)
    assert read_checkpoint(path)[0]["step"] == meta.step + 100
    rep.close()
    assert not Path(str(path) + ".lock").exists()


# ---------------------------------------------------------------------------------------------- blow-ups
def test_blown_up_simulation_stops_without_a_hill_and_keeps_the_checkpoint(tmp_path):
    """Two non-bonded atoms pushed 0.1 pm apart blow the dynamics up (Lennard-Jones r^-12: the next
    positions are NaN). The reporter stops the run with BlownUpError saying so, deposits nothing from the
    NaN CVs, and the last good checkpoint stays on disk and restores into a run that goes on."""
    link, sim = make_run()
    ckpt, log = tmp_path / "run.gbz", tmp_path / "run.gbl"
    rep = link.reporter(STRIDE, checkpoint=ckpt, checkpoint_every=40, log=log)
    sim.reporters.append(rep)
    sim.step(40)
    good = ckpt.read_bytes()
    values, hills = np.array(link.bias.values), link.bias.n_hills
    positions = sim.context.getState(getPositions=True).getPositions(asNumpy=True)._value.copy()
    positions[21] = positions[0] + 1e-4  # two methyl carbons (ACE and NME ends) on top of each other
    sim.context.setPositions(positions)
    expected = (r"CV values are not finite at step 60: \[nan, nan\] \(\['phi', 'psi'\]\); the simulation has "
                rf"blown up\. Stopping; the last checkpoint is '{re.escape(str(ckpt))}' at step 40")
    with pytest.raises(gb.BlownUpError, match=expected):
        sim.step(40)
    assert not np.isfinite(sim.context.getState(getPositions=True).getPositions(asNumpy=True)._value).all()
    assert link.bias.n_hills == hills == 2
    np.testing.assert_array_equal(link.bias.values, values)
    assert ckpt.read_bytes() == good
    assert read_cvlog(log).n_records == 2  # the NaN step was not logged either
    rep.close()
    other, sim2 = make_run(seed=4)
    rep2 = other.reporter(STRIDE, checkpoint=ckpt, checkpoint_every=40, log=log)
    sim2.reporters.append(rep2)
    assert other.restore(sim2, ckpt).step == 40 and other.bias.n_hills == 2
    sim2.step(40)
    assert other.bias.n_hills == 4 and read_checkpoint(ckpt)[0]["step"] == 80
    assert np.isfinite(read_cvlog(log).data).all()
    rep2.close()


# ------------------------------------------------------------------------------ damaged and foreign files
def _damage(raw, how):
    k = gbc.HEADER_SIZE + struct.unpack("<I", raw[20:24])[0]  # first payload byte
    flip = lambda b, i: b[:i] + bytes([b[i] ^ 0x10]) + b[i + 1:]  # noqa: E731
    return {
        "empty": b"",
        "cut in the magic": raw[:7],
        "cut in the header": raw[:40],
        "cut after the kind": raw[:k],
        "cut in half": raw[: len(raw) // 2],
        "last byte missing": raw[:-1],
        "byte appended": raw + b"\x00",
        "flip in the magic": flip(raw, 3),
        "flip in the version": flip(raw, 16),
        "flip in the payload length": flip(raw, 24),
        "flip in the checksum": flip(raw, 40),
        "flip in the kind": flip(raw, 66),
        "flip in the metadata": flip(raw, k + 200),
        "flip in the grid values": flip(raw, len(raw) // 3),
        "flip in the last byte": flip(raw, len(raw) - 1),
    }[how]


DAMAGE = {
    "empty": "is empty",
    "cut in the magic": "is truncated: 7 bytes",
    "cut in the header": "shorter than the 64-byte header",
    "cut after the kind": "is truncated",
    "cut in half": "is truncated",
    "last byte missing": "is truncated",
    "byte appended": "1 unexpected bytes after the payload",
    "flip in the magic": r"not a gridbias checkpoint \(wrong magic bytes\)",
    "flip in the version": "newer than the version this gridbias reads",
    "flip in the payload length": "is truncated|unexpected bytes after the payload",
    "flip in the checksum": "fails its SHA-256 checksum",
    "flip in the kind": "unreadable kind|fails its SHA-256 checksum|holds kind 'g.*', expected",
    "flip in the metadata": "fails its SHA-256 checksum",
    "flip in the grid values": "fails its SHA-256 checksum",
    "flip in the last byte": "fails its SHA-256 checksum",
}


@pytest.mark.parametrize("how", list(DAMAGE))
def test_damaged_run_checkpoint_is_refused_by_reader_and_restore(tmp_path, how):
    """Each damage of a checkpoint the reporter wrote gives a CheckpointError naming the file and the
    problem, from read_checkpoint and from link.restore, and the run it was offered to is untouched."""
    raw, _ = run_checkpoint_bytes()
    path = tmp_path / "run.gbz"
    path.write_bytes(_damage(raw, how))
    with pytest.raises(gb.CheckpointError, match=DAMAGE[how]) as info:
        read_checkpoint(path)
    assert str(path) in str(info.value)
    link, sim = make_run()
    sim.step(30)
    link.deposit(sim)
    before = snapshot(link, sim)
    with pytest.raises(gb.CheckpointError, match=DAMAGE[how]):
        link.restore(sim, path)
    assert_unchanged(before, snapshot(link, sim))


def test_wrong_files_offered_to_restore(tmp_path):
    """The run's own CV log, a core bias file, a plot, a folder and a missing path: each is named."""
    raw, log_raw = run_checkpoint_bytes()
    link, sim = make_run()
    before = snapshot(link, sim)
    (tmp_path / "run.gbl").write_bytes(log_raw)
    link.bias.copy().save(tmp_path / "bias.gbz")
    (tmp_path / "plot.png").write_bytes(b"\x89PNG\r\n\x1a\n" + bytes(200))
    (tmp_path / "folder.gbz").mkdir()
    for name, match in [("run.gbl", "gridbias CV log"),
                        ("bias.gbz", "holds kind 'gridbias.bias', expected 'gridbias.openmm-run'"),
                        ("plot.png", "PNG image"),
                        ("folder.gbz", "could not read checkpoint .*folder.gbz"),
                        ("absent.gbz", "does not exist")]:
        with pytest.raises(gb.CheckpointError, match=match):
            link.restore(sim, tmp_path / name)
    assert_unchanged(before, snapshot(link, sim))
    # and the CV-log reader refuses the run checkpoint
    (tmp_path / "run.gbz").write_bytes(raw)
    with pytest.raises(gb.CVLogError, match=r"it is a gridbias checkpoint"):
        read_cvlog(tmp_path / "run.gbz")


@functools.lru_cache(maxsize=1)
def _fuzz_target():
    link, sim = make_run(seed=9)
    sim.step(20)
    return link, sim


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(edits=st.lists(st.tuples(st.integers(0, 10**7), st.integers(0, 255)), min_size=1, max_size=4),
       cut=st.none() | st.integers(0, 10**7))
def test_fuzz_mutated_run_checkpoint(tmp_path, edits, cut):
    """Random byte edits and cuts of a real run checkpoint: read_checkpoint and link.restore raise only
    CheckpointError (or load it when the edits changed nothing) and never touch the run on failure."""
    raw, _ = run_checkpoint_bytes()
    mutated = bytearray(raw)
    for position, value in edits:
        mutated[position % len(raw)] = value
    if cut is not None:
        mutated = mutated[: cut % len(raw)]
    mutated = bytes(mutated)
    path = tmp_path / "fuzz.gbz"
    path.write_bytes(mutated)
    link, sim = _fuzz_target()
    before = snapshot(link, sim)
    try:
        link.restore(sim, path)
    except gb.CheckpointError:
        assert_unchanged(before, snapshot(link, sim))
    else:
        assert mutated == raw


def _rewritten(raw, tmp_path, change):
    """A checksum-valid run checkpoint whose (meta, arrays) went through ``change``."""
    original = tmp_path / "original.gbz"
    original.write_bytes(raw)
    meta, arrays = read_checkpoint(original)
    change(meta, arrays)
    path = tmp_path / "crafted.gbz"
    write_checkpoint(path, meta, arrays, kind=gbo.CHECKPOINT_KIND)
    return path


CRAFTED = {
    "grid values missing": (lambda m, a: a.pop("bias.coefficients"), "incomplete or invalid: 'coefficients'"),
    "engine table missing": (lambda m, a: a.pop("engine.folded_values"), r"incomplete \(missing 'engine"),
    "grid values reshaped": (lambda m, a: a.update({"bias.coefficients": np.zeros(7)}),
                             r"coefficients have shape \(7,\)"),
    "NaN in the grid": (lambda m, a: a["bias.coefficients"].__setitem__((0, 3, 3, 0), np.nan),
                        "coefficients hold NaN"),
    "hill count too large": (lambda m, a: m["bias"].update({"n_hills": 11}), "does not match n_hills=11"),
    "engine table of another size": (lambda m, a: a.update({"engine.folded_values": np.zeros((8, 8))}),
                                     r"engine table of shape \(8, 8\)"),
    "more folded hills than hills": (lambda m, a: m["engine"].update({"n_folded": 99}), "n_folded=99"),
    "another CV": (lambda m, a: m["cvs"][1]["atoms"].__setitem__(3, 17), "CV 1 differs"),
    "another system": (lambda m, a: m.update({"n_particles": 23}), "23 particles; this System has 22"),
    "another grid": (lambda m, a: m["bias"]["grid"].update({"bins": [32, 32]}),
                     r"coefficients have shape \(4, 64, 64, 1\).*the grid needs \(4, 32, 32, 1\)"),
    "another hill height": (lambda m, a: m["bias"].update({"height": 2.0}), "height differs: 1.2 vs 2.0"),
    "newer format": (lambda m, a: m.update({"version": 99}), "newer gridbias"),
    "not a bias state": (lambda m, a: m["bias"].update({"kind": "other"}), "not a gridbias bias state"),
    "metadata missing": (lambda m, a: m.pop("engine"), r"incomplete \(missing 'engine'\)"),
}


@pytest.mark.parametrize("case", list(CRAFTED))
def test_checksum_valid_but_inconsistent_run_checkpoint(tmp_path, case):
    """A file with a correct checksum but contents that do not fit (a crafted file, or one from a buggy
    writer): restore refuses it with a CheckpointError before changing anything."""
    raw, _ = run_checkpoint_bytes()
    change, match = CRAFTED[case]
    path = _rewritten(raw, tmp_path, change)
    link, sim = make_run()
    before = snapshot(link, sim)
    with pytest.raises(gb.CheckpointError, match=match):
        link.restore(sim, path)
    assert_unchanged(before, snapshot(link, sim))


CRAFTED_TYPES = {
    "platform missing": lambda m, a: m.pop("platform"),
    "version not a number": lambda m, a: m.update({"version": "x"}),
    "bias not an object": lambda m, a: m.update({"bias": "x"}),
    "cvs null": lambda m, a: m.update({"cvs": None}),
    "particle count not a number": lambda m, a: m.update({"n_particles": "x"}),
    "engine not an object": lambda m, a: m.update({"engine": "x"}),
    "n_folded not a number": lambda m, a: m["engine"].update({"n_folded": "x"}),
    "n_outside not a number": lambda m, a: m["bias"].update({"n_outside": "x"}),
}


@pytest.mark.parametrize("case", list(CRAFTED_TYPES))
def test_checksum_valid_metadata_of_wrong_type(tmp_path, case):
    """Metadata of the wrong type in a checksum-valid file is a CheckpointError, never a raw KeyError,
    TypeError, ValueError or AttributeError, and nothing is changed before it is raised."""
    raw, _ = run_checkpoint_bytes()
    path = _rewritten(raw, tmp_path, CRAFTED_TYPES[case])
    link, sim = make_run()
    before = snapshot(link, sim)
    with pytest.raises(gb.CheckpointError):
        link.restore(sim, path)
    assert_unchanged(before, snapshot(link, sim))


def test_run_log_with_a_partial_last_record_loses_only_that_record(tmp_path):
    """A run killed in the middle of a log record: the reader drops the partial record only; the restarted
    run's reporter cuts it off, cuts the log back to the checkpoint and appends after it."""
    _, log_raw = run_checkpoint_bytes()
    raw, _ = run_checkpoint_bytes()
    (tmp_path / "run.gbz").write_bytes(raw)
    (tmp_path / "run.gbl").write_bytes(log_raw + log_raw[-LOG_RECORD_BYTES:-LOG_RECORD_BYTES + 13])
    log = read_cvlog(tmp_path / "run.gbl")
    assert log.n_records == 10 and log.n_partial_bytes == 13
    np.testing.assert_array_equal(log.column("step"), np.arange(20, 201, 20))
    link, sim = make_run()
    rep = link.reporter(STRIDE, checkpoint=tmp_path / "run.gbz", checkpoint_every=100,
                        log=tmp_path / "run.gbl")
    sim.reporters.append(rep)
    link.restore(sim, tmp_path / "run.gbz")
    sim.step(40)
    rep.close()
    log = read_cvlog(tmp_path / "run.gbl")
    assert log.n_partial_bytes == 0
    np.testing.assert_array_equal(log.column("step"), np.arange(20, 241, 20))
    # a flipped header byte of the log is refused by the reader and by a reporter that would append to it
    damaged = bytearray(log_raw)
    damaged[70] ^= 0x01
    (tmp_path / "bad.gbl").write_bytes(bytes(damaged))
    with pytest.raises(gb.CVLogError, match="bad.gbl"):
        read_cvlog(tmp_path / "bad.gbl")
    link2, sim2 = make_run()
    sim2.reporters.append(link2.reporter(STRIDE, log=tmp_path / "bad.gbl"))
    with pytest.raises(gb.CVLogError, match="bad.gbl"):
        sim2.step(STRIDE)


# ------------------------------------------------------------------------------------ nothing is executed
class _Trap:
    """Unpickling this creates a folder: proof that something in a file was executed."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (os.mkdir, (self.marker,))


def test_pickle_planted_in_a_run_checkpoint_is_refused_unexecuted(tmp_path):
    """A run checkpoint whose hill heights were replaced by a pickled object array, with its checksum
    recomputed (so only the parser stands between the file and the payload): restore refuses it and the
    payload never runs. The same payload as a whole file is named as a pickle, also unexecuted."""
    control = tmp_path / "control"
    np.load(io.BytesIO(_npy_of(np.array([_Trap(str(control))], dtype=object))), allow_pickle=True)
    assert control.exists()  # the trap works when unpickled
    marker = tmp_path / "executed"
    raw, _ = run_checkpoint_bytes()
    members = {}
    with zipfile.ZipFile(io.BytesIO(payload_of(raw))) as archive:
        for name in archive.namelist():
            members[name] = archive.read(name)
    members["bias.hill_heights.npy"] = _npy_of(np.array([_Trap(str(marker))] * 10, dtype=object))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_STORED) as archive:
        for name, data in members.items():
            archive.writestr(name, data)
    path = tmp_path / "planted.gbz"
    path.write_bytes(with_payload(raw, buffer.getvalue()))
    link, sim = make_run()
    before = snapshot(link, sim)
    with pytest.raises(gb.CheckpointError, match="valid checksum but an unreadable payload.*allow_pickle"):
        link.restore(sim, path)
    assert not marker.exists()
    assert_unchanged(before, snapshot(link, sim))
    (tmp_path / "whole.gbz").write_bytes(pickle.dumps(_Trap(str(marker))))
    with pytest.raises(gb.CheckpointError, match="Python pickle .it was not unpickled"):
        link.restore(sim, tmp_path / "whole.gbz")
    assert not marker.exists()


def test_code_in_metadata_text_is_data(tmp_path):
    """Metadata strings that are Python code stay strings: a checkpoint whose labels, platform and date
    hold code restores (the platform string only selects the portable-state path) and runs nothing."""
    marker = tmp_path / "executed"
    code = f"__import__('os').mkdir({str(marker)!r})"

    def plant(meta, arrays):
        meta.update({"labels": [code, code], "platform": code, "written": code, "openmm_version": code})

    raw, _ = run_checkpoint_bytes()
    path = _rewritten(raw, tmp_path, plant)
    link, sim = make_run()
    meta = link.restore(sim, path)
    assert meta.platform == code and link.bias.n_hills == 10
    assert not marker.exists()


def _npy_of(array):
    buffer = io.BytesIO()
    np.lib.format.write_array(buffer, array, allow_pickle=True)
    return buffer.getvalue()
