"""CV logs: an append-only, self-describing binary table of float64 records (conventional extension ``.gbl``).

A CV log stores one row per sample (for example step, time, CV values, bias energy): named columns with
units, free-form JSON metadata, then fixed-size records. Every row costs exactly ``8 * m`` bytes for ``m``
columns, so a log can be appended to forever, read without parsing, and memory-mapped when it is large.

File layout (all integers little-endian)::

    offset  size  field
    0       16    MAGIC = b"\\x89GRIDBIAS CVLG\\r\\n"
    16      4     format version, uint32 (FORMAT_VERSION = 1)
    20      4     number of columns m, uint32
    24      8     header text length T in bytes, uint64
    32      32    SHA-256 of bytes 0..31 followed by bytes 64..D-1 (the header; records are not covered)
    64      T     UTF-8 JSON {"columns": [m names], "units": [m units], "metadata": {...}}
    64+T    pad   zero bytes up to D = 64 + T rounded up to a multiple of 8
    D       ...   records: m float64 values each, 8*m bytes per record, no separators

A trailing partial record (a writer killed mid-record) is dropped by the reader and reported as
`CVLog.n_partial_bytes`; a writer reopening the file cuts it off before appending. To read a log with
NumPy alone::

    import json, numpy as np
    head = open("run.gbl", "rb").read(64)
    m, text_len = int.from_bytes(head[20:24], "little"), int.from_bytes(head[24:32], "little")
    header = json.loads(open("run.gbl", "rb").read(64 + text_len)[64:])
    data = np.fromfile("run.gbl", dtype="<f8", offset=64 + -(-text_len // 8) * 8)
    data = data[: data.size // m * m].reshape(-1, m)
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import stat
import struct
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from ._files import AtomicFile, describe_foreign, encode_json, lock_open_file, reason, write_all
from .errors import CVLogError, ParameterError

__all__ = ["MAGIC", "FORMAT_VERSION", "HEADER_SIZE", "CVLog", "CVLogWriter", "read_cvlog"]

MAGIC = b"\x89GRIDBIAS CVLG\r\n"
FORMAT_VERSION = 1
HEADER_SIZE = 64
MAX_COLUMNS = 100_000
MAX_HEADER_TEXT = 64 * 2**20

_HEADER = struct.Struct("<16sIIQ32s")  # magic, version, n columns, text length, sha256
_RECORD_DTYPE = np.dtype("<f8")
_SCAN_ROWS = 2**18  # rows per chunk when scanning a column of a large log


class _Header(NamedTuple):
    columns: tuple
    units: tuple
    metadata: dict
    data_offset: int  # bytes before the first record


# ---------------------------------------------------------------------------------------------- the reader
@dataclass(frozen=True, eq=False)
class CVLog:
    """The content of a CV log, as returned by `read_cvlog`.

    Attributes
    ----------
    path : str
        The file read.
    columns, units : tuple of str
        Column names and their units, in file order (m entries each).
    metadata : dict
        The JSON metadata given when the log was created.
    data : (n, m) float64, read-only
        One row per record.
    n_partial_bytes : int
        Bytes of an incomplete last record that were dropped (0 for a cleanly closed log).
    """

    path: str
    columns: tuple
    units: tuple
    metadata: dict
    data: np.ndarray
    n_partial_bytes: int

    @property
    def n_records(self) -> int:
        """Number of complete records (n)."""
        return self.data.shape[0]

    def column(self, name: str) -> np.ndarray:
        """The (n,) float64 values of column `name` (a read-only view into `data`)."""
        return self.data[:, _column_index(self.columns, name, self.path)]

    def unit(self, name: str) -> str:
        """The unit of column `name`."""
        return self.units[_column_index(self.columns, name, self.path)]


def read_cvlog(path, *, mmap: bool = False) -> CVLog:
    """Read the CV log file `path`.

    Parameters
    ----------
    path : str or os.PathLike
        A file written by `CVLogWriter` (it may still be open for writing elsewhere).
    mmap : bool, optional
        Map the records from the file instead of reading them into memory (for logs larger than RAM).
        Default False: the records are read once, straight into the returned array.

    Returns
    -------
    CVLog
        Columns, units, metadata and the complete records; an incomplete last record is dropped and its
        size reported in ``n_partial_bytes``.

    Raises
    ------
    CVLogError
        Missing or empty file, not a CV log (the message says what it looks like), truncated or damaged
        header, or a log written by a newer format version. Each message names the path.

    Notes
    -----
    The header is protected by a SHA-256 checksum; the records are not (a flipped bit in a record reads
    as a different number). Peak memory is one copy of the records (none with ``mmap=True``).
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as f:
            header = _read_header(f.fileno(), path)
            size = os.fstat(f.fileno()).st_size
            m = len(header.columns)
            n = (size - header.data_offset) // (8 * m)
            if mmap:
                data = (np.memmap(f, dtype=_RECORD_DTYPE, mode="r", offset=header.data_offset, shape=(n, m))
                        if n else np.empty((0, m), dtype=_RECORD_DTYPE))
            else:
                f.seek(header.data_offset)
                flat = np.fromfile(f, dtype=_RECORD_DTYPE, count=n * m)
                n = flat.size // m  # the file may have shrunk meanwhile
                data = flat[: n * m].reshape(n, m)
    except FileNotFoundError as exc:
        raise CVLogError(f"CV log {path!r} does not exist") from exc
    except OSError as exc:
        raise CVLogError(f"could not read CV log {path!r}: {reason(exc)}") from exc
    data.flags.writeable = False
    n_partial = size - header.data_offset - n * 8 * m
    return CVLog(path, header.columns, header.units, header.metadata, data, max(n_partial, 0))


