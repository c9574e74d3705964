"""The cluster_trial process: ICC, cluster sizes, randomisation, missingness, bad input.

External facts used (each check names its own):
- one-way ANOVA estimator of the ICC, (MSB - MSW) / (MSB + (m0 - 1) MSW) with
  m0 = (N - sum m_c^2 / N) / (C - 1) for unequal sizes (Donner & Klar 2000, ch. 2;
  Snijders & Bosker 2012, sec. 3.3);
- the large-sample variance of that estimator for equal clusters,
  2 (1 - rho)^2 (1 + (m - 1) rho)^2 / (m (m - 1) (C - 1)) (Fisher 1925, as quoted by
  Donner 1986, Int Stat Rev; from memory);
- the negative binomial pmf of scipy.stats.nbinom;
- variance components of a random-intercept / random-slope model (common practice).
Tolerances are 4 Monte Carlo standard errors (MCSE) computed from the simulation.
"""

import math

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower._validation import Real
from simpower.errors import ParameterError
from simpower.processes.base import Missingness
from simpower.processes.clusters import ClusterTrial, draw_sizes, size_law
from simpower.registry import build


def anova_icc(y, cluster):
    """One-way ANOVA ICC of one replicate (Donner & Klar 2000, ch. 2), unequal sizes allowed."""
    _, inv = np.unique(cluster, return_inverse=True)
    m = np.bincount(inv).astype(float)
    s = np.bincount(inv, weights=y)
    n, c = y.size, m.size
    means = s / m
    grand = y.mean()
    msb = np.sum(m * (means - grand) ** 2) / (c - 1)
    msw = np.sum((y - means[inv]) ** 2) / (n - c)
    m0 = (n - np.sum(m**2) / n) / (c - 1)
    return (msb - msw) / (msb + (m0 - 1) * msw)


def within_4_mcse(values, target):
    values = np.asarray(values, float)
    mcse = values.std(ddof=1) / math.sqrt(values.size)
    assert abs(values.mean() - target) < 4 * mcse, (values.mean(), target, mcse)


@pytest.mark.parametrize("icc", [0.02, 0.1, 0.3])
def test_realised_icc_equal_clusters(icc):
    proc = ClusterTrial(clusters=100, cluster_size=10, icc=icc, sd=2.0)
    batch = proc.draw_batch(np.random.default_rng(11), 400)
    est = np.array([anova_icc(**{k: v for k, v in batch.replicate(i).items() if k in ("y", "cluster")})
                    for i in range(batch.size)])
    within_4_mcse(est, icc)
    # Fisher's large-sample SD of the ANOVA estimator (from memory, see module doc); the SD of an
    # SD estimate from 400 replicates has relative MCSE about 1/sqrt(2 * 400) = 3.5%.
    m, c = 10, proc.n_clusters
    fisher_sd = math.sqrt(2 * (1 - icc) ** 2 * (1 + (m - 1) * icc) ** 2 / (m * (m - 1) * (c - 1)))
    assert abs(est.std(ddof=1) / fisher_sd - 1) < 4 / math.sqrt(2 * batch.size)
    # total variance of an outcome is sd^2: mean within-replicate variance (ddof 1 is unbiased up to ICC terms,
    # so use the known mean 0 instead)
    second = (batch["y"] ** 2).mean(axis=1)
    within_4_mcse(second, 4.0)


def test_realised_icc_variable_clusters():
    proc = ClusterTrial(clusters=100, cluster_size=12, cluster_size_cv=0.6, icc=0.08)
    batch = proc.draw_batch(np.random.default_rng(12), 300)
    est = [anova_icc(d["y"], d["cluster"]) for d in (batch.replicate(i) for i in range(batch.size))]
    within_4_mcse(est, 0.08)


@pytest.mark.parametrize("mean,cv,kind", [(10, 0.6, "negbin"), (10, 0.2, "binomial"), (10.5, 0.1, "binomial"),
                                          (25, 1.0, "negbin"), (4, math.sqrt(3) / 4, "poisson")])
