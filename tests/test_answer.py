"""The answer first: the answer block, the justification paragraph, MCSE rounding, labels, notebooks.

External references: Cohen (1988), Statistical Power Analysis for the Behavioral Sciences, 2nd ed.,
Table 2.4.1 (64 per arm for d = 0.5, power 0.80, two-sided alpha 0.05); Bradley (1978) liberal
criterion [0.5 alpha, 1.5 alpha]; Morris, White & Crowther (2019), Stat Med 38:2074, Table 6 (MCSE of
a rejection rate sqrt(p(1-p)/R)).
"""

import html
import math
import re

import pytest

import simpower as sp
from simpower.answer import CAUTION, answer_block, justification, mcse_decimals, recruitment, round_to_mcse
from simpower.planning.search import required_n
from simpower.planning.sweep import null_check

SC = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), analyses=[sp.TTest()], name="Answer demo")


@pytest.fixture(scope="module")
def searched():
    res = required_n(SC, 0.8, low=10, high=200, seed=11, n_jobs=1, rel_tol=0.05)
    null = null_check(SC, reps=2000, seed=11, n_jobs=1)
    return res, null


# -- rounding to the Monte Carlo error ------------------------------------------------------
def test_round_to_mcse_keeps_the_digit_of_the_mcse():
    # common practice: an estimate is reported to the decimal place of the first significant digit of
    # its standard error, so the last digit shown is the first uncertain one
    assert round_to_mcse(0.85312, 0.0067) == "0.853"
    assert round_to_mcse(0.85312, 0.021) == "0.85"
    assert round_to_mcse(0.05049, 0.00218) == "0.050"
    for mcse in (0.3, 0.04, 0.006, 0.0008):
        d = mcse_decimals(mcse)
        # the last digit shown is at the MCSE's order of magnitude: half a unit of it is at most the
        # MCSE, a unit of the digit before it is more than the MCSE
        assert 0.5 * 10.0 ** -d <= mcse
        assert 10.0 ** -(d - 1) > mcse


def test_round_to_mcse_of_a_simulated_power_from_its_binomial_mcse():
    # Morris, White & Crowther (2019), Table 6: MCSE = sqrt(p (1 - p) / R); R = 1000, p = 0.8 -> 0.0126
    p, r = 0.8123, 1000
    mcse = math.sqrt(p * (1 - p) / r)
    assert round_to_mcse(p, mcse) == "0.81"
    assert round_to_mcse(p, math.sqrt(p * (1 - p) / 100_000)) == "0.812"


# -- the answer block --------------------------------------------------------------------------
def test_search_answer_block_in_recruited_units(searched):
    res, _ = searched
    block = answer_block(res)
    n = int(res.value)
    # Cohen (1988), Table 2.4.1: 64 per arm for d = 0.5, power 0.8; the closed form must say so
    assert res.analytic == 64
    assert block.numbers["arms"] == (n, n) and block.numbers["participants"] == 2 * n
    assert f"{n} participants in the control arm and {n} in the treatment arm ({2 * n} in total)" in block.answer
    text = block.text()
    assert "Closed form:" in text and "n = 64" in text
    # the assumptions are those at the answer, not the scenario's n = 30
    assert any(f"two arms of {n} (control)" in a for a in block.assumptions)
    assert not any("two arms of 30" in a for a in block.assumptions)


def test_cluster_trial_units_and_expected_completers():
    # hand arithmetic: 14 clusters per arm of mean size 25 -> 28 clusters, 700 participants; MCAR
    # loss 0.15 -> 700 * 0.85 = 595 expected completers
    proc = sp.ClusterTrial(clusters=14, cluster_size=25, cluster_size_cv=0.7, icc=0.05, effect=0.3,
                           missing=sp.MCAR(rate=0.15))
    r = recruitment(proc)
    assert r.clusters_per_arm == 14 and r.participants == 700 and r.completers == pytest.approx(595)
    sc = sp.Scenario(proc, analyses=[sp.ClusterMeansT()])
    res = sp.run(sc, reps=40, seed=1, n_jobs=1)
    rows = dict(answer_block(res).rows)
    assert rows["Clusters"] == "14 per arm, 28 in total"
    assert rows["Expected completers"].startswith("595 ")


# -- the justification paragraph: its numbers are the result's ----------------------------------
def _one(pattern, text):
    m = re.search(pattern, text)
    assert m is not None, f"{pattern!r} not in: {text}"
    return m.groups()


