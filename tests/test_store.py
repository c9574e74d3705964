"""The SQLite run store: round trip, reading back as pandas, export, fingerprint checks, damaged files.

The reference for "what was stored" is the in-memory result of the same run
(its records), and the file itself read with the standard library's sqlite3
and numpy.frombuffer, independently of simpower's reader.
"""

from __future__ import annotations

import json
import sqlite3
import zlib

import numpy as np
import pandas as pd
import pytest

import simpower as sp
from simpower.engine.chunk import run_chunk
from simpower.engine.store import RunStore, open_store
from simpower.errors import StoreError

Z95 = 1.6448536269514722  # upper 5% point of N(0, 1) (e.g. Abramowitz & Stegun 1964, Table 26.5)


def picky(data):
    """A user analysis that raises when the first observation exceeds z_0.95 (about 5% of replicates)."""
    y = np.asarray(data["y"])
    if y[0] > Z95:
        raise ValueError(f"first observation {y[0]:.4f} above z_0.95")
    return {"pvalue": min(1.0, abs(y.mean()))}


def scenario(n=20, effect=0.5):
    return sp.Scenario(sp.NormalTwoArm(n=n, effect=effect), analyses={"t": sp.TTest(), "picky": picky})


@pytest.fixture
def stored(tmp_path):
    path = tmp_path / "run.sqlite"
    res = sp.run(scenario(), reps=1100, seed=11, n_jobs=1, chunk_size=250, store=path)
    return path, res


def test_chunk_round_trip_is_exact(tmp_path):
    out = run_chunk(scenario(), 7, 3, 2, 300)
    with RunStore(tmp_path / "s.sqlite") as st:
        st.save(out)
        st.flush()
        back = st.load(3, 2, 300)
        assert st.load(3, 2, 299) is None  # another size is not this chunk
        assert st.load(3, 1, 300) is None
    assert back.causes == out.causes and back.messages == out.messages and back.paths == out.paths
    for name in out.records:
        for f, a in out.records[name].items():
            b = back.records[name][f]
            assert b.dtype == a.dtype and b.tobytes() == a.tobytes(), (name, f)


def test_stored_run_equals_result_and_reads_back_as_pandas(stored):
    path, res = stored
    with open_store(path) as st:
        reps = st.replicates()
        pts = st.points()
        chunks = st.chunks()
        fails = st.failures()
    assert len(reps) == 2 * 1100 and sorted(chunks["chunk"]) == [0, 1, 2, 3, 4]
    assert list(chunks["size"]) == [250, 250, 250, 250, 100]
    for name in ("t", "picky"):
        mine = reps[reps.analysis == name].sort_values("replicate").reset_index(drop=True)
        ref = res.records_frame(name)
        for col in ("replicate", "pvalue", "estimate", "se", "ci_low", "ci_high", "failure"):
            pd.testing.assert_series_equal(mine[col], ref[col], check_names=False)
        row = pts[pts.analysis == name].iloc[0]
        assert row["power"] == res.summaries[name]["power"] and row["reps_done"] == 1100 and row["complete"]
        assert row["n"] == 20 and row["effect"] == 0.5
    t_row = pts[pts.analysis == "t"].iloc[0]
    assert t_row["bias"] == pytest.approx(res.summaries["t"]["bias"], rel=1e-9)
    assert t_row["coverage"] == res.summaries["t"]["coverage"]
    n_fail = int((res.records["picky"].failure == "error:ValueError").sum())
    assert n_fail > 0
    assert fails.set_index("cause").loc["error:ValueError", "count"] == n_fail


