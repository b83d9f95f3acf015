"""Tests of gridbias.checkpoint: round trips, atomic writes, damaged and foreign files, lock, hard kills."""

import errno
import hashlib
import io
import os
import pickle
import signal
import socket
import struct
import subprocess
import sys
import textwrap
import time
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from gridbias.checkpoint import (
    FORMAT_VERSION,
    HEADER_SIZE,
    MAGIC,
    CheckpointLock,
    read_checkpoint,
    write_checkpoint,
)
from gridbias.errors import CheckpointError, LockError, ParameterError

REPO = Path(__file__).resolve().parents[2]
KIND = "gridbias.test"

ALL_DTYPES = [
    np.bool_, np.int8, np.int16, np.int32, np.int64, np.uint8, np.uint16, np.uint32, np.uint64,
    np.float16, np.float32, np.float64, np.longdouble, np.complex64, np.complex128,
]


def sample_state():
    rng = np.random.default_rng(7)
    meta = {
        "format": "test",
        "step": 1200,
        "temperature": 300.0,
        "bias_factor": None,
        "walls": [{"cv": 1, "bound": 1.3, "k": 2000.0, "side": "above"}],
        "label": "Schwefelsäure · 硫酸 · 🧪",
    }
    arrays = {
        "values": rng.normal(size=(9, 7)),
        "centers": rng.uniform(-3, 3, size=(25, 2)),
        "times": np.where(rng.random(25) < 0.2, np.nan, rng.uniform(0, 10, 25)),
        "engine_state": rng.integers(0, 256, size=300, dtype=np.uint8),
        "periodic": np.array([True, False]),
    }
    return meta, arrays


def assert_same_arrays(expected, got):
    assert list(got) == list(expected)
    for name, array in expected.items():
        assert got[name].dtype == array.dtype, name
        assert got[name].shape == array.shape, name
        assert got[name].tobytes() == np.ascontiguousarray(array).tobytes(), name  # bitwise, NaN included


def temp_files(folder):
    return [p.name for p in Path(folder).iterdir() if ".tmp-" in p.name]


def rehash(raw: bytes) -> bytes:
    """Recompute the checksum field of a (modified) checkpoint image, as the format defines it."""
    return raw[:32] + hashlib.sha256(raw[:32] + raw[64:]).digest() + raw[64:]


def wrap_payload(payload: bytes, kind: str = KIND, version: int = FORMAT_VERSION) -> bytes:
    """A checkpoint image around any payload, with a valid checksum."""
    kind_b = kind.encode()
    head = MAGIC + struct.pack("<IIQ", version, len(kind_b), len(payload))
    return rehash(head + bytes(32) + kind_b + payload)


@pytest.fixture
def ckpt(tmp_path):
    path = tmp_path / "run.gbz"
    meta, arrays = sample_state()
    write_checkpoint(path, meta, arrays, kind=KIND)
    return path


# ------------------------------------------------------------------------------------------------ round trips
def test_round_trip_sample_state(ckpt):
    meta, arrays = sample_state()
    got_meta, got_arrays = read_checkpoint(ckpt, kind=KIND)
    assert got_meta == meta
    assert_same_arrays(arrays, got_arrays)
    assert all(a.flags.writeable for a in got_arrays.values())


@pytest.mark.parametrize("dtype", ALL_DTYPES, ids=lambda d: np.dtype(d).name)
def test_round_trip_every_dtype_and_zero_size(tmp_path, dtype):
    rng = np.random.default_rng(3)
    arrays = {
        "scalar": np.array(rng.integers(0, 2), dtype=dtype),
        "vector": (rng.random(11) * 100).astype(dtype),
        "fortran": np.asfortranarray((rng.random((3, 4)) * 100).astype(dtype)),
        "strided": (rng.random(20) * 100).astype(dtype)[::3],
        "empty": np.zeros((0,), dtype=dtype),
        "empty2d": np.zeros((4, 0, 2), dtype=dtype),
        "swapped": (rng.random(5) * 100).astype(np.dtype(dtype).newbyteorder()),
    }
    write_checkpoint(tmp_path / "d.gbz", {}, arrays, kind=KIND)
    meta, got = read_checkpoint(tmp_path / "d.gbz")
    assert meta == {}
    assert_same_arrays(arrays, got)
    assert got["fortran"].flags.f_contiguous  # layout kept, as numpy's own format keeps it


