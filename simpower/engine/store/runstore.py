"""The run store object: open, bind grid points, save and load chunks, read back and export.

See :mod:`simpower.engine.store` for the format and its promises.
"""

from __future__ import annotations

import json
import sqlite3
import time
import weakref
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pandas as pd

from ...errors import StoreError
from ..chunk import ChunkOutput
from .codec import RECORD_FIELDS, ChunkDamaged, decode_record
from .export import write_frames
from .files import WriterLock, check_file, explain
from .schema import (FORMAT, SCHEMA, TABLES, VERSION, _analyses_info, _check_plan, _flatten, _spec_diff,
                     _truths)
from .writer import _connect, _connect_read_only, _rollback, _shutdown, _Writer, write_chunk


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
                from ..._version import __version__
                from ..._provenance import source_digest

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
        from ..._provenance import source_digest

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
        from ..collect import assemble_records

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
        from ...summaries import AnalysisStats, finalise

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
        return write_frames(frames, path, fmt)


def open_store(path, mode: str = "r", **kw) -> RunStore:
    """Open a run store; read-only by default. See :class:`RunStore`."""
    return RunStore(path, mode=mode, **kw)
