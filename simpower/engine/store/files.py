"""The run store's file on disk: one writer at a time, and the true cause of a failure.

Two jobs the SQLite layer does not do for the run store (:mod:`simpower.engine.store`); also :func:`check_file`, the cheap check that a file is a whole SQLite file:

* :class:`WriterLock` -- an exclusive ``flock`` on a sidecar file ``STORE.lock``
  that holds the writer's pid, host and start time. A second process that
  opens the store to write is refused in one line naming the holder, instead
  of computing every chunk a second time. The operating system releases the
  lock when its process ends in any way (``kill -9`` included), so a lock
  left by a dead run never blocks the next one. Where ``flock`` is missing or
  not supported by the file system (no ``fcntl``; ``ENOLCK`` on some network
  file systems) the store is opened without the lock.
* :func:`explain` -- the one-line message for an ``OSError`` or an SQLite
  error met while opening, reading or writing a store: permission denied
  (naming the file or folder), a read-only file system, a full disk, a path
  that is not a regular file or lies under a file, a store locked by another
  program, and -- only when SQLite says so -- a damaged file. SQLite reports
  most of these as "unable to open database file", so the file and its
  folder are probed with plain OS calls to find the errno the OS gives.

Examples
--------
>>> import errno
>>> from pathlib import Path
>>> msg = explain(OSError(errno.ENOSPC, "No space left on device"), Path("/data/run.sqlite"), "saving a chunk")
>>> msg.startswith("/data/run.sqlite: the disk holding /data is full")
True
>>> "disk" in msg and "full" in msg
True
"""

from __future__ import annotations

import errno
import json
import os
import socket
import stat
import struct
import tempfile
import time
from pathlib import Path

from ...errors import StoreError

try:  # POSIX
    import fcntl
except ImportError:  # pragma: no cover - Windows: no lock
    fcntl = None

LOCK_SUFFIX = ".lock"

#: SQLite primary result codes (https://www.sqlite.org/rescode.html) and the English text
#: sqlite3_errstr gives for each, used when an exception carries no code
SQLITE_CODES = {3: "access permission denied", 5: "database is locked", 6: "database table is locked",
                8: "attempt to write a readonly database", 10: "disk I/O error",
                11: "database disk image is malformed", 13: "database or disk is full",
                14: "unable to open database file", 23: "authorization denied", 26: "file is not a database"}
PERM, BUSY, LOCKED, READONLY, IOERR, CORRUPT, FULL, CANTOPEN, AUTH, NOTADB = 3, 5, 6, 8, 10, 11, 13, 14, 23, 26

#: file systems that hold no ordinary files (Linux names, from /proc/self/mounts)
VIRTUAL_FS = {"proc", "sysfs", "devtmpfs", "devpts", "cgroup", "cgroup2", "debugfs", "securityfs", "tracefs",
              "configfs", "pstore", "bpf", "mqueue", "efivarfs", "fusectl", "binfmt_misc"}


class StoreBusy(StoreError):
    """Another process holds the store's writer lock."""


# -- the writer lock -----------------------------------------------------------------
def lock_path(path: Path) -> Path:
    return Path(str(path) + LOCK_SUFFIX)


class WriterLock:
    """An exclusive, non-blocking ``flock`` on ``STORE.lock`` (see the module notes).

    :meth:`acquire` raises :class:`StoreBusy` naming the holder, or the
    ``OSError`` of creating the file (which :func:`explain` turns into a
    message). :meth:`release` removes the file, then lets go of the lock.
    """

    def __init__(self, path: Path):
        self.path = lock_path(path)
        self.fd: int | None = None

    def acquire(self) -> None:
        if fcntl is None:
            return
        for _ in range(20):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0), 0o644)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = _read_holder(fd)
                os.close(fd)
                raise StoreBusy(_busy_message(self.path, holder)) from None
            except OSError as exc:
                os.close(fd)
                if exc.errno in (errno.ENOLCK, errno.EOPNOTSUPP, errno.ENOTSUP, errno.EINVAL):
                    return  # the file system keeps no locks: go on without one
                raise
            if _same_file(fd, self.path):
                break
            os.close(fd)  # a closing holder removed the file between our open and flock: take the new one
        else:  # pragma: no cover - needs twenty races in a row
            raise StoreBusy(f"{self.path}: could not take the store's lock; run again.")
        self.fd = fd
        try:
            record = json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "since": time.time()})
            os.ftruncate(fd, 0)
            os.write(fd, record.encode())
        except BaseException:
            self.release()
            raise

    def release(self) -> None:
        fd, self.fd = self.fd, None
        if fd is None:
            return
        try:
            if _same_file(fd, self.path):
                os.unlink(self.path)  # while still locked, so nobody takes a file about to vanish
        except OSError:
            pass
        finally:
            os.close(fd)  # releases the lock


