"""File plumbing shared by checkpoints, CV logs and result files (private): atomic writes, locks, JSON headers.

- :func:`write_atomically` is the one way gridbias writes a whole file: a temporary file in the same
  folder, fsynced, renamed over the target, then the folder fsynced. A crash at any moment leaves either
  the old file or the new one (plus, after a hard kill, possibly a stray ``<name>.tmp-<16 hex digits>``,
  which :class:`CheckpointLock` removes when it is next acquired).
- :class:`CheckpointLock` claims a checkpoint path for one run; :func:`lock_open_file` claims an open file
  (a CV log) for one writer.
- :func:`encode_json` and :func:`describe_foreign` are the header checks both file kinds share.
"""

from __future__ import annotations

import errno
import json
import math
import os
import re
import secrets
import socket
import time

from .errors import CheckpointError, LockError, ParameterError

try:
    import fcntl
except ImportError:  # Windows: files work; CheckpointLock raises LockError, CV logs skip their lock
    fcntl = None

__all__ = ["encode_json", "describe_foreign", "write_atomically", "AtomicFile", "create_temp", "write_all",
           "fsync_folder", "fsync_path", "reason", "CheckpointLock", "lock_open_file"]

_MAX_JSON_DEPTH = 100

# Leading bytes of files people may hand us by mistake, to say what the file is instead.
_FOREIGN_SIGNATURES = (
    (b"\x89GRIDBIAS CKPT\r\n", "it is a gridbias checkpoint (read it with gridbias.checkpoint.read_checkpoint)"),
    (b"\x89GRIDBIAS CVLG\r\n", "it looks like a gridbias CV log (read it with gridbias.cvlog.read_cvlog)"),
    (b"PK\x03\x04", "it looks like a ZIP archive (for example a plain NumPy .npz file)"),
    (b"\x93NUMPY", "it looks like a NumPy .npy file"),
    (b"\x89PNG", "it looks like a PNG image"),
    (b"\x80", "it looks like a Python pickle (it was not unpickled)"),
)


# ------------------------------------------------------------------------------------------- JSON headers
def encode_json(value, what: str) -> bytes:
    """Validate `value` and return its UTF-8 JSON, refusing anything JSON cannot hold exactly.

    Allowed: dict with str keys, list, tuple (read back as list), str, int, finite float, bool, None.
    Raises ParameterError naming the offending entry (e.g. ``meta['walls'][0]['k'] = nan``).
    """
    _check_json(value, what, 0)
    return json.dumps(value, ensure_ascii=False, allow_nan=False).encode("utf-8")


def _check_json(value, where: str, depth: int) -> None:
    if depth > _MAX_JSON_DEPTH:
        raise ParameterError(f"{where} is nested deeper than {_MAX_JSON_DEPTH} levels (circular?)")
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
            _check_json(item, f"{where}[{i}]", depth + 1)
        return
    if isinstance(value, dict):
        for key, item in value.items():
            if not isinstance(key, str):
                raise ParameterError(f"{where} has key {key!r} ({type(key).__name__}); keys must be str")
            _check_json(item, f"{where}[{key!r}]", depth + 1)
        return
    raise ParameterError(
        f"{where} has type {type(value).__name__}, which JSON cannot hold exactly; allowed: dict (str keys), "
        "list, tuple, str, int, float, bool, None (convert NumPy scalars with int()/float()/bool())"
    )


def describe_foreign(head: bytes) -> str:
    """Say what a file starting with `head` looks like, for error messages ('' when unknown)."""
    for signature, description in _FOREIGN_SIGNATURES:
        if head.startswith(signature):
            return f"; {description}"
    return ""


# -------------------------------------------------------------------------------------------- atomic writes
class AtomicFile:
    """A file written in full under a temporary name and then put in place atomically.

    Use as a context manager: ``with AtomicFile(path, what="checkpoint", error=CheckpointError) as f:``
    then ``f.write(bytes)`` (or use ``f.fd``). A clean exit fsyncs the file, puts it at ``path`` and
    fsyncs the folder; an exception removes the temporary file and leaves an existing ``path`` untouched.
    Every OSError becomes ``error`` naming ``what``, the path and the cause (chained).

    Parameters
    ----------
    path : str
    what : str
        What the file is, for messages ("checkpoint", "CV log", "file").
    verb : str, keyword-only
        What was being done, for messages: "could not <verb> <what> <path>" (default "write").
    error : type
        The library error to raise (CheckpointError, CVLogError, OutputError).
    replace : bool, keyword-only
        True: replace an existing file (rename). False: never replace one made meanwhile (hard link;
        the existing file wins).
    flags : int, keyword-only
        Extra ``os.open`` flags of the temporary file (e.g. ``os.O_RDWR | os.O_APPEND``).
    keep_open : bool, keyword-only
        Leave ``fd`` open after the file is in place; the caller then owns it and must close it.
    """

    def __init__(self, path, *, what: str, error: type, verb: str = "write", replace: bool = True,
                 flags: int = os.O_WRONLY, keep_open: bool = False):
        self.path = os.fspath(path)
        self.what = what
        self.verb = verb
        self.error = error
        self.replace = replace
        self.flags = flags
        self.keep_open = keep_open
        self.fd = None
        self._tmp = None

    def __enter__(self) -> "AtomicFile":
        try:
            self.fd, self._tmp = create_temp(self.path, self.flags)
        except OSError as exc:
            raise self._failed(exc) from exc
        return self

    def write(self, data) -> None:
        """Write all of ``data`` (bytes-like) at the end of the temporary file."""
        try:
            write_all(self.fd, data)
        except OSError as exc:
            raise self._failed(exc) from exc

    def _failed(self, exc: OSError) -> Exception:
        return self.error(f"could not {self.verb} {self.what} {self.path!r}: {reason(exc)}")

    def __exit__(self, exc_type, exc, tb) -> None:
        try:
            if exc_type is None:
                try:
                    os.fsync(self.fd)
                    if not self.keep_open:
                        os.close(self.fd)
                        self.fd = None
                    if self.replace:
                        os.replace(self._tmp, self.path)
                    else:
                        try:
                            os.link(self._tmp, self.path)
                        except FileExistsError:
                            pass
                        os.unlink(self._tmp)
                    self._tmp = None
                except OSError as error:
                    raise self._failed(error) from error
        finally:
            if self.fd is not None and (exc_type is not None or self._tmp is not None):
                os.close(self.fd)
                self.fd = None
            if self._tmp is not None:
                try:
                    os.unlink(self._tmp)
                except FileNotFoundError:
                    pass
                self._tmp = None
        if exc_type is None:
            try:
                fsync_folder(os.path.dirname(os.path.abspath(self.path)))
            except OSError as error:
                raise self.error(
                    f"wrote {self.what} {self.path!r}, but could not sync its folder, so the rename may not "
                    f"survive a power failure: {reason(error)}"
                ) from error


