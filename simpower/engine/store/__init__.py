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
cause (:mod:`simpower.engine.store.files`).

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


The parts: :mod:`.codec` (arrays as bytes, CRC, the dtypes allowed),
:mod:`.schema` (tables, checks of a grid point's stored plan), :mod:`.files`
(the writer lock, file checks, the true cause of an OS or SQLite failure),
:mod:`.writer` (transactions, the writer thread), :mod:`.export` (CSV and
Parquet) and :mod:`.runstore` (the :class:`RunStore` object).
"""

from .codec import DTYPES, RECORD_FIELDS, ChunkDamaged, decode_record, encode_record
from .files import StoreBusy, WriterLock, check_file, explain
from .runstore import RunStore, open_store
from .schema import FORMAT, SCHEMA, TABLES, VERSION
from .writer import CHECKPOINT_BYTES, COMMIT_DELAY, PAGE_SIZE, write_chunk, write_chunks

__all__ = ["RunStore", "open_store", "ChunkDamaged", "StoreBusy", "WriterLock", "encode_record", "decode_record",
           "check_file", "explain", "write_chunk", "write_chunks", "DTYPES", "RECORD_FIELDS", "FORMAT", "VERSION",
           "SCHEMA", "TABLES", "PAGE_SIZE", "CHECKPOINT_BYTES", "COMMIT_DELAY"]
