"""The planning report: Markdown, self-contained HTML, figures (PNG and SVG), manifest."""

import json
import re

import pytest

pytest.importorskip("matplotlib", reason="the report's figures need matplotlib (a dependency of simpower)")

import simpower as sp  # noqa: E402
from simpower.report import make_report, reproduce_command  # noqa: E402
from simpower.report import plots  # noqa: E402
from simpower.planning.search import required_n  # noqa: E402
from simpower.planning.sweep import null_check, sweep  # noqa: E402
from simpower.textout import CAUTION  # noqa: E402

SC = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.6), analyses=[sp.TTest(), sp.WelchT()], name="Demo trial")


@pytest.fixture(scope="module")
def pieces():
    table = sweep(SC, {"n": [10, 30, 50], "effect": [0.4, 0.6]}, reps=300, seed=1, n_jobs=1)
    search = required_n(SC, 0.8, low=10, high=200, seed=1, n_jobs=1, rel_tol=0.05)
    null = null_check(SC, reps=1000, seed=1, n_jobs=1)
    return table, search, null


def test_report_has_every_section(tmp_path, pieces):
    table, search, null = pieces
    paths = make_report(SC, tmp_path, seed=1, command="simpower report demo.toml --seed 1", sweep=table,
                        search=search, null=null)
    md = paths["md"].read_text()
    for heading in ("Assumptions", "Required sample size", "Sweep over the assumptions", "Type I error under the null",
                    "Failures", "Monte Carlo error", "Path that ran", "Cautions", "Reproducibility manifest"):
        assert f"## {heading}" in md
    assert CAUTION in md and "ICH E9" in md
    assert "`t_test`: batch path" in md
    assert "Bradley" in md and "every analysis meets" in md
    assert "simpower report demo.toml --seed 1" in md
    # the assumptions in words, stated at the answer of the search (not at the scenario's n = 30)
    assumptions = md.split("## Assumptions", 1)[1].split("\n## ", 1)[0]
    assert f"two arms of {search.value} (control)" in assumptions and "two arms of 30 (control)" not in assumptions
    for stem in ("search", "sweep_power", "sweep_heatmap"):
        assert (tmp_path / f"{stem}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert (tmp_path / f"{stem}.svg").read_text().lstrip().startswith("<?xml")
        assert f"({stem}.png)" in md


def test_html_is_self_contained(tmp_path, pieces):
    table, search, null = pieces
    paths = make_report(SC, tmp_path, seed=1, sweep=table, search=search, null=null)
    html = paths["html"].read_text()
    srcs = re.findall(r'src="([^"]+)"', html)
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    assert "<link" not in html and "http://" not in html and "https://" not in html
    assert CAUTION.split(".")[0] in html


def test_manifest_contents(tmp_path, pieces):
    table, search, null = pieces
    paths = make_report(SC, tmp_path, seed=123, command="simpower sweep x.toml --seed 123", sweep=table)
    man = json.loads(paths["manifest"].read_text())
    assert man["seed"] == "123" and man["command"] == "simpower sweep x.toml --seed 123"
    assert man["scenario_fingerprint"] == SC.fingerprint()
    for k in ("simpower", "python", "numpy", "scipy", "pandas", "matplotlib"):
        assert man["versions"][k]
    assert man["platform"]["system"] and re.match(r"\d{4}-\d\d-\d\dT", man["date"])


def test_figures_are_byte_identical_for_the_same_numbers(tmp_path, pieces):
    table, search, _ = pieces
    a = plots.save(plots.power_curve(table, "n", target=0.8), tmp_path / "a")
    b = plots.save(plots.power_curve(table, "n", target=0.8), tmp_path / "b")
    assert a[0].read_bytes() == b[0].read_bytes() and a[1].read_bytes() == b[1].read_bytes()


def test_reproduce_command_pins_the_seed():
    assert reproduce_command(["report", "f.toml", "--out", "d"], 42) == "simpower report f.toml --out d --seed 42"
    assert reproduce_command(["sweep", "f.toml", "--seed", "7", "-q"], 7) == "simpower sweep f.toml -q --seed 7"
    assert reproduce_command(["sweep", "a b.toml", "--seed=3"], 3) == "simpower sweep 'a b.toml' --seed 3"


def test_sequential_run_is_reported(tmp_path):
    from simpower.planning.sequential import run_to_mcse

    res = run_to_mcse(SC, 0.02, seed=2, n_jobs=1)
    md = make_report(SC, tmp_path, seed=2, run=res)["md"].read_text()
    assert "Sequential stopping" in md and f"it took {res.reps} replicates" in md


def test_manifest_and_results_pin_the_source_code(tmp_path):
    # The version string does not pin the code between releases: the manifest, the JSON result
    # and the run store record a digest of simpower's own source files.
    import json as _json

    import simpower as sp
    from simpower._provenance import source_digest

    digest = source_digest()
    assert len(digest) == 16 and int(digest, 16) >= 0
    res = sp.run(sp.Scenario(sp.NormalTwoArm(n=10, effect=0.5), sp.TTest()), reps=100, seed=1, n_jobs=1,
                 store=tmp_path / "s.sqlite")
    assert _json.loads(res.to_json())["simpower_source_sha256"] == digest
    with sp.open_store(tmp_path / "s.sqlite") as st:
        assert st.meta()["simpower_source_sha256"] == digest
    from simpower.report.manifest import build_manifest

    assert build_manifest(seed=1, scenario=res.scenario, command="x")["simpower_source_sha256"] == digest


def test_report_checks_the_plot_axis_before_running(tmp_path, capsys):
    # an x axis that is not swept is refused before any simulation, naming `[sweep] x`
    from simpower.cli.main import main

    f = tmp_path / "s.toml"
    f.write_text('reps = 200\nseed = 1\n[process]\ntype = "normal_two_arm"\nn = 10\neffect = 0.5\n'
                 '[analysis]\ntype = "t_test"\n[sweep]\nx = "effect"\n[sweep.vary]\nn = [10, 20]\n')
    rc = main(["report", str(f), "--out", str(tmp_path / "out"), "-q"])
    captured = capsys.readouterr()
    assert rc == 2 and "`[sweep] x` 'effect' is not a swept parameter" in captured.err
    assert "sweep:" not in captured.out and not (tmp_path / "out" / "report.md").exists()


# -- user text is text -------------------------------------------------------------------------
NASTY_NAME = "Trial <b>bold</b> *star* _under_ [link](http://example.org) & `tick` \\ | ~~x~~"
NASTY_DESC = "# not a heading <script>alert(1)</script>\n- not a list\n1. not numbered"
NASTY_LABEL = "t<i>1</i>*`"


class _Elements(__import__("html.parser").parser.HTMLParser):
    """(tag, text) of every element of an HTML text, and the set of tags (stdlib parser)."""

    def __init__(self, text):
        super().__init__()
        self.stack, self.found, self.tags = [], [], set()
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)
        self.stack.append([tag, ""])

    def handle_endtag(self, tag):
        while self.stack:
            t, text = self.stack.pop()
            self.found.append((t, text))
            if self.stack:
                self.stack[-1][1] += text
            if t == tag:
                break

    def handle_data(self, data):
        if self.stack:
            self.stack[-1][1] += data

    def texts(self, tag):
        return [t for g, t in self.found if g == tag]


