"""Closed-form power, required sample size, minimal detectable effect, design effects.

The bottom layer of simpower: numpy and scipy only. Every function broadcasts
its numeric arguments, returns a Python float for scalar input and an ndarray
otherwise, and raises :class:`simpower.errors.ParameterError` on bad input.
Effects are raw differences with an ``sd`` argument (default 1, so effect =
Cohen's d); two-arm designs take ``n`` = control-arm size and ``ratio`` =
treatment / control size. ``alternative`` is "two-sided", "greater" (H1:
effect > 0) or "less". Two-sided power counts both rejection tails, and the
``*_n`` / ``*_effect`` functions invert the power functions exactly.

See ``docs/analytic.md`` for formulas and sources.
"""

from .ancova import ancova_effect, ancova_n, ancova_power
from .design import ceil_n, clusters_per_arm, design_effect, inflate_for_dropout
from .equivalence import tost_power, welch_tost_power
from .normal import z_critical, z_effect, z_n, z_power
from .proportions import prop2_effect, prop2_n, prop2_power
from .survival import schoenfeld_events, schoenfeld_power
from .ttest import t_effect, t_n, t_power
from .welch import welch_df, welch_effect, welch_n, welch_power

__all__ = [
    "ancova_effect", "ancova_n", "ancova_power",
    "ceil_n", "clusters_per_arm", "design_effect", "inflate_for_dropout",
    "prop2_effect", "prop2_n", "prop2_power",
    "schoenfeld_events", "schoenfeld_power",
    "t_effect", "t_n", "t_power", "tost_power",
    "welch_df", "welch_effect", "welch_n", "welch_power", "welch_tost_power",
    "z_critical", "z_effect", "z_n", "z_power",
]
