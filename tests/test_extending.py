"""Extending simpower: public constraints, a parameter store nothing can shadow silently,
``module:Class`` references that build components, and failure messages naming the failing part.

These are contract checks of the project's own API (common practice: a class
definition error is raised when the class is created, as Python itself does for
bad ``__slots__`` or ``__init_subclass__`` arguments). The run that builds a
component from a reference is checked against scipy's two-sample t-test on the
same simulated data.
"""

from __future__ import annotations

import pickle
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from scipy import stats

import simpower as sp
from simpower import constraints
from simpower.components import Component
from simpower.engine.chunk import chunk_seed
from simpower.errors import DefinitionError, ParameterError, RunError
from simpower.functions import FunctionProcess
from simpower.registry import rebuild


# -- 1. public constraints --------------------------------------------------------------------

def test_constraints_are_public_and_the_private_module_still_works():
    from simpower import _validation

    for name in ("Real", "Int", "Choice", "Bool", "Anything", "check_params"):
        assert getattr(constraints, name) is getattr(_validation, name)
    assert constraints.Nested is sp.components.Nested
    with pytest.raises(ParameterError, match=r"^`sd` must be > 0; got -1\.$"):
        constraints.Real(0.0, low_open=True).clean("sd", -1)
    assert constraints.check_params({"n": constraints.Int(low=2)}, {"n": 4.0}) == {"n": 4}


# -- 2. the parameter store -------------------------------------------------------------------

def test_a_parameter_named_like_a_method_is_refused_when_the_class_is_defined():
    with pytest.raises(DefinitionError) as info:
        class Clash(sp.Process):
            params = {"n": constraints.Int(low=2), "describe": constraints.Real()}
    msg = str(info.value)
    assert "\n" not in msg and "Clash" in msg and "`describe`" in msg and "Component.describe" in msg


def test_a_parameter_named_like_an_inherited_setting_or_own_method_is_refused():
    with pytest.raises(DefinitionError, match=r"parameter `size_param` .* Process\.size_param"):
        class Setting(sp.Process):
            params = {"size_param": constraints.Int()}
    with pytest.raises(DefinitionError, match=r"parameter `total` .* method Own\.total"):
        class Own(sp.Process):
            params = {"total": constraints.Int()}

            def total(self):
                return 1


def test_the_store_names_are_reserved():
    with pytest.raises(DefinitionError, match=r"Mine defines `_p`"):
        class Mine(sp.Process):
            params = {"n": constraints.Int(low=2)}

            def _p(self):
                return "mine"


def test_a_subclass_private_name_cannot_clash_with_the_store():
    class Scaled(sp.Process):
        params = {"n": constraints.Int(low=2), "sd": constraints.Real(0.0, low_open=True)}
        defaults = {"sd": 2.0}

        def _check(self):
            # the subclass keeps its own private table under a name of its own (`_Scaled__params`)
            self.__params = {"variance": self.sd ** 2}

        def variance(self):
            return self.__params["variance"]

    obj = Scaled(n=5)
    assert obj.n == 5 and obj.sd == 2.0 and obj.variance() == 4.0
    assert obj.get_params() == {"n": 5, "sd": 2.0}
    assert obj.replace(sd=3.0).variance() == 9.0


def test_an_instance_attribute_that_hides_a_parameter_is_refused():
    class Hides(sp.Process):
        params = {"n": constraints.Int(low=2)}

        def _check(self):
            object.__setattr__(self, "n", 99)

    with pytest.raises(DefinitionError, match=r"Hides set an instance attribute `n`"):
        Hides(n=5)


def test_declared_shadows_keep_the_deliberate_attribute():
    # Lognormal: `mean` is the population mean however the distribution was given; the
    # parameter value itself stays readable. Mean = median * exp(sigma^2 / 2) (Johnson, Kotz &
    # Balakrishnan 1994, ch. 14), with sigma^2 = log(1 + cv^2).
    ln = sp.Lognormal(median=2.0, cv=0.5)
    assert ln.get_params()["mean"] is None
    assert ln.mean == pytest.approx(2.0 * np.sqrt(1 + 0.5 ** 2))
    assert "shadows" not in ln.spec() and ln.spec()["median"] == 2.0


