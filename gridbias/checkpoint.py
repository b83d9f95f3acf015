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

Writes are atomic (``gridbias._files.write_atomically``): a crash at any moment leaves either the old or
the new checkpoint. `CheckpointLock` (defined with the other file plumbing in ``gridbias._files``) claims
a checkpoint path for one run.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import struct
import zipfile

import numpy as np

from ._files import CheckpointLock, describe_foreign, encode_json, reason, write_atomically
from .errors import CheckpointError, ParameterError

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
# What opens each kind gridbias writes, for the message of a reader that expected another kind.
_READERS = {
    "gridbias.bias": "; it is a bias checkpoint: open it with gridbias.GridBias.load(path) or "
                     "gridbias.runs.load_run(path)",
    "gridbias.openmm-run": "; it is a run checkpoint of the OpenMM adapter: open it with "
                           "gridbias.runs.load_run(path), whose .bias is the GridBias",
}

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
    CheckpointError
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
    meta_bytes = encode_json(meta, "meta")
    payload = _build_payload(meta_bytes, _check_arrays(arrays))
    head = MAGIC + struct.pack("<IIQ", FORMAT_VERSION, len(kind_bytes), len(payload))
    digest = hashlib.sha256(head)
    digest.update(kind_bytes)
    digest.update(payload)
    header = _HEADER.pack(MAGIC, FORMAT_VERSION, len(kind_bytes), len(payload), digest.digest())
    write_atomically(path, (header, kind_bytes, payload), what="checkpoint", error=CheckpointError)


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
    Arrays are read with ``allow_pickle=False``; nothing in the file is executed. Peak memory is about
    twice the file size.
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as f:
            size = os.fstat(f.fileno()).st_size
            head = f.read(HEADER_SIZE)
            kind_len = _check_header(path, head, size)
            stored_kind = _read_kind(path, f.read(kind_len), kind_len)
            if kind is not None and stored_kind != kind:
                raise CheckpointError(f"checkpoint {path!r} holds kind {stored_kind!r}, expected {kind!r}"
                                      f"{_READERS.get(stored_kind, '')}")
            payload = f.read()
    except FileNotFoundError as exc:
        raise CheckpointError(f"checkpoint file {path!r} does not exist") from exc
    except OSError as exc:
        raise CheckpointError(f"could not read checkpoint {path!r}: {reason(exc)}") from exc
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
            f"{path!r} is not a gridbias checkpoint (wrong magic bytes){describe_foreign(head)}"
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
    try:
        npz = np.load(io.BytesIO(payload), allow_pickle=False)
        if not isinstance(npz, np.lib.npyio.NpzFile):
            raise ValueError("the payload is not an .npz archive")
        with npz:
            loaded = {name: npz[name] for name in npz.files}
        if _META_MEMBER not in loaded:
            raise ValueError(f"the archive has no {_META_MEMBER} member")
        meta_array = loaded.pop(_META_MEMBER)
        if meta_array.dtype != np.uint8 or meta_array.ndim != 1:
            raise ValueError(f"{_META_MEMBER} has dtype {meta_array.dtype} and shape {meta_array.shape}")
        meta = json.loads(meta_array.tobytes().decode("utf-8"), parse_constant=_refuse_constant)
        if not isinstance(meta, dict):
            raise ValueError(f"meta is a {type(meta).__name__}, not a dict")
        for name, array in loaded.items():
            if array.dtype.kind not in _ARRAY_KINDS or array.dtype.fields is not None:
                raise ValueError(f"array {name!r} has dtype {array.dtype}")
    except Exception as exc:  # any parser failure on a checksum-valid file: report it, never half-load
        raise CheckpointError(
            f"checkpoint {path!r} has a valid checksum but an unreadable payload "
            f"({type(exc).__name__}: {exc})"
        ) from exc
    return meta, loaded


def _refuse_constant(name: str):
    raise ValueError(f"JSON constant {name} is not allowed")