@pytest.fixture(scope="module")
def nasty_report(tmp_path_factory):
    sc = sp.Scenario(sp.NormalTwoArm(n=10, effect=0.5), analyses={NASTY_LABEL: sp.TTest()}, name=NASTY_NAME,
                     description=NASTY_DESC)
    res = sp.run(sc, reps=50, seed=1, n_jobs=1)
    out = tmp_path_factory.mktemp("nasty")
    return make_report(sc, out, seed=1, command="simpower run x.toml", run=res)


def _check_rendered(html_text):
    doc = _Elements(html_text)
    assert not {"b", "i", "script", "ol"} & doc.tags            # no tag from user text, no numbered list
    assert doc.texts("h1") == [NASTY_NAME]
    assert " ".join(NASTY_DESC.splitlines()) in doc.texts("p")
    assert any(NASTY_LABEL in c for c in doc.texts("code"))
    assert not any("not a heading" in h for g in ("h1", "h2", "h3") for h in doc.texts(g))
    assert not any(t.startswith("not a list") for t in doc.texts("li"))


def test_user_text_is_text_in_the_html_report(nasty_report):
    _check_rendered(nasty_report["html"].read_text())


def test_user_text_is_text_in_the_markdown_report(nasty_report):
    # rendered by a CommonMark implementation (markdown-it-py, CommonMark spec 0.31 section 2.4
    # "Backslash escapes"): the name, description and label come out as the same text, no tags
    markdown_it = pytest.importorskip("markdown_it")
    md = nasty_report["md"].read_text()
    _check_rendered(markdown_it.MarkdownIt("commonmark").render(md))