def test_cluster_size_mean_and_cv(mean, cv, kind):
    # CV = SD / mean, the definition in Eldridge, Ashby & Kerry (2006)
    assert size_law(mean, cv)[0] == kind
    s = draw_sizes(np.random.default_rng(5), mean, cv, 200_000).astype(float)
    assert s.min() >= 1 and np.all(s == np.round(s))
    within_4_mcse(s, mean)
    within_4_mcse((s - mean) ** 2, (cv * mean) ** 2)


def test_cluster_sizes_in_the_long_table():
    proc = ClusterTrial(clusters=30, cluster_size=8, cluster_size_cv=0.7, icc=0.05)
    batch = proc.draw_batch(np.random.default_rng(6), 500)
    sizes = np.concatenate([np.bincount(batch.replicate(i)["cluster"], minlength=proc.n_clusters)
                            for i in range(batch.size)]).astype(float)
    assert sizes.min() >= 1
    within_4_mcse(sizes, 8)
    within_4_mcse((sizes - 8) ** 2, (0.7 * 8) ** 2)


def test_negative_binomial_sizes_match_scipy_pmf():
    # size - 1 ~ NB(r, p) with r = mu^2 / (v - mu), p = mu / v  (scipy.stats.nbinom parametrisation)
    mean, cv = 10, 0.6
    mu, v = mean - 1, (cv * mean) ** 2
    ref = stats.nbinom(mu**2 / (v - mu), mu / v)
    s = draw_sizes(np.random.default_rng(8), mean, cv, 100_000)
    for x in (1, 5, 10, 20):
        hit = (s <= x).astype(float)
        within_4_mcse(hit, ref.cdf(x - 1))


def test_long_table_layout_cluster_randomisation():
    proc = ClusterTrial(clusters=4, cluster_size=6, cluster_size_cv=0.5, icc=0.1, effect=1.0)
    batch = proc.draw_batch(np.random.default_rng(1), 20)
    for i in range(batch.size):
        d = batch.replicate(i)
        assert set(d) == {"y", "arm", "cluster", "subject"}
        assert len({v.size for v in d.values()}) == 1
        # ids unique across arms: clusters 0..3 control, 4..7 treatment; rows ordered by cluster
        assert np.array_equal(np.unique(d["cluster"]), np.arange(8))
        assert np.all(np.diff(d["cluster"]) >= 0)
        assert np.array_equal(d["arm"], (d["cluster"] >= 4).astype(d["arm"].dtype))
        assert np.unique(d["subject"]).size == d["y"].size
    assert proc.size_param == "clusters" and proc.true_effect() == 1.0
    assert proc.null().effect == 0.0


def test_individual_randomisation_and_random_slopes():
    # y = u_c + arm (effect + b_c) + e: Var(treated) = sd^2 + slope_sd^2, Cov(two treated in a cluster)
    # = sigma_b^2 + slope_sd^2, Cov(treated, control in a cluster) = sigma_b^2 (model definition, common practice)
    icc, slope_sd, effect = 0.2, 0.5, 0.3
    proc = ClusterTrial(clusters=100, cluster_size=4, icc=icc, effect=effect, randomise="individual",
                        slope_sd=slope_sd)
    batch = proc.draw_batch(np.random.default_rng(21), 200)
    y = batch["y"].reshape(-1, 4)
    arm = batch["arm"].reshape(-1, 4)
    assert np.all(arm.sum(axis=1) == 2)  # half of each cluster to each arm
    order = np.argsort(-arm, axis=1, kind="stable")
    ys = np.take_along_axis(y, order, axis=1)  # two treated, then two controls
    t1, t2, c1, c2 = ys.T
    within_4_mcse(t1 - c1, effect)
    within_4_mcse((t1 - effect) ** 2, 1.0 + slope_sd**2)
    within_4_mcse(c1**2, 1.0)
    within_4_mcse((t1 - effect) * (t2 - effect), icc + slope_sd**2)
    within_4_mcse((t1 - effect) * c1, icc)
    within_4_mcse(c1 * c2, icc)


