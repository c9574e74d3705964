"""Figures (matplotlib, PNG and SVG) for sweeps and searches; no screen needed.

Figures are built on :class:`matplotlib.figure.Figure` directly (the Agg
renderer, no pyplot, no global backend switch) and saved without time stamps
or random ids, so the same numbers give the same files.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import SimpowerError

try:
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
except ImportError as exc:  # a declared dependency, but an environment may lack it
    raise SimpowerError(f"reports and plots need matplotlib, which cannot be imported here ({exc}); "
                        f"install it with `pip install matplotlib` (simpower's own install brings it).") from None

COLORS = ("#1f5fa8", "#c4441c", "#2a8a3e", "#7a3fa0", "#b88a00", "#4d4d4d")


def new_figure(width: float = 7.0, height: float = 4.5):
    fig = Figure(figsize=(width, height), dpi=100)
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot(1, 1, 1)


def save(fig, stem) -> tuple[Path, Path]:
    """Write ``stem.png`` and ``stem.svg``; return both paths."""
    stem = Path(stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    png, svg = stem.with_suffix(".png"), stem.with_suffix(".svg")
    fig.tight_layout()
    with matplotlib.rc_context({"svg.hashsalt": "simpower", "svg.fonttype": "none"}):
        fig.savefig(png, format="png", metadata={"Software": None})
        fig.savefig(svg, format="svg", metadata={"Date": None, "Creator": None})
    return png, svg


#: line styles and markers that tell the values of the other swept parameters apart (colour tells analyses)
STYLES = (("-", "o"), ("--", "s"), (":", "^"), ("-.", "D"), ((0, (5, 1, 1, 1)), "v"), ((0, (1, 3)), "P"))

#: axis words for common parameter names (a scenario's [labels] block overrides them)
WORDS = {
    "n": "participants in the control arm",
    "n1": "participants in the treatment arm",
    "clusters": "clusters per arm",
    "cluster_size": "mean cluster size",
    "cluster_size_cv": "CV of cluster sizes",
    "icc": "intracluster correlation",
    "effect": "effect",
    "sd": "standard deviation",
    "sd_ratio": "ratio of SDs (treatment / control)",
    "ratio": "allocation ratio (treatment / control)",
    "alpha": "significance level",
    "dropout_rate": "dropout rate",
    "rate": "missing-data rate",
    "visits": "visits",
    "rho": "correlation between visits",
    "hazard_ratio": "hazard ratio",
    "odds_ratio": "odds ratio",
    "p0": "control-arm proportion",
}


def axis_label(name: str, labels=None) -> str:
    """Words for parameter ``name``: the scenario's label (and unit) if given, else :data:`WORDS`, with the name.

    ``labels`` maps names to a string or to ``{"label": ..., "unit": ...}``.
    """
    spec = (labels or {}).get(name)
    unit = ""
    if isinstance(spec, dict):
        words, unit = spec.get("label") or WORDS.get(name.split(".")[-1], ""), spec.get("unit") or ""
    else:
        words = spec or WORDS.get(name.split(".")[-1], "")
    text = f"{words} ({name})" if words and words != name else name
    return f"{text} [{unit}]" if unit else text


def _short(name: str, labels=None) -> str:
    spec = (labels or {}).get(name)
    if isinstance(spec, dict):
        return spec.get("label") or name
    return spec or name


def _series(table: pd.DataFrame, x: str, labels=None):
    """Curves of a sweep table: (analysis, index of the analysis, label of the other parameters, index of that
    combination, rows sorted by x). Colour follows the analysis, line style the other parameters' values."""
    grid = [c for c in table.attrs.get("grid", []) if c in table.columns and c != x]
    analyses = list(dict.fromkeys(table["analysis"]))
    combos: list = []
    for key, part in table.groupby(["analysis"] + grid, sort=False, dropna=False):
        key = key if isinstance(key, tuple) else (key,)
        rest = key[1:]
        if rest not in combos:
            combos.append(rest)
        label = ", ".join(f"{_short(k, labels)} = {v:g}" if isinstance(v, (int, float)) else f"{_short(k, labels)} = {v}"
                          for k, v in zip(grid, rest))
        yield key[0], analyses.index(key[0]), label, combos.index(rest), part.sort_values(x)


