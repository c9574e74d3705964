"""The answer first: a short block and a sample-size justification paragraph for a protocol.

:func:`answer_block` turns a :class:`~simpower.planning.search.SearchResult`, a
:class:`~simpower.result.RunResult` or a sweep table into an
:class:`AnswerBlock`: the answer in the units that get recruited (per arm and
in total; clusters; expected events; expected completers), its Monte Carlo
interval, the closed form beside it where one exists, and the assumptions it
rests on, read from the scenario *at the answer*. :func:`justification` writes
the paragraph a protocol or statistical analysis plan quotes. Both render to
plain text, Markdown and HTML with user text escaped.

Numbers are rounded to the digits their Monte Carlo error supports
(:func:`round_to_mcse`): a rate is given to the decimal place of the first
significant digit of its MCSE (common practice for an estimate reported with
its standard error).
"""

from __future__ import annotations

import html as _html
import math
from dataclasses import dataclass, field
from typing import Any

import re

from ._version import __version__

#: the caution every report, summary and justification carries
CAUTION = ("Results rest on the assumptions entered. A qualified statistician, the ethics committee and the "
           "applicable regulatory guidance (e.g. ICH E9) decide the sample size; local rules prevail.")

#: characters that start Markdown constructs (the rule of :func:`simpower.report.markdown.escape`)
_MD = re.compile(r"([\\`*_\[\]<>&|~])")


def md_escape(text: str) -> str:
    """Plain text as Markdown that shows exactly this text, on one line."""
    return _MD.sub(r"\\\1", " ".join(str(text).splitlines()))

#: references for the methods the paragraph names (author, year, where)
REFERENCES = {
    "simulation": "Morris TP, White IR, Crowther MJ (2019). Using simulation studies to evaluate statistical "
                  "methods. Statistics in Medicine 38:2074-2102.",
    "wilson": "Wilson EB (1927). Probable inference, the law of succession, and statistical inference. JASA "
              "22:209-212.",
    "fieller": "Fieller EC (1954). Some problems in interval estimation. JRSS B 16:175-185.",
    "bradley": "Bradley JV (1978). Robustness? British Journal of Mathematical and Statistical Psychology "
               "31:144-152.",
    "ich": "ICH E9 (1998). Statistical principles for clinical trials.",
}


#: targets a sweep without one reports (common practice in trial planning: 80% or 90% power)
CONVENTIONAL_TARGETS = (0.8, 0.9)


# -- rounding -----------------------------------------------------------------
def mcse_decimals(mcse: float, default: int = 3) -> int:
    """Decimals a value with this MCSE supports: down to the first significant digit of the MCSE (1 to 6)."""
    if mcse is None or not math.isfinite(mcse) or mcse <= 0:
        return default
    return min(6, max(1, -math.floor(math.log10(mcse))))


def round_to_mcse(value: float, mcse: float, default: int = 3) -> str:
    """``value`` as text with the digits its Monte Carlo error supports.

    Examples
    --------
    >>> round_to_mcse(0.85312, 0.0067)   # MCSE in the thousandths: three decimals
    '0.853'
    >>> round_to_mcse(0.85312, 0.021)    # MCSE in the hundredths: two decimals
    '0.85'
    """
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return f"{value:.{mcse_decimals(mcse, default)}f}"


def _num(v: float) -> str:
    """A size or count as text: whole numbers without decimals, others to 3 significant digits."""
    if v is None or not math.isfinite(float(v)):
        return "-"
    v = float(v)
    return f"{v:.0f}" if v.is_integer() else f"{v:.3g}"


def _pct(p: float) -> str:
    return f"{100 * p:.3g}%"


# -- what gets recruited --------------------------------------------------------
@dataclass(frozen=True)
class Recruitment:
    """The units a design recruits, read from a process (None where the design has no such unit)."""

    arms: tuple[int, ...] | None = None
    arm_names: tuple[str, ...] = ()
    participants: float | None = None
    clusters_per_arm: int | None = None
    cluster_size: float | None = None
    events: float | None = None
    loss: float | None = None
    loss_text: str = ""

    @property
    def completers(self) -> float | None:
        if self.participants is None or self.loss is None:
            return None
        return self.participants * (1.0 - self.loss)


