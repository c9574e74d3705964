"""Pilot data resampled whole units at a time (pilot_units): clusters and participants with their visits.

External references:

* Davison & Hinkley (1997), Bootstrap Methods and their Application, section 3.8 (from memory):
  resampling whole clusters (the first stage of the hierarchical bootstrap) reproduces the
  between-cluster spread of the cluster means, shrunk by (m - 1)/m for m clusters, as the plug-in
  distribution of m values does (Efron & Tibshirani 1993, section 2.3); within-cluster deviations
  travel with their cluster unchanged.
* The one-way ANOVA estimator of the ICC (Donner & Klar 2000, section 2.5):
  ICC = (F - 1) / (F + m0 - 1) with F = MSB / MSW; F checked against scipy.stats.f_oneway.
* For visits, the plug-in covariance of m participant vectors is (m - 1)/m times the unbiased
  sample covariance (numpy.cov), so sqrt(m/(m-1)) restores it (common practice).
* The shrunk smoothed bootstrap keeps the second moments (Silverman 1986, section 6.4.1).
* The odds ratio: p1 = OR p / (1 - p + OR p) (definition of the odds; common practice).
* Teare et al. (2014, Trials 15:264): at least 35 per arm to estimate an SD.

Statistical checks use fixed seeds and tolerances of 4 Monte Carlo standard errors.
"""

from __future__ import annotations

import math
import textwrap
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import simpower as sp
from simpower.processes.pilot_units import PilotUnits, anova_icc
from simpower.registry import build
from simpower.testing import check_analysis, check_process


def cluster_pilot(seed=1, clusters=10, sizes=(3, 8), icc=0.3, arms=True, binary=False):
    """Invented pilot rows: clinics with random intercepts (equal sizes when sizes[0] == sizes[1])."""
    rng = np.random.default_rng(seed)
    rows = []
    for c in range(clusters):
        m = int(rng.integers(sizes[0], sizes[1] + 1))
        u = rng.normal(0, math.sqrt(icc))
        for _ in range(m):
            e = rng.normal(0, math.sqrt(1 - icc))
            y = float(rng.random() < 1 / (1 + math.exp(-(-0.8 + u)))) if binary else 20 + 3 * (u + e)
            rows.append({"clinic": f"clinic {c:02d}", "y": y, "arm": c % 2})
    frame = pd.DataFrame(rows)
    return frame if arms else frame.drop(columns="arm")


def visit_pilot(seed=2, people=16, visits=(0, 4, 8), rho=0.6, drop=None, arms=True):
    """Invented pilot rows: participants with exchangeable correlated visits; ``drop`` = (person, visit) rows removed."""
    rng = np.random.default_rng(seed)
    k = len(visits)
    cov = np.full((k, k), rho) + (1 - rho) * np.eye(k)
    rows = []
    for s in range(people):
        z = rng.multivariate_normal(np.zeros(k), cov)
        base = round(float(rng.normal(50, 5)), 1)
        for j, v in enumerate(visits):
            if drop and (s, v) in drop:
                continue
            rows.append({"id": 100 + s, "week": v, "y": 30 + 6 * z[j] - v, "arm": s % 2, "b": base})
    frame = pd.DataFrame(rows)
    return frame if arms else frame.drop(columns="arm")


def _cluster_means(batch, c):
    """(R, c) means of the first c clusters (the control arm) of a batch, from its rows."""
    lay = batch.layout("clustered")
    codes, g = lay.codes
    r, n = lay.y.shape
    present = np.ones((r, n), bool) if lay.present is None else lay.present
    idx = np.broadcast_to(codes, (r, n)) + g * np.arange(r)[:, None]
    s = np.bincount(idx[present], weights=lay.y[present], minlength=r * g).reshape(r, g)
    m = np.bincount(idx[present], minlength=r * g).reshape(r, g)
    return (s / m)[:, :c], m[:, :c]


# -- clusters: the cluster bootstrap ------------------------------------------------------------------
@pytest.mark.parametrize("spread, sizes", [("none", (3, 8)), ("inflate", (3, 8)), ("smooth", (3, 8)),
                                           ("inflate", (5, 5))])
