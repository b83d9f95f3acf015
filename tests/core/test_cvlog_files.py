"""Tests of gridbias.cvlog: round trips, reopen and append, partial records, truncate_after, bad files."""

import errno
import hashlib
import json
import os
import signal
import stat
import struct
import subprocess
import sys
import textwrap
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gridbias import checkpoint
from gridbias.cvlog import FORMAT_VERSION, HEADER_SIZE, MAGIC, CVLog, CVLogWriter, read_cvlog
from gridbias.errors import CVLogError, LockError, ParameterError

REPO = Path(__file__).resolve().parents[2]
COLUMNS = ["step", "time", "phi", "bias"]
UNITS = ["1", "ps", "rad", "kJ/mol"]
META = {"system": "toy dimer in a box", "note": "Größe · 尺寸", "stride": 50}


def rows(start, stop):
    """Records whose every value follows from the step, so any corruption shows."""
    step = np.arange(start, stop, dtype=np.float64)
    return np.column_stack([step, 0.002 * step, np.sin(step), np.sqrt(step)])


def data_offset(path):
    head = Path(path).read_bytes()[:HEADER_SIZE]
    text_len = struct.unpack("<Q", head[24:32])[0]
    return HEADER_SIZE + -(-text_len // 8) * 8


def rehash(raw: bytes, offset: int) -> bytes:
    """Recompute the header checksum of a (modified) log image, as the format defines it."""
    return raw[:32] + hashlib.sha256(raw[:32] + raw[64:offset]).digest() + raw[64:]


@pytest.fixture
def log_path(tmp_path):
    path = tmp_path / "run.gbl"
    with CVLogWriter(path, COLUMNS, UNITS, META) as log:
        log.write(rows(0, 1)[0])  # one row, shape (m,)
        log.write(rows(1, 10))  # a block, shape (k, m)
    return path


# ------------------------------------------------------------------------------------------------ round trips
def test_round_trip(log_path):
    log = read_cvlog(log_path)
    assert isinstance(log, CVLog)
    assert log.columns == tuple(COLUMNS) and log.units == tuple(UNITS) and log.metadata == META
    assert log.n_records == 10 and log.n_partial_bytes == 0 and log.path == str(log_path)
    assert log.data.dtype == np.float64 and log.data.shape == (10, 4)
    np.testing.assert_array_equal(log.data, rows(0, 10))
    np.testing.assert_array_equal(log.column("phi"), np.sin(np.arange(10.0)))
    assert log.unit("bias") == "kJ/mol"
    assert not log.data.flags.writeable
    assert log_path.stat().st_size == data_offset(log_path) + 10 * 8 * len(COLUMNS)  # 8*m bytes a record


def test_mmap_gives_the_same_data(log_path):
    mapped = read_cvlog(log_path, mmap=True)
    np.testing.assert_array_equal(mapped.data, read_cvlog(log_path).data)
    assert isinstance(mapped.data, np.memmap) and not mapped.data.flags.writeable


def test_layout_readable_with_numpy_alone(log_path):
    """The recipe in the module docstring works on a real file."""
    head = log_path.read_bytes()[:64]
    assert head[:16] == MAGIC and struct.unpack("<I", head[16:20])[0] == FORMAT_VERSION
    m, text_len = int.from_bytes(head[20:24], "little"), int.from_bytes(head[24:32], "little")
    header = json.loads(log_path.read_bytes()[64:64 + text_len])
    assert header == {"columns": COLUMNS, "units": UNITS, "metadata": META}
    data = np.fromfile(log_path, dtype="<f8", offset=64 + -(-text_len // 8) * 8)
    np.testing.assert_array_equal(data[: data.size // m * m].reshape(-1, m), rows(0, 10))


def test_nonfinite_values_and_empty_log(tmp_path):
    path = tmp_path / "nf.gbl"
    with CVLogWriter(path, ["a", "b"], ["nm", ""]) as log:
        assert read_cvlog(path).data.shape == (0, 2)
        log.write(np.zeros((0, 2)))  # nothing to do
        log.write([[np.nan, np.inf], [-np.inf, -0.0]])
    got = read_cvlog(path)
    assert got.metadata == {}
    assert got.data.tobytes() == np.array([[np.nan, np.inf], [-np.inf, -0.0]]).tobytes()
    assert read_cvlog(path, mmap=True).n_records == 2


def test_missing_column_names_available_ones(log_path):
    match = r"has no column 'psi'; its columns are \['step', 'time', 'phi', 'bias'\]"
    with pytest.raises(CVLogError, match=match):
        read_cvlog(log_path).column("psi")


def test_reading_needs_one_copy_of_the_records(tmp_path):
    path = tmp_path / "big.gbl"
    block = rows(0, 250_000)  # 8 MB of records
    with CVLogWriter(path, COLUMNS, UNITS) as log:
        log.write(block)
    tracemalloc.start()
    try:
        log = read_cvlog(path)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        baseline, _ = tracemalloc.get_traced_memory()
        mapped = read_cvlog(path, mmap=True)
        mapped_peak = tracemalloc.get_traced_memory()[1] - baseline
    finally:
        tracemalloc.stop()
    assert block.nbytes <= peak < 1.2 * block.nbytes
    assert mapped_peak < 0.1 * block.nbytes
    np.testing.assert_array_equal(log.data, block)
    np.testing.assert_array_equal(mapped.data, block)


# ------------------------------------------------------------------------------------------ reopen and append
def test_reopen_and_append(log_path):
    with CVLogWriter(log_path, COLUMNS, UNITS) as log:  # metadata None: accept the file's
        assert log.n_records == 10 and log.metadata == META and log.dropped_partial_bytes == 0
        log.write(rows(10, 15))
        assert log.n_records == 15
    with CVLogWriter(log_path, COLUMNS, UNITS, dict(META)) as log:  # an equal dict is accepted
        log.write(rows(15, 20))
    np.testing.assert_array_equal(read_cvlog(log_path).data, rows(0, 20))


def test_metadata_compares_as_stored(tmp_path):
    path = tmp_path / "t.gbl"
    CVLogWriter(path, ["a"], ["1"], {"pair": (1, 2)}).close()
    CVLogWriter(path, ["a"], ["1"], {"pair": (1, 2)}).close()  # tuple reads back as a list: still equal
    assert read_cvlog(path).metadata == {"pair": [1, 2]}


@pytest.mark.parametrize(
    ("columns", "units", "metadata", "match"),
    [
        (["step", "time", "psi", "bias"], UNITS, None,
         r"different header \(columns: the file has \['step', 'time', 'phi', 'bias'\], "
         r"given \['step', 'time', 'psi', 'bias'\]\)"),
        (COLUMNS, ["1", "ps", "deg", "kJ/mol"], None, r"units: the file has \['1', 'ps', 'rad', 'kJ/mol'\]"),
        (COLUMNS, UNITS, {**META, "stride": 100},
         r"metadata: the file has \{'stride': 50\}, given \{'stride': 100\}"),
        (COLUMNS, UNITS, {"extra": 1}, r"metadata: the file has \{'extra': '<missing>', 'note'"),
    ],
)
def test_reopen_with_different_header_is_refused(log_path, columns, units, metadata, match):
    before = log_path.read_bytes()
    with pytest.raises(CVLogError, match=match):
        CVLogWriter(log_path, columns, units, metadata)
    assert log_path.read_bytes() == before
    CVLogWriter(log_path, COLUMNS, UNITS).close()  # the refused writer released its lock


def test_partial_record_is_dropped_then_cut_on_reopen(log_path):
    with open(log_path, "ab") as f:  # a writer killed 13 bytes into a record
        f.write(rows(10, 11).tobytes()[:13])
    log = read_cvlog(log_path)
    assert log.n_records == 10 and log.n_partial_bytes == 13
    np.testing.assert_array_equal(log.data, rows(0, 10))
    with CVLogWriter(log_path, COLUMNS, UNITS) as writer:
        assert writer.dropped_partial_bytes == 13 and writer.n_records == 10
        writer.write(rows(10, 12))
    log = read_cvlog(log_path)
    assert log.n_partial_bytes == 0
    np.testing.assert_array_equal(log.data, rows(0, 12))


# -------------------------------------------------------------------------------------------- truncate_after
def test_truncate_after_cuts_the_tail(log_path):
    with CVLogWriter(log_path, COLUMNS, UNITS) as log:
        inode = log_path.stat().st_ino
        assert log.truncate_after(6) == 3  # steps 7, 8, 9 are stale
        assert log.n_records == 7
        assert log.truncate_after(100) == 0
        assert log.truncate_after(6.5, column="step") == 0
        log.write(rows(7, 9))
    assert log_path.stat().st_ino == inode  # cut in place
    np.testing.assert_array_equal(read_cvlog(log_path).data, rows(0, 9))


def test_truncate_after_other_column_and_everything(log_path):
    with CVLogWriter(log_path, COLUMNS, UNITS) as log:
        assert log.truncate_after(0.0101, column="time") == 4  # time = 0.002 * step: keeps steps 0..5
        assert log.truncate_after(-1) == 6
        assert log.n_records == 0
        log.write(rows(0, 2))
    np.testing.assert_array_equal(read_cvlog(log_path).data, rows(0, 2))


def test_truncate_after_unordered_column_rewrites_atomically(tmp_path):
    """A log whose steps are not in order (an append without truncation) is filtered, order kept."""
    path = tmp_path / "u.gbl"
    unordered = np.concatenate([rows(0, 10), rows(5, 8), rows(20, 21)])
    unordered[3, 0] = np.nan  # NaN steps are kept
    with CVLogWriter(path, COLUMNS, UNITS, META) as log:
        log.write(unordered)
    os.chmod(path, 0o640)
    with CVLogWriter(path, COLUMNS, UNITS) as log:
        assert log.truncate_after(6) == 3 + 1 + 1  # steps 7, 8, 9 of the first pass, 7 of the second, and 20
        expected = unordered[~(unordered[:, 0] > 6)]
        assert log.n_records == len(expected) == 9
        with pytest.raises(LockError):  # the new file is locked too
            CVLogWriter(path, COLUMNS, UNITS)
        log.write(rows(7, 8))
    got = read_cvlog(path)
    np.testing.assert_array_equal(got.data, np.concatenate([expected, rows(7, 8)]))
    assert got.metadata == META
    assert stat.S_IMODE(path.stat().st_mode) == 0o640
    assert [p.name for p in tmp_path.iterdir()] == ["u.gbl"]


def test_truncate_after_bad_arguments(log_path):
    with CVLogWriter(log_path, COLUMNS, UNITS) as log:
        with pytest.raises(CVLogError, match=r"no column 'steps'; its columns are \['step'"):
            log.truncate_after(5, column="steps")
        with pytest.raises(ParameterError, match="value must be a number, got nan"):
            log.truncate_after(float("nan"))
        with pytest.raises(ParameterError, match="value must be a number"):
            log.truncate_after("five")
        assert log.n_records == 10


# ------------------------------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    ("columns", "units", "metadata", "match"),
    [
        ([], [], None, "columns must be a non-empty list of names, got \\[\\]"),
        ("step", ["1"], None, "columns must be a non-empty list of names, got 'step'"),
        (["a", ""], ["1", "1"], None, "column names must be non-empty str, got ''"),
        (["a", 3], ["1", "1"], None, "got 3"),
        (["a", "b", "a"], ["1", "1", "1"], None, r"repeated: \['a'\]"),
        (["a", "b"], ["1"], None,
         r"units must be a list of 2 str \(one per column \['a', 'b'\]\), got \['1'\]"),
        (["a"], [None], None, "units must be str"),
        (["a"], ["1"], {"x": float("nan")}, r"metadata\['x'\] = nan"),
        (["a"], ["1"], ["not", "a", "dict"], "metadata must be a dict or None, got list"),
    ],
)
def test_bad_constructor_arguments(tmp_path, columns, units, metadata, match):
    with pytest.raises(ParameterError, match=match):
        CVLogWriter(tmp_path / "x.gbl", columns, units, metadata)
    assert list(tmp_path.iterdir()) == []


def test_bad_rows_and_closed_writer(tmp_path):
    path = tmp_path / "r.gbl"
    log = CVLogWriter(path, ["a", "b"], ["1", "1"])
    for bad, match in [
        ([1.0, 2.0, 3.0], r"rows has shape \(3,\); expected \(2,\) or \(k, 2\) for columns \['a', 'b'\]"),
        ([[1.0], [2.0]], r"rows has shape \(2, 1\)"),
        (np.zeros((2, 2, 2)), r"rows has shape \(2, 2, 2\)"),
        (["x", "y"], r"rows must be numbers of shape \(2,\) or \(k, 2\)"),
        ([[1.0, 2.0], [3.0]], r"rows must be numbers"),
    ]:
        with pytest.raises(ParameterError, match=match):
            log.write(bad)
    assert log.n_records == 0
    log.close()
    log.close()  # idempotent
    assert log.closed and "closed" in repr(log)
    for call in (lambda: log.write([1.0, 2.0]), log.flush, lambda: log.truncate_after(0, column="a")):
        with pytest.raises(CVLogError, match=r"writer for '.*r\.gbl' is closed"):
            call()


def test_failed_append_keeps_previous_records(log_path, monkeypatch):
    real_write = os.write
    calls = []

    def short_then_enospc(fd, data):
        calls.append(len(data))
        if len(calls) == 1:
            return real_write(fd, bytes(memoryview(data)[:20]))
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    with CVLogWriter(log_path, COLUMNS, UNITS) as log:
        before = log_path.read_bytes()
        monkeypatch.setattr(os, "write", short_then_enospc)
        with pytest.raises(CVLogError, match=r"could not append to CV log .*run\.gbl.*ENOSPC") as info:
            log.write(rows(10, 13))
        monkeypatch.undo()
        assert info.value.__cause__.errno == errno.ENOSPC
        assert log_path.read_bytes() == before  # the 20 bytes that landed were cut off again
        log.write(rows(10, 11))  # and the writer still works
    np.testing.assert_array_equal(read_cvlog(log_path).data, rows(0, 11))


def test_failed_creation_leaves_nothing(tmp_path, monkeypatch):
    def fail(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", fail)
    with pytest.raises(CVLogError, match=r"could not create CV log .*new\.gbl.*No space left"):
        CVLogWriter(tmp_path / "new.gbl", COLUMNS, UNITS)
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(CVLogError, match="could not create CV log"):
        CVLogWriter(tmp_path / "missing-folder" / "new.gbl", COLUMNS, UNITS)


# -------------------------------------------------------------------------------------------- damaged files
def test_missing_and_empty(tmp_path):
    with pytest.raises(CVLogError, match=r"CV log '.*absent\.gbl' does not exist"):
        read_cvlog(tmp_path / "absent.gbl")
    (tmp_path / "empty.gbl").write_bytes(b"")
    with pytest.raises(CVLogError, match=r"empty\.gbl' is empty \(0 bytes\)"):
        read_cvlog(tmp_path / "empty.gbl")
    with pytest.raises(CVLogError, match=r"empty\.gbl' is empty"):
        CVLogWriter(tmp_path / "empty.gbl", COLUMNS, UNITS)
    with pytest.raises(CVLogError, match="could not read CV log"):
        read_cvlog(tmp_path)


def test_truncated_header_at_every_length(log_path):
    raw = log_path.read_bytes()
    for n in range(1, data_offset(log_path)):
        log_path.write_bytes(raw[:n])
        with pytest.raises(CVLogError, match=r"is truncated: \d+ bytes, shorter than"):
            read_cvlog(log_path)


def test_every_header_byte_flip_is_detected(log_path):
    raw = log_path.read_bytes()
    rng = np.random.default_rng(5)
    for position in range(data_offset(log_path)):
        mutated = bytearray(raw)
        mutated[position] ^= 1 << int(rng.integers(0, 8))
        log_path.write_bytes(bytes(mutated))
        with pytest.raises(CVLogError):
            read_cvlog(log_path)
        with pytest.raises(CVLogError):
            CVLogWriter(log_path, COLUMNS, UNITS)
    log_path.write_bytes(raw)
    assert read_cvlog(log_path).n_records == 10


def test_header_checksum_message(log_path):
    raw = bytearray(log_path.read_bytes())
    raw[70] ^= 0x01  # inside the JSON text
    log_path.write_bytes(bytes(raw))
    with pytest.raises(CVLogError, match="has a damaged header: it fails its SHA-256 checksum"):
        read_cvlog(log_path)


def test_newer_version_names_both_versions(log_path):
    raw = bytearray(log_path.read_bytes())
    raw[16:20] = struct.pack("<I", FORMAT_VERSION + 3)
    log_path.write_bytes(rehash(bytes(raw), data_offset(log_path)))
    match = rf"format version {FORMAT_VERSION + 3}, newer .*\({FORMAT_VERSION}\); upgrade"
    with pytest.raises(CVLogError, match=match):
        read_cvlog(log_path)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        (b'{"columns": ["a"], "units": ["1"]}', "KeyError"),
        (b'{"columns": ["a", "b"], "units": ["1", "1"], "metadata": {}}', "inconsistent header fields"),
        (b'{"columns": ["a"], "units": ["1"], "metadata": []}', "inconsistent header fields"),
        (b'{"columns": "a", "units": ["1"], "metadata": {}}', "columns must be a non-empty list"),
        (b"not json at all", "Expecting value"),
        (b"\xff\xfe", "codec can't decode"),
    ],
)
def test_checksum_valid_but_inconsistent_header(tmp_path, text, match):
    padded = text + b"\x00" * (-len(text) % 8)
    head = MAGIC + struct.pack("<IIQ", FORMAT_VERSION, 1, len(text))
    (tmp_path / "c.gbl").write_bytes(head + hashlib.sha256(head + padded).digest() + padded)
    with pytest.raises(CVLogError, match=rf"has a damaged header \(.*{match}"):
        read_cvlog(tmp_path / "c.gbl")


@pytest.mark.parametrize(
    ("content", "match"),
    [
        (b"\x89PNG\r\n\x1a\n" + bytes(100), "not a gridbias CV log .*PNG image"),
        (b"step time phi\n0 0.0 1.2\n", r"not a gridbias CV log \(wrong magic bytes\)$"),
        (MAGIC[:5], "is truncated: 5 bytes"),
    ],
)
def test_foreign_files(tmp_path, content, match):
    (tmp_path / "f.gbl").write_bytes(content)
    with pytest.raises(CVLogError, match=match):
        read_cvlog(tmp_path / "f.gbl")


def test_checkpoint_and_npz_are_recognised(tmp_path):
    checkpoint.write_checkpoint(tmp_path / "c.gbz", {}, {}, kind="gridbias.bias")
    with pytest.raises(CVLogError, match=r"it is a gridbias checkpoint \(read it with gridbias.checkpoint"):
        read_cvlog(tmp_path / "c.gbz")
    np.savez(tmp_path / "n.npz", a=np.zeros(3))
    with pytest.raises(CVLogError, match="ZIP archive"):
        read_cvlog(tmp_path / "n.npz")


def test_checkpoint_reader_recognises_cvlogs(log_path):
    with pytest.raises(checkpoint.CheckpointError, match="gridbias CV log"):
        checkpoint.read_checkpoint(log_path)


# --------------------------------------------------------------------------------------------------- fuzzing
@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=300) | st.binary(max_size=300).map(lambda b: MAGIC + b))
def test_fuzz_random_bytes(tmp_path, data):
    (tmp_path / "r.gbl").write_bytes(data)
    with pytest.raises(CVLogError):
        read_cvlog(tmp_path / "r.gbl")


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    edits=st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 255)), min_size=1, max_size=6),
    cut=st.none() | st.integers(0, 10**6),
)
def test_fuzz_mutated_logs(tmp_path, edits, cut):
    """Header damage is always an error; record damage only changes values; truncation loses only the tail."""
    path = tmp_path / "m.gbl"
    path.unlink(missing_ok=True)
    with CVLogWriter(path, COLUMNS, UNITS, META) as log:
        log.write(rows(0, 8))
    raw = path.read_bytes()
    offset = data_offset(path)
    mutated = bytearray(raw)
    for position, value in edits:
        mutated[position % len(raw)] = value
    if cut is not None:
        mutated = mutated[: cut % len(raw)]
    path.write_bytes(bytes(mutated))
    try:
        log = read_cvlog(path)
    except CVLogError:
        assert mutated[:offset] != raw[:offset]
        return
    assert mutated[:offset] == raw[:offset]
    record = 8 * len(COLUMNS)
    assert log.n_records == (len(mutated) - offset) // record
    assert log.n_partial_bytes == (len(mutated) - offset) % record
    assert log.data.tobytes() == bytes(mutated[offset: offset + log.n_records * record])


