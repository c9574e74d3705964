"""Sweeps: grids (lists, ranges, crossed, zipped), tidy rows, agreement with closed-form power, reproducibility."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import simpower as sp
from simpower.errors import ParameterError
from simpower.planning.sequential import MemoryStore
from simpower.planning.sweep import Grid, Range, grid_from_block, parse_axis, parse_together, sweep

SC = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), analyses=[sp.TTest(), sp.WelchT()])


def nct_power(d, n, alpha=0.05):
    """Two-sided two-sample t power, computed here from scipy.stats.nct (independent of simpower.analytic)."""
    df, nc = 2 * n - 2, d * math.sqrt(n / 2)
    crit = stats.t.ppf(1 - alpha / 2, df)
    return stats.nct.sf(crit, df, nc) + stats.nct.cdf(-crit, df, nc)


def test_grid_forms():
    g = Grid.cross(n=[10, 20], effect=Range(0.2, 0.4, step=0.1)) * Grid.together(sd=[1, 2], mean0=[5, 6])
    s = g.settings()
    assert len(s) == 2 * 3 * 2
    assert s[0] == {"n": 10, "effect": 0.2, "sd": 1, "mean0": 5} and s[-1] == {"n": 20, "effect": 0.4, "sd": 2, "mean0": 6}
    assert Range(10, 1000, count=3, scale="log").values(integer=True) == [10, 100, 1000]
    assert Range(0, 1, count=5).values() == [0.0, 0.25, 0.5, 0.75, 1.0]
    assert Grid.points([{"n": 5, "sd": 1}, {"n": 8, "sd": 3}]).settings() == [{"n": 5, "sd": 1}, {"n": 8, "sd": 3}]


def test_integer_ranges_are_rounded_for_integer_parameters():
    s = Grid.cross(n=Range(10, 40, count=4, scale="log")).settings(SC)
    assert [p["n"] for p in s] == [10, 16, 25, 40] and all(isinstance(p["n"], int) for p in s)


def test_toml_block_and_command_line_forms():
    g = grid_from_block({"vary": {"n": [10, 20], "effect": {"from": 0.2, "to": 0.6, "count": 3}},
                         "together": [{"sd": [1, 2], "mean0": [0, 1]}]})
    assert len(g.settings()) == 12
    assert parse_axis("n=10:30:10") == ("n", Range(10, 30, step=10))
    assert parse_axis("n=10:1000//3")[1].values(True) == [10, 100, 1000]
    assert parse_axis("effect=0.2,0.5") == ("effect", [0.2, 0.5])
    assert parse_together("sd=1,2;mean0=3,4").settings() == [{"sd": 1, "mean0": 3}, {"sd": 2, "mean0": 4}]


def test_tidy_rows_and_columns():
    t = sweep(SC, {"n": [10, 20], "effect": [0.0, 0.5]}, reps=400, seed=1, n_jobs=1)
    assert len(t) == 2 * 2 * 2
    for c in ("n", "effect", "analysis", "power", "mcse", "ci_low", "ci_high", "reps", "failures",
              "analytic_power", "seconds", "path"):
        assert c in t.columns
    assert (t["ci_low"] <= t["power"]).all() and (t["power"] <= t["ci_high"]).all()
    assert t.attrs["seed"] == 1 and t.attrs["grid"] == ["n", "effect"]
    # MCSE = sqrt(p(1-p)/R) (Morris, White & Crowther 2019)
    assert np.allclose(t["mcse"], np.sqrt(t["power"] * (1 - t["power"]) / t["n_ok"]))


def test_power_matches_noncentral_t_at_every_point():
    t = sweep(sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), sp.TTest()),
              {"n": [8, 20, 40], "effect": [0.3, 0.8]}, reps=3000, seed=2, n_jobs=1)
    for _, row in t.iterrows():
        ref = nct_power(row["effect"], row["n"])
        assert abs(row["power"] - ref) <= 4 * math.sqrt(ref * (1 - ref) / row["reps"])
        assert row["analytic_power"] == pytest.approx(ref, abs=1e-6)


def test_alpha_and_analysis_parameters_sweep():
    t = sweep(SC, {"alpha": [0.01, 0.05], "t_test.alternative": ["two-sided", "greater"]}, reps=300, seed=3, n_jobs=1)
    assert set(t["alpha"]) == {0.01, 0.05} and len(t) == 8


def test_reproducible_and_independent_of_grid_position():
    a = sweep(SC, {"n": [20, 40]}, reps=500, seed=4, n_jobs=1)
    b = sweep(SC, {"n": [40]}, reps=500, seed=4, n_jobs=1)
    pd.testing.assert_frame_equal(a.drop(columns="seconds"), sweep(SC, {"n": [20, 40]}, reps=500, seed=4,
                                                                   n_jobs=1).drop(columns="seconds"))
    assert list(a[a["n"] == 40]["power"]) == list(b["power"])      # content keys: same point, same numbers


def test_parallel_equals_serial():
    a = sweep(SC, {"n": [10, 20, 30]}, reps=400, seed=5, n_jobs=1, chunk_size=100)
    b = sweep(SC, {"n": [10, 20, 30]}, reps=400, seed=5, n_jobs=2, chunk_size=100)
    pd.testing.assert_frame_equal(a.drop(columns="seconds"), b.drop(columns="seconds"))


def test_store_resumes_without_simulating_again():
    store = MemoryStore()
    a = sweep(SC, {"n": [10, 20]}, reps=400, seed=6, n_jobs=1, store=store)
    done = store.simulated
    b = sweep(SC, {"n": [10, 20]}, reps=400, seed=6, n_jobs=1, store=store)
    assert store.simulated == done and list(a["power"]) == list(b["power"])


def test_sequential_per_point():
    t = sweep(sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), sp.TTest()), {"n": [10, 60]}, seed=7, n_jobs=1,
              target_mcse=0.01)
    assert (t["mcse"] <= 0.01).all() and t["mcse_reached"].all()


def test_csv_and_parquet_round_trip(tmp_path):
    t = sweep(SC, {"n": [10, 20]}, reps=200, seed=8, n_jobs=1)
    t.to_csv(tmp_path / "t.csv", index=False)
    t.to_parquet(tmp_path / "t.parquet", index=False)
    back = pd.read_parquet(tmp_path / "t.parquet")
    assert list(back["power"]) == list(t["power"])
    assert list(pd.read_csv(tmp_path / "t.csv")["n"]) == [10, 10, 20, 20]


def test_duplicate_points_run_once():
    t = sweep(SC, Grid.points([{"n": 10}, {"n": 10}]), reps=200, seed=9, n_jobs=1)
    assert len(t) == 4 and list(t["power"][:2]) == list(t["power"][2:])


@pytest.mark.parametrize("grid, match", [
    ({"nn": [10]}, "Did you mean 'n'"),
    ({"efect": [0.1]}, "Did you mean 'effect'"),
    ({}, "grid is empty"),
    ({"n": []}, "grid is empty"),
])
def test_bad_grids(grid, match):
    with pytest.raises(ParameterError, match=match):
        sweep(SC, grid, reps=10, seed=1, n_jobs=1)


def test_bad_values_and_shapes():
    with pytest.raises(ParameterError, match="`n` must be an integer"):
        sweep(SC, {"n": [10.5]}, reps=10, seed=1, n_jobs=1)
    with pytest.raises(ParameterError, match="equally many values"):
        Grid.together(sd=[1, 2], mean0=[1]).settings()
    with pytest.raises(ParameterError, match="appears twice"):
        Grid.cross(n=[1]) * Grid.cross(n=[2])
    with pytest.raises(ParameterError, match="`step` or `count`"):
        Range(1, 2)
    with pytest.raises(ParameterError, match="from:to:step"):
        parse_axis("n=1:2:3:4")


def test_sqlite_run_store_resumes_with_its_seed(tmp_path):
    path = tmp_path / "sweep.sqlite"
    a = sweep(SC, {"n": [10, 20]}, reps=400, seed=6, n_jobs=1, store=path)
    b = sweep(SC, {"n": [10, 20]}, reps=400, n_jobs=1, store=path)     # no seed given: the store's is used
    assert b.attrs["seed"] == 6 and list(a["power"]) == list(b["power"])
    with pytest.raises(sp.StoreError, match="seed 6"):
        sweep(SC, {"n": [10]}, reps=400, seed=7, n_jobs=1, store=path)


def test_a_sweep_point_reproduces_as_a_single_run():
    # Every scenario is seeded by its content key: the sweep's point n = 30 is the run of n = 30
    # (same seed, same chunk size), whichever command asked and wherever the point sits.
    base = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.5), sp.TTest())
    res = sp.sweep(base, {"n": [20, 30]}, reps=600, seed=9, n_jobs=1, chunk_size=200, return_results=True)
    table, results = res if isinstance(res, tuple) else (res, None)
    single = sp.run(base.with_params(n=30), reps=600, seed=9, n_jobs=1, chunk_size=200)
    row = table[table["n"] == 30].iloc[0]
    assert row["power"] == single.power


def test_descending_command_line_range_is_reported_as_empty():
    # an empty (descending) range is a wrong range, not a wrong format: say so and show the valid form
    with pytest.raises(ParameterError, match=r"range is empty .*clusters=4:10:2\.$"):
        parse_axis("clusters=10:4:2")
    with pytest.raises(ParameterError, match=r"range is empty .*n=4:10/3\.$"):
        parse_axis("n=10:4/3")
    with pytest.raises(ParameterError, match=r"`n=10:40:0`: range `step` must be > 0"):
        parse_axis("n=10:40:0")
    assert parse_axis("n=5:5:1")[1].values(True) == [5]      # from == to is one value, not empty
