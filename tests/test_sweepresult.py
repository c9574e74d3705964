"""A sweep answers its question: the size reaching a target power per curve, plots with units and marks.

External reference: Cohen (1988, Table 2.4.1), d = 0.5 needs n = 64 per group for power
0.80 at two-sided alpha 0.05 (the exact noncentral-t value, 63.8, also from
statsmodels' TTestIndPower below).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

import simpower as sp
from simpower.blocks import read_block
from simpower.planning.sweepresult import SweepResult, required_by_curve


@pytest.fixture(scope="module")
def swept():
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.5), analyses=[sp.TTest(), sp.WelchT()])
    return sp.sweep(sc, {"n": [40, 50, 60, 70, 80, 90]}, reps=4000, seed=20261202, n_jobs=1, progress=False)


def test_sweep_returns_a_dataframe_that_answers(swept):
    assert isinstance(swept, SweepResult) and isinstance(swept, pd.DataFrame)
    assert swept.grid == ["n"] and swept.scenario is not None
    assert type(swept[["n", "power"]]) is pd.DataFrame  # derived frames are plain


def test_required_n_per_curve_brackets_the_textbook_value(swept):
    from statsmodels.stats.power import TTestIndPower

    exact = TTestIndPower().solve_power(effect_size=0.5, alpha=0.05, power=0.8)  # 63.77 (Cohen 1988: 64)
    req = swept.required(0.8)
    assert list(req["analysis"]) == ["t_test", "welch_t"]
    for _, r in req.iterrows():
        assert r["smallest_on_grid"] == 70  # 60 is below 0.80 (exact power 0.775, statsmodels), 70 above (0.836)
        assert r["low"] <= r["interpolated"] <= r["high"]
        # the band-crossing interval holds the exact value; linear interpolation over a 10-wide grid
        # adds at most ~0.3 in n here (the curve's curvature), far inside the band
        assert r["low"] <= exact <= r["high"]
        assert abs(r["interpolated"] - exact) < 3


def test_required_reports_targets_out_of_reach(swept):
    req = swept.required(0.99)
    assert req["smallest_on_grid"].isna().all() and req["note"].str.startswith("not reached").all()
    low = swept.required(0.3)
    assert (low["interpolated"] == 40).all() and low["note"].str.contains("smallest grid value").all()


def test_required_by_curve_interpolates_linearly():
    t = pd.DataFrame({"analysis": ["a"] * 3, "n": [10, 20, 30], "power": [0.5, 0.7, 0.9],
                      "ci_low": [0.45, 0.65, 0.85], "ci_high": [0.55, 0.75, 0.95]})
    t.attrs["grid"] = ["n"]
    r = required_by_curve(t, "n", 0.8).iloc[0]
    assert math.isclose(r["interpolated"], 25.0) and math.isclose(r["low"], 22.5) and math.isclose(r["high"], 27.5)
    with pytest.raises(ValueError):
        required_by_curve(t, "n", 1.2)


def test_plot_marks_each_curve_and_keeps_the_legend_off_the_data(swept, tmp_path):
    fig = swept.plot(target=0.8, labels={"n": {"label": "patients per arm", "unit": "patients"}},
                     stem=tmp_path / "curve")
    ax = fig.axes[0]
    assert ax.get_xlabel() == "patients per arm (n) [patients]"
    leg = ax.get_legend()
    assert leg.get_bbox_to_anchor().x0 > ax.get_window_extent().x1 - 1  # anchored right of the axes
    triangles = [ln for ln in ax.get_lines() if ln.get_marker() == "v"]
    assert len(triangles) == 2
    assert all(abs(float(ln.get_ydata()[0]) - 0.8) < 1e-12 for ln in triangles)
    styles = {ln.get_color() for ln in ax.get_lines() if ln.get_marker() == "o"}
    assert len(styles) == 2  # one colour per analysis
    assert (tmp_path / "curve.png").exists() and (tmp_path / "curve.svg").exists()


def test_html_of_a_sweep_leads_with_the_answer(swept):
    html = swept._repr_html_()
    assert html.index("Sweep over") < html.index("<table")


def test_report_labels_block_is_checked():
    assert read_block("report", {"labels": {"n": "patients per arm", "icc": {"label": "ICC", "unit": ""}}})
    with pytest.raises(sp.ParameterError, match="report.labels.n.units"):
        read_block("report", {"labels": {"n": {"units": "patients"}}})
    with pytest.raises(sp.ParameterError, match="report.labels.n"):
        read_block("report", {"labels": {"n": 3}})


def test_a_search_draws_itself(tmp_path):
    sc = sp.Scenario(sp.NormalTwoArm(n=40, effect=0.5), sp.TTest())
    res = sp.required_n(sc, 0.8, low=20, high=120, seed=5, n_jobs=1, progress=False, max_reps=3000)
    fig = res.plot(stem=tmp_path / "s", labels={"n": "patients per arm"})
    ax = fig.axes[0]
    assert ax.get_xlabel() == "patients per arm (n)"
    answer = [ln for ln in ax.get_lines() if "answer" in str(ln.get_label())]
    assert answer and float(answer[0].get_xdata()[0]) == res.value
    assert (tmp_path / "s.png").exists()
