"""Locks end with their holder and always name it; a really full disk gives WriteError and loses nothing.

- A holder that forked a child (a pool worker) and died: the child does not keep the lock.
- Runs started at the same moment: exactly one wins, every refusal names the holder's pid.
- A tiny tmpfs (as root, where the machine allows mounting one): checkpoints, CV logs and result files
  fail with WriteError (exit 1 from the command line), old files intact, no temporary files left.
"""

import errno
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

import gridbias as gb
from gridbias.checkpoint import CheckpointLock, read_checkpoint, write_checkpoint
from gridbias.cvlog import CVLogWriter, read_cvlog

REPO = Path(__file__).resolve().parents[2]


def python(script, **kwargs):
    env = dict(os.environ, PYTHONPATH=str(REPO))
    return subprocess.Popen([sys.executable, "-c", textwrap.dedent(script)], env=env, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, **kwargs)


def test_a_forked_child_does_not_keep_the_lock_of_its_dead_parent(tmp_path):
    """The holder forks a child that lives on (as a pool worker would) and is killed: the lock is free."""
    path = tmp_path / "run.gbz"
    holder = python(f"""
        import os, sys, time
        from gridbias.checkpoint import CheckpointLock
        lock = CheckpointLock({str(path)!r}).acquire()
        child = os.fork()
        if child == 0:
            time.sleep(60)
            os._exit(0)
        print(child, flush=True)
        time.sleep(60)
    """)
    child = int(holder.stdout.readline())
    try:
        with pytest.raises(gb.LockError, match=f"in use by process {holder.pid} "):
            CheckpointLock(path).acquire()
        holder.kill()
        holder.wait(30)
        os.kill(child, 0)  # the child still lives
        with CheckpointLock(path) as lock:
            assert lock.previous_holder["pid"] == holder.pid
    finally:
        os.kill(child, 9)
        holder.kill()


def test_a_forked_child_does_not_keep_a_cv_log_writer_lock(tmp_path):
    path = tmp_path / "run.gbl"
    holder = python(f"""
        import os, time
        from gridbias.cvlog import CVLogWriter
        writer = CVLogWriter({str(path)!r}, ["step"], ["1"])
        child = os.fork()
        if child == 0:
            time.sleep(60)
            os._exit(0)
        print(child, flush=True)
        time.sleep(60)
    """)
    child = int(holder.stdout.readline())
    try:
        holder.kill()
        holder.wait(30)
        os.kill(child, 0)
        CVLogWriter(path, ["step"], ["1"]).close()  # the dead writer's child does not hold the log
    finally:
        os.kill(child, 9)


@pytest.mark.skipif(not os.path.exists("/proc/locks"), reason="names the holder from Linux's /proc/locks")
def test_a_refused_cv_log_writer_names_the_holder(tmp_path):
    path = tmp_path / "run.gbl"
    holder = python(f"""
        import time
        from gridbias.cvlog import CVLogWriter
        writer = CVLogWriter({str(path)!r}, ["step"], ["1"])
        print("HELD", flush=True)
        time.sleep(60)
    """)
    try:
        assert holder.stdout.readline() == "HELD\n"
        with pytest.raises(gb.LockError, match=f"already open for writing .*held by process {holder.pid} on host"):
            CVLogWriter(path, ["step"], ["1"])
    finally:
        holder.kill()
        holder.wait(30)


def test_runs_started_at_the_same_moment_all_name_the_holder(tmp_path):
    """The issue: simultaneous starts often said the holder 'has not recorded its id yet'."""
    path, go = tmp_path / "run.gbz", tmp_path / "go"
    script = f"""
        import os, time
        from gridbias.checkpoint import CheckpointLock
        from gridbias.errors import LockError
        print("READY", flush=True)
        while not os.path.exists({str(go)!r}):
            time.sleep(0.001)
        try:
            lock = CheckpointLock({str(path)!r}).acquire()
            print("HELD", flush=True)
            time.sleep(2)
        except LockError as exc:
            print("REFUSED", exc, flush=True)
    """
    runs = [python(script) for _ in range(6)]
    assert [r.stdout.readline() for r in runs] == ["READY\n"] * 6  # all imported, all waiting
    go.touch()
    outputs = [r.communicate(timeout=60)[0] for r in runs]
    go.unlink()
    held = [o for o in outputs if o.startswith("HELD")]
    refused = [o for o in outputs if o.startswith("REFUSED")]
    assert len(held) == 1 and len(refused) == 5, outputs
    winner = next(r.pid for r, o in zip(runs, outputs, strict=True) if o.startswith("HELD"))
    for message in refused:
        assert f"in use by process {winner} on host" in message, message


# ------------------------------------------------------------------------------------------ a full disk
@pytest.fixture
def tiny_disk(tmp_path):
    """A 256 KiB tmpfs mounted at tmp_path/disk (root only; skipped where mounting is not allowed)."""
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("mounting a tmpfs needs root and mount(8)")
    disk = tmp_path / "disk"
    disk.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=256k", "tmpfs", str(disk)], capture_output=True,
                          text=True)
    if done.returncode != 0:
        pytest.skip(f"this machine does not allow mounting a tmpfs: {done.stderr.strip()}")
    try:
        yield disk
    finally:
        subprocess.run(["umount", str(disk)], capture_output=True)


def test_a_full_tmpfs_gives_write_errors_and_keeps_old_files(tiny_disk, capsys):
    ckpt = tiny_disk / "run.gbz"
    write_checkpoint(ckpt, {"step": 1}, {"a": np.zeros(100)}, kind="test.state")
    before = ckpt.read_bytes()
    with pytest.raises(gb.WriteError, match="No space left on device") as info:
        write_checkpoint(ckpt, {"step": 2}, {"a": np.zeros(100_000)}, kind="test.state")  # 800 kB
    assert not isinstance(info.value, ValueError) and info.value.path == str(ckpt)
    assert ckpt.read_bytes() == before and read_checkpoint(ckpt)[0] == {"step": 1}
    assert [p.name for p in tiny_disk.iterdir()] == ["run.gbz"]  # no temporary file left

    with CVLogWriter(tiny_disk / "run.gbl", ["a", "b"], ["1", "1"]) as log:
        log.write(np.ones((10, 2)))
        with pytest.raises(gb.WriteError, match="could not append to CV log .*No space left"):
            log.write(np.ones((100_000, 2)))
        assert log.n_records == 10
    assert read_cvlog(tiny_disk / "run.gbl").n_records == 10

    from gridbias.cli import main

    grid = gb.Grid([0.0], [1.0], [20])
    bias = gb.GridBias(grid, [0.1], 1.0, 300.0)
    bias.deposit([0.5], time=1.0)
    source = tiny_disk.parent / "bias.gbz"
    bias.save(source)
    fd = os.open(tiny_disk / "filler", os.O_WRONLY | os.O_CREAT)
    try:  # fill the disk to the last block
        while True:
            os.write(fd, b"\0" * 4096)
    except OSError as exc:
        assert exc.errno == errno.ENOSPC
    finally:
        os.close(fd)
    capsys.readouterr()
    code = main(["export", str(source), str(tiny_disk / "fes.csv")])
    err = capsys.readouterr().err
    assert code == 1 and "No space left" in err and err.count("\n") == 1
    assert not (tiny_disk / "fes.csv").exists() and not any(".tmp-" in p.name for p in tiny_disk.iterdir())
