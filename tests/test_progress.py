"""Feedback on long work (simpower.engine.progress) and the search that fits only its deciding analysis.

None of these numbers come from an outside source: the checks are properties of the
display (what it counts and when it speaks) and the identity that a search fitting only
its deciding analysis gives that analysis the same replicates (content-keyed seeds, see
DEVELOPERS.md "The engine").
"""

from __future__ import annotations

import io

import pandas as pd
import pytest

import simpower as sp
from simpower.engine import progress
from simpower.planning.search import required_n


class _Pipe(io.StringIO):
    def isatty(self):
        return False


@pytest.fixture
def pipe(monkeypatch):
    out = _Pipe()
    monkeypatch.setattr(progress, "_stream", lambda: out)
    return out


def test_log_lines_off_a_terminal_only_after_the_interval(pipe, monkeypatch):
    clock = iter([0.0, 1.0, 5.0, 12.0, 13.0, 25.0])
    monkeypatch.setattr(progress.time, "monotonic", lambda: next(clock))
    d = progress.display(100, None, "simulating")  # created at t = 0
    d.update(10)  # t = 1: too early, silent
    d.update(10)  # t = 5: silent
    assert pipe.getvalue() == ""
    d.update(30)  # t = 12: a line
    line = pipe.getvalue().strip()
    assert line.startswith("simpower: simulating: 50 of 100 replicates (50%)")
    assert "12 s" in line and "about 12 s left" in line
    d.update(10)  # t = 13: within the interval of the last line
    assert pipe.getvalue().count("\n") == 1
    d.close()


def test_disabled_display_says_nothing(pipe, monkeypatch):
    monkeypatch.setattr(progress, "LOG_EVERY", 0.0)
    d = progress.display(10, False, "simulating")
    d.update(10)
    d.close()
    assert pipe.getvalue() == ""


def test_a_session_counts_every_run_inside_it_on_one_display(pipe, monkeypatch):
    monkeypatch.setattr(progress, "LOG_EVERY", 0.0)
    with progress.session(None, "searching") as s:
        progress.status("round 1: n = 40")
        a = progress.display(200, None, "searching")
        a.update(200)
        a.close()
        b = progress.display(600, None, "searching", initial=200)  # a growing point: 200 were done before
        b.update(400)
        assert (s.total, s.done) == (600, 600)
    lines = pipe.getvalue().strip().splitlines()
    assert lines[-1].startswith("simpower: searching: 600 of 600 replicates")
    assert "(round 1: n = 40)" in lines[-1]
    assert progress._SESSION.get() is None


def test_search_fits_only_the_deciding_analysis_with_the_same_replicates():
    sc = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), analyses=[sp.TTest(), sp.WelchT(), sp.MannWhitney()])
    kw = dict(low=20, high=120, seed=11, n_jobs=1, progress=False, max_reps=4000, analysis="welch_t")
    alone = required_n(sc, 0.8, **kw)
    every = required_n(sc, 0.8, all_analyses=True, **kw)
    cols = ["value", "reps", "rejections", "n_ok", "power"]
    pd.testing.assert_frame_equal(alone.table[cols], every.table[cols])
    assert alone.value == every.value


def test_only_keeps_the_named_analyses_and_refuses_unknown_names():
    sc = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), analyses=[sp.TTest(), sp.WelchT()])
    assert list(sc.only("welch_t").analyses) == ["welch_t"]
    assert sc.only("welch_t").point_key() != sc.point_key()
    with pytest.raises(sp.ParameterError, match="not an analysis"):
        sc.only("welch")