def test_justification_numbers_parse_back_to_the_result(searched):
    res, null = searched
    j = justification(res, null=null)
    text = j.paragraph
    n0, n1, total = map(int, _one(r"(\d+) participants in the control arm and (\d+) in the treatment arm "
                                  r"\((\d+) in total\)", text))
    assert (n0, n1, total) == (res.value, res.value, 2 * res.value)
    lo, hi = map(float, _one(r"95% Monte Carlo interval (\d+) to (\d+)", text))
    assert (lo, hi) == tuple(res.interval)
    (power,) = _one(r"For (\d+)% power", text)
    assert float(power) / 100 == res.target
    (alpha,) = _one(r"significance level of (\d*\.?\d+)", text)
    assert float(alpha) == SC.alpha
    reps, values = map(int, _one(r"(\d+) simulated trials at (\d+) candidate values", text))
    assert reps == res.reps_total and values == len(res.table)
    (closed,) = _one(r"closed-form calculation for the same analysis gives n = (\d+)", text)
    assert int(closed) == res.analytic == 64            # Cohen (1988), Table 2.4.1
    row = null.iloc[0]
    t1, mcse, nrep = _one(r"type I error was ([\d.]+) \(MCSE ([\d.]+); (\d+) replicates", text)
    assert float(t1) == pytest.approx(row["type1_error"], abs=0.5 * 10.0 ** -mcse_decimals(row["mcse"]))
    assert float(mcse) == pytest.approx(row["mcse"], rel=0.5) and int(nrep) == row["reps"]
    # Bradley (1978): the criterion at alpha 0.05 is [0.025, 0.075]
    assert "Bradley's liberal criterion of 0.025 to 0.075" in text
    assert f"seed {res.seed}" in text and sp.__version__ in text
    assert "Bradley JV (1978)" in " ".join(j.references) and "Fieller EC (1954)" in " ".join(j.references)
    assert j.caution == CAUTION and "ICH E9" in j.text()


def test_justification_same_text_in_api_markdown_and_html(searched, tmp_path):
    from simpower.report import make_report

    res, null = searched
    j = res.justification(null=null)
    paths = make_report(SC, tmp_path, seed=res.seed, search=res, null=null)
    md, page = paths["md"].read_text(), paths["html"].read_text()
    markdown_it = pytest.importorskip("markdown_it")
    rendered = markdown_it.MarkdownIt("commonmark").render(md)
    assert html.escape(j.paragraph, quote=False) in rendered
    assert html.escape(j.paragraph) in page          # the HTML renderer escapes quotes too
    # the first screen: the answer block and the paragraph come before everything else
    first = md.split("## Assumptions", 1)[0]
    assert "## Answer" in first and "## Sample-size justification" in first and CAUTION in first
    assert len(first.splitlines()) < 40


def test_run_justification_rounds_power_to_its_mcse():
    res = sp.run(SC.with_params(n=64), reps=800, seed=5, n_jobs=1)
    text = res.justification().paragraph
    s = res.summaries[res.primary]
    (p,) = _one(r"simulated power is ([\d.]+) \(MCSE", text)
    assert p == round_to_mcse(s["power"], s["mcse"]) and len(p.split(".")[1]) == mcse_decimals(s["mcse"])
    (closed,) = _one(r"closed-form power for the same analysis is (\d*\.?\d+)", text)
    # Cohen (1988), Table 2.4.1: power 0.80 at n = 64 per arm, d = 0.5
    assert float(closed) == pytest.approx(0.80, abs=0.01)


# -- notebooks and user text -----------------------------------------------------------------------
class _Tags(__import__("html.parser").parser.HTMLParser):
    def __init__(self, text):
        super().__init__()
        self.tags = set()
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)


def test_repr_html_shows_the_answer_and_escapes_labels(searched):
    res, _ = searched
    page = res._repr_html_()
    assert "Required sample size" in page and f"{int(res.value)} participants" in page and "<table>" in page
    label = "t<script>x</script>"
    sc = sp.Scenario(sp.NormalTwoArm(n=20, effect=0.5), analyses={label: sp.TTest()}, name="<b>n</b>")
    run = sp.run(sc, reps=50, seed=1, n_jobs=1)
    page = run._repr_html_()
    assert "script" not in _Tags(page).tags and html.escape(label) in page
    assert "Power" in page and "MCSE" in page and "ci_low" not in page


# -- the terminal ------------------------------------------------------------------------------------
def test_terminal_summary_names_the_direction_of_discordant_pairs():
    # discordant pairs as in McNemar (1947): replicates where exactly one of the two tests rejects
    sc = sp.Scenario(sp.NormalTwoArm(n=8, effect=0.8, sd_ratio=2.0, ratio=2.0),
                     analyses={"student": sp.TTest(), "welch": sp.WelchT()})
    res = sp.run(sc, reps=400, seed=3, n_jobs=1)
    a = res.records["student"].pvalue <= sc.alpha
    b = res.records["welch"].pvalue <= sc.alpha
    text = str(res)
    assert f"student rejects, welch does not: {int((a & ~b).sum())}" in text
    assert f"welch rejects, student does not: {int((b & ~a).sum())}" in text
    assert int((a ^ b).sum()) > 0                     # the check has something to count
    assert "chunk size" not in text and "path" not in text


