"""Reports of a planning study: plots, Markdown and self-contained HTML, the reproducibility manifest."""

from __future__ import annotations

from pathlib import Path

from . import html, markdown, plots
from .build import planning_document
from .document import Document
from .manifest import build_manifest, reproduce_command, versions, write_manifest


def write_report(doc: Document, outdir, formats=("md", "html")) -> dict[str, Path]:
    """Write ``report.md`` and/or ``report.html`` into ``outdir``; return the paths by format."""
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {}
    for f in formats:
        if f == "md":
            p = out / "report.md"
            p.write_text(markdown.render(doc, out), encoding="utf-8")
        elif f == "html":
            p = out / "report.html"
            p.write_text(html.render(doc), encoding="utf-8")
        else:
            from ..errors import ParameterError

            raise ParameterError(f"report format must be 'md' or 'html'; got {f!r}.")
        paths[f] = p
    return paths


def make_report(scenario, outdir, *, seed: int, command: str = "", sweep=None, search=None, null=None, run=None,
                title: str = "", x: str | None = None, target: float | None = None, scenario_file=None,
                settings: dict | None = None, formats=("md", "html"), notes=None, labels=None,
                assurance=None) -> dict[str, Path]:
    """Write a complete planning report into ``outdir`` from results already computed.

    Writes ``report.md`` / ``report.html``, ``manifest.json``, the figures
    (PNG and SVG) and the tables (``sweep.csv``, ``search.csv``,
    ``null_check.csv``). ``command`` is the command that reproduces the
    numbers (see :func:`reproduce_command`); from Python, record the call
    that produced the results. ``labels`` maps parameter names to words (and
    units) for the plots' axes and legends (a scenario file's ``[report.labels]``).
    """
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    if target is None and search is not None:
        target = search.target
    man = build_manifest(seed=seed, scenario=scenario, command=command or "(Python API)", scenario_file=scenario_file,
                         settings=settings)
    doc = planning_document(scenario, title=title, outdir=out, manifest=man, sweep=sweep, search=search, null=null,
                            run=run, x=x, target=target, notes=notes, labels=labels, assurance=assurance)
    paths = write_report(doc, out, formats)
    paths["manifest"] = write_manifest(man, out / "manifest.json")
    for name, t in (("sweep", sweep), ("null_check", null), ("search", None if search is None else search.table)):
        if t is not None:
            paths[name] = out / f"{name}.csv"
            t.to_csv(paths[name], index=False)
    if assurance is not None:
        paths["assurance"] = out / "assurance.csv"
        (assurance.table if hasattr(assurance, "table") else assurance.draws).to_csv(paths["assurance"], index=False)
    if run is not None:
        paths["run"] = out / "run.csv"
        run.summary().to_csv(paths["run"], index=False)
    return paths


__all__ = ["make_report", "Document", "planning_document", "write_report", "build_manifest", "reproduce_command", "versions",
           "write_manifest", "plots", "markdown", "html"]
