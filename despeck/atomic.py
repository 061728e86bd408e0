"""Write-then-rename helpers, so a crash never leaves a half-written file at a destination.

Every output of the package (rasterio rasters, model files, reports, configs) is first
written to a hidden temporary file in the destination folder (same file system, so the
rename is atomic) and renamed into place only when complete. ``tempfile.mkstemp``
creates files readable by their owner only; :func:`publish` gives them the permissions
an ordinary new file would have (``0o666`` less the umask), flushes them to disk
(``fsync``, so a write error the operating system reports late still stops the rename)
and renames them.

Temporary files are named ``.<name>.despeck-<host>-<pid>-<random>.tmp``: ``<host>`` is a
short tag of this machine's name and ``<pid>`` the writing process. A process killed
before it could clean up (SIGKILL, power loss) leaves its temporary file behind;
:func:`sibling_temp` removes such files in the folder it writes to -- only files with
this name pattern, made on this machine by a process that no longer runs, and older than
the current process. Nothing else in a folder is ever touched.

Two processes writing the same output would silently replace each other's result.
:func:`claim_output` prevents that: it creates a lock file ``.<name>.despeck-lock``
beside the destination and holds an exclusive ``flock`` on it while the output is being
written. The kernel drops the lock when its process ends, however it ends, so the lock
file of a killed process is taken over by the next writer; a lock held by a running
process makes the second writer stop with :class:`OutputBusyError`.
"""

from __future__ import annotations

import errno
import hashlib
import os
import pathlib
import re
import resource
import socket
import stat
import tempfile
import time
from typing import NamedTuple

from .errors import DespeckError

__all__ = [
    "sibling_temp",
    "publish",
    "clean_stale_temps",
    "claim_output",
    "OutputClaim",
    "OutputBusyError",
    "write_problem",
    "WriteProblem",
    "folder_is_full",
]

#: Short tag of this machine in temporary and lock file names (a process id is only
#: meaningful on the machine that made it).
HOST_TAG = hashlib.sha1(socket.gethostname().encode("utf-8", "replace")).hexdigest()[:8]

_TEMP_INFIX = ".despeck-"
_TEMP_RE = re.compile(r"^\..+\.despeck-(?P<host>[0-9a-f]{8})-(?P<pid>\d+)-[a-z0-9_]+\.tmp$")
_LOCK_SUFFIX = ".despeck-lock"
# Part of an output's name kept in its temporary file's name (file names are limited to
# 255 bytes on common file systems; the rest of the temporary name needs about 40).
_NAME_KEEP = 180
# Wall-clock time this process started (about): only temporary files older than this
# can be stale.
_STARTED = time.time()
# Free space (bytes) below which a folder's file system counts as full.
_FULL_BYTES = 1 << 20


class OutputBusyError(DespeckError, OSError):
    """Another running process is writing the same output (see :func:`claim_output`)."""


# --------------------------------------------------------------------------- temporaries

def sibling_temp(path) -> pathlib.Path:
    """Create an empty hidden temporary file beside ``path`` and return its path.

    Stale temporary files of killed despeck processes in the same folder are removed
    first (see :func:`clean_stale_temps`).
    """
    path = pathlib.Path(path)
    clean_stale_temps(path.parent)
    prefix = f".{path.name[:_NAME_KEEP]}{_TEMP_INFIX}{HOST_TAG}-{os.getpid()}-"
    fd, tmp = tempfile.mkstemp(prefix=prefix, suffix=".tmp", dir=path.parent)
    os.close(fd)
    return pathlib.Path(tmp)


def _pid_alive(pid: int) -> bool:
    """Whether process ``pid`` runs on this machine (True when unsure)."""
    if pid <= 0 or pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # e.g. a process of another user: it exists
        return True
    return True


def _is_stale_temp(entry) -> bool:
    match = _TEMP_RE.match(entry.name)
    if not match or match["host"] != HOST_TAG:
        return False
    try:
        st = entry.stat(follow_symlinks=False)
    except OSError:
        return False
    if not stat.S_ISREG(st.st_mode) or st.st_mtime >= _STARTED:
        return False
    return not _pid_alive(int(match["pid"]))


