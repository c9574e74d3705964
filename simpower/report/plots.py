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


def _series(table: pd.DataFrame, x: str):
    """Groups of a sweep table that form one line each: analysis x the other swept parameters."""
    grid = [c for c in table.attrs.get("grid", []) if c in table.columns and c != x]
    keys = ["analysis"] + grid
    for key, part in table.groupby(keys, sort=False, dropna=False):
        key = key if isinstance(key, tuple) else (key,)
        label = str(key[0]) + "".join(f", {k} = {v}" for k, v in zip(grid, key[1:]))
        yield label, part.sort_values(x)


def power_curve(table: pd.DataFrame, x: str, *, target: float | None = None, required: float | None = None,
                title: str = "", ylabel: str = "power", value: str = "power"):
    """Power against a swept parameter: points with Wilson bands, analytic curves dashed, the target line."""
    fig, ax = new_figure()
    for i, (label, part) in enumerate(_series(table, x)):
        c = COLORS[i % len(COLORS)]
        xs = part[x].to_numpy(float)
        ax.plot(xs, part[value], "o-", color=c, label=label, ms=4)
        ax.fill_between(xs, part["ci_low"], part["ci_high"], color=c, alpha=0.15, lw=0)
        if "analytic_power" in part and part["analytic_power"].notna().any():
            ax.plot(xs, part["analytic_power"].astype(float), "--", color=c, lw=1, label=f"{label} (closed form)")
    if target is not None:
        ax.axhline(target, color="#555", lw=1, ls=":", label=f"target {target:g}")
    if required is not None:
        ax.axvline(required, color="#000", lw=1, ls="-.", label=f"required {x} = {required:g}")
    ax.set_xlabel(x)
    ax.set_ylabel(ylabel)
    ax.set_ylim(-0.02, 1.02)
    ax.grid(alpha=0.3)
    ax.set_title(title or f"{ylabel} against {x} (bands: 95% Wilson intervals)")
    ax.legend(fontsize=8, loc="best")
    return fig


def type1_plot(table: pd.DataFrame, x: str, alpha: float, title: str = ""):
    """Type I error against a swept parameter with alpha and Bradley's liberal bounds."""
    fig = power_curve(table, x, title=title or f"type I error against {x}", ylabel="type I error",
                      value="type1_error")
    ax = fig.axes[0]
    ax.axhline(alpha, color="#555", lw=1, ls=":", label=f"alpha {alpha:g}")
    ax.axhspan(0.5 * alpha, 1.5 * alpha, color="#2a8a3e", alpha=0.08, label="Bradley (1978) liberal bounds")
    ax.set_ylim(0, max(3 * alpha, float(table["ci_high"].max()) * 1.1))
    ax.legend(fontsize=8, loc="best")
    return fig


def search_plot(result, title: str = ""):
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
    ax.set_xlabel(result.parameter)
    ax.set_ylabel(f"power ({result.analysis})")
    ax.set_ylim(-0.02, 1.02)
    ax.grid(alpha=0.3)
    what = "required size" if result.kind == "size" else "minimal detectable effect"
    ax.set_title(title or f"{what} for power {result.target:g}")
    ax.legend(fontsize=8, loc="lower right")
    return fig


def heatmap(table: pd.DataFrame, x: str, y: str, analysis: str | None = None, value: str = "power",
            target: float | None = None, title: str = ""):
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
    ax.set_xlabel(x)
    ax.set_ylabel(y)
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
