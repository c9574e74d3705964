"""Run store messages say what is true: the real cause of a failure, one damaged chunk, one writer.

What the operating system and SQLite report is the outside reference here:
the errno values are those of POSIX ``open(2)``/``mkdir(2)``/``flock(2)``
(IEEE Std 1003.1-2017; Linux man-pages), SQLite's result codes those of
https://www.sqlite.org/rescode.html (SQLITE_FULL, SQLITE_CANTOPEN,
SQLITE_READONLY). Where the test machine can make the OS return the errno for
real it does (a path under a file, /proc, /dev/null, a read-only folder and an
unreadable file -- as another user when the tests run as root, since root
passes permission checks -- and SQLite's own SQLITE_FULL through
``PRAGMA max_page_count``); the causes no test can make for real (a read-only
file system, a full disk at open) are raised with their real errno by a
patched call. The reference for "nothing changed" is an undamaged run of the
same seed.
"""

from __future__ import annotations

import calendar
import errno
import json
import os
import re
import shutil
import socket
import sqlite3
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import pytest

import simpower as sp
from simpower.engine.store import runstore as store_mod
from simpower.engine.store import writer as store_writer
from simpower.engine.store import RunStore, open_store
from simpower.engine.store.files import StoreBusy, explain
from simpower.errors import StoreError

FIELDS = ("pvalue", "estimate", "se", "ci_low", "ci_high", "status")


def scenario(n=20, effect=0.5):
    return sp.Scenario(sp.NormalTwoArm(n=n, effect=effect), sp.TTest())


def _no_afresh(msg: str) -> None:
    """A cause that is not damage must not invite deleting the store."""
    assert "afresh" not in msg and "corrupt" not in msg and "damaged" not in msg, msg
    assert "\n" not in msg


def _assert_same_records(a, b):
    for name in b:
        for f in FIELDS:
            assert getattr(a[name], f).tobytes() == getattr(b[name], f).tobytes(), (name, f)
        assert a[name].causes == b[name].causes


# -- the real cause of an open failure ------------------------------------------------------
@pytest.mark.skipif(not Path("/proc/self/mounts").exists(), reason="needs Linux /proc")
def test_a_store_in_proc_names_the_virtual_file_system():
    # creating a file in procfs fails with ENOENT although the folder exists (Linux proc(5))
    with pytest.raises(StoreError) as e:
        sp.run(scenario(), reps=50, seed=1, n_jobs=1, store="/proc/x.sqlite")
    msg = str(e.value)
    assert msg.startswith("/proc/x.sqlite: /proc is on a virtual file system (proc)") and "on a disk" in msg
    _no_afresh(msg)


@pytest.mark.skipif(not os.path.exists("/dev/null"), reason="needs /dev/null")
def test_a_device_is_not_a_regular_file():
    for mode in ("a", "r"):
        with pytest.raises(StoreError, match="/dev/null: is not a regular file") as e:
            RunStore("/dev/null", mode=mode)
        _no_afresh(str(e.value))


def test_a_path_under_a_file_names_the_file(tmp_path):
    # mkdir(2) gives ENOTDIR (EEXIST for the file itself): the path cannot be a folder
    blocker = tmp_path / "notes.txt"
    blocker.write_text("a file, not a folder")
    for path in (blocker / "run.sqlite", blocker / "sub" / "run.sqlite"):
        with pytest.raises(StoreError) as e:
            sp.run(scenario(), reps=50, seed=1, n_jobs=1, store=path)
        msg = str(e.value)
        assert f"{blocker} is a file, not a folder" in msg and "inside a folder" in msg
        _no_afresh(msg)


def _as_unprivileged(fn):
    """fn() as a user that permission checks apply to: this one, or 'nobody' in a forked child under root."""
    if os.geteuid() != 0:
        return fn()
    if not hasattr(os, "fork"):
        pytest.skip("needs fork to drop root privileges")
    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: drop to nobody, run, send the result back, never return into pytest
        code = 0
        try:
            os.setgid(65534)
            os.setuid(65534)
            os.write(write, json.dumps(fn()).encode())
        except BaseException as exc:  # pragma: no cover - reported to the parent
            os.write(write, json.dumps({"child_error": repr(exc)}).encode())
            code = 1
        finally:
            os._exit(code)
    os.close(write)
    with os.fdopen(read) as fh:
        text = fh.read()
    os.waitpid(pid, 0)
    out = json.loads(text)
    assert not (isinstance(out, dict) and "child_error" in out), out
    return out