def _same_file(fd: int, path: Path) -> bool:
    try:
        a, b = os.fstat(fd), os.stat(path)
    except OSError:
        return False
    return (a.st_dev, a.st_ino) == (b.st_dev, b.st_ino)


def _read_holder(fd: int) -> dict:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        info = json.loads(os.read(fd, 4096).decode() or "{}")
        return info if isinstance(info, dict) else {}
    except (OSError, ValueError):
        return {}


def _busy_message(lock: Path, holder: dict) -> str:
    store = str(lock)[: -len(LOCK_SUFFIX)]
    pid, host, since = holder.get("pid"), holder.get("host"), holder.get("since")
    if pid is None:
        who = "another process"
    elif pid == os.getpid() and host == socket.gethostname():
        return (f"{store}: already open for writing in this process (pid {pid}); close the other RunStore "
                f"(or let its run finish) before opening it again.")
    else:
        who = f"process {pid}" + (f" on {host}" if host else "")
    when = ""
    if isinstance(since, (int, float)):
        when = " since " + time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(since))
    return (f"{store}: another run is writing this store ({who}{when}); wait for it to finish, or stop it "
            f"(its finished chunks are kept) and run again - or give another store file.")


# -- the true cause of a failure ---------------------------------------------------------
def sqlite_code(exc: BaseException) -> int | None:
    """The primary SQLite result code of an sqlite3 exception (from its code, else its text)."""
    code = getattr(exc, "sqlite_errorcode", None)
    if isinstance(code, int):
        return code & 0xFF
    text = str(exc).lower()
    for c, words in SQLITE_CODES.items():
        if words in text:
            return c
    return None


def _mount_type(path: Path) -> str | None:
    """The file system type of the mount holding ``path`` (Linux), or None."""
    try:
        with open("/proc/self/mounts") as fh:
            mounts = [line.split()[1:3] for line in fh if len(line.split()) >= 3]
    except OSError:
        return None
    p = os.path.realpath(path)
    best = None
    for point, kind in mounts:
        point = point.replace("\\040", " ")
        if (p == point or p.startswith(point.rstrip("/") + "/")) and (best is None or len(point) >= len(best[0])):
            best = (point, kind)
    return best[1] if best else None


def probe(path: Path, write: bool) -> OSError | str | None:
    """What the OS says when the store's file (and, to write, its folder) is opened.

    Returns the ``OSError`` of the first plain OS call that fails, a reason
    string when the path exists but is no regular file, or None when the OS
    sees no problem.
    """
    path = Path(path)
    try:
        st = os.stat(path)
    except FileNotFoundError:
        st = None
    except OSError as exc:
        return exc
    if st is not None and stat.S_ISDIR(st.st_mode):
        return "is a folder"
    if st is not None and not stat.S_ISREG(st.st_mode):
        return "is not a regular file (a device, pipe or socket)"
    folder = path.absolute().parent
    try:
        if st is not None:
            # access(2), not open(2): closing a descriptor of the store would drop the POSIX locks SQLite
            # holds on it in this process
            if not os.access(path, os.R_OK | (os.W_OK if write else 0)):
                read_only = write and bool(os.statvfs(path).f_flag & getattr(os, "ST_RDONLY", 1))
                code = errno.EROFS if read_only else errno.EACCES
                return OSError(code, os.strerror(code), str(path))
        else:
            os.stat(folder)
        if write:  # SQLite writes STORE-wal and STORE-shm beside the store
            fd, tmp = tempfile.mkstemp(prefix=".simpower-probe-", dir=folder)
            os.close(fd)
            os.unlink(tmp)
    except OSError as exc:
        return exc
    return None


def _is_dir(p: Path) -> bool:
    try:
        return stat.S_ISDIR(os.stat(p).st_mode)
    except OSError:
        return False


def _exists(p: Path) -> bool:
    try:
        os.stat(p)
    except OSError:
        return False
    return True