def power_curve(table: pd.DataFrame, x: str, *, target: float | None = None, required: float | None = None,
                title: str = "", ylabel: str = "power", value: str = "power", labels=None, per_curve=None):
    """Power against a swept parameter, one curve per analysis and value of the other swept parameters.

    Colour tells the analyses apart, line style and marker the other parameters' values; bands are 95%
    Wilson intervals; the closed form, where it applies, is a thin line of the same colour and style.
    Points of different analyses are dodged sideways by a hair so that curves that coincide (Student and
    Welch with equal arms) stay visible. With ``target`` the target line is drawn and each curve's required
    ``x`` is marked on it when ``per_curve`` gives them (the table of
    :func:`simpower.planning.sweepresult.required_by_curve`); ``required`` marks one value (e.g. a search's
    answer). The legend sits outside the axes.
    """
    found = {}
    if per_curve is not None and len(per_curve):
        keys = [c for c in per_curve.columns if c not in ("smallest_on_grid", "interpolated", "low", "high", "note")]
        found = {tuple(r[k] for k in keys): r["interpolated"] for _, r in per_curve.iterrows()}
    grid = [c for c in table.attrs.get("grid", []) if c in table.columns and c != x]
    fig, ax = new_figure(9.0, 4.8)
    curves = list(_series(table, x, labels))
    n_an = max((i for _, i, _, _, _ in curves), default=0) + 1
    xs_all = table[x].to_numpy(float)
    span = float(np.nanmax(xs_all) - np.nanmin(xs_all)) if len(xs_all) else 0.0
    closed_drawn = False
    marks = []
    for analysis, i, label, j, part in curves:
        c = COLORS[i % len(COLORS)]
        ls, mk = STYLES[j % len(STYLES)]
        xs = part[x].to_numpy(float)
        dodge = (i - (n_an - 1) / 2) * 0.004 * span
        name = str(analysis) + (f", {label}" if label else "")
        ax.plot(xs + dodge, part[value], color=c, ls=ls, marker=mk, ms=4, lw=1.4, label=name)
        ax.fill_between(xs, part["ci_low"], part["ci_high"], color=c, alpha=0.10, lw=0)
        if "analytic_power" in part and part["analytic_power"].notna().any():
            ax.plot(xs, part["analytic_power"].astype(float), color=c, ls=ls, lw=0.7, alpha=0.7)
            closed_drawn = True
        if target is not None and found:
            first = part.iloc[0]
            xr = float(found.get((analysis, *[first[g] for g in grid]), np.nan))
            if np.isfinite(xr):
                ax.plot([xr], [target], marker="v", color=c, ms=7, ls="none", zorder=4)
                marks.append((xr, c, f"{xr:.0f}" if span >= 20 else f"{xr:.3g}"))
    for k, (xr, c, text) in enumerate(sorted(marks)):
        ax.annotate(text, (xr, target), xytext=(0, 8 + 10 * (k % 3)), textcoords="offset points", ha="center",
                    fontsize=7, color=c)
    if closed_drawn:
        ax.plot([], [], color="#777", lw=0.7, label="thin line: closed form")
    if target is not None:
        ax.axhline(target, color="#555", lw=1, ls=":", label=f"target power {target:g}"
                   + (" (triangles: required value per curve)" if marks else ""))
    if required is not None:
        ax.axvline(required, color="#000", lw=1, ls="-.", label=f"required {x} = {required:g}")
    ax.set_xlabel(axis_label(x, labels))
    ax.set_ylabel(ylabel if ylabel != "power" else "power (share of trials rejecting H0)")
    ax.set_ylim(-0.02, 1.02)
    ax.grid(alpha=0.3)
    ax.set_title(title or f"{ylabel} against {_short(x, labels)} (bands: 95% Wilson intervals)")
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, frameon=False)
    return fig


