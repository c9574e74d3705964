"""Scenario files: TOML loading, references to user code, one-line errors naming the field."""

import textwrap

import numpy as np
import pytest

import simpower as sp
from simpower.errors import ScenarioFileError
from simpower.scenario_files import load, loads, parse_assignment

GOOD = """
name = "demo"
alpha = 0.05
reps = 500
seed = 42

[process]
type = "normal_two_arm"
n = 20
effect = 0.5

[analyses.student]
type = "t_test"

[analyses.welch]
type = "welch_t"
alternative = "greater"
"""


def test_loads_builds_scenario_and_run_settings():
    sf = loads(GOOD)
    assert sf.run == {"reps": 500, "seed": 42}
    assert list(sf.scenario.analyses) == ["student", "welch"]
    assert sf.scenario.analyses["welch"].alternative == "greater"
    assert sf.scenario.process == sp.NormalTwoArm(n=20, effect=0.5)
    # the spec round-trips through the registry
    spec = sf.scenario.process.spec()
    from simpower.registry import build

    assert build("process", spec) == sf.scenario.process


def test_overrides_from_command_line():
    sf = loads(GOOD, overrides={"reps": 100, "seed": None})
    assert sf.run["reps"] == 100 and sf.run["seed"] == 42
    assert parse_assignment("n=80") == ("n", 80)
    assert parse_assignment("alternative=greater") == ("alternative", "greater")
    assert parse_assignment("effect=0.25") == ("effect", 0.25)


@pytest.mark.parametrize("text, pattern", [
    ("[process\ntype='x'", r"TOML syntax error: .*line 1"),
    (GOOD.replace("n = 20", "n = 0"), r"`process.n` must be an integer >= 2; got 0"),
    (GOOD.replace("effect = 0.5", "efect = 0.5"), r"`process.efect` is not a parameter .*Did you mean 'effect'"),
    (GOOD.replace('type = "t_test"', 'type = "t_tset"'), r"unknown analysis 't_tset'.*Did you mean 't_test'"),
    (GOOD.replace('type = "normal_two_arm"', 'type = "normal_twoarm"'), r"Did you mean 'normal_two_arm'"),
    (GOOD.replace("alpha = 0.05", "alpha = 1.5"), r"`alpha` must be in \(0, 1\); got 1.5"),
    (GOOD.replace("alpha = 0.05", "alhpa = 0.05"), r"line 3.*unknown field `alhpa`.*Did you mean 'alpha'"),
    (GOOD.replace("n = 20", "n = 20\nsd = -1"), r"`process.sd` must be > 0; got -1"),
    (GOOD.replace("reps = 500", "reps = -3"), r"`reps` must be an integer >= 1"),
    ("alpha = 0.05\n[analysis]\ntype='t_test'", r"\[process\] table is required"),
    # messages say what is true: the field, the rule once ("a finite number", not "a number a finite number")
    (GOOD.replace("seed = 42", "seed = 42\ntrue_effect = 'big'"),
     r"`true_effect` must be a finite number; got 'big'\.$"),
    (GOOD.replace("seed = 42", "seed = 42\njobs = -7"), r"`jobs` must be -1 \(all cores\) or an integer >= 1; got -7"),
    (GOOD.replace("seed = 42", "seed = 42\njobs = 0"), r"`jobs` must be -1 \(all cores\) or an integer >= 1; got 0"),
])
def test_bad_files_give_one_line_errors(text, pattern):
    with pytest.raises(ScenarioFileError, match=pattern) as info:
        loads(text, path="plan.toml")
    assert "\n" not in str(info.value)
    assert str(info.value).startswith("plan.toml")


def test_missing_file():
    with pytest.raises(ScenarioFileError, match="no such scenario file"):
        load("does/not/exist.toml")


def test_user_code_by_file_reference(tmp_path):
    (tmp_path / "mycode.py").write_text(textwrap.dedent("""
        import numpy as np
        from scipy import stats

        def draw(rng, n, shift):
            return {"y": np.r_[rng.normal(size=n), rng.normal(shift, size=n)], "arm": np.repeat([0, 1], n)}

        def analyse(data):
            y, a = data["y"], data["arm"]
            return stats.ttest_ind(y[a == 1], y[a == 0]).pvalue
    """))
    (tmp_path / "s.toml").write_text(textwrap.dedent("""
        [process]
        type = "mycode.py:draw"
        n = 15
        shift = 0.8
        [analysis]
        type = "mycode.py:analyse"
    """))
    sf = load(tmp_path / "s.toml")
    r1 = sp.run(sf.scenario, reps=300, seed=5, n_jobs=1)
    r2 = sp.run(sf.scenario, reps=300, seed=5, n_jobs=2)  # six chunks on two workers, which re-import by reference
    assert np.array_equal(r1.pvalues, r2.pvalues)
    assert r1.summaries[r1.primary]["n_failed"] == 0