def test_file_is_plain_data_readable_without_simpower(stored):
    path, res = stored
    con = sqlite3.connect(path)
    rows = con.execute("SELECT chunk, layout, crc32, data FROM arrays WHERE analysis='t' ORDER BY chunk").fetchall()
    con.close()
    parts = []
    for chunk, layout, crc, data in rows:
        assert zlib.crc32(data) == crc
        at = 0
        for field, dtype, shape in json.loads(layout):  # plain numpy reads it: no simpower needed
            assert dtype in ("<f8", "<i2")
            a = np.frombuffer(data, dtype=dtype, count=int(np.prod(shape)), offset=at).reshape(shape)
            at += a.nbytes
            if field == "pvalue":
                parts.append(a)
        assert at == len(data)
    assert np.concatenate(parts).tobytes() == res.records["t"].pvalue.tobytes()


def test_export_csv_and_parquet_round_trip(stored, tmp_path):
    path, res = stored
    with open_store(path) as st:
        n_csv = st.export(tmp_path / "r.csv")
        n_pq = st.export(tmp_path / "r.parquet")
        st.export(tmp_path / "p.csv", table="points")
    assert n_csv == n_pq == 2200
    csv = pd.read_csv(tmp_path / "r.csv", keep_default_na=False, na_values=[""])
    pq = pd.read_parquet(tmp_path / "r.parquet")
    for df in (csv, pq):
        t = df[df.analysis == "t"].sort_values("replicate")
        np.testing.assert_allclose(t["pvalue"].to_numpy(float), res.records["t"].pvalue, rtol=1e-15)
    assert pq[pq.analysis == "picky"]["failure"].tolist() == list(res.records["picky"].failure)
    assert len(pd.read_csv(tmp_path / "p.csv")) == 2
    with open_store(path) as st, pytest.raises(StoreError, match="csv"):
        st.export(tmp_path / "r.txt")


def test_changed_scenario_seed_or_chunk_size_refuses_to_resume(stored):
    path, _ = stored
    with pytest.raises(StoreError, match=r"another scenario.*process\.n: 20 -> 24"):
        sp.run(scenario(n=24), reps=1100, seed=11, n_jobs=1, chunk_size=250, store=path)
    with pytest.raises(StoreError, match="seed 11"):
        sp.run(scenario(), reps=1100, seed=12, n_jobs=1, chunk_size=250, store=path)
    with pytest.raises(StoreError, match="chunk size 250"):
        sp.run(scenario(), reps=1100, seed=11, n_jobs=1, chunk_size=200, store=path)


def test_rerun_reuses_chunks_adopts_the_seed_and_extends(tmp_path):
    path = tmp_path / "grow.sqlite"
    first = sp.run(scenario(), reps=700, n_jobs=1, chunk_size=250, store=path)  # fresh entropy
    again = sp.run(scenario(), reps=700, n_jobs=1, chunk_size=250, store=path)  # seed None: the store's
    assert again.seed == first.seed
    assert again.records["t"].pvalue.tobytes() == first.records["t"].pvalue.tobytes()
    with open_store(path) as st:
        before = st.chunks().set_index("chunk")["finished_at"].to_dict()
    longer = sp.run(scenario(), reps=1100, n_jobs=1, chunk_size=250, store=path)
    fresh = sp.run(scenario(), reps=1100, seed=first.seed, n_jobs=1, chunk_size=250)
    for name in ("t", "picky"):
        assert longer.records[name].pvalue.tobytes() == fresh.records[name].pvalue.tobytes()
        assert longer.records[name].status.tobytes() == fresh.records[name].status.tobytes()
    with open_store(path) as st:
        after = st.chunks().set_index("chunk")
    assert after.loc[0, "finished_at"] == before[0] and after.loc[1, "finished_at"] == before[1]
    assert after.loc[2, "size"] == 250 and after.loc[2, "finished_at"] > before[2]  # 200 -> 250: recomputed