def test_round_trip_unicode_nested_meta_and_no_arrays(tmp_path):
    meta = {"ünïcødé ключ": ["α", {"深": [1, 2.5, None, True, ""]}], "empty": {}, "tuple": (1, "a")}
    write_checkpoint(tmp_path / "u.gbz", meta, {}, kind="a")
    got, arrays = read_checkpoint(tmp_path / "u.gbz")
    assert arrays == {}
    assert got == {"ünïcødé ключ": ["α", {"深": [1, 2.5, None, True, ""]}], "empty": {}, "tuple": [1, "a"]}


def test_same_content_gives_same_bytes(tmp_path):
    meta, arrays = sample_state()
    write_checkpoint(tmp_path / "a.gbz", meta, arrays, kind=KIND)
    write_checkpoint(tmp_path / "b.gbz", meta, arrays, kind=KIND)
    raw = (tmp_path / "a.gbz").read_bytes()
    assert raw == (tmp_path / "b.gbz").read_bytes()
    with zipfile.ZipFile(io.BytesIO(raw[HEADER_SIZE + len(KIND):])) as archive:  # no wall-clock time inside
        assert {info.date_time for info in archive.infolist()} == {(1980, 1, 1, 0, 0, 0)}


def test_layout_readable_with_numpy_alone(ckpt):
    """The recipe in the module docstring works on a real file."""
    raw = ckpt.read_bytes()
    assert raw[:16] == MAGIC and int.from_bytes(raw[16:20], "little") == FORMAT_VERSION
    kind_len = int.from_bytes(raw[20:24], "little")
    assert raw[64:64 + kind_len] == KIND.encode()
    assert len(raw) == HEADER_SIZE + kind_len + int.from_bytes(raw[24:32], "little")
    assert hashlib.sha256(raw[:32] + raw[64:]).digest() == raw[32:64]
    npz = np.load(io.BytesIO(raw[64 + kind_len:]), allow_pickle=False)
    meta, arrays = sample_state()
    import json

    assert json.loads(bytes(npz["__meta__"]).decode("utf-8")) == meta
    assert_same_arrays(arrays, {n: npz[n] for n in npz.files if n != "__meta__"})


numeric_dtypes = st.sampled_from(ALL_DTYPES).map(np.dtype)
json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.text()
    | st.floats(allow_nan=False, allow_infinity=False),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(), inner, max_size=4),
    max_leaves=20,
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    meta=st.dictionaries(st.text(), json_values, max_size=5),
    arrays=st.dictionaries(
        st.from_regex(r"[a-z][a-z0-9_.]{0,10}", fullmatch=True),
        hnp.arrays(numeric_dtypes, hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=5)),
        max_size=4,
    ),
)
def test_round_trip_property(tmp_path, meta, arrays):
    write_checkpoint(tmp_path / "h.gbz", meta, arrays, kind=KIND)
    got_meta, got_arrays = read_checkpoint(tmp_path / "h.gbz", kind=KIND)
    assert got_meta == meta
    assert_same_arrays(arrays, got_arrays)