def _parts(process) -> list:
    out = [process]
    for name in ("design", "outcome"):
        part = getattr(process, name, None)
        if part is not None and hasattr(part, "get_params"):
            out.append(part)
    return out


def recruitment(process) -> Recruitment:
    """Arms, participants, clusters, expected events and expected loss of a built-in process (best effort)."""
    kw: dict[str, Any] = {}
    parts = _parts(process)
    for p in parts:
        clusters = getattr(p, "clusters", None)
        if isinstance(clusters, int) and getattr(p, "cluster_size", None) is not None:
            m = float(p.cluster_size)
            kw.update(clusters_per_arm=clusters, cluster_size=m, participants=2 * clusters * m)
            if getattr(p, "randomise", "cluster") == "individual":
                kw["clusters_per_arm"] = None
                kw["arms"] = None
            break
        sizes = getattr(p, "sizes", None)
        if isinstance(sizes, tuple) and all(isinstance(s, (int,)) for s in sizes) and len(sizes) >= 2:
            kw["arms"] = tuple(int(s) for s in sizes)
            kw["arm_names"] = getattr(p, "arm_names", None) or (
                ("control", "treatment") if len(sizes) == 2 else tuple(f"arm {i + 1}" for i in range(len(sizes))))
            kw["participants"] = float(sum(sizes))
            break
    if "participants" not in kw:
        n = getattr(process, "n", None)
        if isinstance(n, int):
            kw["participants"] = float(n)
    ev = getattr(process, "expected_events", None)
    if callable(ev):
        try:
            kw["events"] = float(ev())
        except Exception:  # noqa: BLE001 - a best-effort figure
            pass
    missing = getattr(process, "missing", None)
    rate = getattr(missing, "rate", None)
    if isinstance(rate, (int, float)) and rate > 0:
        kw["loss"] = float(rate)
        kw["loss_text"] = missing.describe() if hasattr(missing, "describe") else ""
    drop = getattr(process, "dropout_rate", None)
    if isinstance(drop, (int, float)) and drop > 0 and "loss" not in kw and kw.get("events") is None:
        kw["loss"] = float(drop)
        kw["loss_text"] = f"{_pct(drop)} of participants drop out before the last visit"
    return Recruitment(**kw)


def recruitment_lines(r: Recruitment) -> list[tuple[str, str]]:
    """(label, value) rows of a recruitment, in the order a protocol states them."""
    rows: list[tuple[str, str]] = []
    if r.clusters_per_arm is not None:
        rows.append(("Clusters", f"{r.clusters_per_arm} per arm, {2 * r.clusters_per_arm} in total"))
    if r.arms is not None:
        per = ", ".join(f"{s} ({a})" for s, a in zip(r.arms, r.arm_names))
        rows.append(("Participants per arm", per))
    if r.participants is not None:
        about = "about " if r.cluster_size is not None else ""
        rows.append(("Participants in total", about + _num(round(r.participants))))
    if r.events is not None:
        rows.append(("Expected events", _num(round(r.events))))
    if r.completers is not None:
        rows.append(("Expected completers", f"{_num(round(r.completers))} (after {_pct(r.loss)} loss assumed)"))
    return rows


def recruitment_phrase(r: Recruitment) -> str:
    """The recruitment as a phrase: '122 participants in the control arm and 244 in the treatment arm (366 in total)'."""
    if r.clusters_per_arm is not None:
        s = (f"{r.clusters_per_arm} clusters per arm ({2 * r.clusters_per_arm} in total"
             f"{', about ' + _num(round(r.participants)) + ' participants' if r.participants else ''})")
    elif r.arms is not None and len(r.arms) == 2:
        s = (f"{r.arms[0]} participants in the {r.arm_names[0]} arm and {r.arms[1]} in the {r.arm_names[1]} arm "
             f"({_num(r.participants)} in total)")
    elif r.arms is not None:
        s = f"{', '.join(str(a) for a in r.arms)} participants in the {len(r.arms)} arms ({_num(r.participants)} in total)"
    elif r.participants is not None:
        s = f"{_num(r.participants)} participants"
    else:
        return ""
    if r.events is not None:
        s += f", with about {_num(round(r.events))} events expected"
    return s


