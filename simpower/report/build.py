"""Assemble the planning report: assumptions, results, plots, type I check, failures, MC error, cautions, manifest."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from ..textout import CAUTION
from . import plots
from ..answer import answer_block, justification, round_to_mcse
from .document import Document, code, literal
from ..labels import readable
from ..planning.sweepresult import required_by_curve
from .manifest import manifest_rows

SWEEP_SHOWN = ("analysis", "power", "mcse", "ci_low", "ci_high", "reps", "failures", "analytic_power")
NULL_SHOWN = ("analysis", "null_at", "null_effect", "alpha", "type1_error", "mcse", "ci_low", "ci_high", "reps",
              "failures", "analytic_type1", "meets_bradley")


def _plain_params(scenario) -> pd.DataFrame:
    rows = []
    for k, v in scenario.get_params().items():
        if hasattr(v, "spec"):
            v = v.spec().get("type", "")
        rows.append((k, v))
    return pd.DataFrame(rows, columns=["Parameter", "Value"])


def _answer(doc: Document, block, just) -> None:
    """The answer block and the justification paragraph: the report's first screen."""
    doc.heading("Answer")
    doc.para("**" + literal(f"{block.heading}: {block.answer}") + "**")
    doc.bullets([literal(f"{k}: {v}") for k, v in block.rows]
                + [literal(f"{block.assumptions_label}: " + (block.assumptions[0] if block.assumptions else "-")
                           + " (all of them under 'Assumptions' below)")])
    doc.heading("Sample-size justification (for the protocol)")
    doc.para(literal(just.paragraph))
    doc.para("References:")
    doc.bullets([literal(r) for r in just.references])
    doc.para(literal("Caution: " + just.caution))


def _paths(paths: dict[str, str]) -> list[str]:
    return [f"{code(a)}: {literal(p)} path" for a, p in paths.items()]


def _describe(scenario) -> list[str]:
    """``scenario.describe()`` as inline markup: analysis labels as code, everything else as typed."""
    lines = scenario.describe()
    out = []
    for i, line in enumerate(lines):
        label = list(scenario.analyses)[i - 1] if 1 <= i <= len(scenario.analyses) else None
        head = f"Analysis `{label}`: "
        if label is not None and line.startswith(head):
            out.append(f"Analysis {code(label)}: {literal(line[len(head):])}")
        else:
            out.append(literal(line))
    return out


def _failures(frames: list[tuple[str, pd.DataFrame]]) -> list[str]:
    lines = []
    for label, t in frames:
        if t is None or "failures" not in t:
            continue
        total = int(t["failures"].sum())
        reps = int(t["reps"].sum())
        causes = "; ".join(sorted({c for c in t.get("failure_causes", pd.Series(dtype=str)) if c}))
        text = f"{label}: {total} failed replicates of {reps}" + (f" (causes: {causes})" if causes else "")
        lines.append(literal(text))
    return lines


def _run_failures(run) -> pd.DataFrame | None:
    if run is None:
        return None
    s = run.summary()
    return pd.DataFrame({"failures": s["n_failed"], "reps": s["reps"], "failure_causes": s["failures"]})


def _mc_error(frames: list[tuple[str, pd.DataFrame, str]]) -> list[str]:
    lines = []
    for label, t, col in frames:
        if t is None or t.empty or "mcse" not in t:
            continue
        lines.append(literal(f"{label}: {int(t['reps'].min())} to {int(t['reps'].max())} replicates per point; "
                             f"MCSE of {col} at most {t['mcse'].max():.4f} (median {t['mcse'].median():.4f})."))
    return lines


def _looks(doc: Document, run, out: Path) -> None:
    """A section per group-sequential analysis: its per-look table and a plot of boundaries and stopping."""
    from ..analyses.groupseq import arm_sizes_of, looks_table, lost_text

    for name, an in run.scenario.analyses.items():
        if not getattr(an, "stopping_indicators", False) or name not in run.summaries:
            continue
        rows, overall = looks_table(an, run.summaries[name], arm_sizes_of(run.scenario.process))
        doc.heading(literal(f"Group-sequential design of {name}"))
        line = (f"{overall['method']}; overall rejection rate {overall['rejection']:.4f} (MCSE "
                f"{overall['rejection_mcse']:.4f}); expected sample size {overall['expected_n']:.4g} (MCSE "
                f"{overall['expected_n_mcse']:.2g}) of {overall['max_n']:g} {overall['expected_n_unit']}")
        if overall.get("bias") is not None:
            line += f"; bias of the naive estimate at stopping {overall['bias']:.4g} (MCSE {overall['bias_mcse']:.2g})"
        doc.para(literal(line + lost_text(overall) + "."))
        doc.table(pd.DataFrame(rows).rename(columns={
            "look": "Look", "fraction": "Information fraction", "n": "Participants", "efficacy_z": "Efficacy z",
            "nominal_p": "Nominal p", "futility_z": "Futility z", "alpha_spent": "Alpha spent (cumulative)",
            "stop_efficacy": "Stopped for efficacy", "stop_efficacy_mcse": "MCSE",
            "stop_futility": "Stopped for futility", "stop_futility_mcse": "MCSE (futility)"}),
            literal(f"Boundaries and simulated stopping proportions per look ({name})"))
        png, svg = plots.save(plots.looks_plot(rows), out / f"looks_{name}")
        doc.figure(png, svg, literal(f"Boundaries and the share of replicates stopping at each look ({name})"))


