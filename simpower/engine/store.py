"""The run store: a SQLite file holding every finished chunk, as data only.

One file per run or sweep. Each finished chunk is written in one transaction
(its ``chunks`` row, the per-replicate arrays and the failure causes commit
together or not at all), in WAL mode, so a ``kill -9`` at any moment leaves a
valid store whose finished chunks a rerun reuses. With the default
``sync="normal"`` a power cut may lose the last few commits (never corrupt the
file); ``sync="full"`` makes every commit reach the disk before the run goes on.

Nothing is pickled: each chunk's arrays of one analysis are raw
little-endian bytes laid end to end, with their layout (field, dtype, shape)
and a CRC-32 beside them, the scenario is its JSON spec, and only
numeric dtypes from a short list are ever decoded -- a store received from
someone else is safe to open.

A chunk whose rows cannot be decoded (CRC, layout, sizes) is recomputed by the
next run with a warning naming it (:meth:`RunStore.load`); a damaged plan of a
grid point refuses the store. One process writes a store at a time (an
``flock`` on ``STORE.lock``), and a failure to open or write names its real
cause (:mod:`simpower.engine.storefile`).

Each grid point records its own scenario fingerprint, the seed entropy and the
chunk size; :meth:`RunStore.bind` refuses a point whose scenario, seed or chunk
size changed, naming what changed. Because a chunk's numbers depend only on
(seed, point key, chunk index, chunk size) (see :mod:`simpower.engine.chunk`),
a resumed run equals an uninterrupted one bit for bit.

Tables: ``meta(key, value)`` (format, version, provenance, the sync setting
and, for a command-line run, the data-only plan ``simpower resume`` rebuilds
the run from); ``points(point, fingerprint, seed, chunk_size, reps, analyses,
scenario, updated_at)``; ``chunks(point, chunk, size, seconds,
started_at, finished_at, worker, timeout_enforced)``; ``arrays(point, chunk,
analysis, path, hypotheses, layout, crc32, data)``; ``causes(point, chunk,
code, cause, message)``. (Format version 1 kept one ``arrays`` row per field
and a ``chunk_analyses`` table; one row per chunk and analysis costs fewer
pages per commit.)

Examples
--------
>>> import simpower as sp, tempfile, os
>>> from simpower.engine.store import open_store
>>> path = os.path.join(tempfile.mkdtemp(), "run.sqlite")
>>> sc = sp.Scenario(sp.NormalTwoArm(n=20, effect=0.5), sp.TTest())
>>> res = sp.run(sc, reps=500, seed=3, n_jobs=1, store=path)
>>> with open_store(path) as st:
...     reps = st.replicates()
...     pts = st.points()
>>> len(reps), int(pts.loc[0, "reps_done"])
(500, 500)
"""

from __future__ import annotations

import json
import math
import queue
import sqlite3
import struct
import threading
import time
import urllib.parse
import weakref
import zlib
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pandas as pd

from ..errors import StoreError
from .chunk import ChunkOutput
from .storefile import CANTOPEN, READONLY, WriterLock, explain, sqlite_code

FORMAT = "simpower-run-store"
VERSION = "2"
#: the only dtypes ever decoded from a store
DTYPES = {"<f8": np.dtype("<f8"), "<i2": np.dtype("<i2"), "<i4": np.dtype("<i4"), "<i8": np.dtype("<i8"),
          "|b1": np.dtype("|b1")}
SQLITE_MAGIC = b"SQLite format 3\x00"
RECORD_FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high")

SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS points (
    point INTEGER PRIMARY KEY, fingerprint TEXT NOT NULL, seed TEXT NOT NULL, chunk_size INTEGER NOT NULL,
    reps INTEGER NOT NULL, analyses TEXT NOT NULL, scenario TEXT NOT NULL, updated_at REAL);
CREATE TABLE IF NOT EXISTS chunks (
    point INTEGER NOT NULL, chunk INTEGER NOT NULL, size INTEGER NOT NULL, seconds REAL NOT NULL,
    started_at REAL, finished_at REAL, worker TEXT, timeout_enforced INTEGER, PRIMARY KEY (point, chunk));
CREATE TABLE IF NOT EXISTS arrays (
    point INTEGER NOT NULL, chunk INTEGER NOT NULL, analysis TEXT NOT NULL, path TEXT, hypotheses TEXT,
    layout TEXT NOT NULL, crc32 INTEGER NOT NULL, data BLOB NOT NULL, PRIMARY KEY (point, chunk, analysis));
