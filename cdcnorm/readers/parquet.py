"""Parquet dumps: typed columns are read back as their text (BLOB as hex)."""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers.base import RawSource, with_rows

FORMAT = "parquet"
SUFFIXES = (".parquet", ".pq")


def read(path: Path, mapping: Mapping, engine: DuckDBEngine, name: str) -> RawSource:
    try:
        columns, table = engine.parquet_as_text(path)
    except Exception as e:  # duckdb raises its own error classes for corrupt files
        raise InputError(f"cannot read this Parquet file: {str(e).splitlines()[0]}", file=str(path)) from None
    tokens = [t for t in mapping.nulls if t != ""]
    if tokens:
        for c in columns:
            col = table[c]
            mask = pc.is_in(col, value_set=pa.array(tokens))
            table = table.set_column(table.column_names.index(c), c, pc.if_else(mask, None, col))
    rows = table["__row"]
    return RawSource(path, name, FORMAT, columns, with_rows(table.drop_columns(["__row"]), rows))