def test_parameters_are_read_only():
    p = sp.NormalTwoArm(n=10)
    with pytest.raises(AttributeError, match="replace"):
        p.n = 20
    with pytest.raises(TypeError):
        p._p["n"] = 20
    assert p.n == 10 and pickle.loads(pickle.dumps(p)) == p


# -- 3. module:Class references build components ----------------------------------------------

USER_MODULE = '''
import numpy as np
from simpower import Batch, Process
from simpower.constraints import Int, Real


class Shifted(Process):
    """Two arms of n normal outcomes; arm 1 shifted by `effect`."""
    params = {"n": Int(low=2), "effect": Real(), "sd": Real(0.0, low_open=True)}
    defaults = {"effect": 0.0, "sd": 1.0}

    def draw_batch(self, rng, size):
        y = rng.normal(0.0, self.sd, (size, 2 * self.n))
        y[:, self.n:] += self.effect
        return Batch(size, {"y": y}, {"arm": np.repeat([0, 1], self.n)})


def plain(rng, n=5, effect=0.0):
    y = rng.standard_normal(2 * n)
    y[n:] += effect
    return {"y": y, "arm": np.repeat([0, 1], n)}
'''


def _scenario_file(tmp_path, ref, **fields):
    (tmp_path / "usercode.py").write_text(USER_MODULE)
    body = "\n".join(f"{k} = {v!r}" for k, v in fields.items())
    path = tmp_path / "study.toml"
    path.write_text(f'reps = 100\nseed = 3\n[process]\ntype = "{ref}"\n{body}\n[analysis]\ntype = "t_test"\n')
    return path


def test_a_file_class_reference_builds_the_component(tmp_path):
    sf = sp.load_scenario(_scenario_file(tmp_path, "usercode.py:Shifted", n=12, effect=0.4))
    proc = sf.scenario.process
    assert isinstance(proc, sp.Process) and not isinstance(proc, FunctionProcess)
    assert type(proc).__name__ == "Shifted" and proc.n == 12 and proc.effect == 0.4 and proc.sd == 1.0
    assert proc.has_batch
    spec = proc.spec()
    assert spec["type"] == "usercode.py:Shifted" and spec["n"] == 12 and spec["_source"]
    again = rebuild(proc)
    assert type(again) is type(proc) and again.fingerprint() == proc.fingerprint()
    assert proc.replace(n=20).spec()["type"] == "usercode.py:Shifted"
    # the run's t-test p-values equal scipy's on the same replicates (Student 1908; scipy.stats.ttest_ind)
    res = sp.run(sf.scenario, reps=50, seed=3, n_jobs=1, chunk_size=50)
    assert res.paths["t_test"] == "batch"
    y = proc.draw_batch(np.random.default_rng(chunk_seed(res.seed, sf.scenario.point_key(), 0)), 50)["y"]
    ref = stats.ttest_ind(y[:, 12:], y[:, :12], axis=1).pvalue
    assert np.allclose(res.records["t_test"].pvalue, ref, rtol=1e-10, atol=0)


def test_a_class_reference_validates_the_table_fields(tmp_path):
    with pytest.raises(sp.ScenarioFileError, match=r"`process\.n` must be an integer >= 2; got 1"):
        sp.load_scenario(_scenario_file(tmp_path, "usercode.py:Shifted", n=1))
    with pytest.raises(sp.ScenarioFileError, match=r"`process\.size` is not a parameter for Shifted\. Valid: effect, n, sd\.$"):
        sp.load_scenario(_scenario_file(tmp_path, "usercode.py:Shifted", n=5, size=2))


def test_a_class_reference_of_the_wrong_kind_is_refused(tmp_path):
    (tmp_path / "outc.py").write_text("from simpower.processes.outcomes import Normal\nclass Wide(Normal):\n    pass\n")
    path = tmp_path / "s.toml"
    path.write_text('[process]\ntype = "outc.py:Wide"\n[analysis]\ntype = "t_test"\n')
    with pytest.raises(sp.ScenarioFileError, match=r"`process.type` = 'outc.py:Wide' is a outcome class; give a "
                                                   r"process here"):
        sp.load_scenario(path)