CREATE TABLE IF NOT EXISTS causes (
    point INTEGER NOT NULL, chunk INTEGER NOT NULL, code INTEGER NOT NULL, cause TEXT NOT NULL, message TEXT,
    PRIMARY KEY (point, chunk, code));
"""
TABLES = ("meta", "points", "chunks", "arrays", "causes")


class ChunkDamaged(StoreError):
    """One chunk's rows cannot be decoded (checksum, layout, sizes); nothing says the rest is unsound.

    A store opened to write recomputes such a chunk (:meth:`RunStore.load`).
    """

    def __init__(self, where: str, reason: str):
        self.where, self.reason = where, reason
        super().__init__(f"{where} is damaged ({reason}); run the same command again (or simpower resume) to "
                         f"recompute it: a chunk's numbers depend only on the seed, its grid point and its index.")


# -- record codec ------------------------------------------------------------
def _little(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a)
    dt = a.dtype.newbyteorder("<") if a.dtype.byteorder not in ("|", "<") else a.dtype
    if dt.str not in DTYPES:
        raise StoreError(f"cannot store an array of dtype {a.dtype} (allowed: {', '.join(DTYPES)}).")
    return np.ascontiguousarray(a, dtype=dt)


def encode_record(rec: dict[str, np.ndarray]) -> tuple[str, int, memoryview]:
    """(layout, crc32, bytes) of one analysis' arrays in a chunk, laid end to end.

    ``layout`` is JSON ``[[field, dtype, shape], ...]`` in the order of the
    bytes; every array is little-endian, of a dtype from :data:`DTYPES`. One
    blob per chunk and analysis (not one per field) keeps a commit to a few
    pages besides the data.
    """
    parts = [(f, _little(v)) for f, v in rec.items()]
    layout = json.dumps([[f, v.dtype.str, list(v.shape)] for f, v in parts])
    data = np.concatenate([v.reshape(-1).view(np.uint8) for _, v in parts]) if parts else np.empty(0, np.uint8)
    view = memoryview(data)
    return layout, zlib.crc32(view), view


def decode_record(layout: str, crc: int, data: bytes, where: str = "") -> dict[str, np.ndarray]:
    """The arrays encoded by :func:`encode_record`; checks dtypes, sizes and the CRC.

    Raises :class:`ChunkDamaged` (``where`` names the chunk) when they do not hold.
    """
    try:
        fields = [(str(f), str(dt), [int(d) for d in shape]) for f, dt, shape in json.loads(layout)]
    except (ValueError, TypeError):
        raise ChunkDamaged(where, f"unreadable array layout {str(layout)[:60]!r}") from None
    for f, dt, _ in fields:
        if dt not in DTYPES:
            raise ChunkDamaged(where, f"array {f!r} of dtype {dt!r} refused: a store holds only {', '.join(DTYPES)}")
    want = sum(DTYPES[dt].itemsize * math.prod(dims) for _, dt, dims in fields)
    if not isinstance(data, (bytes, bytearray, memoryview)) or len(data) != want:
        got = len(data) if isinstance(data, (bytes, bytearray, memoryview)) else 0
        raise ChunkDamaged(where, f"arrays hold {got} bytes, their layout says {want}")
    if not isinstance(crc, int) or zlib.crc32(data) != crc:
        raise ChunkDamaged(where, "array checksum mismatch")
    out, at = {}, 0
    for f, dt, dims in fields:
        d = DTYPES[dt]
        size = d.itemsize * math.prod(dims)
        out[f] = np.frombuffer(data, dtype=d, count=math.prod(dims), offset=at).reshape(dims).astype(
            d.newbyteorder("="), copy=True)
        at += size
    return out


# -- file checks ---------------------------------------------------------------
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


def _spec_diff(old: Any, new: Any, prefix: str = "") -> list[str]:
    """Dotted names whose values differ between two specs, with old -> new."""
    if isinstance(old, dict) and isinstance(new, dict):
        out = []
        for k in sorted(set(old) | set(new), key=str):
            out += _spec_diff(old.get(k, "<absent>"), new.get(k, "<absent>"), f"{prefix}{k}.")
        return out
    if old != new:
        return [f"{prefix[:-1] or 'scenario'}: {old!r} -> {new!r}"]
    return []


def _check_plan(where: str, row: tuple) -> None:
    """Refuse a grid point whose stored plan (fingerprint, seed, chunk size, reps, scenario) is unreadable.

    Its chunks cannot be checked against the run without it, so unlike a
    damaged chunk this refuses the store.
    """
    fp, seed, cs, reps, spec = row
    bad = [name for name, ok in (("fingerprint", isinstance(fp, str) and fp.strip() != ""),
                                 ("seed", _is_int(seed)), ("chunk_size", _is_int(cs)), ("reps", _is_int(reps)),
                                 ("scenario", _is_json_object(spec))) if not ok]
    if bad:
        raise StoreError(f"{where}: its stored plan is damaged (unreadable {', '.join(bad)} in table points), so "
                         f"its chunks cannot be checked against this run; restore the store from a copy, or move "
                         f"it away and start afresh.")


def _is_int(v: Any) -> bool:
    try:
        return not isinstance(v, (float, bytes)) and int(v) >= 0
    except (TypeError, ValueError):
        return False


def _is_json_object(text: Any) -> bool:
    try:
        return isinstance(json.loads(text), dict)
    except (TypeError, ValueError):
        return False


def _analyses_info(scenario) -> dict[str, dict[str, Any]]:
    """Per analysis: the true value of its estimand (for bias and coverage read back from the store)."""
    from ..summaries import true_effect_of

    return {name: {"true_effect": true_effect_of(scenario, name)} for name in scenario.analyses}


def _truths(analyses_text: str) -> dict[str, float | None]:
    info = json.loads(analyses_text)
    if isinstance(info, list):
        return {name: None for name in info}
    out = {}
    for name, v in info.items():
        te = v.get("true_effect") if isinstance(v, dict) else None
        out[name] = float(te) if isinstance(te, (int, float)) and not isinstance(te, bool) else None
    return out


def _flatten(spec: dict, prefix: str = "") -> dict[str, Any]:
    out = {}
    for k, v in spec.items():
        if isinstance(v, dict):
            out.update(_flatten(v, f"{prefix}{k}."))
        elif k != "type" and not k.startswith("_") and (v is None or isinstance(v, (int, float, str, bool))):
            out[f"{prefix}{k}"] = v
    return out


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


class RunStore:
    """A SQLite run store (see the module notes).

    Parameters
    ----------
    path : str or Path
        The store file; created when ``mode='a'`` and absent.
    mode : {'a', 'r'}
        'a' reads and appends (a run); 'r' reads only (never writes, never creates).
    sync : {'normal', 'full'}, optional
        SQLite ``synchronous`` setting, remembered in the store (None: the
        stored choice, else 'normal'): 'normal' survives a killed process (kill -9)
        and stays valid after a power cut (losing the last commits); 'full'
        flushes every commit to the disk.
    check : bool
        Run SQLite's ``quick_check`` when opening (cost grows with the file).
    background : bool
        Commit chunks on a writer thread (the run goes on computing meanwhile);
        :meth:`flush` and :meth:`close` wait for the commits.
    """

    def __init__(self, path, mode: str = "a", sync: str | None = None, check: bool = False,
                 background: bool = True):
        if mode not in ("a", "r"):
            raise StoreError(f"`mode` must be 'a' or 'r'; got {mode!r}.")
        if sync not in (None, "normal", "full"):
            raise StoreError(f"`sync` must be 'normal' or 'full'; got {sync!r}.")
        self.path = Path(path)
        self.mode = mode
        self._conn: sqlite3.Connection | None = None
        self._writer: _Writer | None = None
        self._lock: WriterLock | None = None
        try:
            self._open(sync, check, background)
        except BaseException:
            self.close()
            raise

    def _open(self, sync, check, background) -> None:
        mode = self.mode
        with self._guard("opening"):
            if self.path.is_dir():
                raise StoreError(f"{self.path}: is a folder; give a file name for the run store.")
            if mode == "r" and not self.path.exists():
                raise StoreError(f"{self.path}: no such run store.")
            if self.path.exists() and not self.path.is_file():
                raise StoreError(f"{self.path}: is not a regular file (a device, pipe or socket); give the path "
                                 f"of an ordinary file for the run store.")
            if self.path.exists():
                check_file(self.path)
            if mode == "a":
                self.path.parent.mkdir(parents=True, exist_ok=True)
                self._lock = WriterLock(self.path)
                self._lock.acquire()  # one writer at a time; also shows whether the folder takes new files
                self._finalizer = weakref.finalize(self, self._lock.release)
            if mode == "r":
                self._conn = _connect_read_only(self.path)
            else:
                self._conn = _connect(self.path, sync or "normal")
            if check:
                row = self._conn.execute("PRAGMA quick_check").fetchone()
                if row[0] != "ok":
                    raise StoreError(f"{self.path}: the store is corrupted (SQLite: {row[0]}).")
            self._init_schema()
            if mode == "a":
                sync = self._settle_sync(sync)
            if mode == "a" and background:
                self._writer = _Writer(self.path, sync)
                self._finalizer.detach()
                self._finalizer = weakref.finalize(self, _shutdown, self._writer, self._lock)

    def _settle_sync(self, sync: str | None) -> str:
        """The sync setting: the one given (then remembered) or the stored one."""
        row = self._conn.execute("SELECT value FROM meta WHERE key='sync'").fetchone()
        if sync is None:
            sync = row[0] if row is not None and row[0] in ("normal", "full") else "normal"
        elif row is None or row[0] != sync:
            with self._transaction() as c:
                c.execute("INSERT OR REPLACE INTO meta VALUES ('sync', ?)", (sync,))
        self._conn.execute(f"PRAGMA synchronous={sync.upper()}")
        return sync

    # -- plumbing ----------------------------------------------------------------
    @contextmanager
    def _guard(self, doing: str):
        """SQLite and OS failures as one line naming their true cause (see :func:`.storefile.explain`)."""
        try:
            yield
        except StoreError:
            raise
        except (sqlite3.Error, OSError) as exc:
            raise StoreError(explain(exc, self.path, doing, write=self.mode == "a")) from None

    def _init_schema(self):
        c = self._conn
        tables = {r[0] for r in c.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if not tables:
            if self.mode == "r":
                raise StoreError(f"{self.path}: an empty file, not a simpower run store.")
            with self._transaction():
                for stmt in SCHEMA.strip().split(";"):
                    if stmt.strip():
                        c.execute(stmt)
                from .._version import __version__
                from .._provenance import source_digest

                c.executemany("INSERT INTO meta VALUES (?, ?)", [
                    ("format", FORMAT), ("version", VERSION), ("created_at", repr(time.time())),
                    ("simpower_version", __version__), ("simpower_source_sha256", source_digest())])
        else:
            missing = [t for t in TABLES if t not in tables]
            fmt = c.execute("SELECT value FROM meta WHERE key='format'").fetchone() if "meta" in tables else None
            if missing or fmt is None or fmt[0] != FORMAT:
                raise StoreError(f"{self.path}: a SQLite file but not a simpower run store"
                                 + (f" (missing tables: {', '.join(missing)})." if missing else "."))
            ver = c.execute("SELECT value FROM meta WHERE key='version'").fetchone()
            if ver is None or ver[0] != VERSION:
                raise StoreError(f"{self.path}: run store format version {ver[0] if ver else '?'}; "
                                 f"this simpower reads version {VERSION}.")

    @contextmanager
    def _transaction(self):
        c = self._conn
        c.execute("BEGIN IMMEDIATE")
        try:
            yield c
        except BaseException:
            _rollback(c)
            raise
        else:
            c.execute("COMMIT")

    def close(self) -> None:
        """Commit what is pending, stop the writer thread, close the file and let go of the writer lock."""
        finalizer = getattr(self, "_finalizer", None)
        if finalizer is not None:
            finalizer.detach()
        try:
            if self._writer is not None:
                writer, self._writer = self._writer, None
                try:
                    writer.flush()
                finally:
                    writer.stop()
        finally:
            try:
                if self._conn is not None:
                    conn, self._conn = self._conn, None
                    conn.close()
            finally:
                if self._lock is not None:
                    lock, self._lock = self._lock, None
                    lock.release()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def __repr__(self):
        return f"RunStore({str(self.path)!r}, mode={self.mode!r})"

    def _need_writable(self):
        if self.mode != "a":
            raise StoreError(f"{self.path}: opened read-only.")

    # -- metadata ------------------------------------------------------------------
    def meta(self) -> dict[str, str]:
        with self._guard("reading metadata"):
            return dict(self._conn.execute("SELECT key, value FROM meta"))

    @property
    def seed(self) -> int | None:
        """The seed entropy of the run(s) in this store, or None if it holds no point yet."""
        with self._guard("reading the seed"):
            row = self._conn.execute("SELECT seed FROM points ORDER BY point LIMIT 1").fetchone()
        return None if row is None else int(row[0])

    def record_plan(self, plan: dict[str, Any]) -> None:
        """Keep the command's plan (data only: command name, scenario data, settings) for ``simpower resume``.

        The plan never holds a command line, a folder or an output path;
        ``simpower resume`` validates it before rebuilding the run from it.
        """
        self._need_writable()
        text = json.dumps(plan, sort_keys=True, default=str)
        with self._guard("recording the plan"), self._transaction() as c:
            c.execute("INSERT OR REPLACE INTO meta VALUES ('plan', ?)", (text,))

    @property
    def plan(self) -> Any:
        """The recorded plan as JSON data (not yet validated), or None if the store has none."""
        text = self.meta().get("plan")
        if text is None:
            return None
        try:
            return json.loads(text)
        except ValueError:
            raise StoreError(f"{self.path}: the recorded plan is not valid JSON; re-run the original command "
                             f"with --store to continue.") from None

    def bind(self, point: int, scenario, seed: int, chunk_size: int, reps: int) -> None:
        """Record grid point ``point`` or check that it matches what the store holds.

        Raises :class:`~simpower.errors.StoreError` when the stored point was
        made by another scenario, seed or chunk size (so two runs never mix).
        """
        fp = scenario.fingerprint()
        spec = scenario.spec()
        self.flush()
        with self._guard("checking the scenario"):
            row = self._conn.execute("SELECT fingerprint, seed, chunk_size, reps, scenario FROM points "
                                     "WHERE point=?", (int(point),)).fetchone()
        if row is not None:
            old_fp, old_seed, old_cs, old_reps, old_spec = row
            where = f"{self.path}: grid point {point}"
            _check_plan(where, row)
            self._warn_code_change()
            if old_fp != fp:
                changes = _spec_diff(json.loads(old_spec), json.loads(json.dumps(spec, default=str)))
                what = "; ".join(changes[:4]) if changes else "the spec differs"
                raise StoreError(f"{where} was run with another scenario (fingerprint {old_fp}, now {fp}: {what}). "
                                 f"Use another store file, or move this one away to start afresh.")
            if int(old_seed) != int(seed):
                raise StoreError(f"{where} was run with seed {old_seed}, this run asks seed {seed}; "
                                 f"give seed {old_seed} to resume, or use another store file.")
            if int(old_cs) != int(chunk_size):
                raise StoreError(f"{where} was run with chunk size {old_cs}, this run asks {chunk_size}; "
                                 f"give chunk_size {old_cs} to resume, or use another store file.")
            if int(old_reps) == int(reps):
                return
        self._need_writable()
        with self._guard("recording the scenario"), self._transaction() as c:
            c.execute("INSERT OR REPLACE INTO points VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                      (int(point), fp, str(int(seed)), int(chunk_size), int(reps),
                       json.dumps(_analyses_info(scenario)), json.dumps(spec, default=str), time.time()))

    def _warn_code_change(self) -> None:
        """Warn (once per store) when the stored chunks were computed by other simpower source code."""
        if getattr(self, "_code_checked", False):
            return
        self._code_checked = True
        from .._provenance import source_digest

        old = self.meta().get("simpower_source_sha256")
        if old and old != source_digest():
            import warnings

            warnings.warn(f"{self.path} was written by simpower source {old}, this is {source_digest()}: chunks "
                          f"computed now may differ from an uninterrupted run with either code; to be sure, "
                          f"start a new store.", RuntimeWarning, stacklevel=3)

    # -- chunks ----------------------------------------------------------------------
    def save(self, out: ChunkOutput) -> None:
        """Commit one finished chunk (replacing a stored chunk of the same index).

        With ``background=True`` the commit happens on the store's writer
        thread and :meth:`flush` waits for it; otherwise before returning.
        """
        self._need_writable()
        if self._writer is not None:
            self._writer.put(out)
        else:
            with self._guard("saving a chunk"):
                write_chunk(self._conn, out)

    def flush(self) -> None:
        """Wait until every saved chunk is committed; re-raise a failed commit as StoreError."""
        if self._writer is not None:
            self._writer.flush()

    def load(self, point: int, chunk: int, size: int) -> ChunkOutput | None:
        """The stored chunk, or None if absent or of another size.

        A damaged chunk (checksum mismatch, undecodable arrays, causes or
        sizes: see :class:`ChunkDamaged`) is, in a store opened to write,
        named in a warning and returned as None, so the run recomputes it --
        its numbers depend only on the seed, its grid point and its index, so
        the result is the undamaged one -- and the new chunk replaces it.
        Opened read-only, it raises :class:`ChunkDamaged`.
        """
        try:
            return self._load(point, chunk, size)
        except ChunkDamaged as exc:
            if self.mode != "a":
                raise
            import warnings

            warnings.warn(f"{exc.where} is damaged ({exc.reason}); recomputing it (its numbers depend only on "
                          f"the seed, its grid point and its index, so the result is unchanged).", RuntimeWarning,
                          stacklevel=2)
            return None

    def _load(self, point: int, chunk: int, size: int) -> ChunkOutput | None:
        key = (int(point), int(chunk))
        with self._guard("reading a chunk"):
            row = self._conn.execute("SELECT size, seconds, started_at, worker, timeout_enforced FROM chunks "
                                     "WHERE point=? AND chunk=?", key).fetchone()
            if row is None or row[0] != int(size):
                return None
            return self._read_chunk(key, row)

    def _chunk_name(self, point: int, chunk: int) -> str:
        """'STORE: chunk K (replicates a-b) of grid point P (n=20, effect=0.5)', for messages.

        The parameters shown are those that differ between the store's grid
        points (all of the process's when it holds one point), at most six.
        """
        label = ""
        first = None
        try:
            rows = {int(p): (int(cs), json.loads(spec)) for p, cs, spec in
                    self._conn.execute("SELECT point, chunk_size, scenario FROM points")}
            if int(point) in rows:
                cs, spec = rows[int(point)]
                first = int(chunk) * cs
                flat = _flatten(spec.get("process", {}))
                others = [_flatten(s.get("process", {})) for p, (_, s) in rows.items() if p != int(point)]
                shown = [k for k in flat if not others or any(o.get(k) != flat[k] for o in others)]
                label = " (" + ", ".join(f"{k}={flat[k]!r}" for k in shown[:6]) + ")" if shown else ""
        except (sqlite3.Error, ValueError, TypeError, AttributeError):
            pass  # the name is for a message: go without the parameters
        reps = ""
        if first is not None:
            row = self._conn.execute("SELECT size FROM chunks WHERE point=? AND chunk=?",
                                     (int(point), int(chunk))).fetchone()
            if row is not None and isinstance(row[0], int):
                reps = f" (replicates {first}-{first + row[0] - 1})"
        return f"{self.path}: chunk {chunk}{reps} of grid point {point}{label}"

    def _read_chunk(self, key, row) -> ChunkOutput:
        try:
            return self._decode_chunk(key, row)
        except ChunkDamaged as exc:  # named (a few queries) only when it happens
            raise ChunkDamaged(self._chunk_name(*key), exc.reason) from None

    def _decode_chunk(self, key, row) -> ChunkOutput:
        c = self._conn
        where = f"{self.path}: chunk {key[1]} of grid point {key[0]}"
        records: dict[str, dict[str, np.ndarray]] = {}
        paths, hyp = {}, {}
        for name, path, h, layout, crc, data in c.execute(
                "SELECT analysis, path, hypotheses, layout, crc32, data FROM arrays WHERE point=? AND chunk=?", key):
            records[name] = decode_record(layout, crc, data, where)
            paths[name] = path or ""
            try:
                h = json.loads(h or "[]")
            except ValueError:
                raise ChunkDamaged(where, f"unreadable hypothesis labels of analysis {name!r}") from None
            if h:
                hyp[name] = h
        causes, messages = [], {}
        for code, cause, msg in c.execute("SELECT code, cause, message FROM causes WHERE point=? AND chunk=? "
                                          "ORDER BY code", key):
            causes.append(cause)
            messages[cause] = msg or ""
        size = int(row[0])
        for name, rec in records.items():
            bad = [f for f in (*RECORD_FIELDS, "status") if f not in rec or rec[f].shape[:1] != (size,)]
            if bad:
                raise ChunkDamaged(where, f"analysis {name!r} lacks or has mis-sized fields {bad}")
            if rec["status"].max(initial=0) > len(causes):
                raise ChunkDamaged(where, "failure codes without causes")
        if not records:
            raise ChunkDamaged(where, "its records are missing")
        te = row[4]
        try:
            return ChunkOutput(key[0], key[1], size, records, causes, messages, paths, hyp, float(row[1]),
                               started_at=float(row[2] or 0.0), worker=str(row[3] or ""),
                               timeout_enforced=None if te is None else bool(te))
        except (TypeError, ValueError):
            raise ChunkDamaged(where, "unreadable timing columns") from None

    def done_chunks(self, point: int | None = None) -> list[tuple[int, int, int]]:
        """(point, chunk, size) of the stored chunks."""
        q = "SELECT point, chunk, size FROM chunks" + ("" if point is None else " WHERE point=?")
        with self._guard("listing chunks"):
            return [tuple(map(int, r)) for r in self._conn.execute(q + " ORDER BY point, chunk",
                                                                   () if point is None else (int(point),))]

    def iter_chunks(self, point: int | None = None) -> Iterator[ChunkOutput]:
        """Stored chunks in (point, chunk) order, one at a time (bounded memory)."""
        for p, k, size in self.done_chunks(point):
            out = self._load(p, k, size)  # a damaged chunk raises here, whatever the mode
            if out is not None:
                yield out

    # -- reading back ------------------------------------------------------------------
    def scenario_spec(self, point: int = 0) -> dict[str, Any]:
        """The JSON spec of grid point ``point``'s scenario."""
        with self._guard("reading the scenario"):
            row = self._conn.execute("SELECT scenario FROM points WHERE point=?", (int(point),)).fetchone()
        if row is None:
            raise StoreError(f"{self.path}: no grid point {point}.{self._points_hint()}")
        return json.loads(row[0])

    def _points_hint(self) -> str:
        keys = [r[0] for r in self._conn.execute("SELECT point FROM points ORDER BY point")]
        return f" Points: {keys[:12]}." if keys else " The store holds no point."

    def point_keys(self) -> list[int]:
        """The keys of the grid points this store holds."""
        with self._guard("reading points"):
            return [int(r[0]) for r in self._conn.execute("SELECT point FROM points ORDER BY point")]

    def _point_rows(self) -> list[tuple]:
        with self._guard("reading points"):
            return self._conn.execute("SELECT point, fingerprint, seed, chunk_size, reps, analyses, scenario "
                                      "FROM points ORDER BY point").fetchall()

    def chunks(self) -> pd.DataFrame:
        """One row per stored chunk: point, chunk, size, seconds, started_at, finished_at, worker."""
        with self._guard("reading chunks"):
            return pd.read_sql_query("SELECT point, chunk, size, seconds, started_at, finished_at, worker, "
                                     "timeout_enforced FROM chunks ORDER BY point, chunk", self._conn)

    def records(self, point: int | None = None):
        """Per-replicate records of a point, as ``{analysis: Records}``.

        ``point`` is the grid point's key (``RunResult.point``); it may be left
        out when the store holds one point (a single run). The stored chunks
        laid end to end in chunk order: for a finished point, replicate i is
        record i; an unfinished one lacks the missing chunks (``replicates()``
        carries explicit replicate numbers).
        """
        from .collect import assemble_records

        if point is None:
            keys = sorted({r[0] for r in self._point_rows()})
            if len(keys) != 1:
                raise StoreError(f"{self.path}: holds {len(keys)} grid points; give `point`.{self._points_hint()}")
            point = keys[0]
        rows = [r for r in self._point_rows() if r[0] == int(point)]
        if not rows:
            raise StoreError(f"{self.path}: no grid point {point}.{self._points_hint()}")
        total = sum(size for _, _, size in self.done_chunks(point))
        return assemble_records(list(_truths(rows[0][5])), total, self.iter_chunks(point))

    def iter_replicates(self, point: int | None = None, analysis: str | None = None) -> Iterator[pd.DataFrame]:
        """The per-replicate table, one stored chunk at a time (for exports of any size)."""
        sizes = {int(r[0]): int(r[3]) for r in self._point_rows()}
        for out in self.iter_chunks(point):
            start = out.chunk * sizes[out.point]
            names = np.array([""] + list(out.causes), dtype=object)
            for name, rec in out.records.items():
                if analysis is not None and name != analysis:
                    continue
                df = pd.DataFrame({"point": out.point, "analysis": name, "chunk": out.chunk,
                                   "replicate": np.arange(start, start + out.size)})
                for f in RECORD_FIELDS:
                    df[f] = rec[f]
                df["failure"] = names[rec["status"]]
                if "pvalues" in rec:
                    labels = out.hypotheses.get(name, [])
                    for j in range(rec["pvalues"].shape[1]):
                        df[f"pvalue[{labels[j] if j < len(labels) else j}]"] = rec["pvalues"][:, j]
                yield df

    def replicates(self, point: int | None = None, analysis: str | None = None) -> pd.DataFrame:
        """One row per replicate and analysis: point, analysis, chunk, replicate, pvalue, estimate,
        se, ci_low, ci_high, failure ('' when clean)."""
        parts = list(self.iter_replicates(point, analysis))
        if not parts:
            cols = ["point", "analysis", "chunk", "replicate", *RECORD_FIELDS, "failure"]
            return pd.DataFrame({c: [] for c in cols})
        return pd.concat(parts, ignore_index=True)

    def failures(self) -> pd.DataFrame:
        """Failure counts by point, analysis and cause, with the first message of each cause."""
        rows: dict[tuple, list] = {}
        for out in self.iter_chunks():
            for name, rec in out.records.items():
                codes, counts = np.unique(rec["status"][rec["status"] > 0], return_counts=True)
                for code, n in zip(codes, counts):
                    cause = out.causes[int(code) - 1]
                    k = (out.point, name, cause)
                    if k not in rows:
                        rows[k] = [0, out.messages.get(cause, "")]
                    rows[k][0] += int(n)
        return pd.DataFrame([{"point": p, "analysis": a, "cause": c, "count": v[0], "first_message": v[1]}
                             for (p, a, c), v in sorted(rows.items())],
                            columns=["point", "analysis", "cause", "count", "first_message"])

    def points(self, fit_trouble: str = "failure") -> pd.DataFrame:
        """One row per grid point and analysis: the point's parameters, progress and power with MCSE.

        Summaries use the stored chunks (a partial point is summarised over
        what finished; ``complete`` says whether all planned replicates are in).
        """
        from ..summaries import AnalysisStats, finalise

        out = []
        for point, fp, seed, cs, reps, analyses, spec_text in self._point_rows():
            spec = json.loads(spec_text)
            alpha = float(spec.get("alpha", 0.05))
            truth = _truths(analyses)
            tallies = {name: AnalysisStats() for name in truth}
            for chunk in self.iter_chunks(point):  # one chunk in memory at a time, in chunk order
                for name, rec in chunk.records.items():
                    if name in tallies:
                        tallies[name] = tallies[name].merge(AnalysisStats.of(rec, chunk.causes, alpha, truth[name]))
            params = _flatten(spec.get("process", {}), "")
            for name, t in tallies.items():
                row = {"point": point, "analysis": name, "fingerprint": fp, "seed": seed, "chunk_size": cs,
                       "reps": reps, "reps_done": t.reps, "complete": t.reps >= reps, **params, "alpha": alpha}
                if t.reps:
                    sm = finalise(t, fit_trouble, truth[name])
                    row.update({k: sm[k] for k in ("power", "mcse", "ci_low", "ci_high", "n_ok", "n_failed",
                                                   "n_fit_trouble")})
                    row["failures"] = "; ".join(f"{c} x{n}" for c, n in sm["failures"].items())
                    for k in ("mean_estimate", "empirical_se", "model_se", "bias", "coverage"):
                        if k in sm:
                            row[k] = sm[k]
                out.append(row)
        return pd.DataFrame(out)

    def export(self, path, table: str = "replicates", fmt: str | None = None) -> int:
        """Write ``table`` ('replicates', 'points', 'chunks' or 'failures') to CSV or Parquet.

        The format follows ``fmt`` or the file suffix (.csv, .parquet). The
        replicates table is written one chunk at a time. Returns the rows written.
        """
        path = Path(path)
        fmt = fmt or {".csv": "csv", ".parquet": "parquet", ".pq": "parquet"}.get(path.suffix.lower())
        if fmt not in ("csv", "parquet"):
            raise StoreError(f"`format` must be 'csv' or 'parquet' (or a .csv/.parquet file name); got "
                             f"{fmt or path.suffix or path.name!r}.")
        if table not in ("replicates", "points", "chunks", "failures"):
            raise StoreError(f"`table` must be 'replicates', 'points', 'chunks' or 'failures'; got {table!r}.")
        frames = self.iter_replicates() if table == "replicates" else iter([getattr(self, table)()])
        return _write_frames(frames, path, fmt)


def _write_frames(frames: Iterator[pd.DataFrame], path: Path, fmt: str) -> int:
    n = 0
    if fmt == "csv":
        with open(path, "w", newline="") as fh:
            for i, df in enumerate(frames):
                df.to_csv(fh, index=False, header=i == 0)
                n += len(df)
        return n
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise StoreError("Parquet export needs pyarrow: pip install pyarrow.") from None
    writer = None
    schema = None
    try:
        for df in frames:
            tbl = pa.Table.from_pandas(df, preserve_index=False)
            if writer is None:
                schema = tbl.schema
                writer = pq.ParquetWriter(str(path), schema)
            elif tbl.schema != schema:
                tbl = tbl.cast(schema)
            writer.write_table(tbl)
            n += len(df)
    finally:
        if writer is not None:
            writer.close()
    if writer is None:
        pd.DataFrame().to_parquet(path)
    return n


def open_store(path, mode: str = "r", **kw) -> RunStore:
    """Open a run store; read-only by default. See :class:`RunStore`."""
    return RunStore(path, mode=mode, **kw)