def _open_message(path, mode, write=False):
    try:
        with RunStore(path, mode=mode) as st:
            if write:  # a first write: the data-only plan a command-line run records
                st.record_plan({"command": "run"})
            return ["ok", len(st.replicates())]
    except StoreError as exc:
        return ["error", str(exc)]


def test_read_only_folder_and_unreadable_file_are_named_with_their_fix():
    # a folder the user may not write in: EACCES from open(2) with O_CREAT, not a damaged store
    folder = Path(tempfile.mkdtemp())
    try:
        os.chmod(folder, 0o755)  # others may pass through (the unprivileged child under root)
        path = folder / "run.sqlite"
        sp.run(scenario(), reps=600, seed=5, n_jobs=1, chunk_size=200, store=path)
        if os.geteuid() == 0:
            os.chown(path, 65534, 65534)
        os.chmod(folder, 0o555)
        kind, msg = _as_unprivileged(lambda: _open_message(path, "a"))
        assert kind == "error" and msg.startswith(f"{path}: permission denied on the folder {folder}"), msg
        assert f"chmod u+rwx {folder}" in msg
        _no_afresh(msg)
        # reading a store in a read-only folder works (no -wal left: SQLite reads it as it is)
        assert _as_unprivileged(lambda: _open_message(path, "r")) == ["ok", 600]
        os.chmod(path, 0o000)
        for mode in ("a", "r"):
            kind, msg = _as_unprivileged(lambda: _open_message(path, mode))
            assert kind == "error" and msg.startswith(f"{path}: permission denied on {path}"), msg
            assert f"chmod u+{'rw' if mode == 'a' else 'r'} {path}" in msg
            _no_afresh(msg)
        # a read-only file in a writable folder: SQLite opens it read-only and refuses the first write
        os.chmod(folder, 0o777)
        os.chmod(path, 0o444)
        kind, msg = _as_unprivileged(lambda: _open_message(path, "a", write=True))
        assert kind == "error" and msg.startswith(f"{path}: permission denied on {path}"), msg
        _no_afresh(msg)
    finally:
        os.chmod(folder, 0o755)
        shutil.rmtree(folder)


def test_read_only_file_system_and_full_disk_at_open(tmp_path, monkeypatch):
    # no test can mount a read-only or full file system: the OS call that meets them raises their errno
    real_open = os.open

    def refusing(err):
        def fake(path, flags, *args, **kw):
            if str(path).endswith(".lock") and flags & os.O_CREAT:
                raise OSError(err, os.strerror(err), str(path))
            return real_open(path, flags, *args, **kw)
        return fake

    path = tmp_path / "run.sqlite"
    monkeypatch.setattr(os, "open", refusing(errno.EROFS))
    with pytest.raises(StoreError) as e:
        sp.run(scenario(), reps=50, seed=1, n_jobs=1, store=path)
    msg = str(e.value)
    assert msg.startswith(f"{path}: {tmp_path} is on a read-only file system") and "writable disk" in msg
    _no_afresh(str(e.value))
    monkeypatch.setattr(os, "open", refusing(errno.ENOSPC))
    with pytest.raises(StoreError) as e:
        sp.run(scenario(), reps=50, seed=1, n_jobs=1, store=path)
    assert str(e.value).startswith(f"{path}: the disk holding {tmp_path} is full") and "free some space" in str(e.value)
    _no_afresh(str(e.value))
    monkeypatch.setattr(os, "open", real_open)

    def full(*a, **kw):
        raise sqlite3.OperationalError("database or disk is full")

    monkeypatch.setattr(store_mod.sqlite3, "connect", full)
    with pytest.raises(StoreError, match=f"the disk holding {tmp_path} is full") as e:
        RunStore(path)
    _no_afresh(str(e.value))
    assert not path.with_name("run.sqlite.lock").exists()  # a failed open lets go of its lock


def test_only_sqlite_damage_invites_starting_afresh(tmp_path):
    # SQLITE_CORRUPT / SQLITE_NOTADB are damage; SQLITE_BUSY is someone else's lock
    p = tmp_path / "s.sqlite"
    assert "start afresh" in explain(sqlite3.DatabaseError("database disk image is malformed"), p, "reading")
    assert "start afresh" in explain(sqlite3.DatabaseError("file is not a database"), p, "opening")
    busy = explain(sqlite3.OperationalError("database is locked"), p, "saving a chunk")
    assert "another program holds a lock" in busy
    _no_afresh(busy)