def type1_plot(table: pd.DataFrame, x: str, alpha: float, title: str = "", labels=None):
    """Type I error against a swept parameter with alpha and Bradley's liberal bounds."""
    fig = power_curve(table, x, title=title or f"type I error against {_short(x, labels)}", ylabel="type I error",
                      value="type1_error", labels=labels)
    ax = fig.axes[0]
    ax.axhline(alpha, color="#555", lw=1, ls=":", label=f"alpha {alpha:g}")
    ax.axhspan(0.5 * alpha, 1.5 * alpha, color="#2a8a3e", alpha=0.08, label="Bradley (1978) liberal bounds")
    ax.set_ylim(0, max(3 * alpha, float(table["ci_high"].max()) * 1.1))
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, frameon=False)
    return fig


def run_plot(result, title: str = ""):
    """A plain run: each analysis's power with its 95% Wilson interval, the closed form (open circle) beside it."""
    t = result.summary()
    fig, ax = new_figure(7.5, 1.2 + 0.55 * len(t))
    ys = np.arange(len(t))[::-1]
    for y, (_, r) in zip(ys, t.iterrows()):
        c = COLORS[0]
        ax.plot([r["ci_low"], r["ci_high"]], [y, y], color=c, lw=2.5, alpha=0.5)
        ax.plot([r["power"]], [y], "o", color=c, ms=7, label="simulated (95% Wilson interval)" if y == ys[0] else None)
        a = r.get("analytic_power")
        if a is not None and a == a:
            ax.plot([a], [y], "o", mfc="none", mec=COLORS[1], ms=9, mew=1.5,
                    label="closed form" if not any(ln.get_label() == "closed form" for ln in ax.get_lines()) else None)
    ax.set_yticks(ys, [str(a) for a in t["analysis"]])
    ax.set_xlim(0, 1)
    ax.set_ylim(-0.7, len(t) - 0.3)
    ax.set_xlabel("power (share of trials rejecting H0)")
    ax.grid(alpha=0.3, axis="x")
    ax.set_title(title or f"Power at the planned design ({result.reps} simulated trials)")
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, frameon=False)
    return fig


def search_plot(result, title: str = "", labels=None):
    """A search: evaluated values with Wilson intervals, fitted curve and band, target, answer and interval."""
    fig, ax = new_figure()
    t = result.table
    err = np.vstack([t["power"] - t["ci_low"], t["ci_high"] - t["power"]])
    sizes = 10 + 60 * np.sqrt(t["reps"] / t["reps"].max())
    ax.errorbar(t["value"], t["power"], yerr=err, fmt="none", ecolor=COLORS[0], alpha=0.6, lw=1)
    ax.scatter(t["value"], t["power"], s=sizes, color=COLORS[0], zorder=3, label="simulated (size ~ replicates)")
    cur = result.curve()
    if cur["power"].notna().any():
        ax.plot(cur["value"], cur["power"], color=COLORS[1], lw=1.5, label="fitted probit curve")
        ax.fill_between(cur["value"], cur["low"], cur["high"], color=COLORS[1], alpha=0.15, lw=0)
    ax.axhline(result.target, color="#555", lw=1, ls=":", label=f"target {result.target:g}")
    lo, hi = result.estimate_interval
    if np.isfinite(lo) and np.isfinite(hi):
        ax.axvspan(lo, hi, color="#000", alpha=0.08, lw=0, label=f"{result.level:.0%} Monte Carlo interval")
    ax.axvline(result.value, color="#000", lw=1, ls="-.", label=f"answer {result.parameter} = {result.value:.4g}")
    if result.analytic is not None:
        ax.axvline(result.analytic_estimate, color=COLORS[2], lw=1, ls="--",
                   label=f"closed form {result.analytic_estimate:.4g}")
    ax.set_xlabel(axis_label(result.parameter, labels))
    ax.set_ylabel(f"power ({result.analysis})")
    ax.set_ylim(-0.02, 1.02)
    ax.grid(alpha=0.3)
    what = "required size" if result.kind == "size" else "minimal detectable effect"
    ax.set_title(title or f"{what} for power {result.target:g}")
    ax.legend(fontsize=8, loc="lower right")
    return fig