def test_verbose_flag_shows_implementation_details(capsys):
    from pathlib import Path

    from simpower.cli.main import main

    scen = Path(__file__).parent.parent / "scenarios" / "two_arm_normal.toml"
    assert main(["run", str(scen), "--reps", "200", "--seed", "1", "--jobs", "1", "-q", "-v"]) == 0
    out = capsys.readouterr().out
    assert "chunk size: " in out and "execution path: batch" in out


@pytest.mark.parametrize("command", ["check", "export", "report", "resume", "run", "samplesize", "sweep"])
def test_help_is_plain_text(command, capsys):
    from simpower.cli.main import main

    with pytest.raises(SystemExit):
        main([command, "--help"])
    out = capsys.readouterr().out
    assert out.startswith("usage: simpower " + command)
    assert "`" not in out and "::" not in out and ":func:" not in out


def test_expected_events_of_an_event_time_design():
    # Lachin & Foulkes (1986), Biometrics 42:507, eq. (2.6) with no loss: uniform accrual over a and
    # follow-up f after accrual closes, exponential hazard lam -> P(event) = 1 - (e^{-lam f} -
    # e^{-lam (a + f)}) / (lam a)
    proc = sp.SurvivalTwoArm(n=100, hazard_ratio=0.6, median=12, follow_up=24, accrual=12)
    lam0 = math.log(2) / 12

    def p_event(lam, a=12.0, f=24.0):
        return 1 - (math.exp(-lam * f) - math.exp(-lam * (a + f))) / (lam * a)

    expected = 100 * p_event(lam0) + 100 * p_event(0.6 * lam0)
    r = recruitment(proc)
    assert r.events == pytest.approx(expected, rel=1e-6)
    assert r.participants == 200 and r.completers is None
    res = sp.run(sp.Scenario(proc, analyses=[sp.LogRank()]), reps=50, seed=1, n_jobs=1)
    assert dict(answer_block(res).rows)["Expected events"] == str(round(expected))
    assert f"about {round(expected)} events are expected" in res.justification().paragraph


def test_sweep_answer_is_the_smallest_grid_value_reaching_the_target():
    # noncentral t (scipy): two-sample t, d = 0.5, two-sided 0.05 -> power 0.34 at n = 20 and 0.80 at
    # n = 64 per arm (Cohen 1988, Table 2.4.1); with 600 replicates (MCSE <= 0.02) a target of 0.6
    # lies more than 4 MCSE from both, so the answer must be n = 64
    from scipy import stats

    from simpower.planning.sweep import sweep

    def power(n, d=0.5):
        df, nc = 2 * n - 2, d * math.sqrt(n / 2)
        c = stats.t.ppf(0.975, df)
        return stats.nct.sf(c, df, nc) + stats.nct.cdf(-c, df, nc)

    assert power(20) < 0.6 - 4 * 0.02 and power(64) > 0.6 + 4 * 0.02
    table = sweep(SC, {"n": [20, 64, 100]}, reps=600, seed=2, n_jobs=1)
    block = answer_block(table, scenario=SC, target=0.6)
    assert block.numbers["value"] == 64
    assert block.answer.startswith("n = 64 (64 participants in the control arm and 64 in the treatment arm")
    assert any("two arms of 64 (control)" in a for a in block.assumptions)
    # over a second assumption the least favourable value decides: at d = 0.9, n = 20 already has
    # power 0.79 (noncentral t), but at d = 0.5 it does not, so the answer stays n = 64
    assert power(20, 0.9) > 0.6 + 4 * 0.02
    table = sweep(SC, {"n": [20, 64, 100], "effect": [0.5, 0.9]}, reps=1000, seed=2, n_jobs=1)
    block = answer_block(table, scenario=SC, target=0.6, x="n")
    assert block.numbers["value"] == 64 and dict(block.rows)["Least favourable grid point"] == "n = 64, effect = 0.5"
    # without a target, the conventional 90%: n = 100 at d = 0.5 (power 0.94), n = 64 at d = 0.9 (0.99);
    # each power lies more than 4 MCSE from 0.9 (MCSE at 0.9 with 1000 replicates: sqrt(0.09 / 1000))
    mcse = math.sqrt(0.9 * 0.1 / 1000)
    for n, d in ((64, 0.5), (100, 0.5), (20, 0.9), (64, 0.9)):
        assert abs(power(n, d) - 0.9) > 4 * mcse
    rows = dict(answer_block(table, scenario=SC, x="n").rows)
    assert rows["Smallest n with 90% power at every effect in the grid"] == "100 (100 at effect = 0.5; 64 at effect = 0.9)"