def test_disk_full_while_saving_keeps_the_committed_chunks(tmp_path, monkeypatch):
    # PRAGMA max_page_count makes SQLite itself answer SQLITE_FULL ("database or disk is full") once the
    # file would grow past it, as on a full disk
    path = tmp_path / "run.sqlite"
    real = store_mod._connect

    opened = []

    def capped(p, sync):
        conn = real(p, sync)
        opened.append(p)
        if len(opened) == 2:  # the writer thread's connection, opened after the schema
            pages = conn.execute("PRAGMA page_count").fetchone()[0]
            conn.execute(f"PRAGMA max_page_count={pages + 80}")  # ~1.3 MB: 16-chunk commits fit, not 40
        return conn

    monkeypatch.setattr(store_mod, "_connect", capped)  # the run's connection, then the writer thread's
    monkeypatch.setattr(store_writer, "_connect", capped)
    with pytest.raises(StoreError) as e:
        sp.run(scenario(), reps=40000, seed=9, n_jobs=1, chunk_size=1000, store=path)
    msg = str(e.value)
    assert msg.startswith(f"{path}: the disk holding {tmp_path} is full (while saving a chunk)"), msg
    assert "chunks already committed are kept" in msg
    _no_afresh(msg)
    monkeypatch.setattr(store_mod, "_connect", real)
    monkeypatch.setattr(store_writer, "_connect", real)
    with open_store(path) as st:
        kept = len(st.done_chunks())
    assert 0 < kept < 40
    res = sp.run(scenario(), reps=40000, seed=9, n_jobs=1, chunk_size=1000, store=path)  # space again: resume
    ref = sp.run(scenario(), reps=40000, seed=9, n_jobs=1, chunk_size=1000)
    _assert_same_records(res.records, ref.records)


# -- a damaged chunk is recomputed ------------------------------------------------------------
def _flip(path, point, chunk, at=17):
    con = sqlite3.connect(path)
    data = bytearray(con.execute("SELECT data FROM arrays WHERE point=? AND chunk=?", (point, chunk)).fetchone()[0])
    data[at] ^= 0xFF
    con.execute("UPDATE arrays SET data=? WHERE point=? AND chunk=?", (bytes(data), point, chunk))
    con.commit()
    con.close()


def test_a_damaged_chunk_is_recomputed_and_the_result_is_unchanged(tmp_path):
    path = tmp_path / "run.sqlite"
    sp.run(scenario(), reps=1000, seed=21, n_jobs=1, chunk_size=250, store=path)
    with open_store(path) as st:
        key = st.point_keys()[0]
    _flip(path, key, 2)
    with open_store(path) as st, pytest.raises(StoreError, match=r"chunk 2 .* is damaged \(array checksum"):
        st.replicates()  # read-only: refused, naming the chunk and how to recompute it
    with pytest.warns(RuntimeWarning) as caught:
        res = sp.run(scenario(), reps=1000, seed=21, n_jobs=1, chunk_size=250, store=path)
    texts = [str(w.message) for w in caught if "damaged" in str(w.message)]
    assert len(texts) == 1
    assert (f"chunk 2 (replicates 500-749) of grid point {key} (n=20, effect=0.5" in texts[0]
            and "array checksum mismatch" in texts[0] and "recomputing it" in texts[0])
    ref = sp.run(scenario(), reps=1000, seed=21, n_jobs=1, chunk_size=250)
    _assert_same_records(res.records, ref.records)
    with open_store(path) as st:  # the recomputed chunk replaced the damaged one
        _assert_same_records(st.records(), ref.records)


def test_a_damaged_chunk_of_a_sweep_names_the_parameters_that_vary(tmp_path):
    path = tmp_path / "grid.sqlite"
    grid = [scenario(n=20), scenario(n=30)]
    sp.run_many(grid, 400, seed=4, n_jobs=1, chunk_size=200, store=path)
    con = sqlite3.connect(path)
    con.execute("UPDATE arrays SET layout='[[' WHERE point=1 AND chunk=1")  # undecodable layout
    con.commit()
    con.close()
    with pytest.warns(RuntimeWarning, match=r"chunk 1 \(replicates 200-399\) of grid point 1 \(n=30\) is damaged "
                                            r"\(unreadable array layout"):
        res = sp.run_many(grid, 400, seed=4, n_jobs=1, chunk_size=200, store=path)
    ref = sp.run_many(grid, 400, seed=4, n_jobs=1, chunk_size=200)
    for a, b in zip(res, ref):
        _assert_same_records(a.records, b.records)