_PILOT_LABELS = {"units": "Pilot units", "units_per_arm": "Units per arm (control, treatment)", "mean": "Mean",
                 "sd": "SD", "sd_upper_80": "Upper 80% confidence limit of the SD (Browne 1995)"}


def _pilot(doc: Document, scenario) -> None:
    """The pilot data's summary, when the process resamples a pilot: its size, mean and SD, Browne's upper
    limit of the SD, the power at both SDs (shift effects), and the small-pilot caution."""
    process = scenario.process
    summary = getattr(process, "pilot_summary", None)
    if not callable(summary):
        return
    s = summary()
    rows = [{"Quantity": _PILOT_LABELS.get(k, k.replace("_", " ")),
             "Value": ", ".join(str(x) for x in v) if isinstance(v, (list, tuple)) else v}
            for k, v in s.items() if k != "small"]
    doc.heading("Pilot data")
    doc.table(pd.DataFrame(rows), literal("The pilot the trials are resampled from (SD and mean of the pool the "
                                          "control arm is drawn from)"))
    at_upper = getattr(process, "power_at_upper_sd", None)
    powers = at_upper(scenario.alpha) if callable(at_upper) else None
    if powers is not None:
        doc.para(literal(f"Normal-theory t-test power at the pilot SD: {powers[0]:.3f}; at the SD's upper 80% "
                         f"confidence limit: {powers[1]:.3f}. A true SD that large would cost that much power "
                         f"(Browne 1995)."))
    if s.get("small"):
        per_arm = s.get("units_per_arm") or [s.get("units")]
        doc.para(literal(f"Caution: {min(per_arm)} pilot units per arm is fewer than 35, too few to estimate an "
                         f"SD well (Teare et al. 2014); the simulated power inherits the pilot's uncertainty."))


def _estimate_performance(run) -> pd.DataFrame | None:
    """Bias, empirical SE, model SE and coverage per analysis with a known true effect (None: none has one)."""
    t = run.summary()
    rows = []
    for _, r in t.iterrows():
        truth = r.get("true_effect")
        if truth is None or truth != truth or not r.get("n_estimate"):
            continue

        def cell(v, m, digits=3):
            if v is None or v != v:
                return "-"
            if m is None or m != m or m <= 0:
                return f"{v:.{digits}g}"
            return f"{round_to_mcse(float(v), float(m))} ({float(f'{m:.2g}'):g})"

        rows.append({"Analysis": r["analysis"], "True effect": f"{truth:.4g}",
                     "Mean estimate": cell(r["mean_estimate"], r["mean_estimate_mcse"], 4),
                     "Bias": cell(r["bias"], r["bias_mcse"]),
                     "Empirical SE": cell(r["empirical_se"], r["empirical_se_mcse"]),
                     "Model SE": cell(r.get("model_se"), r.get("model_se_mcse")),
                     "Coverage": cell(r.get("coverage"), r.get("coverage_mcse"))})
    return pd.DataFrame(rows) if rows else None