def heatmap(table: pd.DataFrame, x: str, y: str, analysis: str | None = None, value: str = "power",
            target: float | None = None, title: str = "", labels=None):
    """Power over two swept parameters (one analysis), cells annotated; target-reaching cells outlined."""
    if analysis is None:
        analysis = str(table["analysis"].iloc[0])
    part = table[table["analysis"] == analysis]
    pv = part.pivot_table(index=y, columns=x, values=value, aggfunc="mean").sort_index()
    fig, ax = new_figure(7.0, 5.0)
    im = ax.imshow(pv.to_numpy(float), origin="lower", aspect="auto", cmap="viridis", vmin=0, vmax=1)
    ax.set_xticks(range(pv.shape[1]), [f"{v:g}" if isinstance(v, (int, float)) else str(v) for v in pv.columns])
    ax.set_yticks(range(pv.shape[0]), [f"{v:g}" if isinstance(v, (int, float)) else str(v) for v in pv.index])
    for i in range(pv.shape[0]):
        for j in range(pv.shape[1]):
            v = pv.iat[i, j]
            if np.isfinite(v):
                bold = target is not None and v >= target
                ax.text(j, i, f"{v:.2f}", ha="center", va="center", fontsize=8,
                        color="black" if v > 0.6 else "white", fontweight="bold" if bold else "normal")
    ax.set_xlabel(axis_label(x, labels))
    ax.set_ylabel(axis_label(y, labels))
    fig.colorbar(im, ax=ax, label=value)
    ax.set_title(title or f"{value} of {analysis} over {x} and {y}" + (f" (bold: >= {target:g})" if target else ""))
    return fig


def looks_plot(rows: list[dict], title: str = ""):
    """A group-sequential design: z boundaries per look (lines) and simulated stopping proportions (bars)."""
    fig, ax = new_figure(7.0, 4.0)
    t = np.array([r["fraction"] for r in rows])
    ax.plot(t, [r["efficacy_z"] for r in rows], "o-", color=COLORS[0], label="efficacy boundary (z)")
    fut = [r["futility_z"] for r in rows]
    if any(f is not None for f in fut):
        ft = [(x, f) for x, f in zip(t, fut) if f is not None]
        ax.plot([x for x, _ in ft], [f for _, f in ft], "s--", color=COLORS[1], label="futility boundary (z)")
    ax.set_xlabel("information fraction")
    ax.set_ylabel("z boundary")
    ax.set_xlim(0, 1.05)
    bars = ax.twinx()
    width = 0.035
    eff = np.array([r["stop_efficacy"] for r in rows], float)
    bars.bar(t - width / 2, eff, width, color=COLORS[2], alpha=0.6, label="stopped for efficacy")
    futs = np.array([np.nan if r["stop_futility"] is None else r["stop_futility"] for r in rows], float)
    if np.isfinite(futs).any():
        bars.bar(t + width / 2, np.nan_to_num(futs), width, color=COLORS[3], alpha=0.6, label="stopped for futility")
    bars.set_ylabel("share of replicates stopping")
    bars.set_ylim(0, 1)
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = bars.get_legend_handles_labels()
    ax.legend(h1 + h2, l1 + l2, loc="upper right", fontsize=8)
    ax.set_title(title or "Boundaries and simulated stopping per look")
    return fig
