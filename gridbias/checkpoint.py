"""Checkpoint files: an atomic, checksummed, versioned container for a JSON dict and numeric arrays.

A checkpoint (conventional extension ``.gbz``) holds one ``meta`` dict (JSON) and named numeric arrays.
Nothing in a file is ever unpickled or executed. Every byte of the file is covered by a SHA-256 checksum
that is verified before anything is parsed, so a file that loads is exactly the file that was written.

File layout (all integers little-endian)::

    offset  size  field
    0       16    MAGIC = b"\\x89GRIDBIAS CKPT\\r\\n"
    16      4     format version, uint32 (FORMAT_VERSION = 1)
    20      4     kind length K in bytes, uint32 (1 <= K <= 64)
    24      8     payload length P in bytes, uint64
    32      32    SHA-256 of the file with bytes 32..63 left out (bytes 0..31, then 64..end)
    64      K     kind, ASCII, e.g. "gridbias.bias"
    64+K    P     payload: an uncompressed NumPy ``.npz`` archive; member ``__meta__`` is the UTF-8 JSON
                  of ``meta`` as a uint8 array, every other member is one of the arrays

The file is exactly ``64 + K + P`` bytes long. To read one with NumPy alone::

    import hashlib, io, json, numpy as np
    raw = open("run.gbz", "rb").read()
    kind_len = int.from_bytes(raw[20:24], "little")
    assert hashlib.sha256(raw[:32] + raw[64:]).digest() == raw[32:64]
    npz = np.load(io.BytesIO(raw[64 + kind_len:]), allow_pickle=False)
    meta = json.loads(bytes(npz["__meta__"]).decode("utf-8"))
    arrays = {name: npz[name] for name in npz.files if name != "__meta__"}

Writes are atomic: the file is written to a temporary file ``<name>.tmp-<16 hex digits>`` in the same
folder, flushed, fsynced, renamed over the target and the folder is fsynced. A crash at any moment leaves
either the old or the new checkpoint (plus, after a hard kill, possibly a stray temporary file, which
`CheckpointLock` removes when it is next acquired).
"""

from __future__ import annotations

import errno
import hashlib
import io
import json
import math
import os
import re
import secrets
import socket
import struct
import time
import zipfile

import numpy as np

from .errors import CheckpointError, LockError, ParameterError, WriteError

try:
    import fcntl
except ImportError:  # Windows: checkpoints work, CheckpointLock raises LockError when used
    fcntl = None

__all__ = [
    "MAGIC",
    "FORMAT_VERSION",
    "HEADER_SIZE",
    "write_checkpoint",
    "read_checkpoint",
    "CheckpointLock",
]

MAGIC = b"\x89GRIDBIAS CKPT\r\n"
FORMAT_VERSION = 1
HEADER_SIZE = 64
MAX_KIND_LENGTH = 64

_HEADER = struct.Struct("<16sIIQ32s")  # magic, version, kind length, payload length, sha256
_META_MEMBER = "__meta__"
_KIND_RE = re.compile(r"[A-Za-z0-9_.\-]+")
_NAME_RE = re.compile(r"(?!__)[A-Za-z0-9_][A-Za-z0-9_.\-]{0,199}")
_ARRAY_KINDS = "biufc"  # bool, signed, unsigned, float, complex
_ZIP_DATE = (1980, 1, 1, 0, 0, 0)  # fixed member timestamps: same content, same bytes
_MAX_JSON_DEPTH = 100
MAX_MEMBERS = 1024  # arrays in one checkpoint (the largest written holds about 12)
_MAX_NPY_HEADER = 10_000  # bytes of one .npy header (ours are under 200)

# Leading bytes of files people may hand us by mistake, to say what the file is instead.
_FOREIGN_SIGNATURES = (
    (b"\x89GRIDBIAS CVLG\r\n", "a gridbias CV log (read it with gridbias.cvlog.read_cvlog)"),
    (b"PK\x03\x04", "a ZIP archive (for example a plain NumPy .npz file)"),
    (b"\x93NUMPY", "a NumPy .npy file"),
    (b"\x89PNG", "a PNG image"),
    (b"\x80", "a Python pickle (it was not unpickled)"),
)


