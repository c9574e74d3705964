"""Crash isolation: a replicate that kills its process (segfault, ``os._exit``) does not end the run.

An exception in user code is caught per replicate (:mod:`simpower.engine.chunk`),
but a segmentation fault or ``os._exit`` cannot be caught in the process where
it happens. So chunks that run user code (a user process or analysis: any
component whose class is not defined inside simpower) run in processes forked
from a *helper*: a fresh interpreter started once per Python session, which
imports simpower (and, by unpickling the scenario, the user's modules) and then
only forks -- it never runs user code itself, so it never crashes.

The helper hands each chunk to an idle forked worker (forking one when none
is idle; workers are reused from chunk to chunk, like loky's), which runs it
with ``run_chunk(..., mark=...)``: before each call that may kill it (drawing
data, an analysis on a replicate, a batch call) it writes the call's key
``(replicate, analysis)`` to its pipe. When a worker dies before sending the
chunk's records, the last key it wrote names the call that killed it; the
chunk is redone in another worker with that call skipped and recorded as
failure ``crash`` (``process:crash`` for a draw), until one finishes. The chunk's random numbers are drawn exactly as on the normal path
(the redo starts from the chunk's seed; calls before the crashed ones run
again), so the records, cause codes included, are the same for any number of
jobs, and equal to those of a run whose crashing calls had raised instead.

Where it is used (see :func:`simpower.engine.runner.run_many`):

* the default local executor (``backend=None``) runs scenarios with user code
  in children of the helper, ``n_jobs`` at a time (``n_jobs=1`` too); built-in
  scenarios keep loky workers (or this process for ``n_jobs=1``);
* a loky pool whose worker died, or a dask task that killed its workers
  (``KilledWorker``), hands the chunks it lost (and, for loky, the rest of the
  run) to the helper;
* ``backend='serial'`` and ``'threading'`` run in this process: a crash there
  still ends the run.

It runs on Linux (it forks; on macOS forking a process whose system libraries
may have started threads is unsafe); elsewhere a crash ends the run as before.

What crosses the pipes: jobs (the chunk function, the scenario, its seed key) and their
results are pickled, as loky and dask do between a process and its workers, and only
across the anonymous pipes this process creates for its own helper (``pass_fds``) and
the helper's forked children. Nothing pickled is ever written to or read from a file;
the run store stays data only (:mod:`simpower.engine.store`), so a store, scenario
file or export received from someone else never reaches ``pickle.loads``.

Orphans: the helper exits when this process dies (end of file on its request
pipe, and a check of its parent every second), its children are killed with
it (``PR_SET_PDEATHSIG`` on Linux), and loky workers started by simpower watch
their parent (:func:`worker_init`), so ``kill -9`` of the main process leaves
no worker behind.
"""

from __future__ import annotations

import atexit
import ctypes
import ctypes.util
import faulthandler
import itertools
import os
import pickle  # only across this process's own pipes to its helper (see the module notes)
import selectors
import signal
import struct
import subprocess
import sys
import threading
import time
from typing import Iterable, Iterator

from ..errors import RunError

_HDR = struct.Struct("<cI")
#: seconds between two checks of the parent process by helpers and loky workers
PARENT_POLL = 1.0


def available() -> bool:
    """Whether crash isolation can run here: Linux (it forks; on macOS forking after system libraries
    have started threads is unsafe, and Windows has no fork)."""
    return hasattr(os, "fork") and sys.platform.startswith("linux")


def is_builtin(obj) -> bool:
    """Whether a component is simpower's own code (a user callable or a class defined elsewhere is not)."""
    from ..functions import FunctionAnalysis, FunctionProcess

    if isinstance(obj, (FunctionAnalysis, FunctionProcess)):
        return False
    return type(obj).__module__.split(".")[0] == "simpower"


def has_user_code(scenario) -> bool:
    """Whether the scenario's process or any analysis is user code."""
    return not is_builtin(scenario.process) or not all(is_builtin(a) for a in scenario.analyses.values())


def _cloudpickle():
    try:
        import cloudpickle  # joblib >= 1.6 depends on it
    except ImportError:  # older joblib ships its own copy
        from joblib.externals import cloudpickle
    return cloudpickle


def unsendable(scenario) -> str | None:
    """Why the scenario cannot be sent to a worker process (its pickling error), or None."""
    try:
        _cloudpickle().dumps(scenario)
    except Exception as exc:
        return f"{type(exc).__name__}: {exc}"
    return None


# ---------------------------------------------------------------- framing

def _frame(kind: bytes, payload: bytes) -> bytes:
    return _HDR.pack(kind, len(payload)) + payload


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def _read_exact(fd: int, n: int) -> bytes | None:
    parts, got = [], 0
    while got < n:
        b = os.read(fd, n - got)
        if not b:
            return None
        parts.append(b)
        got += len(b)
    return b"".join(parts)


