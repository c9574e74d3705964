"""Conformance kit: check that a process or an analysis honours the simpower contract.

Run it on your own components (and simpower runs it on every registered one)::

    from simpower.testing import check_process, check_analysis

    check_process(MyProcess(n=20, effect=0.3))
    check_analysis(MyAnalysis(), MyProcess(n=20, effect=0.3))

:func:`check_component` does the value checks for any other component
(outcomes, missingness mechanisms). Each function raises ``AssertionError`` listing every violation it found, one
per line, each naming the object and the broken promise; it returns None when
all checks pass. The checks (see DEVELOPERS.md, "Contracts"):

process
    * ``spec()`` is data only (JSON, no null for TOML) and rebuilds an equal
      object with the same fingerprint; the object pickles (with cloudpickle,
      as the engine ships it to workers); ``repr`` is one line naming the
      class; ``describe()`` is a sentence.
    * Seeds are honoured: the same generator seed gives the same data, a
      different seed different data, and numpy's and Python's global random
      states are left alone.
    * Every draw is a long table: equal-length 1-D columns with an outcome
      (``y``, or ``time`` and ``event``); a NaN outcome appears only when the
      batch says ``info["missing"]``, and ``observed`` (if given) marks it.
    * The batch path (``draw_batch(rng, size).replicate(i)``) gives the
      columns, column types and lengths of a per-replicate draw
      (``process(rng)``).
    * ``effect_param`` and ``size_param`` name parameters; ``null()`` is the
      same kind of process with ``true_effect()`` 0 (difference or log scale)
      or 1 (ratio scale).

analysis (on data drawn from ``process``; default a small two-arm normal trial)
    * spec round trip, pickle and repr as for processes.
    * Output contract: a p-value in [0, 1] (NaN is allowed: the engine counts
      it as a failure), ``ci_low <= ci_high``, several hypotheses come with as
      many names as adjusted p-values and the primary p-value is their
      minimum.
    * Deterministic: the same data give the same result, the global random
      states are left alone, and an analysis with a ``seed`` parameter gives
      different resamples for a different seed.
    * The batch path equals the per-replicate path (p-value, estimate, SE, CI
      bounds, adjusted p-values) to ``rtol``/``atol`` on every replicate
      without fit trouble (a warning per replicate, a ``trouble`` mask in the
      batch), and a replicate the per-replicate path cannot analyse is not
      given a finite p-value by the batch path unless it is flagged.
    * Missing values: on data with some outcomes set to NaN (and
      ``observed`` = 0 there) the analysis returns a p-value in [0, 1] or NaN,
      or raises (a counted failure), never an output of the wrong shape; the
      batch path, if it accepts such a batch, still equals the per-replicate
      path.
"""

from __future__ import annotations

import json
import math
import random
import warnings
from typing import Any

import numpy as np

from .analyses.base import FIELDS, IGNORED_WARNINGS, TestResult, as_test_result
from .functions import as_analysis, as_process

__all__ = ["check_process", "check_analysis", "check_component", "default_process"]

#: columns every built-in process and analysis shares (DEVELOPERS.md, "A data-generating process")
KNOWN_COLUMNS = frozenset({"y", "arm", "pair", "cluster", "subject", "visit", "baseline", "time", "event",
                           "exposure", "observed"})


def default_process():
    """The process :func:`check_analysis` draws from when none is given: 2 x 12 normal outcomes, d = 0.5."""
    from .processes.normal import NormalTwoArm

    return NormalTwoArm(n=12, effect=0.5)


class _Report:
    def __init__(self, obj):
        self.label = _label(obj)
        self.problems: list[str] = []

    def fail(self, text: str) -> None:
        self.problems.append(f"{self.label}: {text}")

    def check(self, ok: bool, text: str) -> bool:
        if not ok:
            self.fail(text)
        return ok

    def guard(self, what: str, fn, *args):
        """``fn(*args)``, recording an exception as a problem (returns None then)."""
        try:
            return fn(*args)
        except Exception as exc:
            self.fail(f"{what} raised {type(exc).__name__}: {exc}")
            return None

    def done(self) -> None:
        if self.problems:
            raise AssertionError("\n".join(self.problems))