def clean_stale_temps(folder) -> list[pathlib.Path]:
    """Remove despeck's own temporary and lock files in ``folder`` left by dead processes.

    A temporary file is removed only when its name has the pattern of
    :func:`sibling_temp`, it was made on this machine by a process that no longer runs
    and it is older than the current process. A lock file is removed only when no
    process holds its lock. Best effort: files that cannot be removed stay.

    Returns
    -------
    list of pathlib.Path
        The files removed.
    """
    folder = pathlib.Path(folder)
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        if entry.name.endswith(_LOCK_SUFFIX) and entry.name.startswith("."):
            if _remove_stale_lock(pathlib.Path(entry.path)):
                removed.append(pathlib.Path(entry.path))
        elif _TEMP_INFIX in entry.name and _is_stale_temp(entry):
            try:
                os.unlink(entry.path)
            except OSError:
                continue
            removed.append(pathlib.Path(entry.path))
    return removed


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _fsync_path(path, directory=False):
    fd = os.open(path, os.O_RDONLY | (getattr(os, "O_DIRECTORY", 0) if directory else 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def publish(tmp, path) -> pathlib.Path:
    """Give ``tmp`` ordinary new-file (or folder) permissions, flush it and rename it to ``path``.

    A file is flushed to disk (``fsync``) before the atomic rename, so an error the
    operating system reports only then (a full disk, a failing device) raises here and
    the destination is left untouched.
    """
    os.chmod(tmp, (0o777 if os.path.isdir(tmp) else 0o666) & ~_umask())
    if not os.path.isdir(tmp):
        _fsync_path(tmp)
    os.replace(tmp, path)
    try:  # make the rename itself durable; not every file system allows this
        _fsync_path(pathlib.Path(path).parent, directory=True)
    except OSError:
        pass
    return pathlib.Path(path)


# --------------------------------------------------------------------------- exclusive claims

def _lock_path(path: pathlib.Path) -> pathlib.Path:
    return path.parent / f".{path.name}{_LOCK_SUFFIX}"


def _read_owner(fd) -> str:
    try:
        text = os.pread(fd, 512, 0).decode("utf-8", "replace").split()
    except OSError:
        return "another process"
    if len(text) >= 3 and text[1].isdigit():
        return f"process {text[1]} on {text[2]}"
    return "another process"


def _owner_alive(fd) -> bool:
    """For file systems without flock: whether the lock's recorded owner still runs here."""
    try:
        text = os.pread(fd, 512, 0).decode("utf-8", "replace").split()
    except OSError:
        return False
    if len(text) < 2 or not text[1].isdigit():
        return False
    return text[0] != HOST_TAG or (int(text[1]) != os.getpid() and _pid_alive(int(text[1])))


def _lock(fd) -> bool:
    """Take an exclusive flock on ``fd`` without waiting; False if another process holds it."""
    import fcntl

    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    except OSError as exc:
        if exc.errno in (errno.EAGAIN, errno.EACCES):
            return False
        # The file system has no flock (some network and FUSE file systems): fall back
        # on the owner written in the file.
        return not _owner_alive(fd)
    return True


def _same_file(fd, path) -> bool:
    try:
        a, b = os.fstat(fd), os.stat(path)
    except OSError:
        return False
    return (a.st_dev, a.st_ino) == (b.st_dev, b.st_ino)


def _remove_stale_lock(lock: pathlib.Path) -> bool:
    try:
        fd = os.open(lock, os.O_RDWR | getattr(os, "O_CLOEXEC", 0))
    except OSError:
        return False
    try:
        if _lock(fd) and _same_file(fd, lock):
            os.unlink(lock)
            return True
    except OSError:
        pass
    finally:
        os.close(fd)
    return False


class OutputClaim:
    """An exclusive claim on an output path; release it when the output is published or abandoned.

    Use :func:`claim_output`. A context manager; :meth:`release` may be called more
    than once.
    """

    def __init__(self, path: pathlib.Path, lock: pathlib.Path, fd: int):
        self.path = path
        self.lock = lock
        self._fd = fd

    @property
    def released(self) -> bool:
        return self._fd is None

    def release(self):
        """Remove the lock file and drop the lock."""
        if self._fd is None:
            return
        fd, self._fd = self._fd, None
        try:
            if _same_file(fd, self.lock):
                os.unlink(self.lock)
        except OSError:
            pass
        finally:
            os.close(fd)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.release()
        return False

    def __del__(self):
        try:
            self.release()
        except Exception:  # noqa: BLE001 - never raise from a finaliser
            pass


def claim_output(path) -> OutputClaim:
    """Claim ``path`` for writing by this process, or raise :class:`OutputBusyError`.

    Creates (or takes over) the lock file ``.<name>.despeck-lock`` beside ``path`` and
    holds an exclusive, non-blocking ``flock`` on it; the lock file records this
    machine and process id for the message another writer shows. A lock file whose
    process has ended holds no lock and is taken over. After taking the lock, the lock
    file is checked to still be the one at its path (another process may have removed it
    meanwhile), so two processes can never both hold a claim.

    Raises
    ------
    OutputBusyError
        Another running process holds the claim.
    OSError
        The lock file cannot be created (e.g. the folder is read-only).
    """
    path = pathlib.Path(path)
    lock = _lock_path(path)
    flags = os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0)
    for _ in range(100):
        fd = os.open(lock, flags, 0o644)
        try:
            if not _lock(fd):
                raise OutputBusyError(f"{path}: being written by another despeck process ({_read_owner(fd)})")
            if not _same_file(fd, lock):
                os.close(fd)  # removed by its previous owner meanwhile: try again
                continue
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{HOST_TAG} {os.getpid()} {socket.gethostname()}\n".encode(), 0)
        except BaseException:
            try:
                os.close(fd)
            except OSError:
                pass
            raise
        return OutputClaim(path, lock, fd)
    raise OutputBusyError(f"{path}: the lock file {lock} keeps changing; is another process writing it?")


# --------------------------------------------------------------------------- diagnosis

class WriteProblem(NamedTuple):
    """Why a write failed: ``kind`` is one of ``'read-only'``, ``'permission'``, ``'full'``,
    ``'size-limit'``; ``text`` says it in a few words."""

    kind: str
    text: str


def write_problem(folder, exc=None, partial=None) -> WriteProblem | None:
    """Why writing in ``folder`` fails, or None when no cause is found.

    Parameters
    ----------
    folder : path-like
        The folder written to.
    exc : BaseException, optional
        The error raised; the ``errno`` of it and of its causes is used when present.
    partial : path-like, optional
        The incomplete file, compared with the process's file size limit.
    """
    codes, seen, depth = set(), exc, 0
    while seen is not None and depth < 10:
        # only operating-system errors: other libraries' errors may carry codes of their own
        if isinstance(seen, OSError) and seen.errno:
            codes.add(seen.errno)
        seen, depth = seen.__cause__ or seen.__context__, depth + 1
    if errno.EROFS in codes:
        return WriteProblem("read-only", "the file system is read-only")
    if codes & {errno.EACCES, errno.EPERM}:
        return WriteProblem("permission", "permission denied")
    if codes & {errno.ENOSPC, errno.EDQUOT}:
        return WriteProblem("full", "no space left on the device (disk full or quota reached)")
    if errno.EFBIG in codes:
        return WriteProblem("size-limit", "the file size limit (ulimit -f) was reached")
    soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
    if partial is not None and soft != resource.RLIM_INFINITY:
        try:
            if os.path.getsize(partial) >= soft:
                return WriteProblem("size-limit", f"the file size limit (ulimit -f) of {soft} bytes was reached")
        except OSError:
            pass
    if folder_is_full(folder):
        return WriteProblem("full", "no space left on the device (disk full)")
    try:
        if os.statvfs(folder).f_flag & os.ST_RDONLY:
            return WriteProblem("read-only", "the file system is read-only")
    except OSError:
        pass
    if not os.access(folder, os.W_OK | os.X_OK):
        return WriteProblem("permission", "the folder is not writable")
    return None


def folder_is_full(folder, below=_FULL_BYTES) -> bool:
    """Whether the file system of ``folder`` has less than ``below`` bytes free."""
    try:
        st = os.statvfs(folder)
    except OSError:
        return False
    return st.f_bavail * st.f_frsize < below