# -- the typed value ---------------------------------------------------------------
@dataclass(frozen=True)
class AnswerBlock:
    """The answer to a planning question, first, in a few lines.

    Attributes
    ----------
    heading : str
        What was asked ("Required sample size for 90% power").
    answer : str
        The answer in one line, in the units that get recruited.
    rows : tuple of (label, value)
        Monte Carlo interval, closed form, recruitment figures.
    assumptions : tuple of str
        The scenario at the answer, in words.
    numbers : dict
        The numbers as values (for programs and tests).
    """

    heading: str
    answer: str
    rows: tuple[tuple[str, str], ...] = ()
    assumptions: tuple[str, ...] = ()
    numbers: dict = field(default_factory=dict)
    assumptions_label: str = "Assumptions"

    def text(self) -> str:
        lines = [f"{self.heading}: {self.answer}"]
        width = max((len(k) for k, _ in self.rows), default=0)
        lines += [f"  {k + ':':<{width + 1}} {v}" for k, v in self.rows]
        if self.assumptions:
            lines.append(f"  {self.assumptions_label}:")
            lines += [f"    - {a}" for a in self.assumptions]
        return "\n".join(lines)

    def markdown(self) -> str:
        escape = md_escape
        lines = [f"**{escape(self.heading)}: {escape(self.answer)}**", ""]
        lines += [f"- {escape(k)}: {escape(v)}" for k, v in self.rows]
        if self.assumptions:
            lines += [f"- {escape(self.assumptions_label)}:"] + [f"    - {escape(a)}" for a in self.assumptions]
        return "\n".join(lines) + "\n"

    def html(self) -> str:
        e = _html.escape
        rows = "".join(f"<tr><th>{e(k)}</th><td>{e(v)}</td></tr>" for k, v in self.rows)
        assum = "".join(f"<li>{e(a)}</li>" for a in self.assumptions)
        return (f'<div class="simpower-answer"><p><strong>{e(self.heading)}: {e(self.answer)}</strong></p>'
                f'<table class="simpower-answer-rows">{rows}</table>'
                + (f"<p>{e(self.assumptions_label)}:</p><ul>{assum}</ul>" if assum else "") + "</div>")

    def __str__(self) -> str:
        return self.text()


def _describe(scenario) -> tuple[str, ...]:
    try:
        return tuple(" ".join(str(s).split()) for s in scenario.describe())
    except Exception:  # noqa: BLE001 - a user process may not describe itself
        return ()


def _design_sentence(scenario) -> str:
    lines = _describe(scenario)
    if not lines:
        return "Sample size."
    d = lines[0].rstrip(".")
    if d.startswith("Data: "):
        d = d[len("Data: "):]
    return f"Sample size. The design: {d}."


def _process_at(scenario):
    return getattr(scenario, "process", None)


def search_block(res) -> AnswerBlock:
    """The answer of a required-size or detectable-effect search."""
    lo, hi = res.interval
    at = res.at_answer() if res.kind == "size" else res.scenario
    rec = recruitment(_process_at(at))
    nums: dict[str, Any] = {"value": res.value, "low": lo, "high": hi, "target": res.target,
                            "alpha": res.scenario.alpha, "reps": res.reps_total, "closed_form": res.analytic,
                            "participants": rec.participants, "arms": rec.arms, "events": rec.events,
                            "completers": rec.completers, "clusters_per_arm": rec.clusters_per_arm}
    if res.kind == "size":
        heading = f"Required sample size for {_pct(res.target)} power ({res.analysis})"
        answer = recruitment_phrase(rec) or f"{res.parameter} = {_num(res.value)}"
        rows = [("Searched parameter", f"{res.parameter} = {_num(res.value)}"),
                (f"{res.level:.0%} Monte Carlo interval", f"{res.parameter} from {_num(lo)} to {_num(hi)}")]
        if res.analytic is not None:
            rows.append(("Closed form", f"{res.parameter} = {_num(res.analytic)}"))
        rows += recruitment_lines(rec)
    else:
        heading = f"Minimal detectable {res.parameter} for {_pct(res.target)} power ({res.analysis})"
        answer = f"{res.parameter} = {res.value:.4g}"
        rows = [(f"{res.level:.0%} Monte Carlo interval", f"{lo:.4g} to {hi:.4g}")]
        if res.analytic is not None:
            rows.append(("Closed form", f"{res.analytic:.4g}"))
        rows += recruitment_lines(rec)
    rows.append(("Monte Carlo effort", f"{res.reps_total} simulated trials at {len(res.table)} values"
                 + ("" if res.converged else "; NOT converged: the interval is wider than asked")))
    return AnswerBlock(heading, answer, tuple(rows), _describe(at), nums,
                       "Assumptions at the answer" if res.kind == "size" else "Assumptions")


