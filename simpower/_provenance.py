"""Which code produced a number: a digest of simpower's own source files.

The version string alone does not pin the code between releases (or in a
development checkout), and a change of the code can change the numbers of a
seed. Manifests, JSON results and run stores therefore record this digest.
"""

from __future__ import annotations

import hashlib
from functools import lru_cache
from pathlib import Path


@lru_cache(maxsize=1)
def source_digest() -> str:
    """SHA-256 (first 16 hex digits) over the package's ``.py`` files, by relative path and content."""
    root = Path(__file__).resolve().parent
    h = hashlib.sha256()
    for path in sorted(root.rglob("*.py")):
        h.update(path.relative_to(root).as_posix().encode())
        h.update(b"\0")
        h.update(path.read_bytes())
        h.update(b"\0")
    return h.hexdigest()[:16]
