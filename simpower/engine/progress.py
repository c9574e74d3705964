"""Feedback on long work: one progress display per command, a bar on a terminal, log lines elsewhere.

A run opens a display with :func:`display`; a planning command (a search's
rounds, a sweep's extensions) opens one *session* around its runs with
:func:`session`, so the runs inside it add to one display (its total grows
round by round) instead of each starting a bar at 0. The session's status
text (``round 3, n = 64``) is shown beside the count.

Where the output goes:

* ``progress=False``: nothing;
* standard error is a terminal (and ``progress`` is None or True): a tqdm bar;
* otherwise (a batch job, a notebook's captured stream, a pipe): one line
  every :data:`LOG_EVERY` seconds, the first after :data:`LOG_EVERY` seconds,
  so short runs stay silent, e.g.
  ``simpower: searching: 12000 replicates done (round 3, n = 64), 42 s``.

Nothing here changes a number: the display only counts finished replicates.
"""

from __future__ import annotations

import sys
import time
from contextlib import contextmanager
from contextvars import ContextVar

#: seconds between two progress lines when standard error is not a terminal
LOG_EVERY = 10.0

_SESSION: ContextVar["_Display | None"] = ContextVar("simpower_progress_session", default=None)


def _stream():
    return sys.stderr


def _is_terminal(stream) -> bool:
    try:
        return bool(stream.isatty())
    except Exception:
        return False


class _Display:
    """Counts finished replicates and shows them (a bar, log lines, or nothing)."""

    def __init__(self, enabled: bool | None, desc: str, total: int | None = 0, initial: int = 0):
        self.stream = _stream()
        self.desc = desc
        self.total = total
        self.done = int(initial)
        self.status = ""
        self.t0 = self.last = time.monotonic()
        self.bar = None
        self.logging = False
        if enabled is False:
            return
        if _is_terminal(self.stream):
            from tqdm import tqdm

            self.bar = tqdm(total=total or None, initial=initial, file=self.stream, unit="rep", desc=desc,
                            leave=False, dynamic_ncols=True)
        else:
            self.logging = True

    # -- counting -------------------------------------------------------
    def grow(self, more: int, done: int = 0) -> None:
        """``more`` replicates join the total, ``done`` of them already finished (a resume)."""
        self.total = (self.total or 0) + int(more)
        self.done += int(done)
        if self.bar is not None:
            self.bar.total = self.total
            if done:
                self.bar.update(int(done))
            self.bar.refresh()

    def update(self, n: int) -> None:
        self.done += int(n)
        if self.bar is not None:
            self.bar.update(int(n))
        elif self.logging:
            now = time.monotonic()
            if now - self.last >= LOG_EVERY:
                self.last = now
                self.stream.write(self.line(now) + "\n")
                self.stream.flush()

    def set_status(self, text: str) -> None:
        self.status = text
        if self.bar is not None:
            self.bar.set_postfix_str(text, refresh=True)

    def line(self, now: float | None = None) -> str:
        """The log line: done of total, status, elapsed time and (for a fixed total) the time left."""
        now = time.monotonic() if now is None else now
        elapsed = now - self.t0
        if self.total:
            share = self.done / self.total
            text = f"simpower: {self.desc}: {self.done} of {self.total} replicates ({100 * share:.0f}%)"
        else:
            share = None
            text = f"simpower: {self.desc}: {self.done} replicates done"
        if self.status:
            text += f" ({self.status})"
        text += f", {elapsed:.0f} s"
        if share and 0 < share < 1 and _SESSION.get() is not self:
            text += f", about {elapsed * (1 - share) / share:.0f} s left"
        return text

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


class _Child:
    """A run inside a session: adds its replicates to the session's display."""

    def __init__(self, parent: _Display, total: int, initial: int):
        self.parent = parent
        parent.grow(total - initial)  # only the new work: a growing run's earlier replicates are counted already

    def update(self, n: int) -> None:
        self.parent.update(n)

    def close(self) -> None:  # the session closes the display
        pass


def display(total: int, enabled: bool | None, desc: str, initial: int = 0):
    """The display of one run of ``total`` replicates (``initial`` already done): its own, or the open session's.

    Returns an object with ``update(n)`` and ``close()``.
    """
    parent = _SESSION.get()
    if parent is not None:
        return _Child(parent, total, initial)
    return _Display(enabled, desc, total, initial)


@contextmanager
def session(enabled: bool | None, desc: str):
    """One display for every run inside the ``with`` block (a search, a sweep); yields it (``set_status``).

    An inner session (a sweep inside a search) reuses the outer one.
    """
    outer = _SESSION.get()
    if outer is not None:
        yield outer
        return
    d = _Display(enabled, desc, total=0)
    token = _SESSION.set(d)
    try:
        yield d
    finally:
        _SESSION.reset(token)
        d.close()


def status(text: str) -> None:
    """Set the open session's status text (no-op outside a session)."""
    d = _SESSION.get()
    if d is not None:
        d.set_status(text)
