"""The run store's record codec: one analysis' arrays of one chunk as raw little-endian bytes.

Nothing is pickled: the arrays are laid end to end with their layout (field,
dtype, shape) and a CRC-32 beside them, and only numeric dtypes from a short
list (:data:`DTYPES`) are ever decoded -- a store received from someone else
is safe to open. A blob that does not decode raises :class:`ChunkDamaged`
(the run recomputes that chunk).
"""

from __future__ import annotations

import json
import math
import zlib

import numpy as np

from ...errors import StoreError

#: the only dtypes ever decoded from a store
DTYPES = {"<f8": np.dtype("<f8"), "<i2": np.dtype("<i2"), "<i4": np.dtype("<i4"), "<i8": np.dtype("<i8"),
          "|b1": np.dtype("|b1")}
RECORD_FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high")


class ChunkDamaged(StoreError):
    """One chunk's rows cannot be decoded (checksum, layout, sizes); nothing says the rest is unsound.

    A store opened to write recomputes such a chunk (:meth:`RunStore.load`).
    """

    def __init__(self, where: str, reason: str):
        self.where, self.reason = where, reason
        super().__init__(f"{where} is damaged ({reason}); run the same command again (or simpower resume) to "
                         f"recompute it: a chunk's numbers depend only on the seed, its grid point and its index.")


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