# ------------------------------------------------------------------------------------------- one writer only
def test_second_writer_is_refused(log_path):
    script = textwrap.dedent(f"""
        from gridbias.cvlog import CVLogWriter
        from gridbias.errors import LockError
        try:
            CVLogWriter({str(log_path)!r}, {COLUMNS!r}, {UNITS!r})
            print("OPENED")
        except LockError as exc:
            print("REFUSED", exc)
    """)
    env = dict(os.environ, PYTHONPATH=str(REPO))
    with CVLogWriter(log_path, COLUMNS, UNITS):
        with pytest.raises(LockError, match=r"run\.gbl' is already open for writing"):
            CVLogWriter(log_path, COLUMNS, UNITS)
        out = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True, text=True,
                             timeout=60)
        assert out.stdout.startswith("REFUSED"), out.stdout + out.stderr
    CVLogWriter(log_path, COLUMNS, UNITS).close()


# ------------------------------------------------------------------------------------------------ hard kills
def _append_forever(path, rng_seed):
    rng = np.random.default_rng(rng_seed)
    with CVLogWriter(path, COLUMNS, UNITS, META) as log:
        n = log.n_records
        while True:
            k = int(rng.integers(1, 9))
            log.write(rows(n, n + k))
            n += k


def test_sigkill_at_random_moments_loses_at_most_a_partial_record(tmp_path):
    path = tmp_path / "k.gbl"
    rng = np.random.default_rng(99)
    last = 0
    for i in range(20):
        pid = os.fork()
        if pid == 0:  # child: reopen (cutting any partial record) and append until killed
            try:
                _append_forever(str(path), i)
            finally:
                os._exit(1)
        time.sleep(rng.uniform(0.005, 0.05))
        os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
        assert os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL
        log = read_cvlog(path)
        assert log.n_records >= last
        assert log.n_partial_bytes < 8 * len(COLUMNS)
        np.testing.assert_array_equal(log.data, rows(0, log.n_records))
        last = log.n_records
    assert last > 1000  # the children really appended between kills
    with CVLogWriter(path, COLUMNS, UNITS, META) as log:  # restart from a checkpoint taken at step 500
        assert log.truncate_after(500) == last - 501
        log.write(rows(501, 600))
    np.testing.assert_array_equal(read_cvlog(path).data, rows(0, 600))