def test_resampled_clusters_reproduce_the_pilots_between_cluster_variance(spread, sizes):
    pilot = cluster_pilot(sizes=sizes, arms=False)
    means = pilot.groupby("clinic")["y"].mean().to_numpy()
    m = means.size
    s2b = float(np.var(means, ddof=1))
    proc = PilotUnits.from_frame(pilot, unit="clinic", clusters=12, spread=spread)
    batch = proc.draw_batch(np.random.default_rng(4), 4000)
    cm, _ = _cluster_means(batch, 12)
    v = cm.var(axis=1, ddof=1)
    mcse = v.std(ddof=1) / math.sqrt(v.size)
    want = (m - 1) / m * s2b if spread == "none" else s2b   # Davison & Hinkley 1997, s. 3.8; plug-in shrinkage
    assert abs(v.mean() - want) < 4 * mcse
    if spread == "none":
        assert abs(v.mean() - s2b) > 4 * mcse   # the shrinkage the corrections remove is there
    # every resampled cluster is a whole pilot cluster: its rows' deviations from its mean are a pilot cluster's
    if spread == "none":
        rep = batch.replicate(0)
        pilot_sets = {tuple(np.round(np.sort(g.to_numpy()), 9)) for _, g in pilot.groupby("clinic")["y"]}
        for c in np.unique(rep["cluster"]):
            assert tuple(np.round(np.sort(rep["y"][rep["cluster"] == c]), 9)) in pilot_sets


def test_anova_icc_agrees_with_scipys_one_way_anova():
    pilot = cluster_pilot(sizes=(3, 9), arms=False)
    y, unit = pilot["y"].to_numpy(), pilot["clinic"].to_numpy()
    icc, msb, msw = anova_icc(y, unit)
    groups = [g.to_numpy() for _, g in pilot.groupby("clinic")["y"]]
    f = stats.f_oneway(*groups).statistic    # scipy: F = MSB / MSW
    n, k = y.size, len(groups)
    m0 = (n - sum(g.size**2 for g in groups) / n) / (k - 1)
    assert math.isclose(msb / msw, f, rel_tol=1e-10)
    assert math.isclose(icc, (f - 1) / (f + m0 - 1), rel_tol=1e-10)   # Donner & Klar 2000, s. 2.5


def test_the_icc_of_resampled_trials_matches_the_pilots_anova_icc():
    # equal sizes, inflated: E(MSB*) = MSB and E(MSW*) = MSW exactly, so the ICC of the mean squares is the
    # pilot's; MC error from 20 batches of replicates (batch means)
    pilot = cluster_pilot(sizes=(6, 6), arms=False, clusters=12)
    icc0, msb0, msw0 = anova_icc(pilot["y"].to_numpy(), pilot["clinic"].to_numpy())
    proc = PilotUnits.from_frame(pilot, unit="clinic", clusters=8, spread="inflate")
    b = proc.draw_batch(np.random.default_rng(9), 4000)
    y = b.per_rep["y"]
    cl = np.asarray(b["cluster"])
    k, m = 16, 6
    means = y.reshape(-1, k, m).mean(axis=2)
    assert np.all(cl.reshape(k, m) == np.arange(k)[:, None])
    msb = m * means.var(axis=1, ddof=1)
    msw = ((y.reshape(-1, k, m) - means[:, :, None]) ** 2).sum(axis=(1, 2)) / (k * (m - 1))
    for got, want in ((msb, msb0), (msw, msw0)):
        assert abs(got.mean() - want) < 4 * got.std(ddof=1) / math.sqrt(got.size)
    groups = np.array_split(np.arange(msb.size), 20)
    iccs = np.array([(msb[g].mean() - msw[g].mean()) / (msb[g].mean() + (m - 1) * msw[g].mean()) for g in groups])
    icc = (msb.mean() - msw.mean()) / (msb.mean() + (m - 1) * msw.mean())
    assert abs(icc - icc0) < 4 * iccs.std(ddof=1) / math.sqrt(iccs.size)
    assert abs(proc.pilot_summary()["icc"] - icc0) < 1e-12