def write_atomically(path, chunks, *, what: str, error: type, replace: bool = True) -> None:
    """Write the byte chunks to ``path`` atomically (see :class:`AtomicFile`); ``chunks`` may be one bytes.

    Raises ``error`` naming ``what``, the path and the cause; an existing file at ``path`` is then intact.
    """
    if isinstance(chunks, (bytes, bytearray, memoryview)):
        chunks = (chunks,)
    with AtomicFile(path, what=what, error=error, replace=replace) as f:
        for chunk in chunks:
            f.write(chunk)


def create_temp(path: str, flags: int = os.O_WRONLY):
    """Create and open ``<path>.tmp-<16 hex>`` exclusively (permissions from the umask); return (fd, name)."""
    while True:
        tmp = f"{path}.tmp-{secrets.token_hex(8)}"
        try:
            return os.open(tmp, flags | os.O_CREAT | os.O_EXCL, 0o666), tmp
        except FileExistsError:
            continue


def write_all(fd: int, data) -> None:
    view = memoryview(data).cast("B")
    while view:
        written = os.write(fd, view)
        view = view[written:]


def fsync_folder(folder: str) -> None:
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


def fsync_path(path) -> None:
    """Make what was written to ``path`` (through any descriptor) durable; nothing if it does not exist."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def reason(exc: OSError) -> str:
    """An OSError as one phrase: 'No space left on device (errno ENOSPC)'."""
    if exc.errno is not None:
        return f"{exc.strerror or os.strerror(exc.errno)} (errno {errno.errorcode.get(exc.errno, exc.errno)})"
    return str(exc)


# ------------------------------------------------------------------------------------------------------ locks
class CheckpointLock:
    """Exclusive claim on a checkpoint path, so that two runs never write the same checkpoint.

    The claim is a POSIX ``flock`` on the sidecar file ``<path>.lock``, which holds the holder's pid,
    host name and start time as JSON. The kernel drops the flock when the holder exits or is killed, so a
    lock file left by a dead process is taken over silently (its old content is kept in
    `previous_holder`). While the lock is held, stray temporary files of `path` left by killed writers
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
        """Claim the path; raise LockError naming the holder (pid, host) if another one holds it."""
        if fcntl is None:
            raise LockError("CheckpointLock needs POSIX file locking (fcntl), which this platform lacks")
        if self._fd is not None:
            raise LockError(f"this CheckpointLock already holds {self.lock_path!r}")
        while True:
            try:
                fd = os.open(self.lock_path, os.O_RDWR | os.O_CREAT, 0o666)
            except OSError as exc:
                raise CheckpointError(
                    f"could not create lock file {self.lock_path!r}: {reason(exc)}"
                ) from exc
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = _read_holder(fd)
                os.close(fd)
                raise LockError(self._held_message(holder)) from None
            except OSError as exc:
                os.close(fd)
                raise CheckpointError(f"could not lock {self.lock_path!r}: {reason(exc)}") from exc
            # The previous holder may have released (and unlinked) the file between our open and flock:
            # then we locked an orphan and must start again on the current file.
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.lock_path))
            except FileNotFoundError:
                same = False
            if same:
                break
            os.close(fd)
        self.previous_holder = _read_holder(fd)
        record = {"pid": os.getpid(), "host": socket.gethostname(),
                  "since": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, json.dumps(record).encode("utf-8") + b"\n", 0)
        except OSError as exc:
            os.close(fd)
            raise CheckpointError(f"could not write lock file {self.lock_path!r}: {reason(exc)}") from exc
        self._fd = fd
        self._remove_stray_temp_files()
        return self

    def release(self) -> None:
        """Give the path up and remove the lock file (no-op when not held)."""
        if self._fd is None:
            return
        try:
            os.unlink(self.lock_path)  # while still locked, so nobody can lock this file in between
        except FileNotFoundError:
            pass
        finally:
            os.close(self._fd)
            self._fd = None

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


def _read_holder(fd: int):
    """The holder record in a lock file, or None when it is empty or unreadable."""
    try:
        record = json.loads(os.pread(fd, 4096, 0).decode("utf-8"))
    except (OSError, ValueError):
        return None
    return record if isinstance(record, dict) else None


def lock_open_file(fd: int, message: str) -> None:
    """Hold an exclusive flock on the open file ``fd``; LockError(message) if another holder has it.

    Without POSIX file locking (Windows) nothing is locked.
    """
    if fcntl is None:
        return
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        raise LockError(message) from None
