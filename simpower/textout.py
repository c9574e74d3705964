"""Plain-text rendering of results for the terminal."""

from __future__ import annotations

import math

CAUTION = ("Results rest on the assumptions entered. A qualified statistician, the ethics committee and the "
           "applicable regulatory guidance (e.g. ICH E9) decide the sample size; local rules prevail.")


def _f(x, nd=4):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.{nd}f}"


def format_result(res) -> str:
    sc = res.scenario
    lines = []
    if sc.name:
        lines.append(f"Scenario: {sc.name}")
    lines += sc.describe()
    lines.append(f"Replicates: {res.reps}  seed: {res.seed}  chunk size: {res.chunk_size}  "
                 f"time: {res.seconds:.2f} s")
    lines.append("")
    for name, s in res.summaries.items():
        lines.append(f"[{name}]  path: {s['path']}")
        lines.append(f"  power {_f(s['power'])}  MCSE {_f(s['mcse'])}  95% interval [{_f(s['ci_low'])}, {_f(s['ci_high'])}]"
                     f"  ({s['rejections']} of {s['n_ok']} usable replicates rejected)")
        if s.get("analytic_power") is not None:
            flag = "  <-- FLAG: more than 3 MCSE apart" if s.get("cross_check_flag") else ""
            kind = "analytic power" if s.get("analytic_exact", True) else "approximate closed-form power"
            lines.append(f"  {kind} {_f(s['analytic_power'])}  distance {s['distance_mcse']:+.2f} MCSE{flag}")
        if s["n_failed"] or s["n_fit_trouble"]:
            fl = ", ".join(f"{c}: {n}" for c, n in s["failures"].items())
            lines.append(f"  failures {s['n_failed']} of {s['reps']} ({fl}); policy for fit trouble: "
                         f"{s['fit_trouble_policy']}; counting failures as non-rejections: "
                         f"power {_f(s['power_failures_as_nonrejections'])}")
            msgs = res.messages.get(name, {})
            for c, m in list(msgs.items())[:5]:
                kind = c.partition(":")[2]
                if kind and m.startswith(kind + ": "):  # the cause already names the type
                    m = m[len(kind) + 2:]
                lines.append(f"    first {c}: {m}")
        else:
            lines.append("  failures 0")
        if "mean_estimate" in s:
            est = f"  estimate mean {_f(s['mean_estimate'])} (MCSE {_f(s.get('mean_estimate_mcse'))})"
            if "bias" in s:
                est += f"  bias {_f(s['bias'])} ({_f(s['bias_mcse'])})"
            est += f"  empirical SE {_f(s.get('empirical_se'))} ({_f(s.get('empirical_se_mcse'))})"
            if "model_se" in s:
                est += f"  model SE {_f(s['model_se'])} ({_f(s['model_se_mcse'])})"
            if "coverage" in s:
                est += f"  coverage {_f(s['coverage'])} ({_f(s['coverage_mcse'])})"
            lines.append(est)
        if "per_hypothesis" in s:
            for h, v in s["per_hypothesis"].items():
                lines.append(f"    {h}: power {_f(v['power'])} (MCSE {_f(v['mcse'])})")
    comps = res.comparisons()
    if comps:
        lines.append("")
        lines.append("Paired differences in power (same simulated data sets):")
        for c in comps:
            lines.append(f"  {c['a']} - {c['b']}: {c['difference']:+.4f} (MCSE {c['mcse']:.4f}; "
                         f"discordant {c['discordant_a_only']} / {c['discordant_b_only']})")
    lines.append("")
    lines.append("Caution: " + CAUTION)
    return "\n".join(lines)
