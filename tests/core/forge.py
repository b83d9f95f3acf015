"""Forger of checksum-valid files (a test helper, also used by bench/bench_faults.py).

The file formats are documented, so anyone can write a file whose checksum is right and whose content is
not: these functions do exactly that, byte by byte, without going through gridbias's writers (which refuse
to write such things).
"""

import hashlib
import io
import json
import struct
import zipfile

import numpy as np

CHECKPOINT_MAGIC = b"\x89GRIDBIAS CKPT\r\n"
CVLOG_MAGIC = b"\x89GRIDBIAS CVLG\r\n"


def npy_bytes(array=None, *, shape=None, dtype=None, data=None) -> bytes:
    """A .npy member: the header of ``array`` (or of the given shape and dtype, which may lie about the data
    that follows), then ``data`` (default: the array's own bytes)."""
    if array is not None:
        shape = array.shape if shape is None else shape
        dtype = array.dtype if dtype is None else np.dtype(dtype)
        data = array.tobytes() if data is None else data
    header = {"descr": np.lib.format.dtype_to_descr(np.dtype(dtype)), "fortran_order": False,
              "shape": tuple(shape)}
    buffer = io.BytesIO()
    np.lib.format.write_array_header_1_0(buffer, header)
    return b"\x93NUMPY\x01\x00" + buffer.getvalue()[8:] + (data or b"")


def zip_bytes(members: dict, *, compression=zipfile.ZIP_STORED) -> bytes:
    """A zip archive of ``{name: bytes}`` (names used as given)."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=compression, allowZip64=True) as archive:
        for name, data in members.items():
            archive.writestr(zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0)), data,
                             compress_type=compression)
    return buffer.getvalue()


def meta_member(meta) -> bytes:
    """The ``__meta__.npy`` member for ``meta``: a dict (dumped with Python's json, NaN and all) or raw bytes."""
    raw = meta if isinstance(meta, bytes) else json.dumps(meta).encode("utf-8")
    return npy_bytes(np.frombuffer(raw, dtype=np.uint8))


def checkpoint_bytes(kind: str, payload: bytes, *, version: int = 1) -> bytes:
    """A checkpoint file around ``payload`` with a correct SHA-256."""
    kind_b = kind.encode("ascii")
    head = CHECKPOINT_MAGIC + struct.pack("<IIQ", version, len(kind_b), len(payload))
    digest = hashlib.sha256(head + kind_b + payload).digest()
    return head + digest + kind_b + payload


def forge_checkpoint(kind: str, meta, arrays: dict, *, extra: dict | None = None,
                     compression=zipfile.ZIP_STORED) -> bytes:
    """A checksum-valid checkpoint holding ``meta`` (dict or raw JSON bytes) and ``arrays``
    (``{name: ndarray}`` or ``{name: raw .npy bytes}``), plus ``extra`` raw members."""
    members = {"__meta__.npy": meta_member(meta)}
    for name, value in arrays.items():
        members[f"{name}.npy"] = value if isinstance(value, bytes) else npy_bytes(np.ascontiguousarray(value))
    members.update(extra or {})
    return checkpoint_bytes(kind, zip_bytes(members, compression=compression))


def forge_cvlog(text: bytes, n_columns: int, records: bytes = b"", *, version: int = 1) -> bytes:
    """A CV log whose header text is ``text`` (any bytes), with a correct header checksum."""
    padded = text + b"\x00" * (-len(text) % 8)
    head = CVLOG_MAGIC + struct.pack("<IIQ", version, n_columns, len(text))
    return head + hashlib.sha256(head + padded).digest() + padded + records