def test_cluster_layout_ids_sizes_and_arms():
    pilot = cluster_pilot(sizes=(2, 7))
    proc = PilotUnits.from_frame(pilot, unit="clinic", arm="arm", clusters=5, ratio=1.4)
    assert proc.size_param == "clusters" and proc.n_treated == 7
    b = proc.draw_batch(np.random.default_rng(3), 50)
    assert "present" in b.per_rep                   # unequal sizes: padded to the longest replicate
    pilot_sizes = set(pilot.groupby("clinic").size())
    for i in range(0, 50, 7):
        rep = b.replicate(i)
        ids = np.unique(rep["cluster"])
        assert list(ids) == list(range(12))          # renumbered, unique in the replicate
        for c in ids:
            rows = rep["cluster"] == c
            assert int(rows.sum()) in pilot_sizes
            assert set(rep["arm"][rows]) == {int(c >= 5)}   # control clusters first, one arm each


def test_the_pilot_difference_is_not_carried_in_unless_asked():
    pilot = cluster_pilot(sizes=(4, 4), clusters=12)
    pilot.loc[pilot["arm"] == 1, "y"] += 5.0       # a large pilot difference
    pooled = PilotUnits.from_frame(pilot, unit="clinic", arm="arm", clusters=6, effect=1.5)
    assert math.isclose(pooled.true_effect(), 1.5)
    separate = PilotUnits.from_frame(pilot, unit="clinic", arm="arm", clusters=6, effect=1.5, arms="separate")
    diff = pilot[pilot.arm == 1].y.mean() - pilot[pilot.arm == 0].y.mean()
    assert math.isclose(separate.true_effect(), diff + 1.5)
    for proc, want in ((pooled, 1.5), (separate, diff + 1.5)):
        res = sp.run(sp.Scenario(proc, sp.ClusterMeansT()), reps=2000, seed=3, n_jobs=1, progress=False)
        est = res.records["cluster_means_t"].estimate
        assert abs(est.mean() - want) < 4 * est.std(ddof=1) / math.sqrt(est.size)


def test_an_odds_ratio_keeps_clustered_binary_outcomes_binary():
    pilot = cluster_pilot(binary=True, sizes=(5, 10), clusters=14, arms=False)
    p = float(pilot["y"].mean())
    proc = PilotUnits.from_frame(pilot, unit="clinic", clusters=10, effect=2.5, effect_type="odds_ratio")
    b = proc.draw_batch(np.random.default_rng(5), 3000)
    lay = b.layout("clustered")
    y, present, arm = lay.y, lay.present, np.broadcast_to(lay.arm, lay.y.shape)
    assert set(np.unique(y[present])) <= {0.0, 1.0}
    p1 = 2.5 * p / (1 - p + 2.5 * p)
    # E(ones) / E(rows) over the replicates: the resampled population's share (ratio of totals)
    for a, want in ((0, p), (1, p1)):
        ones = np.where(present & (arm == a), y, 0).sum(axis=1)
        rows = (present & (arm == a)).sum(axis=1)
        ratio = ones.sum() / rows.sum()
        resid = ones - ratio * rows
        mcse = resid.std(ddof=1) / math.sqrt(resid.size) / rows.mean()   # delta method for a ratio of means
        assert abs(ratio - want) < 4 * mcse
    assert math.isclose(proc.true_effect(), p1 - p)


# -- repeated measures ---------------------------------------------------------------------------------
@pytest.mark.parametrize("spread", ["none", "inflate", "smooth"])
def test_resampled_participants_keep_the_visit_covariance(spread):
    pilot = visit_pilot(people=14, arms=False)
    wide = pilot.pivot(index="id", columns="week", values="y").to_numpy()
    m = wide.shape[0]
    S = np.cov(wide, rowvar=False)                 # numpy: the unbiased covariance of the visits
    proc = PilotUnits.from_frame(pilot, unit="id", visit="week", n=20, spread=spread)
    b = proc.draw_batch(np.random.default_rng(6), 3000)
    y = b.per_rep["y"].reshape(3000, 40, 3)[:, :20, :]   # the control arm's participants
    dev = y - y.mean(axis=1, keepdims=True)
    covs = np.einsum("rij,rik->rjk", dev, dev) / 19
    want = (m - 1) / m * S if spread == "none" else S
    mcse = covs.std(axis=0, ddof=1) / math.sqrt(covs.shape[0])
    assert np.all(np.abs(covs.mean(axis=0) - want) < 4 * mcse)
    if spread != "none":   # hence the within-participant correlation of the pilot
        c = covs.mean(axis=0)
        r = c / np.sqrt(np.outer(np.diag(c), np.diag(c)))
        r0 = S / np.sqrt(np.outer(np.diag(S), np.diag(S)))
        assert np.max(np.abs(r - r0)) < 0.02


