"""The blocks of a scenario file and their declared fields, checked when the file is loaded.

Each block of a study plan (``[sweep]``, ``[search]``, ``[sequential]``,
``[null_check]``, ``[report]``, ``[store]``, ``[execution]``) declares its
fields as a table ``{field: constraint}`` (:mod:`simpower.constraints`);
:func:`read_block` checks a block against its table and returns the cleaned
fields. The loader (:mod:`simpower.scenario_files`) calls it for every block
present, so ``[sweep] reps = -5`` is refused at load, in one line naming
``sweep.reps``, before anything runs.

The tables live here, below the planning code and the engine that use them,
so the loader can check every block without importing what runs it.
"""

from __future__ import annotations

from typing import Any

from ._validation import Anything, Bool, Choice, Int, OneOrMore, Real, Table, Text
from .errors import ParameterError, nearest

#: a target Monte Carlo SE of a rejection rate: above 0 and below 0.5 (the largest SE a rate can have)
TARGET_MCSE = Real(0.0, 0.5, low_open=True, high_open=True)
#: executors (see :mod:`simpower.engine.executor`)
BACKENDS = ("loky", "threading", "serial", "dask")
#: the scales a size search may use between its evaluated sizes (see :mod:`simpower.planning.search`)
SEARCH_SCALES = ("sqrt", "log", "linear")
#: report formats
FORMATS = ("md", "html")

#: [sweep]: the grid (``vary`` crossed, ``together`` zipped sets), replicates per point and the plot axis
SWEEP_FIELDS = {"vary": Table(), "together": OneOrMore(Table()), "reps": Int(low=1), "target_mcse": TARGET_MCSE,
                "max_reps": Int(low=1), "min_reps": Int(low=1), "chunk_size": Int(low=1), "x": Text(),
                "null_check": Bool()}
#: [search]: the required size (``find = "size"``) or the minimal detectable effect (``"effect"``)
SEARCH_FIELDS = {
    "find": Choice(("size", "effect")), "power": Real(0.0, 1.0, low_open=True, high_open=True), "parameter": Text(),
    "low": Real(), "high": Real(), "step": Real(0.0, low_open=True), "scale": Choice(SEARCH_SCALES),
    "level": Real(0.5, 1.0, high_open=True), "rel_tol": Real(0.0, 1.0, low_open=True, high_open=True),
    "max_reps": Int(low=1), "chunk_size": Int(low=1), "analysis": Text(), "pilot_points": Int(low=2),
    "all_analyses": Bool(),
}
#: [sequential]: run until the power's MCSE reaches a target
SEQUENTIAL_FIELDS = {"target_mcse": TARGET_MCSE, "min_reps": Int(low=1), "max_reps": Int(low=1),
                     "chunk_size": Int(low=1), "which": Choice(("primary", "all"))}
#: [null_check]: the type I error at each analysis's H0 boundary
NULL_CHECK_FIELDS = {"enabled": Bool(), "reps": Int(low=1), "at_grid": Bool()}
class Labels(Table):
    """``[report.labels]``: parameter name -> words, or -> ``{label = "...", unit = "..."}``."""

    def clean(self, name, value):
        value = super().clean(name, value)
        out = {}
        for key, spec in value.items():
            where = f"{name}.{key}"
            if isinstance(spec, str):
                out[key] = spec
            elif isinstance(spec, dict):
                bad = [k for k in spec if k not in ("label", "unit")]
                if bad:
                    raise ParameterError(f"`{where}.{bad[0]}` is not a field of a label; use `label` and `unit`, "
                                         f'e.g. {key} = {{label = "words", unit = "units"}}.')
                for k, v in spec.items():
                    if not isinstance(v, str):
                        raise ParameterError(f"`{where}.{k}` must be a string; got {v!r}.")
                out[key] = dict(spec)
            else:
                raise ParameterError(f'`{where}` must be a string or a table {{label = "...", unit = "..."}}; '
                                     f"got {spec!r}.")
        return out


#: [report]: title, output folder (relative to the file's folder), formats (a list or "md,html"), and
#: [report.labels]: words and units for parameters in tables and plots
REPORT_FIELDS = {"title": Text(), "out": Text(), "formats": OneOrMore(Choice(FORMATS), sep=","), "labels": Labels()}
#: [store]: the run store file (relative to the file's folder) and its durability
STORE_FIELDS = {"path": Text(), "sync": Choice(("normal", "full"))}
#: [execution]: where and how chunks run (never what they compute)
EXECUTION_FIELDS = {"backend": Choice(BACKENDS), "address": Text(), "timeout": Real(0.0, low_open=True),
                    "summaries_only": Bool()}