def test_a_plain_function_reference_stays_a_function(tmp_path):
    proc = sp.load_scenario(_scenario_file(tmp_path, "usercode.py:plain", n=4)).scenario.process
    assert isinstance(proc, FunctionProcess) and proc.get_params() == {"n": 4}
    assert len(proc(np.random.default_rng(1))["y"]) == 8


def test_an_importable_module_class_reference(tmp_path, monkeypatch):
    (tmp_path / "gconf_usermod.py").write_text(USER_MODULE)
    monkeypatch.syspath_prepend(str(tmp_path))
    from simpower.registry import build

    proc = build("process", {"type": "gconf_usermod:Shifted", "n": 6}, where="process")
    assert type(proc).__module__ == "gconf_usermod" and proc.n == 6
    assert rebuild(proc) == proc


def test_a_file_class_component_unpickles_in_a_fresh_interpreter(tmp_path):
    proc = sp.load_scenario(_scenario_file(tmp_path, "usercode.py:Shifted", n=7, effect=1.5)).scenario.process
    blob = tmp_path / "proc.pkl"
    blob.write_bytes(pickle.dumps(proc))
    code = textwrap.dedent(f"""
        import pickle, numpy as np
        p = pickle.loads(open({str(blob)!r}, "rb").read())
        print(type(p).__name__, p.n, p.effect, p.spec()["type"], repr(p(np.random.default_rng(5))["y"][0]))
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    here = repr(proc(np.random.default_rng(5))["y"][0])
    assert out.stdout.split() == ["Shifted", "7", "1.5", "usercode.py:Shifted", here]


# -- 4. failure messages name the failing part ------------------------------------------------

def shaky(rng, n=5):
    y = rng.standard_normal(2 * n)
    if y[0] > 0:  # half the replicates
        raise OverflowError("draw failed")
    return {"y": y, "arm": np.repeat([0, 1], n)}


def steady(rng, n=5):
    return {"y": rng.standard_normal(2 * n), "arm": np.repeat([0, 1], n)}


def fussy(data):
    if np.asarray(data["y"])[0] > 0:
        raise KeyError("first value positive")
    return 0.5


def test_a_failing_process_is_named_as_the_part_to_fix():
    sc = sp.Scenario(shaky, analyses={"t": sp.TTest()})
    with pytest.raises(RunError) as info:
        sp.run(sc, reps=400, seed=1, n_jobs=1, max_failure_rate=0.2)
    msg = str(info.value)
    assert "the process `" in msg and "shaky" in msg and "failed to draw the data" in msg
    assert "process:OverflowError" in msg and "Fix the process" in msg and "Fix the analysis" not in msg


def test_a_failing_analysis_is_named_as_the_part_to_fix():
    sc = sp.Scenario(steady, analyses={"fussy": fussy})
    with pytest.raises(RunError) as info:
        sp.run(sc, reps=400, seed=1, n_jobs=1, max_failure_rate=0.2)
    msg = str(info.value)
    assert "the analysis `fussy` failed" in msg and "error:KeyError" in msg and "Fix the analysis" in msg
    assert "Fix the process" not in msg


def test_a_clashing_class_in_a_user_file_is_one_line_naming_it(tmp_path):
    (tmp_path / "clash.py").write_text(
        "from simpower import Process\nfrom simpower.constraints import Int\n"
        "class Clash(Process):\n    params = {'n': Int(low=2), 'replace': Int()}\n")
    path = tmp_path / "s.toml"
    path.write_text('[process]\ntype = "clash.py:Clash"\nn = 4\n[analysis]\ntype = "t_test"\n')
    with pytest.raises(sp.ScenarioFileError) as info:
        sp.load_scenario(path)
    msg = str(info.value)
    assert "\n" not in msg and "importing clash.py raised DefinitionError: Clash: parameter `replace`" in msg
