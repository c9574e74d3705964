"""Seeding, chunking, executors, failure capture, the run store and streaming summaries.

Reproducibility promise: a chunk's numbers depend only on (seed, grid point
key, chunk index, chunk size), never on ``n_jobs``, the executor, the order
in which chunks finish, or an interruption and resume.
"""

from .chunk import ChunkOutput, chunk_seed, run_chunk
from .executor import execute
from .runner import (ChunkStore, RunInterrupted, default_chunk_size, normalize_seed, plan_chunks, run,
                     run_many)
from .store import RunStore, open_store

__all__ = ["ChunkOutput", "ChunkStore", "chunk_seed", "run_chunk", "execute", "RunInterrupted",
           "default_chunk_size", "normalize_seed", "plan_chunks", "run", "run_many", "RunStore", "open_store"]