#: [assurance]: a prior on parameters ([assurance.prior]), the two-level Monte Carlo, and optionally the size
#: whose assurance reaches `target` (evaluated at `points` sizes in [low, high])
ASSURANCE_FIELDS = {"prior": Table(), "draws": Int(low=2), "reps_per_draw": Int(low=1),
                    "favourable": Choice(("greater", "less")), "analysis": Text(),
                    "target": Real(0.0, 1.0, low_open=True, high_open=True), "low": Real(0.0, low_open=True),
                    "high": Real(0.0, low_open=True), "points": Int(low=2), "parameter": Text()}
#: [looks]: a group-sequential design around the scenario's analyses (see docs/group-sequential.md); the values are
#: checked again, with their cross-field rules, when :func:`with_looks` builds the `group_sequential` analyses
LOOKS_FIELDS = {"fractions": Anything(), "spending": Choice(("obf", "pocock", "power", "gamma")), "param": Real(),
                "boundary": Choice(("spending", "classical", "nominal")),
                "alpha": Real(0.0, 0.5, low_open=True, high_open=True), "sides": Int(1, 2), "futility": Anything(),
                "binding": Bool(), "scale": Choice(("z", "p")), "analyses": OneOrMore(Text(), sep=",")}

#: every block of a study plan -> its fields
BLOCK_FIELDS: dict[str, dict[str, Any]] = {
    "sweep": SWEEP_FIELDS, "search": SEARCH_FIELDS, "sequential": SEQUENTIAL_FIELDS,
    "null_check": NULL_CHECK_FIELDS, "report": REPORT_FIELDS, "store": STORE_FIELDS,
    "execution": EXECUTION_FIELDS, "assurance": ASSURANCE_FIELDS, "looks": LOOKS_FIELDS,
}


def read_block(block_name: str, block: Any, fields: dict | None = None) -> dict:
    """Check a block (a TOML table) against ``{field: constraint}``; return the cleaned fields.

    ``fields`` defaults to the block's own table in :data:`BLOCK_FIELDS`. An
    unknown field raises a ParameterError naming the nearest valid one; a bad
    value one naming ``block.field``; absent fields are left out.

    Examples
    --------
    >>> read_block("sweep", {"reps": 500})
    {'reps': 500}
    >>> read_block("sweep", {"reps": -5})
    Traceback (most recent call last):
    ...
    simpower.errors.ParameterError: `sweep.reps` must be an integer >= 1; got -5.
    """
    if fields is None:
        fields = BLOCK_FIELDS[block_name]
    if block is None:
        return {}
    if not isinstance(block, dict):
        raise ParameterError(f"`{block_name}` must be a table ([{block_name}] with fields "
                             f"{', '.join(fields)}); got {block!r}.")
    out = {}
    for key, value in block.items():
        if key not in fields:
            raise ParameterError(f"`{block_name}.{key}` is not a field of [{block_name}].{nearest(key, fields)}")
        con = fields[key]
        out[key] = value if con is None else con.clean(f"{block_name}.{key}", value)
    return out


def with_looks(analyses: dict, block: dict, alpha: float) -> dict:
    """The analyses with those the ``[looks]`` block names (default: all) wrapped in a group-sequential design.

    Each keeps its label; the design's ``alpha`` defaults to the scenario's ``alpha``. A bad value
    raises a ParameterError naming ``looks.<field>`` and the fix.

    Examples
    --------
    >>> from simpower.registry import build
    >>> got = with_looks({"t": build("analysis", {"type": "z_test", "alternative": "greater"})},
    ...                  {"fractions": [0.5, 1]}, 0.025)
    >>> got["t"].name, got["t"].looks
    ('group_sequential', 2)
    >>> with_looks({"t": got["t"].inner}, {"fractions": [0.5, 0.9]}, 0.025)
    Traceback (most recent call last):
    ...
    simpower.errors.ParameterError: `looks.fractions` must end at 1 (the last look has all the data); got 0.9: add 1.
    """
    from .registry import build

    names = list(block.get("analyses") or analyses)
    for n in names:
        if n not in analyses:
            raise ParameterError(f"`looks.analyses` names {n!r}, which is no analysis of the scenario."
                                 f"{nearest(n, analyses)}")
    design = {k: v for k, v in block.items() if k != "analyses"}
    design.setdefault("alpha", alpha)
    return {label: build("analysis", {"type": "group_sequential", "inner": an, **design}, where="looks")
            if label in names else an for label, an in analyses.items()}