def test_bad_references(tmp_path):
    (tmp_path / "m.py").write_text("def f(rng, n):\n    return {'y': rng.normal(size=n)}\n")
    base = "[analysis]\ntype='t_test'\n[process]\n"
    with pytest.raises(ScenarioFileError, match="has no attribute 'g'"):
        loads(base + "type='m.py:g'\nn=3", path=tmp_path / "s.toml")
    with pytest.raises(ScenarioFileError, match="not found"):
        loads(base + "type='nope.py:f'\nn=3", path=tmp_path / "s.toml")
    with pytest.raises(ScenarioFileError, match="`m` is not a parameter of m.py:f. Valid: n"):
        loads(base + "type='m.py:f'\nm=3", path=tmp_path / "s.toml")
    with pytest.raises(ScenarioFileError, match="cannot import module 'no_such_module_xyz'"):
        loads(base + "type='no_such_module_xyz:f'", path=tmp_path / "s.toml")


def test_bundled_scenarios_load():
    from pathlib import Path

    files = sorted((Path(__file__).parent.parent / "scenarios").glob("*.toml"))
    assert files
    for f in files:
        sf = load(f)
        assert sf.scenario.analyses


def test_specs_are_toml_writable_and_rebuild_the_same_object():
    # TOML has no null: unset optional parameters are left out of a spec, and every spec of
    # a built-in rebuilds an equal object through the registry (a round trip through text).
    import tomllib

    from simpower.registry import build

    objs = [sp.TwoArm(n=10, outcome=sp.Lognormal(median=2.0, cv=0.5), missing=sp.MCAR(rate=0.1)),
            sp.BinaryTwoArm(n=30, p0=0.2, odds_ratio=1.5), sp.ZTest(sd=2.0)]
    for obj in objs:
        spec = obj.spec()
        text = "\n".join(_toml_lines(spec))
        again = build(obj.kind, tomllib.loads(text))
        assert again == obj


def _toml_lines(spec, prefix=""):
    flat = {k: v for k, v in spec.items() if not isinstance(v, dict)}
    nested = {k: v for k, v in spec.items() if isinstance(v, dict)}
    if prefix:
        yield f"[{prefix}]"
    for k, v in flat.items():
        yield f"{k} = {v!r}".replace("'", '"').replace("True", "true").replace("False", "false")
    for k, v in nested.items():
        yield from _toml_lines(v, f"{prefix}.{k}" if prefix else k)


def test_a_file_that_is_not_utf8_names_the_file(tmp_path):
    bad = tmp_path / "latin.toml"
    bad.write_bytes("name = 'caf\u00e9'\n".encode("latin-1"))
    with pytest.raises(ScenarioFileError, match=r"latin.toml: not UTF-8 text"):
        load(bad)


