"""Public parameter constraints: declare what a component's parameters accept.

A component (a process, an outcome, a missingness mechanism or an analysis)
declares a table ``params = {name: constraint}``; construction checks every
value once with :func:`check_params`, and a bad value raises
:class:`~simpower.errors.ParameterError` with the parameter's name first::

    from simpower.constraints import Int, Real, Choice
    from simpower import Process

    class MyProcess(Process):
        name = "my_process"
        params = {"n": Int(low=2), "sd": Real(0.0, low_open=True), "shape": Choice(("flat", "peaked"))}
        defaults = {"sd": 1.0, "shape": "flat"}

``Real(0, low_open=True).clean("sd", -1)`` raises "`sd` must be > 0; got -1.".

The types
---------
Real(low, high, low_open, high_open, optional)
    A finite real number in an interval (``None`` bounds are open-ended).
Int(low, high, optional)
    An integer (a float with an integer value is accepted).
Choice(options, optional)
    One of a fixed set of strings; a near miss gets "Did you mean ...?".
Bool(optional)
    True or false.
Text(optional)
    A string (a parameter name, a path, a title).
Table(optional)
    A table of named values (its entries are checked by its reader).
OneOrMore(item, sep, optional)
    One value or a list of values, each meeting ``item`` (with ``sep``, a
    string is split on it); cleans to a tuple.
Anything(optional=True)
    No check here (the component's ``_check`` validates it).
Nested(kind, optional)
    Another component of a kind ("outcome", "missingness", "analysis", ...),
    given as an object or a ``{type = "...", ...}`` table.

Any object with ``describe() -> str``, ``clean(name, value) -> value`` and an
``optional`` attribute serves as a constraint too.

(The implementations live in ``simpower/_validation.py`` and
``simpower/components.py``; this module is their public home.)
"""

from __future__ import annotations

from ._validation import Anything, Bool, Choice, Constraint, Int, OneOrMore, Real, Table, Text, check_params
from .components import Nested
from .errors import ParameterError

__all__ = ["Real", "Int", "Choice", "Bool", "Text", "Table", "OneOrMore", "Anything", "Nested", "Constraint", "check_params", "ParameterError"]