# --------------------------------------------------------------------------------------------------- helpers
def _encode_json(value, what: str) -> bytes:
    """Validate `value` and return its UTF-8 JSON, refusing anything JSON cannot hold exactly.

    Allowed: dict with str keys, list, tuple (read back as list), str, int, finite float, bool, None.
    Raises ParameterError naming the offending entry (e.g. ``meta['walls'][0]['k'] = nan``).
    """
    _check_json(value, what, 0)
    return json.dumps(value, ensure_ascii=False, allow_nan=False).encode("utf-8")


def _check_json(value, where: str, depth: int, max_depth: int = _MAX_JSON_DEPTH) -> None:
    if depth > max_depth:
        raise ParameterError(f"{where} is nested deeper than {max_depth} levels (circular?)")
    if value is None or isinstance(value, (bool, str, int)):
        return
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ParameterError(
                f"{where} = {value!r}: JSON has no NaN or infinity; store non-finite numbers in an array"
            )
        return
    if isinstance(value, (list, tuple)):
        for i, item in enumerate(value):
            _check_json(item, f"{where}[{i}]", depth + 1, max_depth)
        return
    if isinstance(value, dict):
        for key, item in value.items():
            if not isinstance(key, str):
                raise ParameterError(f"{where} has key {key!r} ({type(key).__name__}); keys must be str")
            _check_json(item, f"{where}[{key!r}]", depth + 1, max_depth)
        return
    raise ParameterError(
        f"{where} has type {type(value).__name__}, which JSON cannot hold exactly; allowed: dict (str keys), "
        "list, tuple, str, int, float, bool, None (convert NumPy scalars with int()/float()/bool())"
    )


def _describe_foreign(head: bytes) -> str:
    """Say what a file starting with `head` looks like, for error messages ('' when unknown)."""
    for signature, description in _FOREIGN_SIGNATURES:
        if head.startswith(signature):
            return f"; it looks like {description}"
    return ""


def _write_atomically(path: str, chunks, what: str) -> None:
    """Write the byte chunks to `path` through a fsynced temporary file and an atomic rename.

    On any failure the temporary file is removed, an existing file at `path` is left untouched and a
    WriteError naming `what`, the path and the cause is raised (chained from the OSError).
    """
    folder = os.path.dirname(os.path.abspath(path))
    tmp = None
    try:
        fd, tmp = _create_temp(path)
        try:
            for chunk in chunks:
                _write_all(fd, chunk)
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        raise WriteError(f"could not write {what} {path!r}: {_reason(exc)}", path=path) from exc
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass
    try:
        _fsync_directory(folder)
    except OSError as exc:
        raise WriteError(
            f"wrote {what} {path!r}, but could not sync its folder, so the rename may not survive a power "
            f"failure: {_reason(exc)}", path=path
        ) from exc


def _create_temp(path: str, flags: int = os.O_WRONLY):
    """Create and open ``<path>.tmp-<16 hex>`` exclusively (permissions from the umask); return (fd, name)."""
    while True:
        tmp = f"{path}.tmp-{secrets.token_hex(8)}"
        try:
            return os.open(tmp, flags | os.O_CREAT | os.O_EXCL, 0o666), tmp
        except FileExistsError:
            continue


def _write_all(fd: int, data) -> None:
    view = memoryview(data).cast("B")
    while view:
        written = os.write(fd, view)
        view = view[written:]


def _fsync_directory(folder: str) -> None:
    """Make a rename in `folder` durable (POSIX); skipped where folders cannot be synced (EINVAL)."""
    if os.name == "nt":
        return
    fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    except OSError as exc:
        if exc.errno != errno.EINVAL:
            raise
    finally:
        os.close(fd)


def _reason(exc: OSError) -> str:
    if exc.errno is not None:
        return f"{exc.strerror or os.strerror(exc.errno)} (errno {errno.errorcode.get(exc.errno, exc.errno)})"
    return str(exc)