def test_references_resolve_against_the_scenario_file_wherever_they_sit(tmp_path, monkeypatch):
    # a reference inside multiple.tests (a nested table the analysis builds itself) and one given
    # by --set both mean the file beside the scenario, whatever the current folder
    import pickle
    from types import SimpleNamespace

    from scipy import stats

    from simpower.cli.common import load_scenario

    proj = tmp_path / "proj"
    (proj / "code").mkdir(parents=True)
    (proj / "code" / "tests_here.py").write_text(textwrap.dedent("""
        from scipy import stats

        def welch(data):
            y, a = data["y"], data["arm"]
            return stats.ttest_ind(y[a == 1], y[a == 0], equal_var=False).pvalue

        def student(data):
            y, a = data["y"], data["arm"]
            return stats.ttest_ind(y[a == 1], y[a == 0]).pvalue
    """))
    (proj / "s.toml").write_text(textwrap.dedent("""
        seed = 3
        [process]
        type = "normal_two_arm"
        n = 12
        effect = 0.5
        [analysis]
        type = "multiple"
        method = "none"
        tests = [{type = "code/tests_here.py:welch"}, {type = "t_test"}]
    """))
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)            # nothing named code/ here
    args = SimpleNamespace(scenario=str(proj / "s.toml"), reps=None, seed=None, jobs=None,
                           set=['analysis.tests=[{type = "code/tests_here.py:student"}, {type = "t_test"}]'])
    for changes in ([], args.set):
        sf = load_scenario(SimpleNamespace(**{**vars(args), "set": changes}))
        multiple = sf.scenario.analyses["multiple"]
        user = multiple.tests[0]
        assert user.label.startswith("code/tests_here.py:")
        data = sf.scenario.process(np.random.default_rng(0))
        y, a = np.asarray(data["y"]), np.asarray(data["arm"])
        # the user test gives scipy's p-value (Welch 1947 / Student), and survives a trip to a worker
        ref = stats.ttest_ind(y[a == 1], y[a == 0], equal_var=bool(changes)).pvalue
        assert user(data).pvalue == pytest.approx(ref, rel=1e-12)
        assert pickle.loads(pickle.dumps(user))(data).pvalue == pytest.approx(ref, rel=1e-12)


# -- a top-level true_effect applies only where the analysis estimates the process's estimand --------------
COUNTS = """
[process]
type = "count_two_arm"
n = 30
rate0 = 1.0
rate_ratio = 0.7

[analyses.poisson]
type = "poisson_glm"

[analyses.rank]
type = "mann_whitney"
estimand = "probability"
"""


def test_top_level_true_effect_applies_only_to_matching_analyses():
    sf = loads("true_effect = -0.3\n" + COUNTS)
    assert sf.scenario.true_effect_for("poisson") == -0.3  # a log rate ratio, the process's estimand
    assert sf.scenario.true_effect_for("rank") is None  # a probability index: not the same quantity
    res = sp.run(sf.scenario, reps=200, seed=1, n_jobs=1)
    assert res.summaries["poisson"]["true_effect"] == -0.3 and "bias" in res.summaries["poisson"]
    assert "bias" not in res.summaries["rank"] and "coverage" not in res.summaries["rank"]


def test_top_level_true_effect_that_fits_no_analysis_is_refused():
    text = "true_effect = 0.64\n" + COUNTS.replace('[analyses.poisson]\ntype = "poisson_glm"\n', "")
    with pytest.raises(ScenarioFileError) as info:
        loads(text, path="plan.toml")
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith("plan.toml: `true_effect` applies to no analysis")
    assert "log rate ratio" in msg and "rank: probability index" in msg and "[true_effects]" in msg


def _user_process(rng, n=10, effect=0.5):
    arm = np.repeat([0, 1], n)
    return {"y": rng.normal(size=2 * n) + effect * arm, "arm": arm}


def test_top_level_true_effect_with_a_user_process_must_be_unambiguous():
    # a user process does not say what its effect is: one shared estimand is fine...
    sc = sp.Scenario(_user_process, analyses=[sp.TTest(), sp.WelchT()], true_effect=0.5)
    assert sc.true_effect_for("t_test") == sc.true_effect_for("welch_t") == 0.5
    # ...analyses estimating different things are not
    with pytest.raises(sp.ParameterError, match=r"^`true_effect` is ambiguous: .*t_test: not stated; "
                                                r"mann_whitney: probability index.*\[true_effects\]"):
        sp.Scenario(_user_process, analyses=[sp.TTest(), sp.MannWhitney(estimand="probability")], true_effect=0.5)
    # per-analysis values settle it
    ok = sp.Scenario(_user_process, analyses=[sp.TTest(), sp.MannWhitney(estimand="probability")],
                     true_effect=0.5, true_effects={"mann_whitney": 0.64})
    assert ok.true_effect_for("t_test") == 0.5 and ok.true_effect_for("mann_whitney") == 0.64
    # a change of parameters that makes it ambiguous is refused too
    plain = sp.Scenario(_user_process, analyses=[sp.TTest(), sp.MannWhitney(estimand="none")], true_effect=0.5)
    assert plain.true_effect_for("mann_whitney") == 0.5
    with pytest.raises(sp.ParameterError, match="ambiguous"):
        plain.with_params(**{"mann_whitney.estimand": "probability"})