def test_sweep_points_each_keep_their_fingerprint(tmp_path):
    path = tmp_path / "sweep.sqlite"
    scs = [scenario(n=n) for n in (10, 30)]
    res = sp.run_many(scs, 300, seed=4, n_jobs=1, store=path, keys=[5, 9])
    with open_store(path) as st:
        pts = st.points()
    t = pts[pts.analysis == "t"].set_index("point")
    assert list(t.index) == [5, 9] and list(t["n"]) == [10, 30]
    assert t.loc[9, "fingerprint"] == scs[1].fingerprint()
    assert t.loc[5, "power"] == res[0].summaries["t"]["power"]
    with pytest.raises(StoreError, match="grid point 9"):
        sp.run_many([scs[0], scenario(n=31)], 300, seed=4, n_jobs=1, store=path, keys=[5, 9])


def _checkpointed(tmp_path):
    path = tmp_path / "big.sqlite"
    sp.run(scenario(), reps=6000, seed=2, n_jobs=1, chunk_size=500, store=path)
    return path  # closed: the WAL is checkpointed into the file


def test_truncated_store_is_refused(tmp_path):
    path = _checkpointed(tmp_path)
    size = path.stat().st_size
    with open(path, "r+b") as fh:
        fh.truncate(size // 2)
    with pytest.raises(StoreError, match="truncated"):
        open_store(path)
    with pytest.raises(StoreError, match="truncated"):
        sp.run(scenario(), reps=6000, seed=2, n_jobs=1, chunk_size=500, store=path)


def test_corrupted_bytes_give_a_clear_error(tmp_path):
    path = _checkpointed(tmp_path)
    size = path.stat().st_size
    rng = np.random.default_rng(0)
    with open(path, "r+b") as fh:
        fh.seek(int(size * 0.6))
        fh.write(rng.bytes(8192))
    with pytest.raises(StoreError, match="is damaged") as e:  # a chunk's blob (CRC) or SQLite's own pages
        with open_store(path) as st:
            st.replicates()
    assert "\n" not in str(e.value)


def test_blob_checksum_and_foreign_dtypes_are_checked(tmp_path):
    path = _checkpointed(tmp_path)
    con = sqlite3.connect(path)
    data = bytearray(con.execute("SELECT data FROM arrays WHERE chunk=3 AND analysis='t'").fetchone()[0])
    data[17] ^= 0xFF
    con.execute("UPDATE arrays SET data=? WHERE chunk=3 AND analysis='t'", (bytes(data),))
    layout = con.execute("SELECT layout FROM arrays WHERE chunk=4 AND analysis='t'").fetchone()[0]
    con.execute("UPDATE arrays SET layout=? WHERE chunk=4 AND analysis='t'",
                (layout.replace('["se", "<f8"', '["se", "|O"'),))
    con.commit()
    con.close()
    with open_store(path) as st:
        with pytest.raises(StoreError, match="checksum"):
            st.load(st.point_keys()[0], 3, 500)
        with pytest.raises(StoreError, match="refused"):
            st.load(st.point_keys()[0], 4, 500)
        assert st.load(st.point_keys()[0], 2, 500) is not None


def test_not_a_store(tmp_path):
    junk = tmp_path / "junk.sqlite"
    junk.write_bytes(b"hello, this is not a database" * 10)
    with pytest.raises(StoreError, match="not a simpower run store"):
        open_store(junk)
    other = tmp_path / "other.sqlite"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE t (x)")
    con.commit()
    con.close()
    with pytest.raises(StoreError, match="not a simpower run store"):
        sp.run(scenario(), reps=10, seed=1, n_jobs=1, store=other)
    with pytest.raises(StoreError, match="no such run store"):
        open_store(tmp_path / "absent.sqlite")


def test_cli_store_export_and_mismatch(tmp_path, capsys):
    from simpower.cli.main import main

    toml = tmp_path / "s.toml"
    toml.write_text('alpha = 0.05\nseed = 3\nreps = 900\n[process]\ntype = "normal_two_arm"\nn = 15\neffect = 0.6\n'
                    '[analysis]\ntype = "t_test"\n')
    store = tmp_path / "cli.sqlite"
    assert main(["run", str(toml), "--store", str(store), "--jobs", "1", "-q"]) == 0
    assert main(["export", str(store), str(tmp_path / "out.csv")]) == 0
    df = pd.read_csv(tmp_path / "out.csv")
    ref = sp.run(sp.Scenario(sp.NormalTwoArm(n=15, effect=0.6), sp.TTest()), reps=900, seed=3, n_jobs=1)
    np.testing.assert_array_equal(df.sort_values("replicate")["pvalue"].to_numpy(), ref.pvalues)
    capsys.readouterr()
    assert main(["run", str(toml), "--store", str(store), "--jobs", "1", "-q", "--set", "n=16"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "another scenario" in err and "process.n: 15 -> 16" in err
    assert main(["resume", str(store), "--status"]) == 0
    assert "900 of 900 replicates (complete)" in capsys.readouterr().out


def test_scenario_file_store_and_execution_blocks(tmp_path, capsys):
    from simpower.cli.main import main

    body = ('seed = 3\nreps = 400\n[process]\ntype = "normal_two_arm"\nn = 15\n[analysis]\ntype = "t_test"\n'
            '[store]\npath = "runs/"\nsync = "full"\n[execution]\nbackend = "serial"\n')
    toml = tmp_path / "s.toml"
    toml.write_text(body)
    assert main(["run", str(toml), "-q"]) == 0
    out = capsys.readouterr().out
    files = list((tmp_path / "runs").glob("run-*.sqlite"))  # relative to the scenario file
    assert len(files) == 1 and str(files[0].name) in out
    with open_store(files[0]) as st:
        assert st.meta()["sync"] == "full" and len(st.done_chunks()) == 1
    files[0].unlink()
    toml.write_text(body.replace("path =", "pathh ="))
    assert main(["run", str(toml), "-q"]) == 2
    err = capsys.readouterr().err
    assert "`store.pathh` is not a field of [store]" in err and "path" in err


def test_resuming_a_store_written_by_other_code_warns(tmp_path, monkeypatch):
    # the digest of simpower's source is recorded; a resume with other code says so
    path = tmp_path / "code.sqlite"
    sp.run(scenario(), reps=500, seed=3, n_jobs=1, chunk_size=250, store=path)
    import simpower._provenance as prov

    monkeypatch.setattr(prov, "source_digest", lambda: "0123456789abcdef")
    with pytest.warns(RuntimeWarning, match="written by simpower source .* this is 0123456789abcdef"):
        sp.run(scenario(), reps=750, seed=3, n_jobs=1, chunk_size=250, store=path)


def test_cli_shows_the_code_change_warning_in_one_line(tmp_path, capsys):
    from simpower.cli.main import main

    f = tmp_path / "s.toml"
    f.write_text('seed = 4\nreps = 400\nchunk_size = 200\n[process]\ntype = "normal_two_arm"\nn = 10\n'
                 'effect = 0.5\n[analysis]\ntype = "t_test"\n')
    path = tmp_path / "cli.sqlite"
    assert main(["run", str(f), "--store", str(path), "-q", "--jobs", "1"]) == 0
    con = sqlite3.connect(path)
    con.execute("UPDATE meta SET value='feedfacefeedface' WHERE key='simpower_source_sha256'")
    con.commit()
    con.close()
    capsys.readouterr()
    assert main(["run", str(f), "--store", str(path), "-q", "--jobs", "1", "--reps", "600"]) == 0
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if "written by simpower source feedfacefeedface" in ln]
    assert len(lines) == 1 and lines[0].startswith("simpower: warning: ")


def test_store_of_another_format_version_is_refused_in_one_line(tmp_path):
    path = _checkpointed(tmp_path)
    con = sqlite3.connect(path)
    con.execute("UPDATE meta SET value='1' WHERE key='version'")
    con.commit()
    con.close()
    with pytest.raises(StoreError, match=r"format version 1; this simpower reads version 2") as e:
        open_store(path)
    assert "\n" not in str(e.value)