def run_block(run, analysis: str | None = None) -> AnswerBlock:
    """The power at the planned design (one analysis: the primary unless named)."""
    name = analysis or run.primary
    s = run.summaries[name]
    rec = recruitment(_process_at(run.scenario))
    p, m = s["power"], s["mcse"]
    heading = f"Power at the planned design ({name})"
    where = recruitment_phrase(rec)
    answer = f"{round_to_mcse(p, m)}" + (f" with {where}" if where else "")
    rows = [("MCSE", f"{m:.2g}" if m > 0 else "0"),
            ("95% interval", f"{round_to_mcse(s['ci_low'], m)} to {round_to_mcse(s['ci_high'], m)}")]
    if s.get("analytic_power") is not None:
        rows.append(("Closed form", round_to_mcse(s["analytic_power"], m)))
    rows += recruitment_lines(rec)
    rows.append(("Monte Carlo effort", f"{s['n_ok']} usable of {run.reps} simulated trials"))
    nums = {"power": p, "mcse": m, "ci_low": s["ci_low"], "ci_high": s["ci_high"], "reps": run.reps,
            "alpha": run.scenario.alpha, "closed_form": s.get("analytic_power"), "participants": rec.participants,
            "arms": rec.arms, "events": rec.events, "completers": rec.completers}
    return AnswerBlock(heading, answer, tuple(rows), _describe(run.scenario), nums)


