"""``simpower export STORE [OUT]``: a run store's tables as CSV or Parquet (or a summary on screen).

Tables: ``replicates`` (one row per replicate and analysis: point, analysis,
chunk, replicate, pvalue, estimate, se, ci_low, ci_high, failure), ``points``
(one row per grid point and analysis: parameters, progress, power with MCSE,
failures), ``chunks`` (timings and workers) and ``failures`` (counts by cause
with the first message). The format follows OUT's suffix (.csv, .parquet) or
--format. Without OUT the points table is printed.
"""

from __future__ import annotations


def register(sub) -> None:
    p = sub.add_parser("export", help="write a run store's replicates, points, chunks or failures as CSV/Parquet",
                       description=__doc__)
    p.add_argument("store", help="run store file (SQLite) written with --store")
    p.add_argument("out", nargs="?", help="output file (.csv or .parquet); omitted: print the points table")
    p.add_argument("--table", choices=("replicates", "points", "chunks", "failures"), default=None,
                   help="which table (default: replicates when writing a file, points on screen)")
    p.add_argument("--format", choices=("csv", "parquet"), help="output format (default: from OUT's suffix)")
    p.set_defaults(func=main)


def main(args) -> int:
    import pandas as pd

    from ..engine.store import open_store
    from .common import check_output_file

    if args.out is not None:
        check_output_file("OUT", args.out)
    with open_store(args.store) as st:
        if args.out is None:
            table = args.table or "points"
            df = st.replicates() if table == "replicates" else getattr(st, table)()
            with pd.option_context("display.max_columns", 30, "display.width", 160):
                print(df.to_string(index=False) if len(df) else f"(no rows in {table})")
            return 0
        n = st.export(args.out, table=args.table or "replicates", fmt=args.format)
    print(f"{n} rows written to {args.out}")
    return 0