def test_individual_randomisation_odd_and_variable_sizes():
    proc = ClusterTrial(clusters=20, cluster_size=5, cluster_size_cv=0.8, icc=0.1, randomise="individual")
    batch = proc.draw_batch(np.random.default_rng(3), 50)
    for i in range(batch.size):
        d = batch.replicate(i)
        m = np.bincount(d["cluster"])
        treated = np.bincount(d["cluster"], weights=d["arm"])
        assert np.all(np.abs(treated - m / 2) <= 0.5)


def test_same_rng_same_numbers():
    proc = ClusterTrial(clusters=5, cluster_size=7, cluster_size_cv=0.4, icc=0.1, effect=0.2)
    a = proc.draw_batch(np.random.default_rng(9), 30)
    b = proc.draw_batch(np.random.default_rng(9), 30)
    for key in a.per_rep:
        assert np.array_equal(a.per_rep[key], b.per_rep[key], equal_nan=True)
    c = proc.draw_batch(np.random.default_rng(10), 30)
    assert not np.array_equal(a["y"][:, :5], c["y"][:, :5])


class _TestMCAR(Missingness):
    """A minimal MCAR mechanism, local to these tests."""

    params = {"rate": Real(0.0, 1.0, high_open=True)}

    def mask(self, rng, y, covariates):
        assert set(covariates) >= {"arm", "cluster"}
        for v in covariates.values():
            assert np.shape(v) == np.shape(y)
        return rng.random(np.shape(y)) < self.rate


@pytest.mark.parametrize("cv", [0.0, 0.6])
def test_missingness_contract(cv):
    proc = ClusterTrial(clusters=10, cluster_size=10, cluster_size_cv=cv, icc=0.1, missing=_TestMCAR(rate=0.25))
    batch = proc.draw_batch(np.random.default_rng(4), 200)
    assert batch.info["missing"]
    rows = [batch.replicate(i) for i in range(batch.size)]
    missing = np.concatenate([np.isnan(d["y"]) for d in rows]).astype(float)
    observed = np.concatenate([d["observed"] for d in rows])
    assert np.array_equal(observed == 0, missing == 1)
    within_4_mcse(missing, 0.25)


def test_missing_from_a_toml_table():
    proc = build("process", {"type": "cluster_trial", "clusters": 6, "cluster_size": 5, "icc": 0.05,
                             "missing": {"type": "mcar", "rate": 0.2}})
    d = proc(np.random.default_rng(0))
    assert "observed" in d and proc.missing.kind == "missingness"
    assert "missing" in proc.describe()


@pytest.mark.parametrize("kwargs,field", [
    ({"icc": 1.0}, "icc"), ({"icc": -0.1}, "icc"), ({"cluster_size": 0.5}, "cluster_size"),
    ({"cluster_size": 10.5}, "cluster_size"), ({"clusters": 1}, "clusters"),
    ({"cluster_size": 1, "cluster_size_cv": 0.3}, "cluster_size_cv"),
    ({"cluster_size": 1.5, "cluster_size_cv": 0.2}, "cluster_size_cv"),
    ({"cluster_size_cv": -0.1}, "cluster_size_cv"), ({"slope_sd": 0.3}, "slope_sd"),
    ({"randomise": "clusters"}, "randomise"), ({"sd": 0}, "sd"), ({"cluster_szie": 5}, "cluster_szie"),
])
def test_bad_input_one_line_error_naming_the_field(kwargs, field):
    base = {"clusters": 5, "cluster_size": 10, "icc": 0.05}
    with pytest.raises(ParameterError) as err:
        ClusterTrial(**{**base, **kwargs})
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith(f"`{field}`"), msg


def test_describe_names_the_assumptions():
    text = ClusterTrial(clusters=5, cluster_size=20, cluster_size_cv=0.5, icc=0.05, effect=0.3).describe()
    for word in ("5 clusters", "ICC 0.05", "CV 0.5", "0.3"):
        assert word in text


def test_runs_through_the_engine_with_batches():
    sc = sp.Scenario(ClusterTrial(clusters=6, cluster_size=5, cluster_size_cv=0.5, icc=0.1, effect=0.5),
                     analyses=[sp.TTest()])
    res = sp.run(sc, reps=50, seed=3, n_jobs=1)
    assert res.records["t_test"].status.max() == 0
    assert res.paths["t_test"] == "per-replicate"  # padded layout: the t-test slices replicates