def _label(obj) -> str:
    name = getattr(obj, "name", None) or getattr(obj, "label", None)
    return f"{type(obj).__name__} {name!r}" if name else repr(obj)


# -- shared checks -------------------------------------------------------------------------------

def _has_null(value) -> bool:
    if value is None:
        return True
    if isinstance(value, dict):
        return any(_has_null(v) for v in value.values())
    if isinstance(value, list):
        return any(_has_null(v) for v in value)
    return False


def _check_value(obj, rep: _Report) -> None:
    """spec data-only and round trip, pickle, repr, describe."""
    from .registry import rebuild

    r = rep.guard("repr()", repr, obj)
    if r is not None:
        rep.check(isinstance(r, str) and "\n" not in r and type(obj).__name__ in r,
                  f"repr() should be one line naming {type(obj).__name__}; got {r!r}")
    d = rep.guard("describe()", obj.describe)
    if d is not None:
        rep.check(isinstance(d, str) and d.strip() != "", f"describe() should be a sentence; got {d!r}")
    spec = rep.guard("spec()", obj.spec)
    if spec is None:
        return
    if not rep.check(isinstance(spec, dict) and isinstance(spec.get("type"), str),
                     f"spec() should be a dict with a string `type`; got {spec!r}"):
        return
    try:
        json.dumps(spec, allow_nan=True)
    except (TypeError, ValueError) as exc:
        rep.fail(f"spec() is not plain data ({exc}): {spec!r}")
    rep.check(not _has_null(spec), f"spec() holds a None (TOML has no null): {spec!r}")
    if getattr(obj, "_ref", "unset") is None:
        pass  # a user function given as an object (not by reference): no name to rebuild it from
    else:
        again = rep.guard("rebuilding from spec()", rebuild, obj)
        if again is not None:
            rep.check(type(again) is type(obj), f"spec() rebuilds a {type(again).__name__}, not a {type(obj).__name__}")
            rep.check(again.fingerprint() == obj.fingerprint(),
                      f"spec() does not round-trip: {spec!r} rebuilds as {again.spec()!r}")
    # the engine ships objects to worker processes with cloudpickle (loky, dask)
    pickler = _cloudpickle()
    clone = rep.guard("pickling", lambda: pickler.loads(pickler.dumps(obj)))
    if clone is not None:
        # `_source` records the code's text, which a function pickled by value may not carry
        plain = {k: v for k, v in spec.items() if k != "_source"}
        rep.check({k: v for k, v in clone.spec().items() if k != "_source"} == plain,
                  f"a pickled copy has another spec: {clone.spec()!r}")


def _cloudpickle():
    try:
        import cloudpickle  # what joblib's loky and dask use
    except ImportError:  # pragma: no cover - older joblib vendored it
        try:
            from joblib.externals import cloudpickle
        except ImportError:
            import pickle as cloudpickle
    return cloudpickle


class _GlobalRandom:
    """Remember numpy's and Python's global random states, to check nothing drew from them."""

    def __enter__(self):
        self.np_state = np.random.get_state()
        self.py_state = random.getstate()
        return self

    def __exit__(self, *exc):
        np_after, py_after = np.random.get_state(), random.getstate()
        self.touched = (np_after[2] != self.np_state[2] or not np.array_equal(np_after[1], self.np_state[1])
                        or py_after != self.py_state)
        np.random.set_state(self.np_state)
        random.setstate(self.py_state)
        return False


def _tables_equal(a: dict, b: dict) -> bool:
    if set(a) != set(b):
        return False
    for k in a:
        x, y = np.asarray(a[k]), np.asarray(b[k])
        if x.shape != y.shape:
            return False
        if x.dtype.kind in "fc":
            if not np.array_equal(x, y, equal_nan=True):
                return False
        elif not np.array_equal(x, y):
            return False
    return True


def _as_table(data) -> dict[str, np.ndarray] | None:
    if hasattr(data, "to_dict") and hasattr(data, "columns"):  # a DataFrame
        return {str(c): np.asarray(data[c]) for c in data.columns}
    if isinstance(data, dict):
        return {str(k): np.asarray(v) for k, v in data.items()}
    return None


