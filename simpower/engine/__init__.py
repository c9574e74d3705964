"""Seeding, chunking, executors, failure capture, the run store and streaming summaries.

Reproducibility promise: a chunk's numbers depend only on (seed, grid point
key, chunk index, chunk size), never on ``n_jobs``, the executor, the order
in which chunks finish, or an interruption and resume.

The names below are loaded on first use (PEP 562): a worker process imports
``simpower.engine.guard`` (its initializer) and ``simpower.engine.chunk``
(the task), and with them this package, but never the runner, the run
store or their libraries (pandas, sqlite3), which only the main process needs.
"""

import importlib

#: module -> the names it lends the package
_PUBLIC = {
    "chunk": "ChunkOutput chunk_seed run_chunk",
    "executor": "execute",
    "runner": "ChunkStore RunInterrupted default_chunk_size normalize_seed plan_chunks run run_many",
    "store": "RunStore open_store",
}
_WHERE = {name: module for module, names in _PUBLIC.items() for name in names.split()}


def __getattr__(name):
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module 'simpower.engine' has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{module}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))


__all__ = ["ChunkOutput", "ChunkStore", "chunk_seed", "run_chunk", "execute", "RunInterrupted",
           "default_chunk_size", "normalize_seed", "plan_chunks", "run", "run_many", "RunStore", "open_store"]