def planning_document(scenario, *, title: str = "", outdir, manifest: dict[str, Any], sweep: pd.DataFrame | None = None,
                      search=None, null: pd.DataFrame | None = None, run=None, x: str | None = None,
                      target: float | None = None, notes: list[str] | None = None, labels=None,
                      assurance=None) -> Document:
    """Build the report's :class:`Document`, writing its figures (PNG and SVG) into ``outdir``."""
    out = Path(outdir)
    doc = Document(literal(title or scenario.name or "Power analysis by simulation"))
    if scenario.description:
        doc.para(literal(scenario.description))
    at, where = scenario, "as given"
    if search is not None:
        _answer(doc, answer_block(search), justification(search, null=null))
        if search.kind == "size":
            try:
                at, where = search.at_answer(), f"at the answer ({search.parameter} = {search.value:g})"
            except Exception:  # a user process may refuse the value
                pass
    elif run is not None:
        _answer(doc, answer_block(run), justification(run, null=null))
    elif sweep is not None:
        _answer(doc, answer_block(sweep, scenario=scenario, target=target, x=x),
                justification(sweep, null=null, scenario=scenario, target=target, x=x))
    doc.heading("Assumptions")
    doc.para("The numbers below hold only under these assumptions about the data and the planned analysis"
             + (f", stated {literal(where)}:" if search is not None else ":"))
    doc.bullets(_describe(at))
    doc.table(_plain_params(at), literal(f"Every parameter of the scenario {where}")
              + (" (a sweep varies the grid's parameters)" if sweep is not None else ""))
    _pilot(doc, at)
    paths: dict[str, str] = {}

    if search is not None:
        doc.heading("Required " + ("sample size" if search.kind == "size" else "minimal detectable effect"))
        doc.para(literal(f"Method: a probit model of power in {search.fit.scale if search.fit else '?'}"
                         f"({search.parameter}) fitted to all simulated replicates, the next replicates placed at the "
                         f"current estimate, stopped when the {search.level:.0%} Monte Carlo (Fieller) interval was "
                         f"within {search.settings.get('rel_tol', 0):.0%} of the estimate; continuous estimate "
                         f"{search.estimate:.4g}."))
        if search.note:
            doc.para(literal("Note: " + search.note))
        png, svg = plots.save(plots.search_plot(search, labels=labels), out / "search")
        doc.figure(png, svg, "Search: simulated power (Wilson intervals), fitted curve, target and answer")
        shown = readable(search.table, "power", ("value", "reps", "power", "mcse", "ci_low", "ci_high",
                                                 "fitted_power", "in_fit"))
        doc.table(shown.rename(columns={"Value": search.parameter}), "Values evaluated by the search")
        paths.update({search.analysis: p for p in search.table["path"].unique()[:1]})

    if sweep is not None:
        grid = [c for c in sweep.attrs.get("grid", []) if c in sweep.columns]
        doc.heading("Sweep over the assumptions")
        doc.table(readable(sweep, "power", tuple(grid + [c for c in SWEEP_SHOWN if c in sweep.columns])),
                  "Power at each grid point (Wilson 95% interval; closed form where it applies)")
        xs = x or (grid[0] if grid else None)
        numeric = xs is not None and pd.api.types.is_numeric_dtype(sweep[xs])
        if numeric:
            req = search.value if (search is not None and search.parameter == xs) else None
            per_curve = required_by_curve(sweep, xs, target) if target is not None else None
            png, svg = plots.save(plots.power_curve(sweep, xs, target=target, required=req, labels=labels,
                                                    per_curve=per_curve), out / "sweep_power")
            doc.figure(png, svg, literal(f"Power against {plots.axis_label(xs, labels)} with 95% Wilson bands"
                                         + (f"; triangles mark where each curve reaches {target:g}" if target else "")))
            if per_curve is not None:
                shown = per_curve.rename(columns={
                    "analysis": "Analysis", "smallest_on_grid": f"Smallest {xs} on the grid reaching {target:g}",
                    "interpolated": f"{xs} interpolated", "low": "from (band)", "high": "to (band)", "note": "Note"})
                doc.para(literal(f"How large for power {target:g}: per analysis and value of the other swept "
                                 f"parameters, the smallest grid value of {xs} that reaches the target, and the value "
                                 f"interpolated linearly between the grid values around the crossing, with the range "
                                 f"where the 95% Wilson band crosses the target. The grid's spacing limits the "
                                 f"precision; a sample-size search gives the value itself."))
                doc.table(shown.round(1), literal(f"Required {xs} per curve for power {target:g}"))
        others = [g for g in grid if g != xs and pd.api.types.is_numeric_dtype(sweep[g])]
        if numeric and others:
            png, svg = plots.save(plots.heatmap(sweep, xs, others[0], target=target, labels=labels),
                                  out / "sweep_heatmap")
            doc.figure(png, svg, literal(f"Power of the primary analysis over {xs} and {others[0]}"))
        for a, p in zip(sweep["analysis"], sweep["path"]):
            paths.setdefault(a, p)

    if run is not None:
        doc.heading("Power at the planned design")
        doc.table(readable(run.summary(), "power", ("analysis", "power", "mcse", "ci_low", "ci_high", "reps",
                                                    "n_failed", "analytic_power")),
                  "Simulated power at the scenario as given")
        png, svg = plots.save(plots.run_plot(run), out / "run_power")
        doc.figure(png, svg, "Power of each analysis with its 95% Wilson interval; open circles: closed form")
        perf = _estimate_performance(run)
        if perf is not None:
            doc.table(perf, "How each analysis estimates the effect: bias, empirical and model SE, coverage of its "
                            "confidence interval (MCSE in brackets; Morris, White & Crowther 2019)")
        seq = run.extra.get("sequential")
        if seq:
            doc.para(f"Sequential stopping: the run went on until the MCSE of the power was at most "
                     f"{seq['target_mcse']:g}; it took {seq['reps']} replicates (looks at {seq['looks']}); "
                     f"target {'reached' if seq['reached'] else 'NOT reached within ' + str(seq['max_reps'])}.")
        paths.update(run.paths)
        _looks(doc, run, out)

    if assurance is not None:
        doc.heading("Assurance over the prior")
        lines = assurance.summary().splitlines()
        doc.para(literal(lines[0]))
        doc.bullets([literal(ln.strip()) for ln in lines[1:]])
        if hasattr(assurance, "plot"):
            png, svg = plots.save(assurance.plot(), out / "assurance")
            doc.figure(png, svg, "Power at each prior draw: its distribution over the prior, the assurance and "
                                 "the ceiling")
        doc.para("Assurance is the probability of success (a rejection with the estimate on the favourable side) "
                 "averaged over the prior on the parameters (O'Hagan, Stevens & Campbell 2005); its MCSE counts "
                 "the prior's spread and the replicates' noise. The table of draws is in assurance.csv.")

    if null is not None:
        doc.heading("Type I error under the null")
        a = float(null["alpha"].iloc[0])
        grid = [c for c in null.attrs.get("grid", []) if c in null.columns]
        doc.para(f"The same scenario with the effect on the boundary of each analysis's null hypothesis and everything "
                 f"else kept: no effect for a test of no difference, the margin for an equivalence (upper margin) or "
                 f"non-inferiority test, the stated null value otherwise; the column 'Effect placed at' says where and which "
                 f"value of the process's effect that is ('Effect value'). Bradley's (1978) liberal criterion asks for a rejection "
                 f"rate in [{0.5 * a:g}, {1.5 * a:g}] at alpha = {a:g}; 'Closed-form type I error' is the rate "
                 f"where the analytic core covers the case (normal outcomes).")
        cols = grid + [c for c in NULL_SHOWN if c in null.columns]
        if "analytic_type1" in null and null["analytic_type1"].isna().all():
            cols.remove("analytic_type1")
        doc.table(readable(null, "type1_error", tuple(cols)), "Type I error check")
        ok = bool(null["meets_bradley"].all())
        doc.para("**Verdict:** " + ("every analysis meets Bradley's liberal criterion." if ok else
                                    "at least one analysis does NOT meet Bradley's liberal criterion; its power "
                                    "is not comparable with a test that holds its level."))
        if "null_at" in null and null["null_at"].str.contains("equivalence margin").any():
            doc.para("On an equivalence margin the TOST's exact size is at most alpha, and below it when the "
                     "standard error is large against the equivalence range (Schuirmann 1987); a rate below alpha "
                     "there is a property of the test; where the closed form applies (normal outcomes), "
                     "'Closed-form type I error' gives the value to expect.")

    doc.heading("Failures")
    fl = _failures([("search", search.table if search is not None else None), ("sweep", sweep),
                    ("null check", null), ("planned design", _run_failures(run))])
    doc.bullets(fl or ["no replicate failed"])
    doc.para("A failed replicate (an analysis error, a non-finite p-value, or fit trouble under the 'failure' "
             "policy) is left out of the power's denominator; the tables give the counts.")

    doc.heading("Monte Carlo error")
    mc = _mc_error([("sweep", sweep, "power"), ("null check", null, "type I error"),
                    ("search", search.table if search is not None else None, "power")])
    if run is not None:
        mc.append(f"planned design: {run.reps} replicates, MCSE {run.mcse:.4f}.")
    doc.bullets(mc or ["-"])
    doc.para("MCSE of a rejection rate p from R replicates: sqrt(p(1-p)/R) (Morris, White & Crowther 2019). "
             "Intervals for rates are Wilson score intervals.")

    doc.heading("Path that ran")
    doc.bullets(_paths(paths) or ["-"])
    doc.para("'batch' means the process and the analysis ran vectorised over whole chunks; 'per-replicate' means "
             "one data set at a time. Both give the same numbers for the same seed.")

    if notes:
        doc.heading("Notes")
        doc.bullets([literal(n) for n in notes])

    doc.heading("Cautions")
    doc.para(CAUTION)
    doc.para("Simulated power is an estimate with Monte Carlo error; it answers the question asked under the "
             "assumptions entered and no other.")

    doc.heading("Reproducibility manifest")
    doc.para("Run this command again (same scenario file, same versions) to reproduce every number exactly:")
    doc.code(manifest["command"])
    doc.table(manifest_rows(manifest), "Manifest (also in manifest.json)")
    return doc