def sweep_block(table, scenario, *, target: float | None = None, x: str | None = None,
                analysis: str | None = None) -> AnswerBlock:
    """The answer of a sweep: the smallest swept value reaching ``target`` (else the range of power)."""
    name = analysis or scenario.primary
    part = table[table["analysis"] == name]
    grid = [c for c in table.attrs.get("grid", []) if c in table.columns]
    x = x or (grid[0] if grid else None)
    rows: list[tuple[str, str]] = []
    nums: dict[str, Any] = {"points": len(part)}
    at = scenario
    if target is not None and x is not None and len(part):
        # the least favourable of the other swept assumptions decides: the smallest x whose power reaches
        # the target at every combination of them
        worst = part.loc[part.groupby(x, sort=True)["power"].idxmin()].sort_values(x)
        ok = worst[worst["power"] >= target]
        others = [g for g in grid if g != x]
        heading = (f"Sweep over {', '.join(grid)}: smallest {x} reaching {_pct(target)} power"
                   + (f" at every {', '.join(others)} in the grid" if others else "") + f" ({name})")
        if len(ok):
            r = ok.iloc[0]
            point = {g: r[g] for g in grid}
            point = {k: (int(v) if float(v).is_integer() else float(v)) if isinstance(v, (int, float)) else v
                     for k, v in point.items()}
            try:
                at = scenario.with_params(**point)
            except Exception:  # noqa: BLE001 - a grid column need not be a scenario parameter
                at = scenario
            rec = recruitment(_process_at(at))
            answer = f"{x} = {point[x]}" + (f" ({recruitment_phrase(rec)})" if recruitment_phrase(rec) else "")
            m = float(r["mcse"])
            where = "least favourable grid point" if others else "grid point"
            rows += [(where.capitalize(), ", ".join(f"{k} = {v}" for k, v in point.items())),
                     ("Power there", f"{round_to_mcse(float(r['power']), m)} (95% interval "
                                     f"{round_to_mcse(float(r['ci_low']), m)} to {round_to_mcse(float(r['ci_high']), m)})")]
            if "analytic_power" in r and r["analytic_power"] is not None and r["analytic_power"] == r["analytic_power"]:
                rows.append(("Closed form there", round_to_mcse(float(r["analytic_power"]), m)))
            rows += recruitment_lines(rec)
            nums.update(value=point[x], power=float(r["power"]), mcse=m)
            rows.append(("Note", "the smallest grid value reaching the target; the grid's spacing limits the "
                                 "precision (a search gives the value itself)"))
        else:
            answer = f"no {x} in the grid reaches the target everywhere (best power {part['power'].max():.2f})"
            nums.update(value=None)
    else:
        heading = f"Sweep over {', '.join(grid) or 'the grid'} ({name})"
        lo, hi = part["power"].min(), part["power"].max()
        answer = f"power from {lo:.2f} to {hi:.2f} over {len(part)} grid points"
        nums.update(low=float(lo), high=float(hi))
        if x is not None and len(part) and pd_numeric(part[x]):
            others = [g for g in grid if g != x]
            worst = part.loc[part.groupby(x, sort=True)["power"].idxmin()].sort_values(x)
            every = f" at every {', '.join(others)} in the grid" if others else ""
            for t in CONVENTIONAL_TARGETS:   # no target given: the usual ones (common practice: 80% or 90%)
                ok = worst[worst["power"] >= t]
                value = ok[x].iloc[0] if len(ok) else None
                nums[f"smallest_for_{t:g}"] = value
                text = "none in the grid" if value is None else f"{value:g}"
                if others:
                    reached, missed = [], []
                    for key, g in part.groupby(others, sort=True):
                        key = key if isinstance(key, tuple) else (key,)
                        at_key = ", ".join(f"{k} = {v:g}" if isinstance(v, (int, float)) else f"{k} = {v}"
                                           for k, v in zip(others, key))
                        hit = g[g["power"] >= t][x]
                        (reached.append(f"{hit.min():g} at {at_key}") if len(hit) else missed.append(at_key))
                    text += " (" + "; ".join(reached + ([f"not reached at {'; '.join(missed)}"] if missed else [])) + ")"
                rows.append((f"Smallest {x} with {_pct(t)} power{every}", text))
    rows.append(("Monte Carlo effort", f"{int(part['reps'].min())} to {int(part['reps'].max())} simulated trials "
                                       f"per grid point"))
    return AnswerBlock(heading, answer, tuple(rows), _describe(at), nums)


def pd_numeric(column) -> bool:
    import pandas as pd

    return bool(pd.api.types.is_numeric_dtype(column))


def answer_block(result, **kw) -> AnswerBlock:
    """The :class:`AnswerBlock` of a search, a run or a sweep table (give ``scenario=`` with a table)."""
    if hasattr(result, "estimate_interval"):
        return search_block(result)
    if hasattr(result, "summaries"):
        return run_block(result, kw.get("analysis"))
    scenario = kw.pop("scenario", None)
    if scenario is None:
        from .errors import ParameterError

        raise ParameterError("`scenario` is required with a sweep table: answer_block(table, scenario=...).")
    return sweep_block(result, scenario, **kw)


# -- the justification paragraph ---------------------------------------------------
@dataclass(frozen=True)
class Justification:
    """A sample-size justification paragraph, its references and the caution that goes with it."""

    sentences: tuple[str, ...]
    references: tuple[str, ...]
    caution: str = CAUTION

    @property
    def paragraph(self) -> str:
        return " ".join(self.sentences)

    def text(self) -> str:
        refs = "\n".join(f"  {r}" for r in self.references)
        return f"{self.paragraph}\n\nReferences:\n{refs}\n\nCaution: {self.caution}"

    def markdown(self) -> str:
        escape = md_escape
        refs = "\n".join(f"- {escape(r)}" for r in self.references)
        return f"{escape(self.paragraph)}\n\nReferences:\n\n{refs}\n\n*Caution: {escape(self.caution)}*\n"

    def html(self) -> str:
        e = _html.escape
        refs = "".join(f"<li>{e(r)}</li>" for r in self.references)
        return (f'<div class="simpower-justification"><p>{e(self.paragraph)}</p><p>References:</p><ul>{refs}</ul>'
                f"<p><em>Caution: {e(self.caution)}</em></p></div>")

    def __str__(self) -> str:
        return self.text()


