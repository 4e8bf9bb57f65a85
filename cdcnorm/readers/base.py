"""What a reader returns: the raw rows of one dump file, all values as text."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

MALFORMED_SCHEMA = pa.schema([("__row", pa.int64()), ("text", pa.string()), ("reason", pa.string())])


def empty_malformed() -> pa.Table:
    return MALFORMED_SCHEMA.empty_table()


@dataclass
class RawSource:
    """One dump file as read.

    ``table`` holds one text column per raw column, ``__row`` (the record's
    1-based number in the file: the data record for CSV, the line for JSON
    Lines, the row for Parquet) and ``__enc`` (NULL, or a JSON object of the
    cells that were not UTF-8, base64). ``malformed`` holds records that could
    not be split into columns at all, with their raw text.
    """

    path: Path
    name: str
    format: str
    columns: list[str]
    table: pa.Table
    malformed: pa.Table = field(default_factory=empty_malformed)
    empty: bool = False
    notes: list[str] = field(default_factory=list)

    @property
    def rows_read(self) -> int:
        return int(self.table.num_rows) + int(self.malformed.num_rows)


def with_rows(table: pa.Table, rows: pa.Array | None = None, enc: pa.Array | None = None) -> pa.Table:
    n = table.num_rows
    if rows is None:
        rows = pa.array(np.arange(1, n + 1, dtype=np.int64))
    table = table.append_column("__row", rows)
    if "__enc" not in table.column_names:
        table = table.append_column("__enc", enc if enc is not None else pa.nulls(n, pa.string()))
    return table