def check_component(obj, *, size: int = 50, seed: int = 20261202) -> None:
    """The value checks (spec round trip, pickle, repr, describe) for any component, plus, for an
    outcome, seeds honoured by ``sample`` and finite ``mean``/``sd``, and for a missingness
    mechanism, a boolean ``mask`` shaped like the outcomes and seeds honoured.
    """
    from .processes.base import Missingness, Outcome

    rep = _Report(obj)
    _check_value(obj, rep)

    def draws(fn):
        out = []
        for s in (seed, seed, seed + 1):
            with _GlobalRandom() as g:
                out.append(np.asarray(fn(np.random.default_rng(s))))
            rep.check(not g.touched, "drawing used numpy's or Python's global random state")
        return out

    if isinstance(obj, Outcome):
        for attr in ("mean", "sd"):
            v = rep.guard(attr, getattr, obj, attr)
            rep.check(v is None or (isinstance(v, float) and math.isfinite(v)), f"`{attr}` = {v!r} is not a "
                                                                                "finite number")
        got = rep.guard("sample(rng, size)", draws, lambda rng: obj.sample(rng, (2, size)))
        if got is not None:
            a, b, c = got
            rep.check(a.shape == (2, size), f"sample(rng, (2, {size})) has shape {a.shape}")
            rep.check(np.array_equal(a, b), "sample: the same seed gave different values")
            rep.check(not np.array_equal(a, c), "sample: a different seed gave the same values")
    if isinstance(obj, Missingness):
        y = np.random.default_rng(seed).standard_normal((2, size))
        cov = {"baseline": y + 0.5, "arm": np.tile(np.repeat([0, 1], size // 2 + 1)[:size], (2, 1))}
        if size % 5 == 0:  # rows as participants x 5 visits, for mechanisms over visits (dropout)
            cov.update(visit=np.tile(np.arange(5), (2, size // 5)), subject=np.tile(np.repeat(np.arange(size // 5), 5),
                                                                                  (2, 1)))
        got = rep.guard("mask(rng, y, covariates)", draws, lambda rng: obj.mask(rng, y, cov))
        if got is not None:
            a, b, c = got
            rep.check(a.shape == y.shape and a.dtype == bool, f"mask is {a.dtype} {a.shape}, not bool {y.shape}")
            rep.check(np.array_equal(a, b), "mask: the same seed gave different masks")
            rep.check(not np.array_equal(a, c), "mask: a different seed gave the same mask")
    rep.done()


# -- processes -----------------------------------------------------------------------------------

def _check_table(data, rep: _Report, where: str, missing_allowed: bool) -> dict[str, np.ndarray] | None:
    table = _as_table(data)
    if not rep.check(table is not None, f"{where} is a {type(data).__name__}; return a dict of 1-D arrays "
                                        "or a DataFrame"):
        return None
    lengths = {k: v.shape for k, v in table.items()}
    if not rep.check(all(len(s) == 1 for s in lengths.values()), f"{where}: columns must be 1-D; got {lengths}"):
        return None
    if not rep.check(len({s[0] for s in lengths.values()}) == 1, f"{where}: columns differ in length: {lengths}"):
        return None
    outcome = "y" if "y" in table else ("time" if "time" in table and "event" in table else None)
    if not rep.check(outcome is not None, f"{where} has no outcome column (`y`, or `time` and `event`); "
                                          f"columns {sorted(table)}"):
        return table
    y = table[outcome].astype(float)
    nan = np.isnan(y)
    if nan.any():
        rep.check(missing_allowed, f"{where}: {int(nan.sum())} NaN outcomes but the batch does not say "
                                   "info['missing'] = True")
    if "observed" in table:
        obs = table["observed"].astype(float)
        rep.check(np.array_equal(obs == 0, nan), f"{where}: `observed` = 0 should mark exactly the NaN outcomes")
    return table


def _outcome_differs(a: dict, b: dict) -> bool:
    if set(a) != set(b):
        return True
    return any(not np.array_equal(np.asarray(a[k]), np.asarray(b[k]), equal_nan=True)
               for k in a if np.asarray(a[k]).dtype.kind in "fiub")


def check_process(process, *, size: int = 5, seed: int = 20261202) -> None:
    """Check that ``process`` honours the process contract; raise AssertionError listing violations.

    Parameters
    ----------
    process : Process or callable ``(rng, **params) -> data``
    size : int
        Replicates drawn per batch (keep it small: the checks draw a few batches).
    seed : int
        Seed of the generators the checks use.
    """
    proc = as_process(process)
    rep = _Report(proc)
    _check_value(proc, rep)
    for attr in ("effect_param", "size_param"):
        key = getattr(proc, attr, None)
        if key is not None:
            rep.check(key in proc.get_params(deep=True), f"`{attr}` = {key!r} is not a parameter")  # dotted: nested
    te = rep.guard("true_effect()", proc.true_effect)
    rep.check(te is None or isinstance(te, (int, float)), f"true_effect() should be a number or None; got {te!r}")
    if getattr(proc, "effect_param", None):
        null = rep.guard("null()", proc.null)
        if null is not None:
            # no effect is 0 on a difference or log scale, 1 on a ratio scale
            t0 = null.true_effect()
            rep.check(type(null) is type(proc), f"null() is a {type(null).__name__}")
            rep.check(t0 is None or any(math.isclose(t0, v, abs_tol=1e-12) for v in (0.0, 1.0)),
                      f"null() has true_effect() = {t0!r}, which is no null (0 or 1)")

    def draw_one(s):
        with _GlobalRandom() as g:
            data = proc(np.random.default_rng(s))
        rep.check(not g.touched, "drawing a replicate used numpy's or Python's global random state; "
                                 "draw from the `rng` argument only")
        return data

    one = rep.guard("process(rng)", draw_one, seed)
    if one is None:
        rep.done()
        return
    batch_probe = rep.guard("draw_batch(rng, size)", proc.draw_batch, np.random.default_rng(seed), size) \
        if proc.has_batch else None
    missing_ok = bool(batch_probe is not None and batch_probe.info.get("missing")) or not proc.has_batch
    one_t = _check_table(one, rep, "process(rng)", missing_ok)
    again = rep.guard("process(rng)", draw_one, seed)
    other = rep.guard("process(rng)", draw_one, seed + 1)
    if one_t is not None and again is not None and other is not None:
        rep.check(_tables_equal(one_t, _as_table(again)), "the same seed gave different data")
        rep.check(_outcome_differs(one_t, _as_table(other)), "a different seed gave the same data")
    if proc.has_batch:
        _check_batch(proc, rep, size, seed, one_t)
    rep.done()


def _check_batch(proc, rep: _Report, size: int, seed: int, one: dict | None) -> None:
    from .processes.base import Batch

    def draw(s):
        with _GlobalRandom() as g:
            b = proc.draw_batch(np.random.default_rng(s), size)
        rep.check(not g.touched, "draw_batch used numpy's or Python's global random state")
        return b

    batch = rep.guard("draw_batch(rng, size)", draw, seed)
    if batch is None or not rep.check(isinstance(batch, Batch), f"draw_batch returned {type(batch).__name__}, "
                                                                "not a Batch"):
        return
    rep.check(batch.size == size, f"draw_batch(rng, {size}) has size {batch.size}")
    bad = {k: v.shape for k, v in batch.per_rep.items() if v.ndim < 1 or v.shape[0] != size}
    rep.check(not bad, f"per_rep arrays need a leading replicate axis of {size}: {bad}")
    same = draw(seed)
    rep.check(all(np.array_equal(batch.per_rep[k], same.per_rep[k], equal_nan=True) for k in batch.per_rep),
              "draw_batch: the same seed gave different data")
    other = draw(seed + 1)
    rep.check(any(not np.array_equal(batch.per_rep[k], other.per_rep[k], equal_nan=True)
                  for k in batch.per_rep if k != "present"),
              "draw_batch: a different seed gave the same data")
    padded = "present" in batch.per_rep
    missing = bool(batch.info.get("missing"))
    for i in range(size):
        row = _check_table(batch.replicate(i), rep, f"draw_batch(...).replicate({i})", missing)
        if row is None or one is None:
            continue
        if set(row) != set(one):
            rep.fail(f"replicate({i}) has columns {sorted(row)}, a per-replicate draw {sorted(one)}")
            break
        kinds = {k: (row[k].dtype.kind, one[k].dtype.kind) for k in row
                 if (row[k].dtype.kind in "iub") != (one[k].dtype.kind in "iub")}
        if kinds:
            rep.fail(f"replicate({i}) and a per-replicate draw differ in column types (kind): {kinds}")
            break
        if not padded and len(next(iter(row.values()))) != len(next(iter(one.values()))):
            rep.fail(f"replicate({i}) has {len(next(iter(row.values())))} rows, a per-replicate draw "
                     f"{len(next(iter(one.values())))}, though the batch has no `present` padding")
            break


# -- analyses ------------------------------------------------------------------------------------

class _Outcome(tuple):
    """(result or None, exception or None, whether the call warned of fit trouble, output problem or "")."""

    res = property(lambda self: self[0])
    exc = property(lambda self: self[1])
    warned = property(lambda self: self[2])
    bad_output = property(lambda self: self[3])


def _raw(analysis, data):
    """What the analysis returns, before :func:`as_test_result` (a user function's own return value)."""
    from .functions import FunctionAnalysis

    if isinstance(analysis, FunctionAnalysis):
        return analysis._fn(data, **analysis.get_params())
    return analysis(data)


def _result(analysis, data) -> _Outcome:
    bad = ""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            raw = _raw(analysis, data)
        except Exception as e:
            res, exc = None, e
        else:
            try:
                res, exc = as_test_result(raw), None
            except Exception as e:  # the engine counts it, but the output breaks the contract
                res, exc, bad = None, e, f"{type(e).__name__}: {e}"
    warned = any(not issubclass(w.category, IGNORED_WARNINGS) for w in caught)
    return _Outcome((res, exc, warned, bad))


def _check_output(res: TestResult, rep: _Report, where: str, indicators: bool = False) -> None:
    p = res.pvalue
    if not rep.check(isinstance(p, float), f"{where}: the p-value is a {type(p).__name__}, not a number"):
        return
    rep.check(math.isnan(p) or 0.0 <= p <= 1.0, f"{where}: p-value {p!r} is outside [0, 1]")
    for f in FIELDS:
        v = getattr(res, f)
        rep.check(isinstance(v, float), f"{where}: `{f}` is a {type(v).__name__}, not a number")
    lo, hi = res.ci_low, res.ci_high
    if math.isfinite(lo) and math.isfinite(hi):
        rep.check(lo <= hi, f"{where}: ci_low {lo!r} > ci_high {hi!r}")
    if res.pvalues is not None:
        pv = np.asarray(res.pvalues, float)
        if rep.check(pv.ndim == 1 and (not res.names or pv.size == len(res.names)),
                     f"{where}: `pvalues` {pv.shape} does not match `names` {res.names}"):
            ok = np.isfinite(pv)
            rep.check(bool(np.all((pv[ok] >= 0) & (pv[ok] <= 1))), f"{where}: adjusted p-values outside [0, 1]")
            if ok.all() and math.isfinite(p) and not indicators:  # stopping indicators are no hypotheses
                rep.check(math.isclose(p, float(pv.min()), rel_tol=1e-12, abs_tol=1e-15),
                          f"{where}: the primary p-value {p!r} is not the smallest adjusted one {pv.min()!r}")


def _same_result(a: TestResult, b: TestResult) -> bool:
    for f in FIELDS:
        x, y = getattr(a, f), getattr(b, f)
        if not (x == y or (math.isnan(x) and math.isnan(y))):
            return False
    if (a.pvalues is None) != (b.pvalues is None):
        return False
    return a.pvalues is None or np.array_equal(a.pvalues, b.pvalues, equal_nan=True)


def _draw_batch_or_list(proc, size: int, seed: int):
    rng = np.random.default_rng(seed)
    if proc.has_batch:
        batch = proc.draw_batch(rng, size)
        return batch, [batch.replicate(i) for i in range(size)]
    return None, [proc(rng) for _ in range(size)]


def check_analysis(analysis, process=None, *, size: int = 6, seed: int = 20261202, rtol: float = 1e-7,
                   atol: float = 1e-12) -> dict[str, Any]:
    """Check that ``analysis`` honours the analysis contract on data from ``process``.

    Returns what was checked: ``replicates``, ``failed`` (replicates the
    per-replicate path could not analyse), and ``batch_compared`` /
    ``batch_compared_missing`` (replicates on which the batch path was compared
    with the per-replicate path, on the data as drawn / with missing outcomes;
    None when the batch path did not apply).

    Parameters
    ----------
    analysis : Analysis or callable ``data -> p-value | result``
    process : Process or callable, optional
        Where the data come from (default :func:`default_process`); it must
        give the layout the analysis expects.
    size : int
        Replicates analysed (keep it small).
    seed : int
        Seed of the data.
    rtol, atol : float
        Tolerance of "the batch path equals the per-replicate path".
    """
    an = as_analysis(analysis)
    proc = as_process(process if process is not None else default_process())
    rep = _Report(an)
    _check_value(an, rep)
    drawn = rep.guard(f"drawing from {_label(proc)}", _draw_batch_or_list, proc, size, seed)
    if drawn is None:
        rep.done()
    batch, data = drawn
    results = []
    for i, d in enumerate(data):
        with _GlobalRandom() as g:
            outcome = _result(an, d)
        rep.check(not g.touched, f"replicate {i}: the analysis used numpy's or Python's global random state")
        results.append(outcome)
        res = outcome.res
        rep.check(not outcome.bad_output, f"replicate {i}: the output is not a result ({outcome.bad_output})")
        if res is not None:
            _check_output(res, rep, f"replicate {i}", getattr(an, "stopping_indicators", False))
            again = _result(an, d).res
            rep.check(again is not None and _same_result(res, again), f"replicate {i}: the same data gave "
                                                                     "another result")
    if all(o.res is None for o in results):
        exc = results[0].exc
        rep.fail(f"raised on every replicate of {_label(proc)} (first: {type(exc).__name__}: {exc}); "
                 "pair it with a process of the layout it analyses")
        rep.done()
    if "seed" in an.get_params(deep=False) and isinstance(an.get_params(deep=False)["seed"], int):
        other = an.replace(seed=an.get_params(deep=False)["seed"] + 1)
        changed = any(o.res is not None and (r := _result(other, d).res) is not None and not _same_result(o.res, r)
                      for o, d in zip(results, data))
        rep.check(changed, "a different `seed` gave the same results on every replicate")
    info = {"replicates": len(data), "failed": sum(o.res is None for o in results),
            "batch_compared": None, "batch_compared_missing": None}
    if batch is not None:
        info["batch_compared"] = _check_batch_path(an, batch, results, rep, rtol, atol, "")
    info["batch_compared_missing"] = _check_missing(an, proc, batch, data, rep, rtol, atol)
    rep.done()
    return info


def _check_batch_path(an, batch, results, rep: _Report, rtol, atol, where: str) -> int | None:
    """Compare the batch path with the per-replicate results; the number of replicates compared
    (None when the analysis has no batch path for this batch)."""
    if not an.has_batch:
        return None
    try:
        ok = bool(an.supports_batch(batch))
    except Exception as exc:
        rep.fail(f"{where}supports_batch raised {type(exc).__name__}: {exc}; return False instead")
        return None
    if not ok:
        return None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            out = an.batch(batch)
        except Exception as exc:
            rep.fail(f"{where}batch() raised {type(exc).__name__}: {exc} on a batch supports_batch() accepted")
            return 0
    from collections.abc import Mapping

    if not rep.check(isinstance(out, Mapping) and "pvalue" in out, f"{where}batch() should return a "
                                                                   "BatchResult or a dict with 'pvalue'"):
        return 0
    n = batch.size
    cols = {}
    for f in FIELDS:
        if f in out:
            try:
                cols[f] = np.broadcast_to(np.asarray(out[f], float), (n,))
            except ValueError:
                rep.fail(f"{where}batch()['{f}'] has shape {np.shape(out[f])}, not ({n},)")
                return 0
    trouble = np.zeros(n, bool)
    for mask in (out.get("trouble") or {}).values():
        trouble |= np.asarray(mask, bool)
    compared = 0
    for i, (res, exc, warned, _) in enumerate(results):
        if warned or trouble[i]:
            continue  # fit trouble on either path: the engine records it, values are not compared
        compared += 1
        if res is None or not math.isfinite(res.pvalue):
            p = float(cols["pvalue"][i])
            rep.check(not math.isfinite(p) or trouble[i],
                      f"{where}replicate {i}: the per-replicate path "
                      f"{'raised ' + type(exc).__name__ if exc is not None else 'gave p = nan'} but batch() gives "
                      f"p = {p!r} unflagged")
            continue
        for f in FIELDS:
            mine = getattr(res, f)
            if f not in cols:
                rep.check(not math.isfinite(mine), f"{where}batch() gives no `{f}` but the per-replicate path "
                                                   f"does ({mine!r} on replicate {i})")
                continue
            theirs = float(cols[f][i])
            if math.isnan(mine) and math.isnan(theirs):
                continue
            if not (np.isclose(theirs, mine, rtol=rtol, atol=atol) or theirs == mine):
                rep.fail(f"{where}replicate {i}: `{f}` is {theirs!r} on the batch path and {mine!r} per replicate "
                         f"(rtol {rtol:g})")
        if res.pvalues is not None and "pvalues" in out:
            pv = np.asarray(out["pvalues"], float)[i]
            if not np.allclose(pv, res.pvalues, rtol=rtol, atol=atol, equal_nan=True):
                rep.fail(f"{where}replicate {i}: adjusted p-values {pv} on the batch path, {res.pvalues} per "
                         "replicate")
    rep.check(compared > 0, f"{where}no replicate could be compared: every one had fit trouble on one path")
    return compared


def _with_missing(table: dict, rows: np.ndarray) -> dict:
    out = {k: np.array(v, copy=True) for k, v in table.items()}
    y = out["y"].astype(float)
    y[rows] = np.nan
    out["y"] = y
    if "observed" in out:
        obs = out["observed"].copy()
        obs[rows] = 0
        out["observed"] = obs
    return out


def _check_missing(an, proc, batch, data, rep: _Report, rtol, atol) -> int | None:
    """Some outcomes set to NaN: a p-value in [0, 1] or NaN, or a raised (counted) failure."""
    if "y" not in _as_table(data[0]):
        return None  # no outcome column to blank (e.g. time-to-event data)
    blanked = []
    for i, d in enumerate(data):
        t = _as_table(d)
        m = len(t["y"])
        rows = np.array(sorted({0, m // 2, m - 1})) if m >= 6 else np.array([0])
        nd = _with_missing(t, rows)
        blanked.append(nd)
        outcome = _result(an, nd)
        res = outcome.res
        rep.check(not outcome.bad_output, f"replicate {i} with missing outcomes: the output is not a result "
                                          f"({outcome.bad_output})")
        if res is not None:
            _check_output(res, rep, f"replicate {i} with missing outcomes", getattr(an, "stopping_indicators", False))
    if batch is None or not an.has_batch:
        return None
    from .processes.base import Batch

    y = np.array(batch.per_rep.get("y", np.empty(0)), float, copy=True)
    if y.ndim != 2:
        return None
    per_rep = {k: np.array(v, copy=True) for k, v in batch.per_rep.items()}
    shared = dict(batch.shared)
    present = per_rep.get("present")
    for i in range(batch.size):
        idx = np.flatnonzero(present[i]) if present is not None else np.arange(y.shape[1])
        m = idx.size
        rows = idx[np.array(sorted({0, m // 2, m - 1})) if m >= 6 else np.array([0])]
        y[i, rows] = np.nan
        if "observed" in per_rep:
            per_rep["observed"][i, rows] = 0
    per_rep["y"] = y
    if "observed" in shared:  # make it per replicate so it can mark the blanks
        obs = np.broadcast_to(shared.pop("observed"), y.shape).copy()
        obs[np.isnan(y)] = 0
        per_rep["observed"] = obs
    nb = Batch(batch.size, per_rep, shared, {**batch.info, "missing": True})
    results = [_result(an, nb.replicate(i)) for i in range(nb.size)]
    return _check_batch_path(an, nb, results, rep, rtol, atol, "with missing outcomes: ")