# ---------------------------------------------------------------------------------------------- write/read
def write_checkpoint(path, meta: dict, arrays: dict, *, kind: str) -> None:
    """Write `meta` and `arrays` to the checkpoint file `path`, atomically.

    Parameters
    ----------
    path : str or os.PathLike
        Target file (conventionally ``*.gbz``). Its folder must exist. An existing file is replaced only
        once the new one is complete and on disk.
    meta : dict
        JSON-safe dict: str keys; values dict, list, tuple (read back as a list), str, int, finite float,
        bool or None. Non-finite numbers belong in `arrays`.
    arrays : dict of str to ndarray
        Numeric arrays (bool, int, uint, float, complex) of any shape, including 0-size. Names match
        ``[A-Za-z0-9_][A-Za-z0-9_.-]*`` (up to 200 characters) and must not start with ``__``.
        Shape, dtype and byte order round-trip exactly.
    kind : str
        What the file holds, e.g. ``"gridbias.bias"``; 1 to 64 characters from ``[A-Za-z0-9_.-]``.
        `read_checkpoint` can insist on it.

    Raises
    ------
    ParameterError
        `meta`, `arrays` or `kind` cannot be stored (the message names the entry and what is allowed).
    WriteError
        The file could not be written (chained from the OSError; the old file, if any, is intact).

    Notes
    -----
    The same content always gives the same bytes. Peak memory is about twice the arrays' size.

    Examples
    --------
    >>> import os, tempfile, numpy as np
    >>> path = os.path.join(tempfile.mkdtemp(), "demo.gbz")
    >>> write_checkpoint(path, {"step": 10}, {"values": np.zeros((3, 4))}, kind="example.state")
    >>> meta, arrays = read_checkpoint(path, kind="example.state")
    >>> meta, arrays["values"].shape
    ({'step': 10}, (3, 4))
    """
    path = os.fspath(path)
    kind_bytes = _check_kind(kind)
    if not isinstance(meta, dict):
        raise ParameterError(f"meta must be a dict, got {type(meta).__name__}")
    meta_bytes = _encode_json(meta, "meta")
    payload = _build_payload(meta_bytes, _check_arrays(arrays))
    head = MAGIC + struct.pack("<IIQ", FORMAT_VERSION, len(kind_bytes), len(payload))
    digest = hashlib.sha256(head)
    digest.update(kind_bytes)
    digest.update(payload)
    header = _HEADER.pack(MAGIC, FORMAT_VERSION, len(kind_bytes), len(payload), digest.digest())
    _write_atomically(path, (header, kind_bytes, payload), "checkpoint")


def _check_kind(kind) -> bytes:
    if not isinstance(kind, str) or len(kind) > MAX_KIND_LENGTH or not _KIND_RE.fullmatch(kind):
        raise ParameterError(
            f"kind must be a str of 1 to {MAX_KIND_LENGTH} characters from [A-Za-z0-9_.-], got {kind!r}"
        )
    return kind.encode("ascii")


def _check_arrays(arrays) -> dict:
    if not isinstance(arrays, dict):
        raise ParameterError(f"arrays must be a dict of name -> numpy array, got {type(arrays).__name__}")
    checked = {}
    for name, value in arrays.items():
        if not isinstance(name, str) or not _NAME_RE.fullmatch(name):
            raise ParameterError(
                f"array name {name!r} is not allowed; use 1-200 characters from [A-Za-z0-9_.-], "
                "not starting with '.', '-' or '__'"
            )
        if not isinstance(value, np.ndarray):
            raise ParameterError(f"arrays[{name!r}] must be a numpy.ndarray, got {type(value).__name__}")
        if value.dtype.kind not in _ARRAY_KINDS or value.dtype.fields is not None:
            raise ParameterError(
                f"arrays[{name!r}] has dtype {value.dtype}; allowed are bool, integer, unsigned, float and "
                "complex dtypes (no object, string, structured or datetime arrays)"
            )
        checked[name] = value
    return checked


def _build_payload(meta_bytes: bytes, arrays: dict) -> memoryview:
    members = {_META_MEMBER: np.frombuffer(meta_bytes, dtype=np.uint8), **arrays}
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as archive:
        for name, array in members.items():
            info = zipfile.ZipInfo(name + ".npy", date_time=_ZIP_DATE)
            with archive.open(info, "w", force_zip64=True) as member:
                np.lib.format.write_array(member, array, allow_pickle=False)
    return buffer.getbuffer()