def test_a_damaged_plan_still_refuses_the_store(tmp_path):
    path = tmp_path / "run.sqlite"
    sp.run(scenario(), reps=500, seed=2, n_jobs=1, chunk_size=250, store=path)
    con = sqlite3.connect(path)
    con.execute("UPDATE points SET scenario='{\"process\": ', chunk_size='x'")
    con.commit()
    con.close()
    with pytest.raises(StoreError, match=r"grid point \d+: its stored plan is damaged \(unreadable chunk_size, "
                                         r"scenario in table points\)"):
        sp.run(scenario(), reps=500, seed=2, n_jobs=1, chunk_size=250, store=path)


def test_cli_resume_recomputes_a_damaged_chunk_with_a_one_line_warning(tmp_path, capsys, monkeypatch):
    from simpower.cli.main import main

    f = tmp_path / "s.toml"
    f.write_text('seed = 8\nreps = 600\nchunk_size = 200\n[process]\ntype = "normal_two_arm"\nn = 12\n'
                 'effect = 0.4\n[analysis]\ntype = "t_test"\n')
    path = tmp_path / "cli.sqlite"
    argv = ["run", str(f), "--store", str(path), "-q", "--jobs", "1"]
    monkeypatch.setattr(sys, "argv", ["simpower", *argv])  # the command line the store records
    assert main(argv) == 0
    with open_store(path) as st:
        key = st.point_keys()[0]
    _flip(path, key, 1, at=3)
    capsys.readouterr()
    assert main(["resume", str(path)]) == 0
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if "is damaged" in ln]
    assert len(lines) == 1 and lines[0].startswith("simpower: warning: ") and "chunk 1 (replicates 200-399)" in lines[0]
    ref = sp.run(sp.Scenario(sp.NormalTwoArm(n=12, effect=0.4), sp.TTest()), reps=600, seed=8, n_jobs=1,
                 chunk_size=200)
    with open_store(path) as st:
        _assert_same_records(st.records(), ref.records)


# -- one writer at a time -----------------------------------------------------------------------
def test_a_second_writer_in_the_same_process_is_refused(tmp_path):
    path = tmp_path / "run.sqlite"
    with RunStore(path):
        with pytest.raises(StoreBusy, match=rf"already open for writing in this process \(pid {os.getpid()}\)"):
            RunStore(path)
        with open_store(path) as reader:  # reading while a run writes is fine
            assert reader.done_chunks() == []
    assert not Path(str(path) + ".lock").exists()  # a clean close removes the lock file
    with RunStore(path):  # and the store opens again
        pass


HOLDER = textwrap.dedent('''
    import sys
    from simpower.engine.store import RunStore
    st = RunStore(sys.argv[1])
    print("ready", flush=True)
    sys.stdin.readline()
''')


def test_a_second_process_is_told_who_writes_the_store(tmp_path, capsys):
    path = tmp_path / "run.sqlite"
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(Path(sp.__file__).parents[1]),
                                                        os.environ.get("PYTHONPATH", "")])}
    before = int(time.time())
    child = subprocess.Popen([sys.executable, "-c", HOLDER, str(path)], stdin=subprocess.PIPE,
                             stdout=subprocess.PIPE, text=True, env=env)
    try:
        assert child.stdout.readline().strip() == "ready"
        after = time.time()
        with pytest.raises(StoreBusy) as e:
            sp.run(scenario(), reps=100, seed=1, n_jobs=1, store=path)
        msg = str(e.value)
        m = re.search(rf"another run is writing this store \(process {child.pid} on {re.escape(socket.gethostname())} "
                      r"since (\d{4}-\d\d-\d\d \d\d:\d\d:\d\d) UTC\)", msg)
        assert m, msg
        since = calendar.timegm(time.strptime(m.group(1), "%Y-%m-%d %H:%M:%S"))
        assert before <= since <= after  # the holder's start, to the second
        assert "\n" not in msg
        _no_afresh(msg)
        from simpower.cli.main import main

        toml = tmp_path / "s.toml"
        toml.write_text('seed = 1\nreps = 100\n[process]\ntype = "normal_two_arm"\nn = 10\n[analysis]\n'
                        'type = "t_test"\n')
        capsys.readouterr()
        assert main(["run", str(toml), "--store", str(path), "-q", "--jobs", "1"]) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and f"process {child.pid}" in err
    finally:
        child.kill()  # SIGKILL: the OS lets go of the lock, the lock file (naming a dead pid) stays
        child.wait(timeout=30)
    assert Path(str(path) + ".lock").exists()
    res = sp.run(scenario(), reps=100, seed=1, n_jobs=1, store=path)
    assert res.reps == 100
