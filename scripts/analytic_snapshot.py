"""Closed-form power of many (process, analysis) pairs, as JSON: a before/after check for refactors.

Run it on two checkouts and compare the files::

    PYTHONPATH=/path/to/old python scripts/analytic_snapshot.py old.json
    PYTHONPATH=/path/to/new python scripts/analytic_snapshot.py new.json
    python scripts/analytic_snapshot.py --compare old.json new.json

Covered: every pair of the processes and analyses listed below (built-in names, several
parameter variants each) at alpha 0.05 and 0.01, their null scenarios, every point of the
validation battery (``simpower check``), and every bundled scenario file (``scenarios/``)
at its own values, its null, and a range of sizes. Only closed-form numbers are computed:
nothing is simulated.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

PROCESSES = {
    "one_sample": ("normal_one_sample", {"n": 12, "effect": 0.4, "sd": 1.5}),
    "one_sample/null": ("normal_one_sample", {"n": 12, "effect": 0.0}),
    "one_sample/missing": ("normal_one_sample", {"n": 12, "effect": 0.4, "missing": {"type": "mcar", "rate": 0.1}}),
    "paired": ("normal_paired", {"n": 12, "effect": 0.4, "sd0": 1.0, "sd1": 1.5, "corr": 0.3}),
    "paired/missing": ("normal_paired", {"n": 12, "effect": 0.4, "missing": {"type": "mcar", "rate": 0.1}}),
    "normal_two_arm": ("normal_two_arm", {"n": 10, "effect": 0.5, "sd": 2.0, "mean0": 1.0}),
    "normal_two_arm/ratio": ("normal_two_arm", {"n": 10, "effect": 0.5, "ratio": 2.0}),
    "normal_two_arm/n1": ("normal_two_arm", {"n": 10, "n1": 17, "effect": 0.7}),
    "normal_two_arm/sd_ratio": ("normal_two_arm", {"n": 10, "effect": 0.5, "sd_ratio": 2.0, "ratio": 1.5}),
    "normal_two_arm/missing": ("normal_two_arm", {"n": 10, "effect": 0.5, "missing": {"type": "mcar", "rate": 0.1}}),
    "two_arm": ("two_arm", {"n": 10, "effect": 0.5, "outcome": {"type": "normal", "sd": 2.0}}),
    "two_arm/d": ("two_arm", {"n": 10, "effect": 0.5, "effect_type": "d", "ratio": 2.0,
                              "outcome": {"type": "normal", "sd": 2.0}}),
    "two_arm/sd_ratio": ("two_arm", {"n": 10, "effect": 0.5, "sd_ratio": 1.5}),
    "two_arm/baseline": ("two_arm", {"n": 10, "effect": 0.5, "baseline_corr": 0.5}),
    "two_arm/lognormal": ("two_arm", {"n": 10, "outcome": {"type": "lognormal", "median": 1.0, "cv": 0.5},
                                      "effect": 1.3, "effect_type": "ratio"}),
    "two_arm/missing": ("two_arm", {"n": 10, "effect": 0.5, "missing": {"type": "mcar", "rate": 0.2}}),
    "trial/arms": ("trial", {"design": {"type": "arms", "n": 10, "n1": 14}, "effect": 0.5}),
    "trial/arms/sd": ("trial", {"design": {"type": "arms", "n": 10}, "effect": 0.5, "sd_ratio": 1.5,
                                "outcome": {"type": "normal", "sd": 2.0, "mean": 3.0}}),
    "trial/arms/lognormal": ("trial", {"design": {"type": "arms", "n": 10},
                                       "outcome": {"type": "lognormal", "median": 1.0, "cv": 0.5}, "effect": 0.3}),
    "trial/arms/missing": ("trial", {"design": {"type": "arms", "n": 10}, "effect": 0.5,
                                     "missing": {"type": "mcar", "rate": 0.2}}),
    "trial/clusters": ("trial", {"design": {"type": "clusters", "clusters": 6, "cluster_size": 8, "icc": 0.05},
                                 "effect": 0.5, "outcome": {"type": "normal", "sd": 2.0}}),
    "trial/clusters/cv": ("trial", {"design": {"type": "clusters", "clusters": 6, "cluster_size": 8,
                                               "cluster_size_cv": 0.4, "icc": 0.05}, "effect": 0.5}),
    "trial/clusters/individual": ("trial", {"design": {"type": "clusters", "clusters": 6, "cluster_size": 8,
                                                       "icc": 0.05, "randomise": "individual"}, "effect": 0.5}),
    "trial/clusters/lognormal": ("trial", {"design": {"type": "clusters", "clusters": 6, "cluster_size": 8,
                                                      "icc": 0.05},
                                           "outcome": {"type": "lognormal", "median": 1.0, "cv": 0.5}, "effect": 0.3}),
    "binary/or": ("binary_two_arm", {"n": 40, "p0": 0.3, "odds_ratio": 2.0}),
    "binary/rr": ("binary_two_arm", {"n": 40, "p0": 0.2, "risk_ratio": 1.8, "ratio": 2.0}),
    "binary/rd": ("binary_two_arm", {"n": 40, "n1": 55, "p0": 0.4, "risk_difference": -0.15}),
    "binary/missing": ("binary_two_arm", {"n": 40, "p0": 0.3, "odds_ratio": 2.0,
                                          "missing": {"type": "mcar", "rate": 0.2}}),
    "survival": ("survival_two_arm", {"n": 60, "median": 1.0, "hazard_ratio": 0.6, "follow_up": 2.0}),
    "survival/accrual": ("survival_two_arm", {"n": 60, "ratio": 2.0, "median": 12.0, "hazard_ratio": 0.7,
                                              "accrual": 12.0, "follow_up": 12.0}),
    "cluster_trial": ("cluster_trial", {"clusters": 6, "cluster_size": 8, "icc": 0.05, "effect": 0.5, "sd": 2.0}),
    "cluster_trial/cv": ("cluster_trial", {"clusters": 6, "cluster_size": 8, "cluster_size_cv": 0.4, "icc": 0.05,
                                           "effect": 0.5}),
    "cluster_trial/individual": ("cluster_trial", {"clusters": 6, "cluster_size": 8, "icc": 0.05, "effect": 0.5,
                                                   "randomise": "individual"}),
    "cluster_trial/missing": ("cluster_trial", {"clusters": 6, "cluster_size": 8, "icc": 0.05, "effect": 0.5,
                                                "missing": {"type": "mcar", "rate": 0.1}}),
    "counts": ("count_two_arm", {"n": 15, "rate0": 2.0, "rate_ratio": 1.5, "dispersion": 0.5}),
    "multi_arm": ("multi_arm", {"effects": [0.0, 0.3, 0.6], "n": 8}),
    "repeated": ("repeated_measures", {"n": 8, "visits": 3, "rho": 0.5, "effect": 0.5}),
}

ANALYSES = {
    "t_test": {"type": "t_test"},
    "t_test/greater": {"type": "t_test", "alternative": "greater"},
    "t_test/null_mean": {"type": "t_test", "null_mean": 0.2, "alternative": "less"},
    "welch_t": {"type": "welch_t"},
    "welch_t/less": {"type": "welch_t", "alternative": "less", "null_mean": -0.1},
    "paired_t": {"type": "paired_t"},
    "paired_t/null_mean": {"type": "paired_t", "null_mean": 0.1, "alternative": "greater"},
    "z_test": {"type": "z_test"},
    "z_test/sd1.5": {"type": "z_test", "sd": 1.5, "alternative": "greater"},
    "z_test/sd2": {"type": "z_test", "sd": 2.0},
    "z_test/sd1": {"type": "z_test", "sd": 1.0, "sd1": 2.0},
    "z_test/sd1b": {"type": "z_test", "sd": 1.0, "sd1": 1.5},
    "tost": {"type": "tost", "margin": 0.8},
    "tost/pooled": {"type": "tost", "margin": 0.8, "equal_var": True},
    "tost/range": {"type": "tost", "low": -0.3, "high": 1.2, "equal_var": True},
    "non_inferiority": {"type": "non_inferiority", "margin": 0.5},
    "non_inferiority/pooled": {"type": "non_inferiority", "margin": 0.5, "equal_var": True},
    "non_inferiority/lower": {"type": "non_inferiority", "margin": 0.5, "higher_is_better": False},
    "two_proportions": {"type": "two_proportions"},
    "two_proportions/cc": {"type": "two_proportions", "continuity": True, "alternative": "less"},
    "chi_square": {"type": "chi_square"},
    "fisher_exact": {"type": "fisher_exact"},
    "logistic": {"type": "logistic"},
    "logrank": {"type": "logrank"},
    "logrank/less": {"type": "logrank", "alternative": "less"},
    "cox": {"type": "cox"},
    "cluster_means_t": {"type": "cluster_means_t"},
    "cluster_means_t/size": {"type": "cluster_means_t", "weights": "size", "alternative": "greater"},
    "mixed_model": {"type": "mixed_model"},
    "gee": {"type": "gee"},
    "mann_whitney": {"type": "mann_whitney"},
    "wilcoxon_signed_rank": {"type": "wilcoxon_signed_rank"},
    "ols": {"type": "ols"},
    "ancova": {"type": "ancova"},
    "log_t": {"type": "log_t"},
    "negbin_glm": {"type": "negbin_glm"},
    "poisson_glm": {"type": "poisson_glm"},
    "final_visit_t": {"type": "final_visit_t"},
    "permutation_test": {"type": "permutation_test", "n_resamples": 199},
    "bootstrap_ci": {"type": "bootstrap_ci", "n_resamples": 199},
}


def _num(v):
    return None if v is None else float(v)


def _pair(sp, proc, an, alpha):
    try:
        sc = sp.Scenario(proc, an, alpha=alpha)
    except Exception as exc:  # a pair the scenario refuses
        return f"refused: {type(exc).__name__}"
    return {"power": _num(sc.analytic_power()[sc.primary]), "exact": bool(an.analytic_exact)}


def snapshot() -> dict:
    import simpower as sp

    try:
        from simpower import validation
    except ImportError:  # the battery's later home
        from simpower.planning import battery as validation
    from simpower.registry import build
    from simpower.scenario_files import load

    out: dict = {"pairs": {}, "battery": {}, "files": {}}
    for pk, (ptype, pspec) in PROCESSES.items():
        proc = build("process", {"type": ptype, **pspec})
        variants = {"": proc}
        try:
            variants["@null"] = proc.null()
        except Exception:
            pass
        for ak, aspec in ANALYSES.items():
            an = build("analysis", dict(aspec))
            for vk, p in variants.items():
                for alpha in (0.05, 0.01):
                    out["pairs"][f"{pk}{vk} | {ak} | {alpha}"] = _pair(sp, p, an, alpha)
    for quick in (False, True):
        for row in validation.battery_grid(quick):
            sc = validation._scenario(row)
            key = json.dumps(row, sort_keys=True)
            out["battery"][key] = {"power": _num(sc.analytic_power()[sc.primary]),
                                   "exact": bool(sc.analyses[sc.primary].analytic_exact)}
    root = Path(__file__).resolve().parent.parent / "scenarios"
    for path in sorted(root.glob("*.toml")):
        sc = load(path).scenario
        rows = {"as given": sc}
        try:
            rows["null"] = sc.with_params(**{sc.process.effect_param: sc.process.null_value()})
        except Exception:
            pass
        size = getattr(sc.process, "size_param", None)
        if size:
            for v in (2, 3, 5, 8, 13, 20, 40, 80, 150):
                try:
                    rows[f"{size}={v}"] = sc.with_params(**{size: v})
                except Exception as exc:
                    rows[f"{size}={v}"] = f"refused: {type(exc).__name__}"
        for rk, s in rows.items():
            if isinstance(s, str):
                out["files"][f"{path.name} | {rk}"] = s
                continue
            ap = s.analytic_power()
            out["files"][f"{path.name} | {rk}"] = {
                name: {"power": _num(ap[name]), "exact": bool(a.analytic_exact)} for name, a in s.analyses.items()}
    return out


def compare(a: dict, b: dict) -> int:
    diffs = 0
    for part in sorted(set(a) | set(b)):
        for key in sorted(set(a.get(part, {})) | set(b.get(part, {}))):
            x, y = a.get(part, {}).get(key, "absent"), b.get(part, {}).get(key, "absent")
            if x != y:
                diffs += 1
                print(f"{part}: {key}\n    before {x}\n    after  {y}")
    counts = {part: len(v) for part, v in b.items()}
    have = sum(1 for part in b.values() for v in part.values()
               if isinstance(v, dict) and any(isinstance(w, dict) and w.get("power") is not None
                                              for w in ([v] if "power" in v else v.values())))
    print(f"{diffs} differences; entries per part {counts}; {have} with a closed-form number")
    return diffs


if __name__ == "__main__":
    if sys.argv[1] == "--compare":
        sys.exit(1 if compare(*(json.loads(Path(p).read_text()) for p in sys.argv[2:4])) else 0)
    Path(sys.argv[1]).write_text(json.dumps(snapshot(), indent=1, sort_keys=True))
