"""The one formula grammar of simpower: checked before any formula engine sees the text.

statsmodels hands a formula to a formula engine (patsy or formulaic), which
evaluates the text as Python, so ``I(__import__('os')...)`` in a scenario file
would run code. Every analysis that takes a ``formula`` therefore parses it
here first, at construction, and refuses anything outside this grammar::

    formula  := NAME "~" sum
    sum      := ["-"] product (("+" | "-") product)*
    product  := inter ("*" inter)*          a*b  = a + b + a:b
    inter    := atom (":" atom)*            a:b  = the interaction
    atom     := NAME | "C(" NAME [", " contrast] ")" | "0" | "1" | "(" sum ")"
    contrast := "Treatment(" ["reference="] INTEGER ")"

A NAME is a column of the long table (letters, digits, ``_``; not a Python
keyword, not starting with ``__``); ``C(name)`` makes it categorical
(treatment coding, the lowest level as reference, or the level given by
``Treatment(k)``); ``0 +`` or ``- 1`` drops the intercept, ``- term`` drops a
term. There are no strings, calls (other than ``C`` and ``Treatment``),
attribute access, indexing or transformations: put a transformed variable in
the data as its own column instead. The accepted text then goes to statsmodels
unchanged, so coefficient names are the ones statsmodels gives.

Examples
--------
>>> f = parse_formula("y ~ C(arm) * baseline - 1")
>>> f.columns, f.intercept
(['y', 'arm', 'baseline'], False)
>>> parse_formula("y ~ np.log(x)")  # doctest: +ELLIPSIS
Traceback (most recent call last):
...
simpower.errors.ParameterError: `formula`: '.' at position 6 is not accepted; ...
"""

from __future__ import annotations

import keyword
import re
from dataclasses import dataclass, field
from functools import lru_cache

from ._validation import Anything
from .errors import ParameterError

HINT = ("e.g. \"y ~ C(arm) + baseline\"; terms are column names, C(column), C(column, Treatment(k)), "
        "a:b, a*b, (...), 0, 1 and - term")

_TOKEN = re.compile(r"\s*(?:(?P<name>[A-Za-z_][A-Za-z0-9_]*)|(?P<num>\d+(?:\.\d*)?)|(?P<op>[~+\-*:(),=]))")

Factor = tuple[str, str]          # ('num' | 'cat', column)
Term = tuple[Factor, ...]


@dataclass(frozen=True)
class Formula:
    """A parsed formula of the accepted grammar.

    ``terms`` excludes the intercept; each term is a tuple of factors
    ``(kind, column)`` with kind 'num' (the column as a number) or 'cat'
    (``C(column)``). ``references`` maps a categorical column to the
    reference level given by ``Treatment(k)``.
    """

    text: str
    outcome: str
    terms: tuple[Term, ...]
    intercept: bool
    references: dict = field(default_factory=dict)

    @property
    def columns(self) -> list[str]:
        """The outcome, then every column the terms use, in order of first use."""
        cols = [self.outcome]
        for term in self.terms:
            for _, c in term:
                if c not in cols:
                    cols.append(c)
        return cols

    @property
    def main_effects_only(self) -> bool:
        return all(len(t) == 1 for t in self.terms)


