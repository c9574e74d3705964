"""Writing a store's tables to CSV or Parquet, one frame at a time (bounded memory)."""

from __future__ import annotations

from pathlib import Path
from typing import Iterator

import pandas as pd

from ...errors import StoreError


def write_frames(frames: Iterator[pd.DataFrame], path: Path, fmt: str) -> int:
    n = 0
    if fmt == "csv":
        with open(path, "w", newline="") as fh:
            for i, df in enumerate(frames):
                df.to_csv(fh, index=False, header=i == 0)
                n += len(df)
        return n
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise StoreError("Parquet export needs pyarrow: pip install pyarrow.") from None
    writer = None
    schema = None
    try:
        for df in frames:
            tbl = pa.Table.from_pandas(df, preserve_index=False)
            if writer is None:
                schema = tbl.schema
                writer = pq.ParquetWriter(str(path), schema)
            elif tbl.schema != schema:
                tbl = tbl.cast(schema)
            writer.write_table(tbl)
            n += len(df)
    finally:
        if writer is not None:
            writer.close()
    if writer is None:
        pd.DataFrame().to_parquet(path)
    return n