def test_missing_pilot_visits_stay_missing():
    drop = {(0, 8), (3, 8), (5, 4), (9, 8)}
    pilot = visit_pilot(people=16, drop=drop)
    proc = PilotUnits.from_frame(pilot, unit="id", visit="week", arm="arm", n=30, effect=-2.0, effect_from=4,
                                 spread="inflate")
    b = proc.draw_batch(np.random.default_rng(8), 2000)
    assert b.info["missing"] and "observed" in b.per_rep
    y = b.per_rep["y"].reshape(2000, 60, 3)
    np.testing.assert_array_equal(b.per_rep["observed"].reshape(2000, 60, 3) == 0, np.isnan(y))
    assert not np.isnan(y[:, :, 0]).any()           # every pilot participant was seen at week 0
    for j, week in ((1, 4), (2, 8)):
        share = np.isnan(y[:, :, j]).mean(axis=1)
        want = sum(1 for (_, v) in drop if v == week) / 16
        assert abs(share.mean() - want) < 4 * share.std(ddof=1) / math.sqrt(share.size)
    # the baseline column: one value per participant, repeated on its rows, from the pilot's values
    proc_b = PilotUnits.from_frame(pilot, unit="id", visit="week", baseline="b", n=5)
    rep = proc_b(np.random.default_rng(1))
    assert set(rep) >= {"y", "arm", "subject", "visit", "baseline", "observed"}
    for s in np.unique(rep["subject"]):
        assert np.unique(rep["baseline"][rep["subject"] == s]).size == 1
    assert set(np.unique(rep["baseline"])) <= set(pilot["b"])


def test_the_effect_from_a_visit_on_is_the_final_visit_difference():
    pilot = visit_pilot(people=20)
    pilot.loc[pilot["arm"] == 1, "y"] += 4.0        # the pilot's own difference, not carried in
    proc = PilotUnits.from_frame(pilot, unit="id", visit="week", arm="arm", n=25, effect=-3.0, effect_from=4)
    assert math.isclose(proc.true_effect(), -3.0)
    b = proc.draw_batch(np.random.default_rng(2), 3000)
    y = b.per_rep["y"].reshape(3000, 50, 3)
    d = y[:, 25:, :].mean(axis=1) - y[:, :25, :].mean(axis=1)
    for j, want in enumerate((0.0, -3.0, -3.0)):
        assert abs(d[:, j].mean() - want) < 4 * d[:, j].std(ddof=1) / math.sqrt(d.shape[0])


# -- batch paths: the analyses keep them and they agree with the per-replicate paths -------------------
CLUSTER_PROC = {"clusters": 5, "effect": 1.0, "spread": "inflate"}
ANALYSES = [
    ("clusters", {"type": "cluster_means_t"}, {}),
    ("clusters", {"type": "cluster_means_t", "weights": "size"}, {}),
    ("clusters", {"type": "gee"}, {}),
    # statsmodels' default optimiser stops within about 1e-4 of the REML optimum (as in test_conformance)
    ("clusters", {"type": "mixed_model"}, {"atol": 1e-4, "rtol": 0.0}),
    ("binary", {"type": "glmm"}, {"rtol": 1e-6, "atol": 1e-9}),
    # two REML optimisers (Fisher scoring, scipy BFGS): they agree to about 1e-7 in absolute terms, which is
    # more than 1e-6 relative for an estimate near 0 (here with intermittent missing visits)
    ("visits", {"type": "mmrm"}, {"rtol": 1e-6, "atol": 1e-6}),
    ("visits", {"type": "mmrm", "baseline": True}, {"rtol": 1e-6, "atol": 1e-6}),
    ("visits", {"type": "final_visit_t"}, {}),
    ("visits", {"type": "gee"}, {}),
    ("visits", {"type": "mixed_model", "formula": "y ~ C(arm) * C(visit, Treatment(2))", "groups": "subject"},
     {"atol": 1e-4, "rtol": 0.0}),
]


