"""Writing chunks: one transaction per group of whole chunks, on a writer thread.

A chunk is in the store exactly when its ``chunks`` row is; the transaction
makes that all-or-nothing. The writer thread lets a finished chunk wait up to
:data:`COMMIT_DELAY` for others to share its commit, and checkpoints the WAL
about every :data:`CHECKPOINT_BYTES`, so the run computes while SQLite writes.
"""

from __future__ import annotations

import json
import queue
import sqlite3
import threading
import time
import urllib.parse
from pathlib import Path

from ...errors import StoreError
from ..chunk import ChunkOutput
from .codec import encode_record
from .files import CANTOPEN, READONLY, WriterLock, explain, sqlite_code


def _insert_chunk(conn: sqlite3.Connection, out: ChunkOutput) -> None:
    key = (int(out.point), int(out.chunk))
    rows = [(*key, name, out.paths.get(name, ""), json.dumps(out.hypotheses.get(name, [])), *encode_record(rec))
            for name, rec in out.records.items()]
    for table in ("chunks", "arrays", "causes"):
        conn.execute(f"DELETE FROM {table} WHERE point=? AND chunk=?", key)
    conn.executemany("INSERT INTO arrays VALUES (?, ?, ?, ?, ?, ?, ?, ?)", rows)
    if out.causes:
        conn.executemany("INSERT INTO causes VALUES (?, ?, ?, ?, ?)",
                         [(*key, j, cause, out.messages.get(cause, "")) for j, cause in enumerate(out.causes, 1)])
    conn.execute("INSERT INTO chunks VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                 (*key, int(out.size), float(out.seconds), float(out.started_at), time.time(), out.worker,
                  None if out.timeout_enforced is None else int(out.timeout_enforced)))


def write_chunks(conn: sqlite3.Connection, outs: list[ChunkOutput]) -> None:
    """Whole chunks in one transaction: each chunk's arrays, causes, paths, then its ``chunks`` row.

    A chunk is in the store exactly when its ``chunks`` row is; the
    transaction makes that all-or-nothing.
    """
    conn.execute("BEGIN IMMEDIATE")
    try:
        for out in outs:
            _insert_chunk(conn, out)
    except BaseException:
        _rollback(conn)
        raise
    conn.execute("COMMIT")


def _rollback(conn: sqlite3.Connection) -> None:
    """Roll back if a transaction is still open: SQLite ends it itself on some errors (SQLITE_FULL,
    SQLITE_IOERR), and a second ROLLBACK would then hide the real error."""
    if conn.in_transaction:
        conn.execute("ROLLBACK")


def write_chunk(conn: sqlite3.Connection, out: ChunkOutput) -> None:
    """One chunk in one transaction."""
    write_chunks(conn, [out])


#: page size of new stores (fewer overflow pages for the per-chunk arrays)
PAGE_SIZE = 16384
#: checkpoint the WAL into the main file once it holds about this many bytes. Small, so the
#: writer thread checkpoints while the run computes and closing the store has little left
#: to copy (SQLite's default, 1000 pages, left up to 16 MB for the run's own thread at close:
#: the store then cost about 10% of a t-test run instead of about 4%; scripts/bench_store.py).
CHECKPOINT_BYTES = 1_600_000


def _connect(path: Path, sync: str) -> sqlite3.Connection:
    fresh = not path.exists() or path.stat().st_size == 0
    conn = sqlite3.connect(str(path), isolation_level=None, timeout=60, check_same_thread=False)
    if fresh:
        conn.execute(f"PRAGMA page_size={PAGE_SIZE}")
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute(f"PRAGMA synchronous={sync.upper()}")
    page = int(conn.execute("PRAGMA page_size").fetchone()[0])
    conn.execute(f"PRAGMA wal_autocheckpoint={max(1, CHECKPOINT_BYTES // page)}")
    return conn


def _connect_read_only(path: Path) -> sqlite3.Connection:
    """A read-only connection; in a folder SQLite may not write in, one that reads the file as it is.

    Reading a WAL-mode store makes SQLite create ``STORE-shm`` beside it; in
    a read-only folder (a shared drive, a copy on a read-only disk) that
    fails. With no ``STORE-wal`` there, no run can be writing the store, so it
    is opened ``immutable`` instead (SQLite then takes no locks).
    """
    uri = "file:" + urllib.parse.quote(str(path.resolve()))
    conn = sqlite3.connect(uri + "?mode=ro", uri=True)
    try:
        conn.execute("SELECT count(*) FROM sqlite_master").fetchone()
        return conn
    except sqlite3.OperationalError as exc:
        if sqlite_code(exc) not in (READONLY, CANTOPEN) or Path(str(path) + "-wal").exists():
            raise
        conn.close()
    return sqlite3.connect(uri + "?mode=ro&immutable=1", uri=True)


#: a finished chunk waits at most this long (seconds) on the writer thread for others to share
#: its commit: fast runs then commit about a dozen chunks per transaction instead of one
#: (fewer pages written per chunk), while a run killed loses at most this much work
COMMIT_DELAY = 0.05


class _Writer:
    """A thread that commits chunks, so the run computes while SQLite writes.

    The first chunk of a commit waits up to :data:`COMMIT_DELAY` for others;
    those that arrived meanwhile are committed with it (at most ``group``,
    each one whole). :meth:`flush` cuts the wait short. The queue is bounded
    (back-pressure keeps memory bounded); :meth:`flush` waits for it to drain
    and re-raises the first failure.
    """

    def __init__(self, path: Path, sync: str, depth: int = 32, group: int = 16, delay: float = COMMIT_DELAY):
        self.path = path
        self.group = group
        self.delay = delay
        self.queue: queue.Queue = queue.Queue(maxsize=depth)
        self.error: BaseException | None = None
        self.hurry = threading.Event()
        self.conn = _connect(path, sync)
        self.thread = threading.Thread(target=self._loop, name="simpower-store-writer", daemon=True)
        self.thread.start()

    def _loop(self):
        while True:
            batch = [self.queue.get()]
            if batch[-1] is not None and self.delay > 0:
                self.hurry.wait(self.delay)  # returns at once while a flush waits
            while batch[-1] is not None and len(batch) < self.group:
                try:
                    batch.append(self.queue.get_nowait())
                except queue.Empty:
                    break
            outs = [o for o in batch if o is not None]
            try:
                if outs and self.error is None:
                    write_chunks(self.conn, outs)  # chunks waiting together commit together
            except BaseException as exc:  # kept and re-raised in the run's thread
                self.error = exc
            finally:
                for _ in batch:
                    self.queue.task_done()
            if batch[-1] is None:
                return

    def _raise(self):
        if self.error is not None:
            exc, self.error = self.error, None
            if isinstance(exc, (sqlite3.Error, OSError)):
                raise StoreError(explain(exc, self.path, "saving a chunk")) from None
            raise exc

    def put(self, out: ChunkOutput) -> None:
        self._raise()
        self.queue.put(out)

    def flush(self) -> None:
        self.hurry.set()
        try:
            self.queue.join()
        finally:
            self.hurry.clear()
        self._raise()

    def stop(self) -> None:
        if self.conn is None:
            return
        if self.thread.is_alive():
            self.hurry.set()
            self.queue.put(None)
            self.thread.join()
        self.conn.close()
        self.conn = None


def _shutdown(writer: _Writer, lock: WriterLock | None = None) -> None:
    """At exit or when the store is collected unclosed: commit what is queued, then let go of the lock."""
    try:
        writer.flush()
    finally:
        try:
            writer.stop()
        finally:
            if lock is not None:
                lock.release()
