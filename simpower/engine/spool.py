"""Per-replicate records kept on disk instead of in memory, so memory does not grow with reps.

A run that keeps its records (the default up to
:data:`~simpower.engine.runner.KEEP_RECORDS_LIMIT` replicates per point)
holds about 42 bytes per replicate and analysis, plus the copies made while
summarising. Above a small size (:data:`~simpower.engine.runner.RECORDS_IN_MEMORY`)
the runner instead *spools* them: each chunk's arrays are written with
``os.pwrite`` at their replicate offset into one raw file per grid point
(every field of every analysis at its own offset), in a private temporary
folder, and the summaries come from the streaming tallies
of :mod:`simpower.summaries`. Written pages live in the operating system's
file cache, not in the process, so the process's memory stays flat in reps.
The result's ``records`` are then read-only ``numpy.memmap`` arrays over those
files, read from disk only when used; the folder is removed when the result
is garbage collected (or at exit).

Failure codes are written as the chunk's codes mapped to the point's
:class:`~simpower.engine.collect.CauseBook`; when the records are built, the
status file is renumbered in place (chunk by chunk) into the canonical
first-appearance order, so the records equal those of
:class:`~simpower.engine.collect.RecordCollector` bit for bit (tested).

Several-hypothesis p-values (``pvalues``, a (reps, k) array) are few and
kept in memory as the collector keeps them.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import weakref

import numpy as np

from ..analyses.base import FIELDS
from ..errors import RunError
from ..result import Records
from .chunk import ChunkOutput
from .collect import place_pvalues

#: fields written to disk, their dtypes
_DTYPES = {**{f: np.dtype("<f8") for f in FIELDS}, "status": np.dtype("<i2")}
#: replicates renumbered per step when the canonical cause order differs from the book's
_RENUMBER_STEP = 1 << 16


class _Folder:
    """A private temporary folder, removed when the last object holding it goes."""

    def __init__(self, parent=None):
        try:
            self.path = tempfile.mkdtemp(prefix="simpower-records-", dir=parent)
        except OSError as exc:
            raise RunError(f"cannot create a folder for the per-replicate records in "
                           f"{parent or tempfile.gettempdir()} ({exc.strerror or exc}); set TMPDIR to a "
                           f"writable folder, or pass keep_records=True or False.") from None
        self._cleanup = weakref.finalize(self, shutil.rmtree, self.path, True)


class RecordSpool:
    """Records of one grid point written to disk chunk by chunk, as raw little-endian arrays.

    One file per point holds every field of every analysis, each a
    contiguous array at its own offset. The file is opened at the first
    chunk and closed once every replicate is written, so a sweep of many
    points holds open only the files of the points still running.

    Parameters
    ----------
    analyses : iterable of str
    reps : int
        Replicates of the point.
    parent : str, optional
        Where the private folder is made (default: the system's temporary folder).
    """

    def __init__(self, analyses, reps: int, parent=None):
        self.reps = int(reps)
        self.analyses = list(analyses)
        self.folder = _Folder(parent)
        self.path = os.path.join(self.folder.path, "records")
        self._pvalues: dict[str, np.ndarray] = {}
        self._offsets: dict[tuple[str, str], int] = {}
        at = 0
        for name in self.analyses:
            for f, dt in _DTYPES.items():
                self._offsets[(name, f)] = at
                at += self.reps * dt.itemsize
        self._size = at
        self._fds: dict[str, int] = {}
        self._written: list[tuple[int, int]] = []
        self._done = 0
        self._finalizer = weakref.finalize(self, _close_all, self._fds)

    def _error(self, exc: OSError) -> RunError:
        return RunError(f"writing the per-replicate records to {self.folder.path} failed "
                        f"({exc.strerror or exc}); free some disk space or set TMPDIR to another folder, "
                        f"or pass keep_records=False (summaries only).")

    def _fd(self) -> int:
        fd = self._fds.get("file")
        if fd is None:
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o600)
                if os.fstat(fd).st_size < self._size:
                    os.ftruncate(fd, self._size)  # sparse: replicates not yet written read as 0
            except OSError as exc:
                raise self._error(exc) from None
            self._fds["file"] = fd
        return fd

    def add(self, out: ChunkOutput, start: int, table: np.ndarray) -> None:
        """Write chunk ``out`` at replicates ``[start, start + out.size)``; ``table`` maps its codes to the book's."""
        stop = start + out.size
        fd = self._fd()
        for name, rec in out.records.items():
            if (name, "status") not in self._offsets:
                continue
            for f, v in rec.items():
                if f == "pvalues":
                    self._pvalues[name] = place_pvalues(self._pvalues.get(name), v, start, self.reps)
                    continue
                dt = _DTYPES.get(f)
                if dt is None:
                    continue
                buf = np.ascontiguousarray(table[v] if f == "status" else v, dtype=dt)
                try:
                    os.pwrite(fd, memoryview(buf).cast("B"), self._offsets[(name, f)] + start * dt.itemsize)
                except OSError as exc:
                    raise self._error(exc) from None
        self._written.append((start, stop))
        self._done += out.size
        if self._done >= self.reps:
            self.close()  # complete: nothing more to write until the records are built

    def _gaps(self) -> list[tuple[int, int]]:
        """Replicate ranges no chunk wrote (an unfinished point)."""
        gaps, at = [], 0
        for lo, hi in sorted(self._written):
            if lo > at:
                gaps.append((at, lo))
            at = max(at, hi)
        if at < self.reps:
            gaps.append((at, self.reps))
        return gaps

    def records(self, causes, messages, table: np.ndarray, hypotheses=None) -> dict[str, Records]:
        """The records as read-only memory maps, causes renumbered by ``table`` (book code -> canonical).

        ``hypotheses``: the labels of each analysis' several p-values, if any.

        Replicates that never ran have NaN fields and status 0, as in
        :class:`~simpower.engine.collect.RecordCollector`.
        """
        missing = self._gaps()
        renumber = not np.array_equal(table, np.arange(table.size))
        if (missing or renumber) and self.reps:
            fd = self._fd()
            try:
                for name in self.analyses:
                    for f in FIELDS:
                        for lo, hi in missing:
                            nan = np.full(hi - lo, np.nan, _DTYPES[f])
                            os.pwrite(fd, memoryview(nan).cast("B"), self._offsets[(name, f)] + lo * 8)
                    if renumber:
                        self._renumber(fd, self._offsets[(name, "status")], table)
            except OSError as exc:
                raise self._error(exc) from None
        self.close()
        out = {}
        for name in self.analyses:
            cols = {f: self._map(name, f) for f in _DTYPES}
            r = Records(cols["pvalue"], cols["estimate"], cols["se"], cols["ci_low"], cols["ci_high"],
                        cols["status"], list(causes), dict(messages), self._pvalues.get(name),
                        (hypotheses or {}).get(name, []))
            r._spool_folder = self.folder  # the folder lives as long as the records
            out[name] = r
        return out

    def _map(self, name, f):
        dt = _DTYPES[f]
        if self.reps == 0:
            return np.empty(0, dt)
        return np.memmap(self.path, dtype=dt, mode="r", offset=self._offsets[(name, f)], shape=(self.reps,))

    def _renumber(self, fd: int, base: int, table: np.ndarray) -> None:
        item = _DTYPES["status"].itemsize
        for lo in range(0, self.reps, _RENUMBER_STEP):
            n = min(_RENUMBER_STEP, self.reps - lo)
            codes = np.frombuffer(os.pread(fd, n * item, base + lo * item), dtype="<i2")
            if codes.any():
                os.pwrite(fd, memoryview(np.ascontiguousarray(table[codes], dtype="<i2")).cast("B"),
                          base + lo * item)

    def close(self) -> None:
        """Close the file (reopened if more is written)."""
        _close_all(self._fds)


def _close_all(fds: dict) -> None:
    for fd in list(fds.values()):
        try:
            os.close(fd)
        except OSError:
            pass
    fds.clear()