def _read_header(fd: int, path: str) -> _Header:
    """Read and verify the header of the open log `fd`."""
    size = os.fstat(fd).st_size
    head = os.pread(fd, HEADER_SIZE, 0)
    if size == 0:
        raise CVLogError(f"CV log {path!r} is empty (0 bytes)")
    k = min(len(head), len(MAGIC))
    if head[:k] != MAGIC[:k]:
        raise CVLogError(f"{path!r} is not a gridbias CV log (wrong magic bytes){describe_foreign(head)}")
    if len(head) < HEADER_SIZE:
        raise CVLogError(
            f"CV log {path!r} is truncated: {size} bytes, shorter than the {HEADER_SIZE}-byte header"
        )
    _, version, m, text_len, digest = _HEADER.unpack(head)
    if version > FORMAT_VERSION:
        raise CVLogError(
            f"CV log {path!r} was written with format version {version}, newer than the version this "
            f"gridbias reads ({FORMAT_VERSION}); upgrade gridbias to read it"
        )
    if version < 1 or not 1 <= m <= MAX_COLUMNS or text_len > MAX_HEADER_TEXT:
        raise CVLogError(
            f"CV log {path!r} has a damaged header (version {version}, {m} columns, {text_len} text bytes)"
        )
    data_offset = HEADER_SIZE + -(-text_len // 8) * 8
    if size < data_offset:
        raise CVLogError(
            f"CV log {path!r} is truncated: {size} bytes, shorter than its {data_offset}-byte header"
        )
    rest = os.pread(fd, data_offset - HEADER_SIZE, HEADER_SIZE)
    if hashlib.sha256(head[:32] + rest).digest() != digest:
        raise CVLogError(f"CV log {path!r} has a damaged header: it fails its SHA-256 checksum")
    try:
        text = json.loads(rest[:text_len].decode("utf-8"))
        columns, units, metadata = text["columns"], text["units"], text["metadata"]
        _check_columns(columns, units)
        if len(columns) != m or not isinstance(metadata, dict) or rest[text_len:].strip(b"\x00"):
            raise ValueError("inconsistent header fields")
    except (ValueError, KeyError, TypeError, ParameterError) as exc:
        raise CVLogError(f"CV log {path!r} has a damaged header ({type(exc).__name__}: {exc})") from exc
    return _Header(tuple(columns), tuple(units), metadata, data_offset)


def _check_columns(columns, units) -> None:
    if isinstance(columns, str) or not isinstance(columns, (list, tuple)) or not columns:
        raise ParameterError(f"columns must be a non-empty list of names, got {columns!r}")
    if len(columns) > MAX_COLUMNS:
        raise ParameterError(f"columns has {len(columns)} names; at most {MAX_COLUMNS} are allowed")
    for name in columns:
        if not isinstance(name, str) or not name:
            raise ParameterError(f"column names must be non-empty str, got {name!r} in columns {columns!r}")
    duplicates = sorted({name for name in columns if columns.count(name) > 1})
    if duplicates:
        raise ParameterError(f"column names must be unique; repeated: {duplicates}")
    if isinstance(units, str) or not isinstance(units, (list, tuple)) or len(units) != len(columns):
        raise ParameterError(
            f"units must be a list of {len(columns)} str (one per column {list(columns)}), got {units!r}"
        )
    for unit in units:
        if not isinstance(unit, str):
            raise ParameterError(f"units must be str (use '' or '1' for dimensionless), got {unit!r}")


def _column_index(columns, name, path) -> int:
    if name not in columns:
        raise CVLogError(f"CV log {path!r} has no column {name!r}; its columns are {list(columns)}")
    return columns.index(name)


# ---------------------------------------------------------------------------------------------- the writer
class CVLogWriter:
    """Append float64 records to a CV log, creating it or reopening it.

    Parameters
    ----------
    path : str or os.PathLike
        The log file (conventionally ``*.gbl``). Created with its header if missing; if it exists, it is
        reopened for appending after checking that its header matches.
    columns : list of str
        Column names, m >= 1, unique (e.g. ``["step", "time", "phi", "psi", "bias"]``).
    units : list of str
        One unit per column (e.g. ``["1", "ps", "rad", "rad", "kJ/mol"]``).
    metadata : dict, optional
        JSON-safe dict stored in the header (finite numbers only). When reopening, None accepts the
        file's metadata as it is; a dict must equal it.

    Attributes
    ----------
    path : str
    columns, units : tuple of str
    metadata : dict
        The metadata in the file.
    n_records : int
        Complete records in the file.
    dropped_partial_bytes : int
        Bytes of an incomplete last record cut off when the file was reopened (0 normally).

    Raises
    ------
    ParameterError
        Bad columns, units or metadata.
    CVLogError
        The existing file is not a CV log, is damaged, or its columns, units or metadata differ (the
        message says which), or it cannot be created or opened.
    LockError
        Another writer (in this or another process) has the log open.

    Notes
    -----
    Each record is ``8 * m`` bytes (m float64, little-endian). `write` hands records to the operating
    system immediately, so a killed process loses at most a partially written last record; `flush`
    also makes them survive a power failure. The header is created atomically. One writer at a time
    holds a ``flock`` on the file (POSIX); readers need no lock.

    Examples
    --------
    >>> import os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "run.gbl")
    >>> with CVLogWriter(path, ["step", "phi"], ["1", "rad"]) as log:
    ...     log.write([[0, 0.1], [10, 0.2], [20, 0.3]])
    ...     log.truncate_after(10)
    1
    >>> read_cvlog(path).column("phi")
    array([0.1, 0.2])
    """

    def __init__(self, path, columns, units, metadata=None):
        self.path = os.fspath(path)
        _check_columns(columns, units)
        self.columns, self.units = tuple(columns), tuple(units)
        if metadata is not None:
            if not isinstance(metadata, dict):
                raise ParameterError(f"metadata must be a dict or None, got {type(metadata).__name__}")
            metadata = json.loads(encode_json(metadata, "metadata"))  # as it will read back
        self._record_size = 8 * len(self.columns)
        self._fd = None
        self.dropped_partial_bytes = 0
        if not os.path.exists(self.path):
            self._create(metadata or {})
        self._open(metadata)

    # -- public ---------------------------------------------------------------------------------------
    @property
    def n_records(self) -> int:
        """Complete records in the file."""
        return self._n_records

    @property
    def closed(self) -> bool:
        """True after `close`."""
        return self._fd is None

    def write(self, rows) -> None:
        """Append one row, shape (m,), or several, shape (k, m); values in the columns' units.

        NaN and infinity are stored as they are. Raises ParameterError for the wrong shape and CVLogError
        if the file cannot be written (the file then keeps exactly its previous records).
        """
        fd = self._require_open()
        m = len(self.columns)
        try:
            array = np.asarray(rows, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"rows must be numbers of shape ({m},) or (k, {m}): {exc}") from exc
        if array.ndim == 1 and array.shape[0] == m:
            array = array[None, :]
        elif array.ndim != 2 or array.shape[1] != m:
            raise ParameterError(
                f"rows has shape {array.shape}; expected ({m},) or (k, {m}) for columns {list(self.columns)}"
            )
        if array.shape[0] == 0:
            return
        try:
            write_all(fd, np.ascontiguousarray(array, dtype=_RECORD_DTYPE))
        except OSError as exc:
            try:
                os.ftruncate(fd, self._data_offset + self._n_records * self._record_size)
            except OSError:
                self._close_quietly()  # cannot restore record alignment: refuse further writes
            raise CVLogError(f"could not append to CV log {self.path!r}: {reason(exc)}") from exc
        self._n_records += array.shape[0]

    def flush(self) -> None:
        """Make the records written so far durable (fsync), so they survive an OS crash or power loss."""
        fd = self._require_open()
        try:
            os.fsync(fd)
        except OSError as exc:
            raise CVLogError(f"could not flush CV log {self.path!r}: {reason(exc)}") from exc

    def close(self) -> None:
        """Flush and close (idempotent)."""
        if self._fd is None:
            return
        try:
            self.flush()
        finally:
            self._close_quietly()

    def truncate_after(self, value: float, column: str = "step") -> int:
        """Drop the records whose `column` value is greater than `value`; return how many were dropped.

        Use it when a run restarts from a checkpoint taken at step ``S``: ``truncate_after(S)`` removes
        the records written after that checkpoint. Records with NaN in `column` are kept. When the dropped
        records are all at the end (the usual case) the file is cut in place; otherwise the kept records
        are rewritten to a new file that atomically replaces the old one.
        """
        fd = self._require_open()
        j = _column_index(self.columns, column, self.path)
        try:
            value = float(value)
        except (TypeError, ValueError):
            value = math.nan
        if math.isnan(value):
            raise ParameterError(f"value must be a number, got {value!r}")
        n, m = self._n_records, len(self.columns)
        if n == 0:
            return 0
        records = np.memmap(self.path, dtype=_RECORD_DTYPE, mode="r", offset=self._data_offset, shape=(n, m))
        first_drop, keep_after = None, False
        for start in range(0, n, _SCAN_ROWS):
            drop = records[start:start + _SCAN_ROWS, j] > value
            if first_drop is None and drop.any():
                first_drop = start + int(np.argmax(drop))
                drop = drop[first_drop - start:]
            if first_drop is not None and not drop.all():
                keep_after = True
                break
        try:
            if first_drop is None:
                return 0
            if keep_after:
                n_kept = self._rewrite_keeping(records, j, value)
            else:
                del records  # unmap before cutting the file
                os.ftruncate(fd, self._data_offset + first_drop * self._record_size)
                n_kept = first_drop
        except OSError as exc:
            raise CVLogError(f"could not truncate CV log {self.path!r}: {reason(exc)}") from exc
        self._n_records = n_kept
        return n - n_kept

    def __enter__(self) -> "CVLogWriter":
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self.closed else f"{self._n_records} records"
        return f"CVLogWriter({self.path!r}, columns={list(self.columns)}, {state})"

    # -- private --------------------------------------------------------------------------------------
    def _require_open(self) -> int:
        if self._fd is None:
            raise CVLogError(f"CV log writer for {self.path!r} is closed")
        return self._fd

    def _close_quietly(self) -> None:
        fd, self._fd = self._fd, None
        os.close(fd)

    def _header_bytes(self, metadata: dict) -> bytes:
        text = encode_json({"columns": list(self.columns), "units": list(self.units), "metadata": metadata},
                            "the CV log header")
        padded = text + b"\x00" * (-len(text) % 8)
        head = MAGIC + struct.pack("<IIQ", FORMAT_VERSION, len(self.columns), len(text))
        return head + hashlib.sha256(head + padded).digest() + padded

    def _create(self, metadata: dict) -> None:
        """Create the file with its header atomically (a crash leaves no file or a complete header).

        Unlike a rename, the final link never replaces a log another writer created meanwhile."""
        with AtomicFile(self.path, what="CV log", error=CVLogError, verb="create", replace=False) as f:
            f.write(self._header_bytes(metadata))

    def _open(self, metadata) -> None:
        """Open the existing file for appending, lock it, check its header and cut a partial record."""
        while True:
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_APPEND)
            except OSError as exc:
                raise CVLogError(f"could not open CV log {self.path!r}: {reason(exc)}") from exc
            try:
                _lock(fd, self.path)
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except FileNotFoundError:
                same = False
            except BaseException:
                os.close(fd)
                raise
            if same:
                break
            os.close(fd)  # replaced by a rewrite while we opened it: open the current file
        try:
            header = _read_header(fd, self.path)
            self._check_match(header, metadata)
            body = os.fstat(fd).st_size - header.data_offset
            partial = body % self._record_size
            if partial:
                os.ftruncate(fd, header.data_offset + body - partial)
        except OSError as exc:
            os.close(fd)
            raise CVLogError(f"could not open CV log {self.path!r}: {reason(exc)}") from exc
        except BaseException:
            os.close(fd)
            raise
        self._fd = fd
        self.metadata = header.metadata
        self._data_offset = header.data_offset
        self._n_records = body // self._record_size
        self.dropped_partial_bytes = partial

    def _check_match(self, header: _Header, metadata) -> None:
        differences = []
        if header.columns != self.columns:
            differences.append(f"columns: the file has {list(header.columns)}, given {list(self.columns)}")
        elif header.units != self.units:
            differences.append(f"units: the file has {list(header.units)}, given {list(self.units)}")
        if metadata is not None and metadata != header.metadata:
            keys = sorted(k for k in set(metadata) | set(header.metadata)
                          if metadata.get(k, _MISSING) != header.metadata.get(k, _MISSING))
            in_file = {k: header.metadata.get(k, "<missing>") for k in keys}
            given = {k: metadata.get(k, "<missing>") for k in keys}
            differences.append(f"metadata: the file has {in_file}, given {given}")
        if differences:
            raise CVLogError(
                f"CV log {self.path!r} exists with a different header ({'; '.join(differences)}); "
                "use another path or the same columns, units and metadata"
            )

    def _rewrite_keeping(self, records: np.ndarray, j: int, value: float) -> int:
        """Write the records with column j <= value (or NaN) to a new file that replaces the log.

        The new file is locked before it is put in place, so no other writer can claim it in between."""
        header = os.pread(self._fd, self._data_offset, 0)
        n_kept = 0
        with AtomicFile(self.path, what="CV log", error=CVLogError, verb="truncate",
                        flags=os.O_RDWR | os.O_APPEND, keep_open=True) as f:
            os.fchmod(f.fd, stat.S_IMODE(os.fstat(self._fd).st_mode))
            _lock(f.fd, self.path)
            f.write(header)
            for start in range(0, records.shape[0], _SCAN_ROWS):
                block = np.asarray(records[start:start + _SCAN_ROWS])
                kept = np.ascontiguousarray(block[~(block[:, j] > value)])
                f.write(kept)
                n_kept += kept.shape[0]
        os.close(self._fd)  # the new file is locked through its own descriptor already
        self._fd = f.fd
        return n_kept


_MISSING = object()


def _lock(fd: int, path: str) -> None:
    """Hold an exclusive flock on the open log; LockError if another writer holds it."""
    lock_open_file(fd, f"CV log {path!r} is already open for writing by another writer (in this or another "
                       "process)")
