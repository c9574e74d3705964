"""The formula grammar: no string from a scenario file runs as code, and accepted formulas mean what
statsmodels' formula engine makes of them.

Every analysis that takes a ``formula`` (found from the registry, so a new one is covered too)
refuses a formula that would run Python when a formula engine evaluates it, at construction, and
writes nothing; the command line refuses the same formula in a scenario file at load, with a
one-line error naming the field and exit code 2.
"""

import os
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from simpower.errors import ParameterError
from simpower.formula import parse_formula
from simpower.registry import build, lookup, names

ROOT = Path(__file__).resolve().parents[1]
INJECTION = "y ~ arm + I(__import__('pathlib').Path('marker').write_text('x') * 0)"
OTHER_ESCAPES = [
    "y ~ arm + np.log(baseline)",                         # attribute access
    "y ~ arm + C(arm, __import__('os').getcwd())",        # a call inside C(...)
    "y ~ arm + baseline[0]",                              # indexing
    "y ~ arm + 'text'",                                   # strings
    "y ~ arm + Q('x')",                                   # patsy's quoting call
    "y ~ arm + __builtins__",                             # dunder names
    "y ~ arm + (lambda: 0)",                              # keywords
    "y ~ arm; import os",
]


def formula_analyses() -> list[str]:
    return [n for n in names("analysis") if "formula" in lookup("analysis", n).params]


def test_the_formula_analyses_are_found():
    # the four built-ins that hand a formula to statsmodels (grep of simpower/analyses/)
    assert {"ols", "ancova", "gee", "mixed_model"} <= set(formula_analyses())


@pytest.mark.parametrize("analysis", formula_analyses())
@pytest.mark.parametrize("formula", [INJECTION, *OTHER_ESCAPES])
def test_every_formula_analysis_refuses_code_at_construction(analysis, formula, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    with pytest.raises(ParameterError, match=r"^`analysis\.formula`") as err:
        build("analysis", {"type": analysis, "formula": formula, "term": "arm"}, where="analysis")
    assert "\n" not in str(err.value)
    with pytest.raises(ParameterError, match=r"^`formula`"):
        lookup("analysis", analysis)(formula=formula, term="arm")
    assert list(tmp_path.iterdir()) == []          # no marker file


def _scenario_file(folder: Path, analysis: str, formula: str) -> Path:
    process = ('type = "cluster_trial"\nclusters = 6\ncluster_size = 4\nicc = 0.05\neffect = 0.3'
               if analysis in ("gee", "mixed_model") else 'type = "normal_two_arm"\nn = 10\neffect = 0.5')
    text = (f'reps = 20\nseed = 1\n\n[process]\n{process}\n\n[analysis]\ntype = "{analysis}"\n'
            f'formula = "{formula}"\nterm = "arm"\n')
    path = folder / "scenario.toml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.parametrize("analysis", formula_analyses())
def test_the_command_line_refuses_the_injection_at_load(analysis, tmp_path):
    toml = _scenario_file(tmp_path, analysis, INJECTION)
    # the TOML string holds the injection verbatim
    assert tomllib.loads(toml.read_text())["analysis"]["formula"] == INJECTION
    env = {**os.environ, "PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg"}
    proc = subprocess.run([sys.executable, "-m", "simpower.cli.main", "run", str(toml), "--jobs", "1", "-q"],
                          cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    err = proc.stderr.strip()
    assert "\n" not in err and "Traceback" not in err
    assert "`analysis.formula`" in err and "not a column name" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["scenario.toml"]


# -- what an accepted formula means --------------------------------------------------------
@pytest.mark.parametrize("text, n_terms, intercept", [
    ("y ~ a + b", 2, True),
    ("y ~ a * b", 3, True),               # a + b + a:b
    ("y ~ a * b * c", 7, True),
    ("y ~ (a + b):c", 2, True),           # a:c + b:c
    ("y ~ a * b - a:b", 2, True),
    ("y ~ a:b + a", 2, True),
    ("y ~ 0 + a + b", 2, False),
    ("y ~ a + b - 1", 2, False),
    ("y ~ -1 + a", 1, False),
    ("y ~ a + a", 1, True),
    ("y ~ (a + b) * c", 5, True),
])
def test_term_expansion_agrees_with_statsmodels_formula_engine(text, n_terms, intercept):
    # statsmodels' formula engine (patsy or formulaic) is the reference: with numeric columns,
    # every term is one design column and the intercept one more
    f = parse_formula(text)
    assert (len(f.terms), f.intercept) == (n_terms, intercept)
    rng = np.random.default_rng(0)
    frame = pd.DataFrame(rng.normal(size=(30, 4)), columns=["y", "a", "b", "c"])
    exog = smf.ols(text, frame).exog
    assert exog.shape[1] == n_terms + intercept
    assert f.columns[0] == "y" and sorted(f.columns[1:]) == [c for c in ("a", "b", "c") if c in text.split("~")[1]]


def test_treatment_reference_levels_are_kept_and_reach_statsmodels_unchanged():
    # the shipped repeated-measures scenario uses C(visit, Treatment(3)); statsmodels then names the
    # visit levels against visit 3
    f = parse_formula("y ~ C(arm) * C(visit, Treatment(reference=3))")
    assert f.references == {"visit": 3}
    rng = np.random.default_rng(1)
    frame = pd.DataFrame({"y": rng.normal(size=40), "arm": np.repeat([0, 1], 20), "visit": np.tile(range(4), 10)})
    names_ = smf.ols(f.text, frame).fit().params.index
    assert "C(visit, Treatment(reference=3))[T.0]" in names_
    with pytest.raises(ParameterError, match="two different reference levels"):
        parse_formula("y ~ C(v, Treatment(1)) + C(v, Treatment(2))")


@pytest.mark.parametrize("text, message", [
    ("y ~ 2 + a", "only 0 or 1"),
    ("y ~ a:1", "cannot enter"),
    ("y ~ (a + 0)", "only outside parentheses"),
    ("y ~ 1", "no terms"),
    ("y ~ a ~ b", "not accepted here"),
    ("y + z ~ a", "'~' after the outcome"),
    ("y ~ C(a, Sum)", "the only contrast is Treatment"),
    ("y ~ f(a)", "a call other than C"),
    ("no tilde", "must be a formula"),
])
def test_malformed_formulas_get_one_line_naming_the_field(text, message):
    with pytest.raises(ParameterError, match=message) as err:
        parse_formula(text, "analyses.m.formula")
    assert str(err.value).startswith("`analyses.m.formula`") and "\n" not in str(err.value)


@pytest.mark.parametrize("analysis", ["gee", "mixed_model", "ols"])
def test_a_name_that_is_not_a_column_is_refused_before_the_formula_engine(analysis):
    # a formula engine would look an unknown name up in Python's namespaces (here: a module);
    # the analysis names the missing column instead
    an = lookup("analysis", analysis)(formula="y ~ arm + np", term="arm")
    rng = np.random.default_rng(3)
    data = {"y": rng.normal(size=24), "arm": np.repeat([0, 1], 12), "cluster": np.repeat(np.arange(6), 4)}
    with pytest.raises(ValueError, match=f"{analysis}: column 'np' of the formula is not in the data"):
        an(data)
