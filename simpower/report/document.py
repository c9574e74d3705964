"""A report as a list of blocks, rendered to Markdown or HTML by their own modules.

Blocks are plain data: headings, paragraphs, bullet lists, tables
(DataFrames), code, and figures (a PNG and an SVG file on disk), so the two
renderers show the same content.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd


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
