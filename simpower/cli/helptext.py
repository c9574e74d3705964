"""``--help`` as plain text: the docstrings and option help lose their reST markup.

Command descriptions come from the modules' docstrings, which use reST
(````code````, ``:func:`name```, ``::``); a terminal shows them as typed, so
this formatter removes the markup and keeps the paragraphs.
"""

from __future__ import annotations

import argparse
import re
import textwrap

_ROLE = re.compile(r":[a-z]+:`~?([^`]+)`")
_TICKS = re.compile(r"`{1,2}([^`]+)`{1,2}")


def plain(text: str) -> str:
    """reST inline markup removed: ``:func:`x``` and ````x```` become x; a closing ``::`` becomes ``:``."""
    text = _ROLE.sub(lambda m: m.group(1).rsplit(".", 1)[-1] if m.group(0).count("~") else m.group(1), text)
    text = _TICKS.sub(r"\1", text)
    text = re.sub(r"\s*::(\s|$)", r":\1", text)
    return text


class PlainHelpFormatter(argparse.HelpFormatter):
    """Descriptions and option help without reST markup; blank-line paragraphs of a description kept."""

    def _format_text(self, text: str) -> str:
        if "%(prog)" in text:
            text = text % {"prog": self._prog}
        text = plain(textwrap.dedent(text)).strip()
        width = max(self._width - self._current_indent, 11)
        paras = [" ".join(p.split()) for p in re.split(r"\n\s*\n", text) if p.strip()]
        return "\n\n".join(textwrap.fill(p, width) for p in paras) + "\n\n"

    def _expand_help(self, action) -> str:
        return plain(super()._expand_help(action))


def apply(parser: argparse.ArgumentParser) -> None:
    """Use :class:`PlainHelpFormatter` for ``parser`` and every sub-command parser under it."""
    parser.formatter_class = PlainHelpFormatter
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for sub in action.choices.values():
                apply(sub)