def _read_frame(fd: int):
    hdr = _read_exact(fd, _HDR.size)
    if hdr is None:
        return None
    kind, n = _HDR.unpack(hdr)
    payload = _read_exact(fd, n)
    return None if payload is None else (kind, payload)


def _frames(buf: bytearray) -> Iterator[tuple[bytes, bytes]]:
    """Complete frames at the start of ``buf`` (consumed)."""
    while len(buf) >= _HDR.size:
        kind, n = _HDR.unpack_from(buf)
        if len(buf) < _HDR.size + n:
            return
        payload = bytes(buf[_HDR.size:_HDR.size + n])
        del buf[:_HDR.size + n]
        yield kind, payload


def _pack_error(exc: BaseException) -> bytes:
    try:
        data = pickle.dumps(exc)
        pickle.loads(data)
        return data
    except Exception:
        return pickle.dumps(RunError(f"{type(exc).__name__}: {exc}"))


# ---------------------------------------------------------------- the helper process (child side)

def _die_with_parent() -> None:
    """Linux: get SIGKILL when the parent dies (the helper is single-threaded, so 'parent' is stable)."""
    if not sys.platform.startswith("linux"):
        return
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGKILL, 0, 0, 0)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def _take_place(where: tuple[list[str], str]) -> None:
    """Take the parent's import path (entries added since the helper started) and working directory."""
    path, cwd = where
    sys.path.extend(p for p in path if p not in sys.path)
    try:
        if os.getcwd() != cwd:
            os.chdir(cwd)
    except OSError:
        pass


def _run_job(job, w: int) -> int:
    """Run one job in a worker, writing its markers and outcome to ``w``; the exit code if it must end."""
    try:
        where, blob = pickle.loads(job)
        _take_place(where)
        kind, fn, args, kwargs = pickle.loads(blob)
        if kind == "chunk":
            def mark(i, name, _w=w):
                _write_all(_w, _frame(b"M", pickle.dumps((i, name))))
            kwargs = {**kwargs, "mark": mark}
        res = fn(*args, **kwargs)
        _write_all(w, _frame(b"O", pickle.dumps(res, protocol=pickle.HIGHEST_PROTOCOL)))
    except (SystemExit, KeyboardInterrupt) as exc:  # user code left the process: like a crash
        return exc.code if isinstance(exc, SystemExit) and isinstance(exc.code, int) and exc.code else 1
    except BaseException as exc:
        _write_all(w, _frame(b"E", _pack_error(exc)))
    finally:
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except Exception:
                pass
    return 0


def _worker(jobs_r: int, w: int, close: list[int]) -> None:
    """A forked worker: run the jobs it is sent, one at a time, until its pipe closes; never returns."""
    code = 0
    try:
        for fd in close:
            os.close(fd)
        _die_with_parent()
        while True:
            frame = _read_frame(jobs_r)
            if frame is None:
                break
            code = _run_job(frame[1], w)
            if code:
                break
    finally:
        os._exit(code)


def _how(status: int) -> str:
    if os.WIFSIGNALED(status):
        sig = os.WTERMSIG(status)
        try:
            return signal.Signals(sig).name
        except ValueError:
            return f"signal {sig}"
    return f"exit status {os.WEXITSTATUS(status)}"


class _Worker:
    def __init__(self, pid: int, jobs_w: int, res_r: int):
        self.pid, self.jobs_w, self.res_r = pid, jobs_w, res_r
        self.buf = bytearray()
        self.rid: int | None = None
        self.last = None