# ---------------------------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    ("meta", "arrays", "kind", "match"),
    [
        ({}, {"x": np.array([object()])}, KIND, r"arrays\['x'\] has dtype object"),
        ({}, {"x": np.array(["a"])}, KIND, r"arrays\['x'\] has dtype <U1"),
        ({}, {"x": np.zeros(2, dtype=[("a", "f8")])}, KIND, r"arrays\['x'\] has dtype"),
        ({}, {"x": np.array(["2020-01-01"], dtype="M8[D]")}, KIND, r"datetime"),
        ({}, {"x": [1.0, 2.0]}, KIND, r"arrays\['x'\] must be a numpy.ndarray, got list"),
        ({}, {"__meta__": np.zeros(2)}, KIND, r"array name '__meta__' is not allowed"),
        ({}, {"a/b": np.zeros(2)}, KIND, r"array name 'a/b' is not allowed"),
        ({}, {"": np.zeros(2)}, KIND, r"array name '' is not allowed"),
        ({}, {1: np.zeros(2)}, KIND, r"array name 1 is not allowed"),
        ({}, [np.zeros(2)], KIND, r"arrays must be a dict"),
        ({"walls": [{"k": float("nan")}]}, {}, KIND, r"meta\['walls'\]\[0\]\['k'\] = nan: JSON has no NaN"),
        ({"t": float("inf")}, {}, KIND, r"meta\['t'\] = inf"),
        ({"n": np.int64(3)}, {}, KIND, r"meta\['n'\] has type int64.*int\(\)"),
        ({"a": {1: 2}}, {}, KIND, r"meta\['a'\] has key 1 \(int\); keys must be str"),
        ([1, 2], {}, KIND, r"meta must be a dict, got list"),
        ({}, {}, "", r"kind must be a str of 1 to 64 characters.*got ''"),
        ({}, {}, "has space", r"got 'has space'"),
        ({}, {}, "x" * 65, r"kind must be"),
        ({}, {}, None, r"got None"),
    ],
)
def test_bad_input_is_refused_and_old_file_kept(ckpt, meta, arrays, kind, match):
    before = ckpt.read_bytes()
    with pytest.raises(ParameterError, match=match):
        write_checkpoint(ckpt, meta, arrays, kind=kind)
    assert ckpt.read_bytes() == before
    assert temp_files(ckpt.parent) == []


def test_circular_meta_is_refused(tmp_path):
    meta = {}
    meta["self"] = meta
    with pytest.raises(ParameterError, match="nested deeper"):
        write_checkpoint(tmp_path / "c.gbz", meta, {}, kind=KIND)