def _process(kind):
    if kind == "clusters":
        return PilotUnits.from_frame(cluster_pilot(sizes=(3, 7)), unit="clinic", arm="arm", **CLUSTER_PROC)
    if kind == "binary":
        return PilotUnits.from_frame(cluster_pilot(binary=True, sizes=(6, 10)), unit="clinic", clusters=6,
                                     effect=2.0, effect_type="odds_ratio")
    pilot = visit_pilot(people=12, drop={(1, 8), (4, 4)})
    return PilotUnits.from_frame(pilot, unit="id", visit="week", arm="arm", baseline="b", n=8, effect=-2.0,
                                 effect_from=4)


@pytest.mark.parametrize("kind, spec, tol", ANALYSES, ids=[f"{a['type']}-{k}" for k, a, _ in ANALYSES])
def test_batch_path_equals_the_per_replicate_path(kind, spec, tol):
    proc = _process(kind)
    analysis = build("analysis", spec)
    assert analysis.supports_batch(proc.draw_batch(np.random.default_rng(0), 10))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = check_analysis(analysis, proc, **tol)
    assert out["batch_compared"] >= 3


@pytest.mark.parametrize("kind", ["clusters", "binary", "visits"])
def test_the_process_passes_the_conformance_kit(kind):
    check_process(_process(kind))


@pytest.mark.parametrize("kind", ["clusters", "visits"])
def test_a_worker_copy_draws_the_same_numbers(kind):
    # workers get the process pickled (parameters only); the pools are rebuilt from the pilot on first use
    import cloudpickle

    proc = _process(kind)
    copy = cloudpickle.loads(cloudpickle.dumps(proc))
    assert "_pilot_state" not in copy.__dict__
    a, b = proc.draw_batch(np.random.default_rng(4), 5), copy.draw_batch(np.random.default_rng(4), 5)
    np.testing.assert_array_equal(a.per_rep["y"], b.per_rep["y"])
    assert copy.true_effect() == proc.true_effect() and copy.describe() == proc.describe()


def test_runs_take_the_batch_paths_and_the_search_varies_the_clusters():
    proc = _process("clusters")
    res = sp.run(sp.Scenario(proc, analyses=[sp.ClusterMeansT(), build("analysis", {"type": "gee"})]), reps=400, seed=1,
                 n_jobs=1, progress=False)
    assert set(res.paths.values()) == {"batch"}
    assert proc.replace(clusters=9).draw_batch(np.random.default_rng(1), 2).layout("clustered").n_clusters == 18
    visits = _process("visits")
    res = sp.run(sp.Scenario(visits, analyses=[build("analysis", {"type": "mmrm"}), build("analysis", {"type": "final_visit_t"})]),
                 reps=200, seed=1, n_jobs=1, progress=False)
    assert set(res.paths.values()) == {"batch"} and visits.size_param == "n"


# -- cautions ------------------------------------------------------------------------------------------
def test_a_small_pilot_is_flagged_in_its_units():
    small = _process("clusters")
    s = small.pilot_summary()
    assert s["small"] and s["units_per_arm"] == [5, 5]
    assert "CAUTION" in small.describe() and "clusters per arm" in small.describe() and "Teare" in small.describe()
    visits = _process("visits")
    assert "participants per arm" in visits.describe() and "Teare et al. 2014" in visits.describe()
    big = PilotUnits.from_frame(cluster_pilot(clusters=80, sizes=(2, 3)), unit="clinic", arm="arm", clusters=5)
    assert not big.pilot_summary()["small"] and "CAUTION" not in big.describe()