def _zygote(req: int, resp: int, parent: int) -> None:
    """The helper's loop: hand each request to an idle forked worker (forking one if none), relay outcomes.

    A worker that dies is reported as a crash of its request, with the last
    call it marked; the next request gets a new worker. Exits (killing its
    workers) when the parent is gone.
    """
    import gc

    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's business; it closes our pipe
    from . import chunk  # noqa: F401  (imported once here, shared by every fork)

    os.set_blocking(req, False)
    os.set_blocking(resp, False)
    sel = selectors.DefaultSelector()
    sel.register(req, selectors.EVENT_READ, None)
    inbox, outbox = bytearray(), bytearray()
    workers: dict[int, _Worker] = {}  # by result pipe
    writing = False

    def quit_():
        for wk in workers.values():
            try:
                os.kill(wk.pid, signal.SIGKILL)
            except OSError:
                pass
        os._exit(0)

    def fork_worker() -> _Worker:
        jr, jw = os.pipe()
        rr, rw = os.pipe()
        gc.collect()
        gc.freeze()  # objects made so far stay untouched by the child's collector: fewer copied pages
        pid = os.fork()
        if pid == 0:
            _worker(jr, rw, [req, resp, jw, rr, *(fd for wk in workers.values() for fd in (wk.jobs_w, wk.res_r))])
        os.close(jr)
        os.close(rw)
        os.set_blocking(rr, False)
        wk = workers[rr] = _Worker(pid, jw, rr)
        sel.register(rr, selectors.EVENT_READ, rr)
        return wk

    def dispatch(rid: int, where, blob: bytes):
        try:
            _take_place(where)
            pickle.loads(blob)  # imports the user's modules here once, so later forks share them
        except BaseException as exc:
            return outbox.extend(_frame(b"D", pickle.dumps((rid, "error", _pack_error(exc)))))
        wk = next((wk for wk in workers.values() if wk.rid is None), None) or fork_worker()
        wk.rid, wk.last = rid, None
        try:
            _write_all(wk.jobs_w, _frame(b"J", pickle.dumps((where, blob))))
        except BrokenPipeError:  # the worker is gone; its end of file reports the request
            pass

    def finish(wk: _Worker):
        sel.unregister(wk.res_r)
        os.close(wk.res_r)
        os.close(wk.jobs_w)
        del workers[wk.res_r]
        _, status = os.waitpid(wk.pid, 0)
        if wk.rid is not None:
            key = None if wk.last is None else pickle.loads(wk.last)
            outbox.extend(_frame(b"D", pickle.dumps((wk.rid, "crash", (key, _how(status))))))

    while True:
        if outbox and not writing:
            sel.register(resp, selectors.EVENT_WRITE, "out")
            writing = True
        events = sel.select(PARENT_POLL)
        if os.getppid() != parent:
            quit_()
        for key, _ in events:
            if key.data == "out":
                try:
                    n = os.write(resp, outbox)
                except BlockingIOError:
                    continue
                except BrokenPipeError:
                    quit_()
                del outbox[:n]
                if not outbox:
                    sel.unregister(resp)
                    writing = False
            elif key.data is None:
                try:
                    data = os.read(req, 1 << 20)
                except BlockingIOError:
                    continue
                if not data:
                    quit_()
                inbox += data
                for _, payload in _frames(inbox):
                    dispatch(*pickle.loads(payload))
            else:
                wk = workers[key.data]
                try:
                    data = os.read(wk.res_r, 1 << 20)
                except BlockingIOError:
                    continue
                if not data:
                    finish(wk)
                    continue
                wk.buf += data
                for kind, payload in _frames(wk.buf):
                    if kind == b"M":
                        wk.last = payload
                    else:
                        outbox.extend(_frame(b"D", pickle.dumps((wk.rid, "ok" if kind == b"O" else "error", payload))))
                        wk.rid, wk.last = None, None


# ---------------------------------------------------------------- the parent side

class Guard:
    """A helper process; submit jobs, receive outcomes (one thread at a time)."""

    def __init__(self):
        req_r, req_w = os.pipe()
        resp_r, resp_w = os.pipe()
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join(p for p in sys.path if p)
        code = f"from simpower.engine.guard import _zygote; _zygote({req_r}, {resp_w}, {os.getpid()})"
        try:
            self.proc = subprocess.Popen([sys.executable, "-c", code], pass_fds=(req_r, resp_w), env=env,
                                         stdin=subprocess.DEVNULL)
        finally:
            os.close(req_r)
            os.close(resp_w)
        self.req, self.resp = req_w, resp_r
        self._ids = itertools.count()
        self.lock = threading.Lock()
        self.closed = False
        self.owner = os.getpid()  # a forked copy of this process must not share our pipes

    def submit(self, kind: str, fn, args: tuple, kwargs: dict | None = None) -> int:
        rid = next(self._ids)
        blob = _cloudpickle().dumps((kind, fn, tuple(args), dict(kwargs or {})))
        try:
            where = ([p for p in sys.path if p], os.getcwd())
            _write_all(self.req, _frame(b"R", pickle.dumps((rid, where, blob))))
        except BrokenPipeError:
            raise RunError("the crash-isolation helper process ended unexpectedly; run again.") from None
        return rid

    def receive(self) -> tuple[int, str, object]:
        """(request id, 'ok' | 'error' | 'crash', value | exception | (key, how))."""
        frame = _read_frame(self.resp)
        if frame is None:
            self.close()
            raise RunError("the crash-isolation helper process ended unexpectedly (killed, or out of memory); "
                           "finished chunks are kept in the store if one was given.")
        rid, status, info = pickle.loads(frame[1])
        if status == "ok":
            info = pickle.loads(info)
        elif status == "error":
            info = pickle.loads(info)
        return rid, status, info

    def call(self, fn, *args):
        """``fn(*args)`` in a forked child: (True, value), or (False, how) when the child died."""
        rid = self.submit("call", fn, args)
        got, status, info = self.receive()
        assert got == rid
        if status == "error":
            raise info
        return (True, info) if status == "ok" else (False, info[1])

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        for fd in (self.req, self.resp):
            try:
                os.close(fd)
            except OSError:
                pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