def read_checkpoint(path, *, kind: str | None = None) -> tuple[dict, dict]:
    """Read and verify the checkpoint file `path`.

    Parameters
    ----------
    path : str or os.PathLike
        A file written by `write_checkpoint`.
    kind : str, optional
        If given, the file must hold this kind (e.g. ``"gridbias.bias"``).

    Returns
    -------
    meta : dict
        The JSON dict as written (tuples come back as lists).
    arrays : dict of str to ndarray
        The arrays as written: same names, shapes, dtypes and values. Fresh, writable arrays.

    Raises
    ------
    CheckpointError
        The message names the path and the problem: missing or empty file, not a gridbias checkpoint,
        written by a newer format version, wrong kind, truncated, extra bytes, checksum mismatch (altered
        or damaged file) or an unreadable payload. Nothing is returned unless the whole file verifies.

    Notes
    -----
    Nothing in the file is unpickled or executed. Memory is bounded by the file: members must be stored
    uncompressed and each array's header must account for exactly its bytes, so peak memory is about
    twice the file size whatever the file declares.
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as f:
            size = os.fstat(f.fileno()).st_size
            head = f.read(HEADER_SIZE)
            kind_len = _check_header(path, head, size)
            stored_kind = _read_kind(path, f.read(kind_len), kind_len)
            if kind is not None and stored_kind != kind:
                raise CheckpointError(f"checkpoint {path!r} holds kind {stored_kind!r}, expected {kind!r}")
            payload = f.read()
    except FileNotFoundError as exc:
        raise CheckpointError(f"checkpoint file {path!r} does not exist") from exc
    except OSError as exc:
        raise CheckpointError(f"could not read checkpoint {path!r}: {_reason(exc)}") from exc
    payload_len = _HEADER.unpack(head)[3]
    digest = hashlib.sha256(head[:32])
    digest.update(stored_kind.encode("ascii"))
    digest.update(payload)
    if len(payload) != payload_len:  # the file changed size while we read it
        raise CheckpointError(f"checkpoint {path!r} changed while it was being read; read it again")
    if digest.digest() != head[32:64]:
        raise CheckpointError(
            f"checkpoint {path!r} fails its SHA-256 checksum: the file was altered or damaged after writing"
        )
    return _parse_payload(path, payload)


def _check_header(path: str, head: bytes, size: int) -> int:
    """Check magic, version and sizes; return the kind length."""
    if size == 0:
        raise CheckpointError(f"checkpoint file {path!r} is empty (0 bytes)")
    n = min(len(head), len(MAGIC))
    if head[:n] != MAGIC[:n]:
        raise CheckpointError(
            f"{path!r} is not a gridbias checkpoint (wrong magic bytes){_describe_foreign(head)}"
        )
    if len(head) < HEADER_SIZE:
        raise CheckpointError(
            f"checkpoint {path!r} is truncated: {size} bytes, shorter than the {HEADER_SIZE}-byte header"
        )
    _, version, kind_len, payload_len, _ = _HEADER.unpack(head)
    if version > FORMAT_VERSION:
        raise CheckpointError(
            f"checkpoint {path!r} was written with format version {version}, newer than the version "
            f"this gridbias reads ({FORMAT_VERSION}); upgrade gridbias to read it"
        )
    if version < 1:
        raise CheckpointError(f"checkpoint {path!r} has a damaged header (format version {version})")
    if not 1 <= kind_len <= MAX_KIND_LENGTH:
        raise CheckpointError(f"checkpoint {path!r} has a damaged header (kind length {kind_len})")
    expected = HEADER_SIZE + kind_len + payload_len
    if size < expected:
        raise CheckpointError(
            f"checkpoint {path!r} is truncated: {size} bytes, the header says {expected} "
            "(an interrupted copy, or a damaged header)"
        )
    if size > expected:
        raise CheckpointError(
            f"checkpoint {path!r} has {size - expected} unexpected bytes after the payload "
            f"({size} bytes, the header says {expected}): the file was altered or damaged"
        )
    return kind_len


def _read_kind(path: str, raw: bytes, kind_len: int) -> str:
    try:
        text = raw.decode("ascii")
    except UnicodeDecodeError:
        text = None
    if len(raw) != kind_len or text is None or not _KIND_RE.fullmatch(text):
        raise CheckpointError(f"checkpoint {path!r} has a damaged header (unreadable kind {raw!r})")
    return text


def _parse_payload(path: str, payload: bytes) -> tuple[dict, dict]:
    """Unpack the archive of a checksum-valid file, never allocating more than the file holds.

    Every member must be stored uncompressed (the only method the writer uses) with a ``.npy`` header
    whose shape and dtype account for exactly the member's bytes, so the arrays' total size is bounded
    by the file size before anything is allocated.
    """
    try:
        loaded = {}
        with zipfile.ZipFile(io.BytesIO(payload)) as archive:
            infos = archive.infolist()
            if len(infos) > MAX_MEMBERS:
                raise ValueError(f"the archive has {len(infos)} members; at most {MAX_MEMBERS} are allowed")
            for info in infos:
                name = _member_name(info, loaded)
                loaded[name] = _read_member(archive, info)
        if _META_MEMBER not in loaded:
            raise ValueError(f"the archive has no {_META_MEMBER} member")
        meta_array = loaded.pop(_META_MEMBER)
        if meta_array.dtype != np.uint8 or meta_array.ndim != 1:
            raise ValueError(f"{_META_MEMBER} has dtype {meta_array.dtype} and shape {meta_array.shape}")
        meta = decode_json(meta_array.tobytes())
        if not isinstance(meta, dict):
            raise ValueError(f"meta is a {type(meta).__name__}, not a dict")
    except Exception as exc:  # any parser failure on a checksum-valid file: report it, never half-load
        raise CheckpointError(
            f"checkpoint {path!r} has a valid checksum but an unreadable payload "
            f"({type(exc).__name__}: {_short(exc)})"
        ) from exc
    return meta, loaded


def _member_name(info: zipfile.ZipInfo, loaded: dict) -> str:
    if info.compress_type != zipfile.ZIP_STORED:
        raise ValueError(f"member {info.filename!r} uses compression method {info.compress_type}; "
                         "gridbias writes members uncompressed only")
    if info.file_size != info.compress_size:
        raise ValueError(f"member {info.filename!r} declares {info.file_size} bytes but stores "
                         f"{info.compress_size}")
    stem = info.filename[:-4] if info.filename.endswith(".npy") else None
    if stem is None or not (stem == _META_MEMBER or _NAME_RE.fullmatch(stem)):
        raise ValueError(f"member name {info.filename[:80]!r} is not one gridbias writes")
    if stem in loaded:
        raise ValueError(f"member {info.filename!r} appears twice")
    return stem


def _read_member(archive: zipfile.ZipFile, info: zipfile.ZipInfo) -> np.ndarray:
    """One array, after checking that its header's shape and dtype fill exactly the member's bytes."""
    with archive.open(info) as member:
        version = np.lib.format.read_magic(member)
        if version == (1, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_1_0(member, max_header_size=_MAX_NPY_HEADER)
        elif version == (2, 0):
            shape, fortran, dtype = np.lib.format.read_array_header_2_0(member, max_header_size=_MAX_NPY_HEADER)
        else:
            raise ValueError(f"member {info.filename!r} has .npy format version {version}")
        if dtype.kind not in _ARRAY_KINDS or dtype.fields is not None or dtype.shape != () or dtype.hasobject:
            raise ValueError(f"member {info.filename!r} has dtype {dtype}")
        n_items = math.prod(shape)
        data_size = n_items * dtype.itemsize
        if member.tell() + data_size != info.file_size:
            raise ValueError(f"member {info.filename!r}: shape {shape} of {dtype} needs {data_size} bytes, "
                             f"the member holds {info.file_size - member.tell()}")
        data = bytearray(data_size)
        if member.readinto(data) != data_size:
            raise ValueError(f"member {info.filename!r} is shorter than its header says")
    return np.frombuffer(data, dtype=dtype).reshape(shape, order="F" if fortran else "C")


def decode_json(raw: bytes, *, max_depth: int = _MAX_JSON_DEPTH):
    """Parse UTF-8 JSON written by `_encode_json`, refusing what the writer never produces.

    Refused (ValueError): invalid UTF-8 or JSON, NaN/Infinity, numbers that overflow a float (``1e400``),
    integers of more than 4300 digits, nesting deeper than `max_depth`.
    """
    try:
        value = json.loads(raw.decode("utf-8"), parse_constant=_refuse_constant, parse_float=_finite_float)
    except RecursionError:
        raise ValueError(f"JSON nested deeper than {max_depth} levels") from None
    try:
        _check_json(value, "JSON", 0, max_depth)
    except ParameterError as exc:
        raise ValueError(str(exc)) from None
    return value


def _finite_float(text: str) -> float:
    x = float(text)
    if not math.isfinite(x):
        raise ValueError(f"JSON number {text[:40]} does not fit a float")
    return x


def _refuse_constant(name: str):
    raise ValueError(f"JSON constant {name} is not allowed")


def _short(exc, limit: int = 300) -> str:
    text = " ".join(str(exc).split())
    return text if len(text) <= limit else text[:limit] + "..."


# ------------------------------------------------------------------------------------------------------ lock
class CheckpointLock:
    """Exclusive claim on a checkpoint path, so that two runs never write the same checkpoint.

    The claim is a POSIX ``flock`` on the sidecar file ``<path>.lock``, which holds the holder's pid,
    host name and start time as JSON. The kernel drops the flock when the holder exits or is killed, so a
    lock file left by a dead process is taken over silently (its old content is kept in
    `previous_holder`). Children the holder forks do not keep the lock: they close their copy at the fork,
    so the lock ends with the holder even while its children live on. While the lock is held, stray temporary files of `path` left by killed writers
    (``<path>.tmp-<16 hex digits>``) are removed.

    Parameters
    ----------
    path : str or os.PathLike
        The checkpoint path to claim (it need not exist yet; its folder must).

    Attributes
    ----------
    path, lock_path : str
        The checkpoint path and its lock file.
    previous_holder : dict or None
        After `acquire`: ``{"pid", "host", "since"}`` read from a lock file left by a process that died
        holding it, else None.

    Notes
    -----
    Use it as a context manager, or call `acquire` / `release`. A second lock on the same path fails with
    LockError whether it is in another process or in this one. ``flock`` protects processes on one host;
    on network file systems it may not reach other hosts. The lock file is removed on `release`.

    Examples
    --------
    >>> import os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "run.gbz")
    >>> with CheckpointLock(path):  # doctest: +ELLIPSIS
    ...     CheckpointLock(path).acquire()
    Traceback (most recent call last):
    ...
    gridbias.errors.LockError: checkpoint ... is in use by process ...
    """

    def __init__(self, path):
        self.path = os.fspath(path)
        self.lock_path = self.path + ".lock"
        self.previous_holder = None
        self._fd = None

    @property
    def held(self) -> bool:
        """True while this object holds the lock."""
        return self._fd is not None

    def acquire(self) -> "CheckpointLock":
        """Claim the path; raise LockError naming the holder (pid, host) if another one holds it.

        The lock file appears with its holder already recorded (it is written, locked, then linked into
        place), so a refusal always names the holder, even when two runs start at the same moment.
        """
        if fcntl is None:
            raise LockError("CheckpointLock needs POSIX file locking (fcntl), which this platform lacks")
        if self._fd is not None:
            raise LockError(f"this CheckpointLock already holds {self.lock_path!r}")
        for _ in range(1000):  # each retry means the file changed under us; a handful is the most seen
            try:
                fd = os.open(self.lock_path, os.O_RDWR)
            except FileNotFoundError:
                if self._publish(None):
                    break
                continue
            except OSError as exc:
                raise WriteError(f"could not open lock file {self.lock_path!r}: {_reason(exc)}",
                                 path=self.lock_path) from exc
            try:
                locked = _try_flock(fd)
                same = _same_file(fd, self.lock_path)
            except OSError as exc:
                os.close(fd)
                raise WriteError(f"could not lock {self.lock_path!r}: {_reason(exc)}", path=self.lock_path) from exc
            if not same:  # replaced or removed meanwhile: look again
                os.close(fd)
                continue
            if not locked:
                holder = _read_holder(fd)
                os.close(fd)
                if holder is None:  # a file from an older gridbias being written right now: look again
                    time.sleep(0.01)
                    continue
                raise LockError(self._held_message(holder))
            # Its holder died: replace the file by ours, complete before it becomes visible.
            previous = _read_holder(fd)
            try:
                published = self._publish(fd)
            finally:
                os.close(fd)
            if published:
                self.previous_holder = previous
                break
        else:
            raise LockError(f"could not claim {self.lock_path!r}: it kept changing while being claimed")
        self._remove_stray_temp_files()
        _HELD.add(self)
        return self

    def _publish(self, stale_fd) -> bool:
        """Write our record to a new locked file and put it at lock_path: by link() when there is no file
        (False if another process was faster), by rename over the stale file whose lock we hold."""
        record = {"pid": os.getpid(), "host": socket.gethostname(),
                  "since": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
        tmp = None
        try:
            fd, tmp = _create_temp(self.lock_path, os.O_RDWR)
            try:
                _try_flock(fd)
                _write_all(fd, json.dumps(record).encode("utf-8") + b"\n")
                if stale_fd is None:
                    try:
                        os.link(tmp, self.lock_path)
                    except FileExistsError:
                        os.close(fd)
                        return False
                else:
                    os.replace(tmp, self.lock_path)
                    tmp = None
            except BaseException:
                os.close(fd)
                raise
        except OSError as exc:
            raise WriteError(f"could not write lock file {self.lock_path!r}: {_reason(exc)}",
                             path=self.lock_path) from exc
        finally:
            if tmp is not None:
                try:
                    os.unlink(tmp)
                except FileNotFoundError:
                    pass
        self.previous_holder = None
        self._fd = fd
        return True

    def release(self) -> None:
        """Give the path up and remove the lock file (no-op when not held)."""
        if self._fd is None:
            return
        _HELD.discard(self)
        try:
            os.unlink(self.lock_path)  # while still locked, so nobody can lock this file in between
        except FileNotFoundError:
            pass
        finally:
            os.close(self._fd)
            self._fd = None

    def _drop_after_fork(self) -> None:
        """In a forked child: close the child's copy of the locked file, so the lock dies with its holder."""
        fd, self._fd = self._fd, None
        if fd is not None:
            os.close(fd)

    def __enter__(self) -> "CheckpointLock":
        return self.acquire()

    def __exit__(self, *exc_info) -> None:
        self.release()

    def _held_message(self, holder) -> str:
        if holder is None:
            who = "another process (which has not recorded its id yet)"
        else:
            who = f"process {holder.get('pid')} on host {holder.get('host')!r} (since {holder.get('since')})"
        return (
            f"checkpoint {self.path!r} is in use by {who}; lock file {self.lock_path!r}. Stop that run or "
            "use another checkpoint path"
        )

    def _remove_stray_temp_files(self) -> None:
        folder, base = os.path.split(os.path.abspath(self.path))
        pattern = re.compile(re.escape(base) + r"\.tmp-[0-9a-f]{16}")
        for name in os.listdir(folder):
            if pattern.fullmatch(name):
                try:
                    os.unlink(os.path.join(folder, name))
                except FileNotFoundError:
                    pass