class _Parser:
    def __init__(self, text: str, field: str):
        self.text, self.field = text, field
        self.tokens = self._tokenize(text)
        self.i = 0
        self.references: dict[str, int] = {}

    # -- errors and tokens -----------------------------------------------------
    def fail(self, what: str):
        raise ParameterError(f"`{self.field}`: {what}; {HINT}; got {self.text!r}.")

    def _tokenize(self, text):
        out, pos = [], 0
        text = text.rstrip()
        while pos < len(text):
            m = _TOKEN.match(text, pos)
            if m is None:
                bad = text[pos:].lstrip()
                self.fail(f"{bad[:1]!r} at position {len(text) - len(bad)} is not accepted")
            kind = m.lastgroup
            value = m.group(kind)
            start = m.start(kind)
            if kind == "name":
                if keyword.iskeyword(value) or value.startswith("__"):
                    self.fail(f"{value!r} at position {start} is not a column name")
            out.append((kind, value, start))
            pos = m.end()
        return out

    def peek(self, value=None, kind=None):
        if self.i >= len(self.tokens):
            return False
        k, v, _ = self.tokens[self.i]
        return (value is None or v == value) and (kind is None or k == kind)

    def take(self, value=None, kind=None, what=""):
        if not self.peek(value, kind):
            if self.i >= len(self.tokens):
                self.fail(f"the formula ends where {what or repr(value)} was expected")
            _, v, pos = self.tokens[self.i]
            self.fail(f"{v!r} at position {pos} is not accepted here (expected {what or repr(value)})")
        tok = self.tokens[self.i]
        self.i += 1
        return tok

    # -- grammar -----------------------------------------------------------------
    def formula(self) -> Formula:
        _, outcome, _ = self.take(kind="name", what="the outcome column")
        self.take("~", what="'~' after the outcome (one outcome column)")
        terms, icpt = self.sum()
        if self.i < len(self.tokens):
            _, v, pos = self.tokens[self.i]
            self.fail(f"{v!r} at position {pos} is not accepted here")
        terms = [t for t in terms if t]
        if not terms:
            self.fail("the formula has no terms besides the intercept")
        return Formula(self.text, outcome, tuple(terms), icpt is not False, dict(self.references))

    def sum(self):
        """(terms, intercept) with intercept None (not said), True ('+ 1') or False ('0 +', '- 1')."""
        terms: list[Term] = []
        icpt = None
        sign = "+"
        if self.peek("-"):
            self.take("-")
            sign = "-"
        while True:
            value = self.product()
            if isinstance(value, str):          # a number: 0 or 1
                if (sign, value) in (("+", "0"), ("-", "1")):
                    icpt = False
                elif (sign, value) == ("+", "1"):
                    icpt = True
                else:
                    self.fail(f"'{sign} {value}' is not accepted (only '+ 0', '+ 1' or '- 1' set the intercept)")
            elif sign == "+":
                terms += [t for t in value if t not in terms]
            else:
                terms = [t for t in terms if t not in value]
            if self.peek("+") or self.peek("-"):
                sign = self.take()[1]
            else:
                return terms, icpt

    def product(self):
        left = self.inter()
        while self.peek("*"):
            self.take("*")
            right = self.inter()
            self._no_number(left, "*")
            self._no_number(right, "*")
            both = [t for t in left] + [t for t in right if t not in left]
            left = both + [t for t in _cross(left, right) if t not in both]
        return left

    def inter(self):
        left = self.atom()
        while self.peek(":"):
            self.take(":")
            right = self.atom()
            self._no_number(left, ":")
            self._no_number(right, ":")
            left = _cross(left, right)
        return left

    def _no_number(self, value, op):
        if isinstance(value, str):
            self.fail(f"the number {value} cannot enter '{op}' (0 and 1 only set the intercept)")

    def atom(self):
        if self.peek(kind="num"):
            _, v, pos = self.take(kind="num")
            if v not in ("0", "1"):
                self.fail(f"the number {v} at position {pos} is not accepted (only 0 or 1, the intercept)")
            return v
        if self.peek("("):
            self.take("(")
            terms, icpt = self.sum()
            self.take(")", what="')'")
            if icpt is not None:
                self.fail("0 and 1 (the intercept) are accepted only outside parentheses")
            return terms
        _, name, pos = self.take(kind="name", what="a column name, C(column), 0, 1 or '('")
        if not self.peek("("):
            return [(("num", name),)]
        if name != "C":
            self.fail(f"'{name}(' at position {pos} is not accepted (a call other than C(...))")
        self.take("(")
        _, col, _ = self.take(kind="name", what="a column name inside C(...)")
        if self.peek(","):
            self.take(",")
            _, fn, fpos = self.take(kind="name", what="Treatment(level)")
            if fn != "Treatment":
                self.fail(f"'{fn}' at position {fpos} is not accepted (the only contrast is Treatment(level))")
            self.take("(")
            if self.peek("reference"):
                self.take("reference")
                self.take("=")
            _, level, lpos = self.take(kind="num", what="an integer reference level")
            if not level.isdigit():
                self.fail(f"the reference level {level} at position {lpos} must be a whole number")
            self.take(")", what="')'")
            if self.references.get(col, int(level)) != int(level):
                self.fail(f"column {col!r} has two different reference levels")
            self.references[col] = int(level)
        self.take(")", what="')'")
        return [(("cat", col),)]


def _cross(left: list[Term], right: list[Term]) -> list[Term]:
    out: list[Term] = []
    for a in left:
        for b in right:
            t = a + tuple(f for f in b if f not in a)
            if t not in out:
                out.append(t)
    return out


def parse_formula(text, field: str = "formula") -> Formula:
    """Parse ``outcome ~ terms`` of the accepted grammar, or raise ParameterError naming ``field``."""
    if not isinstance(text, str) or "~" not in text:
        raise ParameterError(f"`{field}` must be a formula 'outcome ~ terms', {HINT}; got {text!r}.")
    return _parse(text.strip(), field)


@lru_cache(maxsize=256)
def _parse(text: str, field: str) -> Formula:   # analyses parse per replicate: keep the result
    return _Parser(text, field).formula()


def require_columns(text: str, columns, who: str) -> Formula:
    """The parsed formula, or ValueError when a column it names is not among ``columns`` (the data's).

    Called before a formula engine sees the text, so an unknown name is never looked up
    anywhere but in the data.
    """
    f = parse_formula(text)
    missing = [c for c in f.columns if c not in columns]
    if missing:
        raise ValueError(f"{who}: column {missing[0]!r} of the formula is not in the data "
                         f"(columns: {sorted(map(str, columns))})")
    return f


@dataclass(frozen=True)
class FormulaText(Anything):
    """Parameter constraint: a formula of the accepted grammar (None too when ``optional``).

    ``strip``: keep the text without surrounding spaces (the value, and so the
    scenario fingerprint, is otherwise the text as given).
    """

    optional: bool = False
    strip: bool = False

    def describe(self) -> str:
        return "a formula such as \"y ~ C(arm) + baseline\""

    def clean(self, name, value):
        if value is None and self.optional:
            return None
        parse_formula(value, name)
        return value.strip() if self.strip else value