_shared: Guard | None = None
_shared_lock = threading.Lock()


def acquire() -> tuple[Guard, bool]:
    """(guard, shared): the session's helper (started on first use), or a private one if it is busy."""
    global _shared
    with _shared_lock:
        if _shared is None or _shared.closed or _shared.owner != os.getpid() or _shared.proc.poll() is not None:
            _shared = Guard()
        g = _shared
    if g.lock.acquire(blocking=False):
        return g, True
    return Guard(), False


def release(g: Guard, shared: bool, clean: bool) -> None:
    """Give the helper back; one left with children running (an aborted run) is closed."""
    if shared:
        if not clean:
            g.close()
        g.lock.release()
    else:
        g.close()


@atexit.register
def _close_shared() -> None:
    if _shared is not None and _shared.owner == os.getpid():
        _shared.close()


def crash_message(task: tuple, key: tuple, how: str) -> str:
    """The record message of a call that killed its process."""
    point, chunk = task[2], task[3]
    i, name = key
    where = f"chunk {chunk} of grid point {point}"
    if name is None:
        if i < 0:
            return f"drawing the data of {where} killed the process ({how})"
        return (f"drawing replicate {i} of {where} killed the process ({how}); the later replicates of the chunk, "
                f"whose random numbers follow it, are counted with it")
    if i < 0:
        return f"the batch path of analysis `{name}` killed its process ({how}) in {where}; redone replicate by replicate"
    return f"analysis `{name}` killed its process ({how}) on replicate {i} of {where}"


def _check_crashes(task: tuple, crashed: dict, max_failure_rate: float) -> None:
    size = task[4]
    per: dict = {}
    for (i, name) in crashed:
        if i >= 0:
            per[name] = per.get(name, 0) + 1
    for name, k in per.items():
        if k > max(1.0, max_failure_rate * size):
            who = f"analysis `{name}`" if name is not None else "drawing the data"
            first = crashed[min(key for key in crashed if key[1] == name)]
            raise RunError(f"stopped: {who} killed its process on {k} of the {size} replicates of chunk {task[3]} "
                           f"at grid point {task[2]} (more than max_failure_rate {max_failure_rate:g}); first: "
                           f"{first}. Fix the analysis or raise `max_failure_rate` (--max-failure-rate).")


def run_isolated(fn, tasks: Iterable[tuple], jobs: int = 1, max_failure_rate: float = 1.0) -> Iterator:
    """Yield ``fn(*task, crashed=...)`` (``run_chunk``) for each task, run in forked children, ``jobs`` at a time.

    A child that dies is followed by another for the same chunk with the call that
    killed it recorded as a crash (see the module notes). Results come in
    completion order.
    """
    g, shared = acquire()
    pending: dict[int, tuple[tuple, dict]] = {}
    it = iter(tasks)
    clean = False
    try:
        def submit(task, crashed):
            pending[g.submit("chunk", fn, task, {"crashed": crashed})] = (task, crashed)

        for task in itertools.islice(it, max(1, jobs)):
            submit(task, {})
        while pending:
            rid, status, info = g.receive()
            task, crashed = pending.pop(rid)
            if status == "ok":
                yield info
                nxt = next(it, None)
                if nxt is not None:
                    submit(nxt, {})
            elif status == "error":
                raise info
            else:
                key, how = info
                if key is None or key in crashed:
                    raise RunError(f"a worker process died ({how}) while running chunk {task[3]} of grid point "
                                   f"{task[2]}, outside any replicate's call (out of memory?); run again, or with "
                                   f"fewer jobs.")
                crashed = {**crashed, key: crash_message(task, key, how)}
                _check_crashes(task, crashed, max_failure_rate)
                submit(task, crashed)
        clean = True
    finally:
        release(g, shared, clean and not pending)


# ---------------------------------------------------------------- loky workers

_devnull = None


def worker_init(parent: int) -> None:
    """Initializer of simpower's loky workers: exit when ``parent`` dies; no fault dump on a crash.

    ``parent`` is the main process's PID, given when the pool is made: a worker
    still importing when the main process died finds itself adopted at once.
    A crash is reported by the run (failure cause ``crash``), so loky's
    faulthandler dump of the dying worker is sent to /dev/null.
    """
    global _devnull
    if os.getppid() != parent:
        os._exit(1)
    if "PYTHONFAULTHANDLER" not in os.environ and not faulthandler.is_enabled():
        _devnull = open(os.devnull, "w")
        faulthandler.enable(file=_devnull)

    def watch():
        while True:
            time.sleep(PARENT_POLL)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=watch, name="simpower-parent-watch", daemon=True).start()


__all__ = ["available", "has_user_code", "run_isolated", "worker_init", "Guard", "crash_message"]