# -- scenario files and one-line errors ----------------------------------------------------------------
def test_a_pilot_file_relative_to_the_scenario(tmp_path):
    cluster_pilot().rename(columns={"y": "score", "arm": "group"}).to_csv(tmp_path / "pilot.csv", index=False)
    (tmp_path / "s.toml").write_text(textwrap.dedent("""
        [process]
        type = "pilot_units"
        data = "pilot.csv"
        outcome = "score"
        unit = "clinic"
        arm = "group"
        clusters = 6
        effect = 1.0
        [analysis]
        type = "cluster_means_t"
    """))
    plan = sp.load_plan(tmp_path / "s.toml")
    proc = plan.scenario.process
    assert proc.size_param == "clusters" and len(proc.table["y"]) == len(cluster_pilot())
    before = plan.scenario.point_key()
    frame = cluster_pilot().rename(columns={"y": "score", "arm": "group"})
    frame.loc[0, "score"] += 1
    frame.to_csv(tmp_path / "pilot.csv", index=False)
    assert sp.load_plan(tmp_path / "s.toml").scenario.point_key() != before   # seeds follow the data


def test_the_bundled_demo_runs():
    from pathlib import Path

    plan = sp.load_plan(Path(__file__).resolve().parents[1] / "scenarios" / "pilot_care_homes_mobility.toml")
    proc = plan.scenario.process
    assert proc.name == "pilot_units" and proc.size_param == "clusters"
    res = sp.run(plan.scenario, reps=100, seed=1, n_jobs=1, progress=False)
    assert all(p == "batch" for p in res.paths.values())


MIXED = pd.DataFrame({"y": [1.0, 2, 3, 4, 5, 6], "clinic": ["a", "a", "b", "b", "c", "c"], "arm": [0, 1, 0, 0, 1, 1]})


@pytest.mark.parametrize("frame, kw, match", [
    (cluster_pilot(), {"unit": "site"}, "`unit` column 'site' is not in"),
    (cluster_pilot(), {"unit": "clinic", "visit": "week"}, "`visit` column 'week' is not in"),
    (cluster_pilot().assign(row=range(len(cluster_pilot()))), {"unit": "row"}, "has one row"),
    (MIXED, {"unit": "clinic", "arm": "arm"}, "unit 'a' of the `unit` column has rows in both arms"),
    (cluster_pilot(), {"unit": "clinic", "n": 10}, "`n` does not apply here: give `clusters`"),
    (visit_pilot(), {"unit": "id", "visit": "week", "clusters": 4}, "`clusters` does not apply here: give `n`"),
    (pd.concat([visit_pilot(), visit_pilot().iloc[:1]]), {"unit": "id", "visit": "week", "n": 4}, "two rows at visit"),
    (visit_pilot().assign(b=np.arange(48.0)), {"unit": "id", "visit": "week", "baseline": "b", "n": 4},
     "one baseline value per participant"),
    (visit_pilot(), {"unit": "id", "visit": "week", "n": 4, "effect_from": 3}, "`effect_from` = 3 is not a visit"),
    (cluster_pilot(), {"unit": "clinic", "clusters": 4, "effect": 1.2, "effect_type": "odds_ratio"}, "0/1"),
])
def test_bad_pilots_are_one_line_errors(frame, kw, match):
    kw = dict(kw)
    kw.setdefault("clusters", None) if "n" in kw else kw.setdefault("clusters", 4)
    with pytest.raises(sp.ParameterError, match=match) as err:
        PilotUnits.from_frame(frame, **kw)
    assert "\n" not in str(err.value)


def test_pilot_resample_with_a_unit_points_to_pilot_units():
    with pytest.raises(sp.ParameterError, match="use type = \"pilot_units\""):
        build("process", {"type": "pilot_resample", "n": 10, "values": [1.0, 2.0, 3.0], "unit": "clinic"})


def test_bad_files_are_one_line_errors_on_the_command_line(tmp_path, capsys):
    from simpower.cli.main import main

    MIXED.to_csv(tmp_path / "pilot.csv", index=False)
    (tmp_path / "s.toml").write_text('[process]\ntype = "pilot_units"\ndata = "pilot.csv"\nunit = "clinic"\n'
                                     'clusters = 4\n[analysis]\ntype = "cluster_means_t"\n')
    rc = main(["run", str(tmp_path / "s.toml"), "--reps", "10", "--jobs", "1", "-q"])
    err = capsys.readouterr().err.strip()
    assert rc != 0 and "Traceback" not in err and len(err.splitlines()) == 1 and "both arms" in err