def _sided(scenario, name: str) -> str:
    alt = scenario.get_params().get(f"{name}.alternative")
    if alt == "two-sided":
        return "two-sided "
    if alt in ("greater", "less", "larger", "smaller"):
        return "one-sided "
    return ""


def _level(scenario, name: str) -> str:
    """'at a one-sided significance level of 0.025', or the analysis's own decision rule when it has one."""
    a = scenario.analyses.get(name) if hasattr(scenario.analyses, "get") else None
    rule = a.decision_rule() if hasattr(a, "decision_rule") else None
    if rule:
        return f"deciding by {rule}"
    return f"at a {_sided(scenario, name)}significance level of {scenario.alpha:g}"


def _analysis_words(scenario, name: str) -> str:
    """A built-in analysis by the first line of its docstring ("Welch's t-test for two arms (...)"), else in words."""
    a = scenario.analyses.get(name) if hasattr(scenario.analyses, "get") else None
    doc = (type(a).__doc__ or "").strip().splitlines() if a is not None else []
    if doc and type(a).__module__.startswith("simpower.analyses"):
        return doc[0].strip().rstrip(".")
    for line in _describe(scenario):
        head = f"Analysis `{name}`: "
        if line.startswith(head):
            return line[len(head):].rstrip(".")
    return name


def _null_where(null, res) -> str:
    """Where a search's null check ran: at the answer or at the scenario as given (by the table's fingerprint)."""
    fp = getattr(null, "attrs", {}).get("fingerprint")
    if fp is None or res is None or res.kind != "size" or null.attrs.get("grid"):
        return ""
    try:
        if fp == res.at_answer().fingerprint():
            return f" at the answer ({res.parameter} = {_num(res.value)})"
        if fp == res.scenario.fingerprint():
            given = res.scenario.get_params().get(res.parameter)
            return f" at the scenario as given ({res.parameter} = {given})"
    except Exception:  # noqa: BLE001 - the place is extra information
        pass
    return ""


def _null_sentence(null, name: str, where: str = "") -> tuple[str, bool]:
    if null is None or "analysis" not in null:
        return "", False
    rows = null[null["analysis"] == name]
    if rows.empty:
        return "", False
    r = rows.iloc[0]
    m = float(r["mcse"])
    closed = r.get("analytic_type1")
    closed = (f"; closed form {round_to_mcse(float(closed), m)}" if closed is not None and closed == closed else "")
    verdict = "within" if bool(r["meets_bradley"]) else "OUTSIDE"
    return (f"With the effect set to the null ({r['null_at']}){where}, the simulated type I error was "
            f"{round_to_mcse(float(r['type1_error']), m)} (MCSE {m:.1g}; {int(r['reps'])} replicates{closed}), "
            f"{verdict} Bradley's liberal criterion of {r['bradley_low']:g} to {r['bradley_high']:g}."), True


def _dropout_sentence(rec: Recruitment) -> str:
    if rec.loss is not None:
        return (f"Missing outcomes were simulated within each trial ({rec.loss_text}), so the numbers above are "
                f"participants to randomise; about {_num(round(rec.completers))} are expected to complete.")
    if rec.events is not None:
        return (f"Censoring and loss to follow-up were simulated within each trial; about {_num(round(rec.events))} "
                f"events are expected in total.")
    return ("No loss to follow-up was assumed; if some is expected, the number to recruit is the number above "
            "divided by one minus the expected proportion lost.")


