"""Human labels for result tables, and tables rounded to the digits their Monte Carlo error supports.

The CSV files keep the column names of the data (``type1_error``, ``ci_low``...);
reports and the terminal show these labels instead.
"""

from __future__ import annotations

import html

import pandas as pd

from .answer import round_to_mcse

LABELS = {
    "analysis": "Analysis",
    "value": "Value",
    "power": "Power",
    "type1_error": "Type I error",
    "mcse": "MCSE",
    "reps": "Replicates",
    "n_ok": "Usable replicates",
    "n_failed": "Failed replicates",
    "failures": "Failed replicates",
    "analytic_power": "Closed-form power",
    "analytic_type1": "Closed-form type I error",
    "fitted_power": "Fitted power",
    "in_fit": "Used in the fit",
    "null_at": "Effect placed at",
    "null_effect": "Effect value",
    "alpha": "Alpha",
    "meets_bradley": "Meets Bradley's criterion",
    "path": "Execution path",
}


def label(column: str) -> str:
    """The human label of a column (the column itself when none is known)."""
    return LABELS.get(column, column)


def readable(frame: pd.DataFrame, rate: str | None = None, keep: tuple[str, ...] = (),
             level: float = 0.95) -> pd.DataFrame:
    """``frame`` for reading: rates rounded to their MCSE, the interval in one column, human labels.

    ``rate`` is the column holding the rejection rate (``power`` or
    ``type1_error``); its interval (``ci_low``, ``ci_high``) becomes one
    column "95% interval", and the rate, the interval and the closed-form
    columns are rounded to the decimals the row's MCSE supports. ``keep``
    lists the columns to show, in order (default: all).
    """
    cols = list(keep) if keep else list(frame.columns)
    out = pd.DataFrame(index=frame.index)
    m = frame["mcse"] if "mcse" in frame else None
    for c in cols:
        if c not in frame:
            continue
        if c == "ci_high":
            continue
        if c == "ci_low" and "ci_high" in frame:
            out[f"{level:.0%} interval"] = [
                f"{round_to_mcse(lo, s)} to {round_to_mcse(hi, s)}" for lo, hi, s in
                zip(frame["ci_low"], frame["ci_high"], m if m is not None else [float("nan")] * len(frame))]
            continue
        if m is not None and c in (rate, "analytic_power", "analytic_type1", "fitted_power", "power", "type1_error"):
            vals = [None if (v is None or v != v) else v for v in frame[c]]
            out[label(c)] = [("-" if v is None else round_to_mcse(float(v), s)) for v, s in zip(vals, m)]
            continue
        if c == "mcse":
            out[label(c)] = [f"{v:.1g}" if v == v and v > 0 else "0" for v in frame[c]]
            continue
        out[label(c)] = frame[c]
    return out.reset_index(drop=True)


def frame_html(frame: pd.DataFrame, caption: str = "") -> str:
    """A small table as HTML (for notebooks), every cell escaped."""
    def cell(v):
        if v is None or (isinstance(v, float) and v != v):
            return "-"
        if isinstance(v, float):
            return f"{v:.4g}"
        return str(v)

    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in frame.columns)
    rows = "".join("<tr>" + "".join(f"<td>{html.escape(cell(v))}</td>" for v in row) + "</tr>"
                   for row in frame.itertuples(index=False))
    cap = f"<caption>{html.escape(caption)}</caption>" if caption else ""
    return f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table>"