# ------------------------------------------------------------------------------------------------ atomicity
def test_enospc_during_write_keeps_old_file(ckpt, monkeypatch):
    before = ckpt.read_bytes()
    real_write = os.write
    calls = []

    def write_then_fail(fd, data):
        calls.append(len(data))
        if len(calls) == 1:  # a short write: half of the first chunk lands on disk
            return real_write(fd, bytes(memoryview(data)[: max(1, len(data) // 2)]))
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "write", write_then_fail)
    meta, arrays = sample_state()
    arrays["values"] = arrays["values"] + 1.0
    with pytest.raises(CheckpointError, match=r"could not write checkpoint .*run\.gbz.*ENOSPC") as info:
        write_checkpoint(ckpt, meta, arrays, kind=KIND)
    monkeypatch.undo()
    assert len(calls) == 2
    assert isinstance(info.value.__cause__, OSError) and info.value.__cause__.errno == errno.ENOSPC
    assert ckpt.read_bytes() == before
    assert temp_files(ckpt.parent) == []
    read_checkpoint(ckpt, kind=KIND)


def test_enospc_at_fsync_keeps_old_file(ckpt, monkeypatch):
    before = ckpt.read_bytes()

    def fail(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", fail)
    with pytest.raises(CheckpointError, match="No space left on device") as info:
        write_checkpoint(ckpt, {"new": True}, {}, kind=KIND)
    monkeypatch.undo()
    assert info.value.__cause__.errno == errno.ENOSPC
    assert ckpt.read_bytes() == before
    assert temp_files(ckpt.parent) == []


def test_real_file_size_limit_keeps_old_file(ckpt):
    """The kernel refuses the write (RLIMIT_FSIZE gives EFBIG): same guarantees as ENOSPC."""
    before = ckpt.read_bytes()
    script = textwrap.dedent(f"""
        import resource, signal, numpy as np
        from gridbias.checkpoint import write_checkpoint
        from gridbias.errors import CheckpointError
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (100_000, 100_000))
        try:
            write_checkpoint({str(ckpt)!r}, {{}}, {{"big": np.zeros(100_000)}}, kind="x")
        except CheckpointError as exc:
            print("REFUSED", exc, "| cause:", type(exc.__cause__).__name__)
    """)
    out = run_python(script)
    assert "REFUSED" in out and "EFBIG" in out and "cause: OSError" in out, out
    assert ckpt.read_bytes() == before
    assert temp_files(ckpt.parent) == []


def test_missing_folder_and_directory_target(tmp_path):
    with pytest.raises(CheckpointError, match="could not write checkpoint .*nope.*ENOENT"):
        write_checkpoint(tmp_path / "nope" / "a.gbz", {}, {}, kind=KIND)
    (tmp_path / "dir.gbz").mkdir()
    with pytest.raises(CheckpointError, match="could not write checkpoint .*dir.gbz"):
        write_checkpoint(tmp_path / "dir.gbz", {}, {}, kind=KIND)
    assert temp_files(tmp_path) == []


def test_overwrite_replaces_content(ckpt):
    write_checkpoint(ckpt, {"second": 2}, {"a": np.arange(3)}, kind="other")
    meta, arrays = read_checkpoint(ckpt, kind="other")
    assert meta == {"second": 2} and list(arrays) == ["a"]


# -------------------------------------------------------------------------------------- damaged/foreign files
def test_missing_empty_and_directory(tmp_path):
    with pytest.raises(CheckpointError, match=r"'.*absent\.gbz' does not exist"):
        read_checkpoint(tmp_path / "absent.gbz")
    (tmp_path / "empty.gbz").write_bytes(b"")
    with pytest.raises(CheckpointError, match=r"empty\.gbz' is empty \(0 bytes\)"):
        read_checkpoint(tmp_path / "empty.gbz")
    with pytest.raises(CheckpointError, match="could not read checkpoint"):
        read_checkpoint(tmp_path)


def test_every_truncation_is_reported(ckpt):
    raw = ckpt.read_bytes()
    for n in [*range(1, 200), *range(200, len(raw), 23), len(raw) - 1]:
        ckpt.write_bytes(raw[:n])
        with pytest.raises(CheckpointError, match="is truncated") as info:
            read_checkpoint(ckpt)
        assert str(ckpt) in str(info.value)


def test_appended_bytes_are_reported(ckpt):
    ckpt.write_bytes(ckpt.read_bytes() + b"\x00")
    with pytest.raises(CheckpointError, match="1 unexpected bytes after the payload"):
        read_checkpoint(ckpt)


def test_every_single_byte_change_is_detected(ckpt):
    raw = bytearray(ckpt.read_bytes())
    rng = np.random.default_rng(11)
    positions = [*range(200), *rng.choice(np.arange(200, len(raw)), size=300, replace=False), len(raw) - 1]
    for position in positions:
        mutated = bytearray(raw)
        mutated[position] ^= 1 << int(rng.integers(0, 8))
        ckpt.write_bytes(bytes(mutated))
        with pytest.raises(CheckpointError):
            read_checkpoint(ckpt)
    ckpt.write_bytes(bytes(raw))
    read_checkpoint(ckpt)


def test_payload_change_is_a_checksum_mismatch(ckpt):
    raw = bytearray(ckpt.read_bytes())
    raw[-200] ^= 0x40
    ckpt.write_bytes(bytes(raw))
    with pytest.raises(CheckpointError, match="fails its SHA-256 checksum: the file was altered or damaged"):
        read_checkpoint(ckpt)


def test_newer_version_names_both_versions(ckpt):
    raw = bytearray(ckpt.read_bytes())
    raw[16:20] = struct.pack("<I", FORMAT_VERSION + 1)
    ckpt.write_bytes(rehash(bytes(raw)))
    match = rf"format version {FORMAT_VERSION + 1}, newer .*\({FORMAT_VERSION}\); upgrade gridbias"
    with pytest.raises(CheckpointError, match=match):
        read_checkpoint(ckpt)


def test_wrong_kind_names_both(ckpt):
    with pytest.raises(CheckpointError, match=r"holds kind 'gridbias.test', expected 'gridbias.openmm-run'"):
        read_checkpoint(ckpt, kind="gridbias.openmm-run")


class _Trap:
    """Unpickling this creates a folder: proof that a pickle was executed."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (os.mkdir, (self.marker,))


def test_pickle_file_is_refused_and_not_executed(tmp_path):
    control = tmp_path / "control"
    pickle.loads(pickle.dumps(_Trap(str(control))))
    assert control.exists()  # the trap works when unpickled
    marker = tmp_path / "executed"
    (tmp_path / "p.gbz").write_bytes(pickle.dumps(_Trap(str(marker))))
    with pytest.raises(CheckpointError, match="not a gridbias checkpoint.*Python pickle"):
        read_checkpoint(tmp_path / "p.gbz")
    assert not marker.exists()


def test_pickled_array_inside_valid_checksum_is_refused(tmp_path):
    marker = tmp_path / "executed"
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        with archive.open("__meta__.npy", "w") as member:
            np.lib.format.write_array(member, np.frombuffer(b"{}", np.uint8))
        with archive.open("trap.npy", "w") as member:
            np.lib.format.write_array(member, np.array([_Trap(str(marker))], dtype=object), allow_pickle=True)
    (tmp_path / "t.gbz").write_bytes(wrap_payload(buffer.getvalue()))
    with pytest.raises(CheckpointError, match="valid checksum but an unreadable payload"):
        read_checkpoint(tmp_path / "t.gbz")
    assert not marker.exists()


@pytest.mark.parametrize(
    ("content", "match"),
    [
        (b"\x89PNG\r\n\x1a\n" + bytes(100), "PNG image"),
        (b"\x93NUMPY" + bytes(100), r"NumPy \.npy file"),
        (b"\x89GRIDBIAS CVLG\r\n" + bytes(100), "gridbias CV log"),
        (b"hello world, just text\n" * 5, r"not a gridbias checkpoint \(wrong magic bytes\)$"),
        (MAGIC[:7], "is truncated: 7 bytes"),
    ],
)
def test_foreign_files(tmp_path, content, match):
    (tmp_path / "f.gbz").write_bytes(content)
    with pytest.raises(CheckpointError, match=match):
        read_checkpoint(tmp_path / "f.gbz")


def test_real_npz_is_refused(tmp_path):
    np.savez(tmp_path / "plain.npz", values=np.arange(3.0))
    with pytest.raises(CheckpointError, match=r"not a gridbias checkpoint.*ZIP archive \(for example a"):
        read_checkpoint(tmp_path / "plain.npz")


@pytest.mark.parametrize(
    ("payload", "match"),
    [
        (b"", "unreadable payload"),
        (b"random bytes, not an archive", "unreadable payload"),
        (None, "not an .npz archive"),
        ({"values": np.zeros(2)}, "no __meta__ member"),
        ({"__meta__": np.frombuffer(b"[1, 2]", np.uint8)}, "meta is a list, not a dict"),
        ({"__meta__": np.frombuffer(b'{"a": NaN}', np.uint8)}, "JSON constant NaN is not allowed"),
        ({"__meta__": np.frombuffer(b"{\xff}", np.uint8)}, "UnicodeDecodeError"),
        ({"__meta__": np.zeros(3)}, "__meta__ has dtype float64"),
    ],
)
def test_checksum_valid_but_bad_payload(tmp_path, payload, match):
    if payload is None:
        buffer = io.BytesIO()
        np.save(buffer, np.arange(3))
        payload = buffer.getvalue()
    elif isinstance(payload, dict):
        buffer = io.BytesIO()
        np.savez(buffer, **payload)
        payload = buffer.getvalue()
    (tmp_path / "b.gbz").write_bytes(wrap_payload(payload))
    with pytest.raises(CheckpointError, match=match):
        read_checkpoint(tmp_path / "b.gbz")


def test_damaged_header_fields(ckpt):
    raw = ckpt.read_bytes()
    for field, value, match in [
        (slice(16, 20), struct.pack("<I", 0), r"damaged header \(format version 0\)"),
        (slice(20, 24), struct.pack("<I", 0), r"damaged header \(kind length 0\)"),
        (slice(20, 24), struct.pack("<I", 10_000), r"damaged header \(kind length 10000\)"),
        (slice(24, 32), struct.pack("<Q", 2**63), "is truncated"),
        (slice(64, 65), b"\xff", "unreadable kind"),
    ]:
        mutated = bytearray(raw)
        mutated[field] = value
        ckpt.write_bytes(rehash(bytes(mutated)))
        with pytest.raises(CheckpointError, match=match):
            read_checkpoint(ckpt)


# --------------------------------------------------------------------------------------------------- fuzzing
def only_checkpoint_errors(path, data: bytes):
    path.write_bytes(data)
    try:
        meta, arrays = read_checkpoint(path)
    except CheckpointError:
        return None
    assert isinstance(meta, dict) and all(isinstance(a, np.ndarray) for a in arrays.values())
    return meta, arrays


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=300) | st.binary(max_size=300).map(lambda b: MAGIC + b))
def test_fuzz_random_bytes(tmp_path, data):
    assert only_checkpoint_errors(tmp_path / "r.gbz", data) is None


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    edits=st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 255)), min_size=1, max_size=6),
    cut=st.none() | st.integers(0, 10**6),
    extra=st.binary(max_size=8),
)
def test_fuzz_mutated_checkpoints_never_load(tmp_path, edits, cut, extra):
    """Any change to a real file is caught (SHA-256 covers every byte but the checksum field itself)."""
    meta, arrays = sample_state()
    write_checkpoint(tmp_path / "m.gbz", meta, arrays, kind=KIND)
    raw = (tmp_path / "m.gbz").read_bytes()
    mutated = bytearray(raw)
    for position, value in edits:
        mutated[position % len(raw)] = value
    if cut is not None:
        mutated = mutated[: cut % len(raw)]
    mutated = bytes(mutated) + extra
    result = only_checkpoint_errors(tmp_path / "m.gbz", mutated)
    assert result is None or mutated == raw


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    edits=st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 255)), min_size=1, max_size=4),
    cut=st.none() | st.integers(0, 10**6),
)
def test_fuzz_rehashed_payloads(tmp_path, edits, cut):
    """A crafted file with a correct checksum exercises the zip/npy/JSON parsers: only CheckpointError."""
    meta, arrays = sample_state()
    write_checkpoint(tmp_path / "m.gbz", meta, arrays, kind=KIND)
    raw = (tmp_path / "m.gbz").read_bytes()
    start = HEADER_SIZE + len(KIND)
    payload = bytearray(raw[start:])
    for position, value in edits:
        payload[position % len(payload)] = value
    if cut is not None:
        payload = payload[: cut % len(payload)]
    only_checkpoint_errors(tmp_path / "m.gbz", wrap_payload(bytes(payload)))


# ------------------------------------------------------------------------------------------------------ lock
def run_python(script: str, **kwargs) -> str:
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    done = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True, text=True, timeout=60,
                          **kwargs)
    return done.stdout + done.stderr


def test_lock_in_same_process(tmp_path):
    path = tmp_path / "run.gbz"
    with CheckpointLock(path) as lock:
        assert lock.held and lock.previous_holder is None
        assert Path(lock.lock_path).exists()
        with pytest.raises(LockError, match=rf"in use by process {os.getpid()} on host"):
            CheckpointLock(path).acquire()
        with pytest.raises(LockError, match="already holds"):
            lock.acquire()
    assert not lock.held
    assert not Path(str(path) + ".lock").exists()
    lock.release()  # no-op when not held
    with CheckpointLock(path):
        pass


def test_lock_refuses_second_process(tmp_path):
    path = tmp_path / "run.gbz"
    script = textwrap.dedent(f"""
        from gridbias.checkpoint import CheckpointLock
        from gridbias.errors import LockError
        try:
            CheckpointLock({str(path)!r}).acquire()
            print("ACQUIRED")
        except LockError as exc:
            print("REFUSED", exc)
    """)
    with CheckpointLock(path):
        out = run_python(script)
    assert out.startswith("REFUSED"), out
    assert f"process {os.getpid()} on host {socket.gethostname()!r}" in out
    assert "ACQUIRED" in run_python(script)


def test_lock_of_killed_process_is_taken_over(tmp_path):
    path = tmp_path / "run.gbz"
    script = textwrap.dedent(f"""
        import sys, time
        from gridbias.checkpoint import CheckpointLock
        CheckpointLock({str(path)!r}).acquire()
        print("HELD", flush=True)
        time.sleep(60)
    """)
    env = dict(os.environ, PYTHONPATH=str(REPO))
    child = subprocess.Popen([sys.executable, "-c", script], env=env, stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "HELD"
        with pytest.raises(LockError, match=rf"in use by process {child.pid} "):
            CheckpointLock(path).acquire()
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait()
        child.stdout.close()
    assert Path(str(path) + ".lock").exists()  # the dead holder's file is still there
    with CheckpointLock(path) as lock:
        assert lock.previous_holder["pid"] == child.pid
        assert lock.previous_holder["host"] == socket.gethostname()


def test_lock_removes_only_our_stray_temp_files(tmp_path):
    path = tmp_path / "run.gbz"
    ours = tmp_path / "run.gbz.tmp-0123456789abcdef"
    keep = ["run.gbz.tmp-notours", "other.gbz.tmp-0123456789abcdef", "run.gbz.tmp-0123456789abcdef.bak"]
    ours.write_bytes(b"partial")
    for name in keep:
        (tmp_path / name).write_bytes(b"x")
    with CheckpointLock(path):
        assert not ours.exists()
        assert all((tmp_path / name).exists() for name in keep)


# ------------------------------------------------------------------------------------------------ hard kills
def _write_forever(path, n):
    while True:
        n += 1
        write_checkpoint(path, {"n": n}, {"ramp": np.arange(n, dtype=np.float64),
                                          "fill": np.full(20_000 + 37 * n, n, dtype=np.int32)}, kind=KIND)


def test_sigkill_at_random_moments_leaves_old_or_new(tmp_path):
    path = tmp_path / "run.gbz"
    rng = np.random.default_rng(2024)
    first = {"ramp": np.arange(1.0), "fill": np.full(20_037, 1, np.int32)}
    write_checkpoint(path, {"n": 1}, first, kind=KIND)
    last = 1
    for _ in range(20):
        pid = os.fork()
        if pid == 0:  # child: write growing checkpoints until killed
            try:
                _write_forever(str(path), last)
            finally:
                os._exit(1)
        time.sleep(rng.uniform(0.005, 0.08))
        os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
        assert os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGKILL  # it was still writing
        meta, arrays = read_checkpoint(path, kind=KIND)
        n = meta["n"]
        assert n >= last
        np.testing.assert_array_equal(arrays["ramp"], np.arange(n, dtype=np.float64))
        np.testing.assert_array_equal(arrays["fill"], np.full(20_000 + 37 * n, n, dtype=np.int32))
        last = n
    assert last > 20  # the children really wrote new checkpoints between kills
    with CheckpointLock(path):
        assert temp_files(tmp_path) == []