def _try_flock(fd: int) -> bool:
    """Take an exclusive flock without waiting; False when another open file holds it."""
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    return True


def _same_file(fd: int, path: str) -> bool:
    try:
        return os.path.samestat(os.fstat(fd), os.stat(path))
    except FileNotFoundError:
        return False


class _HeldLocks:
    """Every lock (checkpoint lock, CV log writer) this process holds. A forked child (a multiprocessing
    worker, for example) closes its inherited copies at once, so a lock never outlives its holder because
    a child lives on, and a refusal never names a dead process."""

    def __init__(self):
        import weakref

        self._held = weakref.WeakSet()
        if hasattr(os, "register_at_fork"):
            os.register_at_fork(after_in_child=self._drop_all)

    def add(self, holder) -> None:
        self._held.add(holder)

    def discard(self, holder) -> None:
        self._held.discard(holder)

    def _drop_all(self) -> None:
        for holder in list(self._held):
            holder._drop_after_fork()
        self._held.clear()


_HELD = _HeldLocks()


def _read_holder(fd: int):
    """The holder record in a lock file, or None when it is empty or unreadable."""
    try:
        record = json.loads(os.pread(fd, 4096, 0).decode("utf-8"))
    except (OSError, ValueError):
        return None
    return record if isinstance(record, dict) else None
