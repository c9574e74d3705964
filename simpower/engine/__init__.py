"""Seeding, chunking, executors and failure capture."""

from .chunk import ChunkOutput, chunk_seed, run_chunk
from .executor import execute
from .runner import RunInterrupted, default_chunk_size, normalize_seed, plan_chunks, run, run_many

__all__ = ["ChunkOutput", "chunk_seed", "run_chunk", "execute", "RunInterrupted", "default_chunk_size",
           "normalize_seed", "plan_chunks", "run", "run_many"]