def justification(result, *, null=None, scenario=None, target=None, x=None) -> Justification:
    """The sample-size justification paragraph of a search, a run or a sweep table.

    ``null`` is the table of :func:`simpower.planning.sweep.null_check` (its sentence
    is left out without one). Numbers are those of ``result``, rounded to
    their Monte Carlo error.
    """
    refs = ["simulation", "wilson"]
    if hasattr(result, "estimate_interval"):
        res = result
        sc, name = res.scenario, res.analysis
        at = res.at_answer() if res.kind == "size" else sc
        rec = recruitment(_process_at(at))
        lo, hi = res.interval
        first = [_design_sentence(at),
                 f"Primary analysis: {_analysis_words(sc, name)}, {_level(sc, name)}."]
        if res.kind == "size":
            first.append(f"For {_pct(res.target)} power, {recruitment_phrase(rec) or f'{res.parameter} = {_num(res.value)}'} "
                         f"are required ({res.parameter} = {_num(res.value)}; {res.level:.0%} Monte Carlo interval "
                         f"{_num(lo)} to {_num(hi)}).")
        else:
            first.append(f"With {recruitment_phrase(rec) or 'the planned size'}, the smallest {res.parameter} "
                         f"detected with {_pct(res.target)} power is {res.value:.4g} ({res.level:.0%} Monte Carlo "
                         f"interval {lo:.4g} to {hi:.4g}).")
        first.append(f"The answer was found by Monte Carlo simulation: {res.reps_total} simulated trials at "
                     f"{len(res.table)} candidate values of {res.parameter}, a probit model of power fitted to them, "
                     f"and Fieller's interval for the value reaching the target"
                     + ("" if res.converged else "; the search did NOT reach the precision asked") + ".")
        if res.fit is not None and res.kind == "size":
            p = float(res.fit.power(res.sign * float(res.value)))
            first.append(f"The fitted power at the answer is {p:.3f}.")
        refs.append("fieller")
        if res.analytic is not None:
            v = _num(res.analytic) if res.kind == "size" else f"{res.analytic:.4g}"
            first.append(f"The closed-form calculation for the same analysis gives {res.parameter} = {v}.")
        seed = res.seed
    elif hasattr(result, "summaries"):
        run = result
        sc, name = run.scenario, run.primary
        s = run.summaries[name]
        rec = recruitment(_process_at(sc))
        m = s["mcse"]
        first = [_design_sentence(sc),
                 f"Primary analysis: {_analysis_words(sc, name)}, {_level(sc, name)}.",
                 f"With {recruitment_phrase(rec) or 'the planned size'}, the simulated power is "
                 f"{round_to_mcse(s['power'], m)} (MCSE {m:.1g}; 95% interval {round_to_mcse(s['ci_low'], m)} to "
                 f"{round_to_mcse(s['ci_high'], m)}; {run.reps} simulated trials)."]
        if s.get("analytic_power") is not None:
            first.append(f"The closed-form power for the same analysis is {round_to_mcse(s['analytic_power'], m)}.")
        seed = run.seed
    else:
        if scenario is None:
            from .errors import ParameterError

            raise ParameterError("`scenario` is required with a sweep table: justification(table, scenario=...).")
        sc, name = scenario, scenario.primary
        block = sweep_block(result, scenario, target=target, x=x)
        rec = recruitment(_process_at(scenario))
        first = [f"Sample size. {block.heading}: {block.answer}.",
                 f"Primary analysis: {_analysis_words(sc, name)}, {_level(sc, name)}."] + [f"{k}: {v}." for k, v in block.rows]
        seed = result.attrs.get("seed", "")
    where = _null_where(null, result) if hasattr(result, "estimate_interval") else ""
    null_text, used = _null_sentence(null, name, where)
    if used:
        refs.append("bradley")
    sentences = first + ([null_text] if null_text else []) + [_dropout_sentence(rec)]
    sentences.append(f"Software: simpower {__version__} (seed {seed}); the report's manifest holds the command "
                     f"that reproduces every number.")
    refs.append("ich")
    return Justification(tuple(s for s in sentences if s), tuple(REFERENCES[k] for k in refs))
