"""A report as a list of blocks, rendered to Markdown or HTML by their own modules.

Blocks are plain data: headings, paragraphs, bullet lists, tables
(DataFrames), code, and figures (a PNG and an SVG file on disk), so the two
renderers show the same content.

Text of headings, paragraphs, bullets and captions (and the title) is a small
inline markup: ```code```, ``**bold**``, and ``\\x`` for a literal ``x``.
User text (scenario names, labels, descriptions, messages) enters it only
through :func:`literal` or :func:`code`, so it shows as typed in both formats:
a name with HTML tags or Markdown characters is text, never markup. Table
cells and code blocks are data, escaped by each renderer.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd


MARKUP = "\\`*"


def literal(text: Any) -> str:
    """User text as inline markup that shows exactly this text (on one line)."""
    t = " ".join(str(text).splitlines())
    return "".join("\\" + c if c in MARKUP else c for c in t)


def code(text: Any) -> str:
    """User text as a code span (e.g. an analysis label)."""
    return "`" + literal(text) + "`"


def spans(text: str) -> list[tuple[str, str]]:
    """Parse inline markup into ``(kind, text)`` pieces: kind 'text', 'code', or 'bold' (a toggle, text '')."""
    out: list[tuple[str, str]] = []
    buf: list[str] = []
    in_code = False
    i = 0

    def flush():
        if buf:
            out.append(("code" if in_code else "text", "".join(buf)))
            buf.clear()

    while i < len(text):
        c = text[i]
        if c == "\\" and i + 1 < len(text):
            buf.append(text[i + 1])
            i += 2
            continue
        if c == "`":
            if in_code:
                out.append(("code", "".join(buf)))
                buf.clear()
            else:
                flush()
            in_code = not in_code
        elif not in_code and text.startswith("**", i):
            flush()
            out.append(("bold", ""))
            i += 1
        else:
            buf.append(c)
        i += 1
    flush()
    return out


@dataclass
class Heading:
    text: str
    level: int = 2


@dataclass
class Paragraph:
    text: str


@dataclass
class Bullets:
    items: list[str]


@dataclass
class Table:
    frame: pd.DataFrame
    caption: str = ""


@dataclass
class Code:
    text: str


@dataclass
class Figure:
    png: Path
    svg: Path
    caption: str


@dataclass
class Document:
    title: str
    blocks: list[Any] = field(default_factory=list)

    def add(self, block) -> None:
        self.blocks.append(block)

    def heading(self, text: str, level: int = 2) -> None:
        self.add(Heading(text, level))

    def para(self, text: str) -> None:
        self.add(Paragraph(text))

    def bullets(self, items) -> None:
        self.add(Bullets([str(i) for i in items]))

    def table(self, frame: pd.DataFrame, caption: str = "") -> None:
        self.add(Table(frame, caption))

    def code(self, text: str) -> None:
        self.add(Code(text))

    def figure(self, png, svg, caption: str) -> None:
        self.add(Figure(Path(png), Path(svg), caption))


def fmt_cell(v: Any) -> str:
    """A table cell as text: 4 significant digits for floats, '-' for missing."""
    if v is None:
        return "-"
    if isinstance(v, float):
        if v != v:
            return "-"
        return f"{v:.4g}"
    if isinstance(v, (bool,)):
        return "yes" if v else "no"
    try:
        import numpy as np

        if isinstance(v, np.bool_):
            return "yes" if bool(v) else "no"
        if isinstance(v, np.floating):
            return fmt_cell(float(v))
    except ImportError:  # pragma: no cover
        pass
    return str(v)