def test_markdown_escapes_without_a_renderer(nasty_report):
    # CommonMark (spec 0.31, section 2.4): a backslash before ASCII punctuation makes it literal, so
    # every character that could open markup in user text is preceded by one
    md = nasty_report["md"].read_text()
    title = md.splitlines()[0]
    assert title == r"# Trial \<b\>bold\</b\> \*star\* \_under\_ \[link\](http://example.org) \& \`tick\` \\ \| \~\~x\~\~"
    assert r"\# not a heading \<script\>alert(1)\</script\> - not a list 1. not numbered" in md


def test_a_plain_run_report_has_a_figure_and_the_estimate_performance(tmp_path):
    # a plain run's report shows each analysis's power with its interval (a figure) and how it estimates
    # the effect: bias, SEs and coverage with their MCSE (Morris, White & Crowther 2019)
    import simpower as sp
    from simpower.report import make_report

    sc = sp.Scenario(sp.NormalTwoArm(n=30, effect=0.5), analyses=[sp.TTest(), sp.WelchT()])
    res = sp.run(sc, reps=400, seed=2, n_jobs=1, progress=False)
    paths = make_report(sc, tmp_path, seed=2, run=res, formats=("md",))
    md = paths["md"].read_text()
    assert "run_power.png" in md and (tmp_path / "run_power.svg").exists()
    assert "| Analysis | True effect | Mean estimate | Bias | Empirical SE | Model SE | Coverage |" in md
    ax = res.plot().axes[0]
    import numpy as np

    ticks, names = ax.get_yticks(), [t.get_text() for t in ax.get_yticklabels()]
    assert names[int(np.argmax(ticks))] == "t_test"  # the primary analysis on top


def test_a_pilot_run_report_shows_the_pilot_and_its_cautions(tmp_path):
    # the pilot's summary in the report: the SD of the pooled (centred) pilot, Browne's (1995) upper 80% limit
    # sd * sqrt((m - 1) / chi2_{0.2, m-1}) computed here with scipy, the power at both SDs from the noncentral t
    # (tests/_helpers.nct_power), and Teare et al.'s (2014) caution for fewer than 35 units per arm
    import numpy as np
    from scipy import stats

    from simpower.report import make_report
    from _helpers import nct_power

    rng = np.random.default_rng(8)
    y = np.round(rng.normal(50, 10, 24), 1)
    arm = np.repeat([0, 1], 12)
    proc = sp.PilotResample(values=y.tolist(), arm_values=arm.tolist(), n=40, effect=6.0)
    sc = sp.Scenario(proc, analyses=[sp.TTest()])
    res = sp.run(sc, reps=100, seed=2, n_jobs=1, progress=False)
    md = make_report(sc, tmp_path, seed=2, run=res, formats=("md",))["md"].read_text()
    pooled = np.concatenate([y[arm == k] - y[arm == k].mean() for k in (0, 1)]) + y.mean()
    sd = pooled.std(ddof=1)
    upper = sd * np.sqrt(23 / stats.chi2.ppf(0.2, 23))
    assert "## Pilot data" in md
    assert f"| SD | {sd:.4g} |" in md
    assert f"| Upper 80% confidence limit of the SD (Browne 1995) | {upper:.4g} |" in md
    assert f"at the SD's upper 80% confidence limit: {nct_power(6.0 / upper * np.sqrt(20), 78, 0.05, 'two-sided'):.3f}" in md
    assert "12 pilot units per arm is fewer than 35" in md
