"""Render a :class:`~simpower.report.document.Document` as Markdown (figures linked by relative path)."""

from __future__ import annotations

from pathlib import Path

from .document import Bullets, Code, Document, Figure, Heading, Paragraph, Table, fmt_cell


def _escape(text: str) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def table_markdown(frame) -> str:
    cols = [str(c) for c in frame.columns]
    lines = ["| " + " | ".join(_escape(c) for c in cols) + " |", "|" + "|".join(" --- " for _ in cols) + "|"]
    for row in frame.itertuples(index=False):
        lines.append("| " + " | ".join(_escape(fmt_cell(v)) for v in row) + " |")
    return "\n".join(lines)


def render(doc: Document, base: Path | None = None) -> str:
    """Markdown text; figure paths are written relative to ``base`` (the report's folder)."""
    out = [f"# {doc.title}", ""]
    for b in doc.blocks:
        if isinstance(b, Heading):
            out += ["#" * b.level + " " + b.text, ""]
        elif isinstance(b, Paragraph):
            out += [b.text, ""]
        elif isinstance(b, Bullets):
            out += [f"- {i}" for i in b.items] + [""]
        elif isinstance(b, Table):
            if b.caption:
                out += [f"*{b.caption}*", ""]
            out += [table_markdown(b.frame), ""]
        elif isinstance(b, Code):
            out += ["```", b.text, "```", ""]
        elif isinstance(b, Figure):
            rel = b.png.name if base is None else b.png.relative_to(base).as_posix()
            svg = b.svg.name if base is None else b.svg.relative_to(base).as_posix()
            out += [f"![{b.caption}]({rel})", "", f"*{b.caption}* (vector version: [{svg}]({svg}))", ""]
    return "\n".join(out).rstrip() + "\n"
