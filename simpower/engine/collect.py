"""Assemble per-replicate records from chunks, whatever order they finish in.

Chunks arrive in completion order (parallel workers, or stored chunks first
and fresh ones after a resume). Failure codes are local to a chunk; the
collector maps them to one list of causes per grid point and, at the end,
renumbers the causes in the order of their first appearance by chunk index
(and keeps the message of that first appearance). So the assembled records,
status codes included, are the same for any number of jobs, any executor and
any interruption-and-resume history.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from ..analyses.base import FIELDS
from ..result import Records
from .chunk import ChunkOutput


class CauseBook:
    """Causes of one grid point, with where each was first seen."""

    def __init__(self):
        self.causes: list[str] = []
        self.first: dict[str, tuple[int, int]] = {}
        self.messages: dict[str, str] = {}

    def remap(self, out: ChunkOutput) -> np.ndarray:
        """Array mapping the chunk's codes (index) to this book's codes."""
        table = np.zeros(len(out.causes) + 1, np.int16)
        for j, cause in enumerate(out.causes, start=1):
            seen = (out.chunk, j)
            if cause not in self.first:
                self.causes.append(cause)
                self.first[cause] = seen
                self.messages[cause] = out.messages.get(cause, "")
            elif seen < self.first[cause]:
                self.first[cause] = seen
                self.messages[cause] = out.messages.get(cause, "")
            table[j] = self.causes.index(cause) + 1
        return table

    def canonical(self) -> tuple[list[str], dict[str, str], np.ndarray]:
        """Causes ordered by first appearance, their messages, and old code -> new code."""
        order = sorted(self.causes, key=lambda c: self.first[c])
        table = np.zeros(len(self.causes) + 1, np.int16)
        for new, cause in enumerate(order, start=1):
            table[self.causes.index(cause) + 1] = new
        return order, {c: self.messages[c] for c in order}, table


def place_pvalues(arr: np.ndarray | None, v: np.ndarray, start: int, reps: int) -> np.ndarray:
    """Put a chunk's several-hypothesis p-values ``v`` (size, k) at ``start`` of a (reps, width) array.

    The array is made (NaN) when ``arr`` is None and widened when ``v`` has more
    hypotheses than seen so far; returns the array to keep.
    """
    width = v.shape[1]
    if arr is None:
        arr = np.full((reps, width), np.nan)
    elif arr.shape[1] < width:
        wider = np.full((reps, width), np.nan)
        wider[:, : arr.shape[1]] = arr
        arr = wider
    arr[start:start + v.shape[0], :width] = v
    return arr


class RecordCollector:
    """Per-replicate arrays of one grid point, filled chunk by chunk."""

    def __init__(self, analyses: Iterable[str], reps: int):
        self.reps = int(reps)
        self.arrays = {name: {**{f: np.full(self.reps, np.nan) for f in FIELDS},
                              "status": np.zeros(self.reps, np.int16)} for name in analyses}
        self.book = CauseBook()
        self.hypotheses: dict[str, list[str]] = {}

    def add(self, out: ChunkOutput, start: int) -> None:
        """Place chunk ``out`` at replicates ``[start, start + out.size)``."""
        stop = start + out.size
        table = self.book.remap(out)
        for name, rec in out.records.items():
            arr = self.arrays.get(name)
            if arr is None:
                continue
            for f, v in rec.items():
                if f == "status":
                    arr["status"][start:stop] = table[v]
                elif f == "pvalues":
                    arr["pvalues"] = place_pvalues(arr.get("pvalues"), v, start, self.reps)
                elif f in arr:
                    arr[f][start:stop] = v
        for name, h in out.hypotheses.items():
            self.hypotheses.setdefault(name, h)

    def records(self) -> dict[str, Records]:
        """The assembled records, causes in canonical order."""
        causes, messages, table = self.book.canonical()
        out = {}
        for name, a in self.arrays.items():
            status = table[a["status"]]
            out[name] = Records(a["pvalue"], a["estimate"], a["se"], a["ci_low"], a["ci_high"], status,
                                list(causes), dict(messages), a.get("pvalues"), self.hypotheses.get(name, []))
        return out


def assemble_records(analyses: Iterable[str], total: int, chunks: Iterable[ChunkOutput]):
    """Records of ``chunks`` (``total`` replicates, given in chunk order) laid end to end."""
    coll = RecordCollector(analyses, total)
    start = 0
    for out in chunks:
        coll.add(out, start)
        start += out.size
    return coll.records()