def test_run_accepts_a_scenario_file_path(tmp_path):
    p = tmp_path / "demo.toml"
    p.write_text(GOOD)
    from_path = sp.run(str(p), reps=200, n_jobs=1)
    from_object = sp.run(load(p).scenario, reps=200, seed=42, n_jobs=1)
    assert from_path.seed == 42  # the file's seed
    assert from_path.summaries["student"]["power"] == from_object.summaries["student"]["power"]
    assert sp.run(p, n_jobs=1).reps == 500  # the file's reps when none is given
    with pytest.raises(sp.ParameterError, match=r"`scenario` must be a Scenario or a scenario file path"):
        sp.run({"process": "normal_two_arm"}, reps=10)


# -- every block of the study plan is checked at load (simpower.blocks), in one line naming the field --------
@pytest.mark.parametrize("block, pattern", [
    ("[sweep]\nreps = -5", r"\(line \d+\): `sweep.reps` must be an integer >= 1; got -5\.$"),
    ('[execution]\ntimeout = "soon"', r"`execution.timeout` must be a number > 0; got 'soon'\.$"),
    ("[execution]\ntimeout = 0", r"`execution.timeout` must be > 0; got 0\.$"),
    ('[execution]\nbackend = "lokyy"', r"`execution.backend` must be one of .*Did you mean 'loky'\?$"),
    ("[execution]\nsummaries_only = 1", r"`execution.summaries_only` must be true or false; got 1\.$"),
    ("[sweep]\nrep = 500", r"`sweep.rep` is not a field of \[sweep\]\. Did you mean 'reps'\?$"),
    ("[sweep]\nvary = [1, 2]", r"`sweep.vary` must be a table"),
    ("[sweep]\nx = 3", r"`sweep.x` must be a string; got 3\.$"),
    ("[search]\npower = 1.2", r"`search.power` must be in \(0, 1\); got 1\.2\.$"),
    ('[search]\nfind = "sizes"', r"`search.find` must be one of 'size', 'effect'.*Did you mean 'size'\?$"),
    ("[search]\nparameter = 5", r"`search.parameter` must be a string; got 5\.$"),
    ("[sequential]\ntarget_mcse = 0.7", r"`sequential.target_mcse` must be in \(0, 0\.5\); got 0\.7\.$"),
    ('[sequential]\nwhich = "every"', r"`sequential.which` must be one of 'primary', 'all'"),
    ('[null_check]\nenabled = "yes"', r"`null_check.enabled` must be true or false; got 'yes'\.$"),
    ("[null_check]\nreps = 0", r"`null_check.reps` must be an integer >= 1; got 0\.$"),
    ('[report]\nformats = "md,pdf"', r"`report.formats` must be one of 'md', 'html'; got 'pdf'\.$"),
    ("[report]\ntitel = 'x'", r"`report.titel` is not a field of \[report\]\. Did you mean 'title'\?$"),
    ('[store]\nsync = "ful"', r"`store.sync` must be one of 'normal', 'full'.*Did you mean 'full'\?$"),
    ("[store]\npath = 3", r"`store.path` must be a string; got 3\.$"),
    ("execution = 3", r"`execution` must be a table"),
])
def test_every_block_is_checked_at_load(block, pattern):
    text = block + "\n" + GOOD if not block.startswith("[") else GOOD + "\n" + block + "\n"
    with pytest.raises(ScenarioFileError, match=pattern) as info:
        loads(text, path="plan.toml")
    assert "\n" not in str(info.value) and str(info.value).startswith("plan.toml")


def test_blocks_are_kept_cleaned():
    sf = loads(GOOD + '\n[report]\nformats = "md, html"\n[search]\nlow = 20\nhigh = 400\n'
               '[execution]\ntimeout = 5\n')
    assert sf.blocks["report"]["formats"] == ("md", "html")
    assert sf.blocks["search"] == {"low": 20.0, "high": 400.0}
    assert sf.blocks["execution"] == {"timeout": 5.0}
    # a recorded plan (data, no file) is checked the same way
    from simpower.scenario_files import from_data
    import tomllib

    raw = tomllib.loads(GOOD + "\n[sweep]\nreps = -5\n")
    with pytest.raises(ScenarioFileError, match=r"`sweep.reps` must be an integer >= 1"):
        from_data(raw, "store.sqlite: recorded plan")
