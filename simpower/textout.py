"""Plain-text rendering of results for the terminal."""

from __future__ import annotations

import math

from .answer import CAUTION, round_to_mcse, run_block


def _f(x, nd=4):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.{nd}f}"


def _m(mcse) -> str:
    """An MCSE to two significant digits."""
    if mcse is None or not math.isfinite(mcse):
        return "-"
    return f"{mcse:.2g}"


def _r(x, mcse):
    """A rate rounded to the digits its MCSE supports."""
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return round_to_mcse(x, mcse)


def format_result(res, verbose: bool = False) -> str:
    """The terminal summary of a run: the answer first, then each analysis in words.

    ``verbose`` adds the implementation details (execution path, chunk size,
    wall time) that do not change the numbers.
    """
    sc = res.scenario
    lines = []
    if sc.name:
        lines.append(f"Scenario: {sc.name}")
    try:
        lines += [run_block(res).text(), ""]
    except Exception:  # a user process may not describe itself; the per-analysis lines follow anyway
        lines += sc.describe()
    run_line = f"Replicates: {res.reps}  seed: {res.seed}"
    if verbose:
        run_line += f"  chunk size: {res.chunk_size}  time: {res.seconds:.2f} s"
    lines.append(run_line)
    lines.append("")
    for name, s in res.summaries.items():
        m = s["mcse"]
        lines.append(f"[{name}]" + (f"  execution path: {s['path']}" if verbose else ""))
        lines.append(f"  Power {_r(s['power'], m)}  MCSE {_m(m)}  95% interval {_r(s['ci_low'], m)} to "
                     f"{_r(s['ci_high'], m)}  ({s['rejections']} of {s['n_ok']} usable replicates rejected)")
        if s.get("analytic_power") is not None:
            flag = "  <-- FLAG: more than 3 MCSE apart" if s.get("cross_check_flag") else ""
            kind = "Closed-form power" if s.get("analytic_exact", True) else "Approximate closed-form power"
            lines.append(f"  {kind} {_r(s['analytic_power'], m)}  distance {s['distance_mcse']:+.2f} MCSE{flag}")
        if s["n_failed"] or s["n_fit_trouble"]:
            fl = ", ".join(f"{c}: {n}" for c, n in s["failures"].items())
            lines.append(f"  Failed replicates {s['n_failed']} of {s['reps']} ({fl}); policy for fit trouble: "
                         f"{s['fit_trouble_policy']}; counting failures as non-rejections: "
                         f"power {_f(s['power_failures_as_nonrejections'])}")
            msgs = res.messages.get(name, {})
            for c, m in list(msgs.items())[:5]:
                kind = c.partition(":")[2]
                if kind and m.startswith(kind + ": "):  # the cause already names the type
                    m = m[len(kind) + 2:]
                lines.append(f"    first {c}: {m}")
        else:
            lines.append("  Failed replicates: 0")
        if "mean_estimate" in s:
            def pair(label, key):
                se = s.get(f"{key}_mcse")
                return f"{label} {_r(s.get(key), se)} (MCSE {_m(se)})"

            parts = [pair("Estimate: mean", "mean_estimate")]
            parts += [pair(lab, key) for lab, key in (("bias", "bias"), ("empirical SE", "empirical_se"),
                                                       ("model SE", "model_se"), ("coverage", "coverage")) if key in s]
            lines.append("  " + "; ".join(parts))
        an = sc.analyses.get(name)
        if getattr(an, "stopping_indicators", False):  # a group-sequential design: its per-look table
            lines += ["  " + line for line in an.looks_lines(s, sc.process, name)]
        elif "per_hypothesis" in s:
            for h, v in s["per_hypothesis"].items():
                lines.append(f"    {h}: power {_f(v['power'])} (MCSE {_f(v['mcse'])})")
    comps = res.comparisons()
    if comps:
        lines.append("")
        lines.append("Paired differences in power (same simulated data sets):")
        for c in comps:
            lines.append(f"  {c['a']} - {c['b']}: {c['difference']:+.4f} (MCSE {c['mcse']:.4f}); "
                         f"{c['a']} rejects, {c['b']} does not: {c['discordant_a_only']}; "
                         f"{c['b']} rejects, {c['a']} does not: {c['discordant_b_only']}")
    lines.append("")
    lines.append("Caution: " + CAUTION)
    return "\n".join(lines)