def _os_cause(exc: OSError, path: Path, write: bool) -> tuple[str, str]:
    """(cause, fix) for an OSError met on the store ``path``."""
    target = Path(exc.filename) if getattr(exc, "filename", None) else path
    folder = path.absolute().parent
    code = exc.errno
    if code in (errno.EACCES, errno.EPERM):
        need, bits = ("read and write", "rw") if write else ("read", "r")
        if _is_dir(target) or target == folder or not _exists(target):
            place = target if _is_dir(target) else folder
            return (f"permission denied on the folder {place}",
                    f"give your user {need} access to it (chmod u+{bits}x {place}) or use a store in a folder "
                    f"of your own")
        return (f"permission denied on {target}",
                f"give your user {need} access to it (chmod u+{bits} {target}) or copy it to a folder of your own")
    if code == errno.EROFS:
        return (f"{folder} is on a read-only file system",
                "put the store on a writable disk (copy it there to resume a run)")
    if code in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        return (f"the disk holding {folder} is {'full' if code == errno.ENOSPC else 'over your quota'}",
                "free some space there (or give a store on another disk) and run the same command again: the chunks "
                "already committed are kept")
    if code in (errno.ENOTDIR, errno.EEXIST):
        blocker = next((p for p in reversed(path.absolute().parents) if _exists(p) and not _is_dir(p)), None)
        if blocker is not None or code == errno.ENOTDIR:
            return (f"{blocker or 'a part of the path'} is a file, not a folder", "give a store path inside a folder")
    if code == errno.ENOENT:
        kind = _mount_type(folder) if _is_dir(folder) else None
        if kind in VIRTUAL_FS:
            return (f"{folder} is on a virtual file system ({kind}) that holds no ordinary files",
                    "give a store path on a disk")
        if not _is_dir(folder):
            return f"the folder {folder} does not exist", "create it or give another store path"
    if code == errno.EISDIR:
        return f"{target} is a folder", "give a file name for the run store"
    return f"{exc.strerror or exc} ({target})", "check the path, its permissions and its disk"


def explain(exc: BaseException, path: Path, doing: str, write: bool = True) -> str:
    """One line saying why ``doing`` failed on the store ``path``, and what fixes it.

    ``doing`` says what the store was doing ("opening", "saving a chunk");
    ``write`` whether it was opened to write (the probe checks accordingly).
    Only damage that SQLite itself reports invites starting afresh.
    """
    path = Path(path)
    try:
        return _explain(exc, path, doing, write)
    except Exception:  # the diagnosis itself failed: say what is known
        return f"{path}: {exc} (while {doing}); check the path, its permissions and its disk."


def _explain(exc: BaseException, path: Path, doing: str, write: bool) -> str:
    def line(cause: str, fix: str) -> str:
        return f"{path}: {cause} (while {doing}); {fix}."

    if isinstance(exc, OSError):
        return line(*_os_cause(exc, path, write))
    code = sqlite_code(exc)
    if code in (CORRUPT, NOTADB):
        return line(f"the store file is damaged (SQLite: {exc})",
                    "restore it from a copy, or move it away and start afresh")
    if code == FULL:
        return line(*_os_cause(OSError(errno.ENOSPC, "No space left on device"), path, write))
    if code in (BUSY, LOCKED):
        return line(f"another program holds a lock on the file (SQLite: {exc})",
                    "close what else has it open (a database browser, another run) and run again")
    if code in (CANTOPEN, READONLY, PERM, AUTH, IOERR):
        found = probe(path, write)
        if isinstance(found, OSError):
            return line(*_os_cause(found, path, write))
        if isinstance(found, str):
            return line(f"{path} {found}", "give the path of an ordinary file")
        if code == IOERR:
            return line(f"the disk reported an I/O error (SQLite: {exc})",
                        "check the disk, copy the store elsewhere and resume there")
        if code == READONLY:
            return line(f"SQLite may not write the store (SQLite: {exc})",
                        "check the permissions of the store, its -wal and -shm files and its folder")
    return line(f"SQLite failed: {exc}", "check the path, its permissions and its disk")


SQLITE_MAGIC = b"SQLite format 3\x00"


def check_file(path: Path) -> None:
    """Refuse files that are not SQLite or whose main file is shorter than its header says."""
    size = path.stat().st_size
    if size == 0:
        return  # SQLite creates the file lazily; an empty file is a fresh store
    with open(path, "rb") as fh:
        head = fh.read(100)
    if len(head) < 100 or head[:16] != SQLITE_MAGIC:
        raise StoreError(f"{path}: not a simpower run store (not a SQLite file).")
    wal = Path(str(path) + "-wal")
    if wal.exists() and wal.stat().st_size > 0:
        return  # a WAL to replay (e.g. after kill -9 during a checkpoint): SQLite's recovery decides
    page = struct.unpack(">H", head[16:18])[0]
    page = 65536 if page == 1 else page
    pages = struct.unpack(">I", head[28:32])[0]
    valid = head[24:28] == head[92:96]
    if valid and pages and size < page * pages:
        raise StoreError(f"{path}: the store is truncated ({size} bytes; its header says {page * pages}). "
                         f"Restore it from a copy or move it away and start afresh.")
