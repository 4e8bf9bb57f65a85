"""Parquet dumps, read by the engine: typed columns as their text, BLOB as hex, nested values
(structs, lists, maps) as RFC 8259 JSON text. A string equal to a null token other than "" is NULL."""

from __future__ import annotations

from pathlib import Path

import duckdb

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers.base import RawFile, RawTable
from cdcnorm.sql import ident, lit

FORMAT = "parquet"
SUFFIXES = (".parquet", ".pq")


def _as_text(col: str, typ: str, tokens: list[str]) -> str:
    if typ == "BLOB":
        return f"hex({col})"
    if typ.startswith(("STRUCT", "MAP")) or typ.endswith("]"):
        return f"CAST(to_json({col}) AS VARCHAR)"
    text = f"CAST({col} AS VARCHAR)"
    if tokens and typ == "VARCHAR":
        return f"CASE WHEN {col} IN ({', '.join(lit(t) for t in tokens)}) THEN NULL ELSE {col} END"
    return text


def read_files(
    files: list[RawFile], mapping: Mapping, engine: DuckDBEngine, raw: RawTable, scratch: Path
) -> None:
    tokens = [t for t in mapping.nulls if t != ""]
    for f in files:
        f.format = FORMAT
        src = f"read_parquet({lit(str(f.path))}, file_row_number = true)"
        try:
            described = engine.rows(f"DESCRIBE SELECT * FROM {src}")
            cols = [(str(r[0]), str(r[1])) for r in described if r[0] != "file_row_number"]
            f.columns = [c for c, _ in cols]
            internal = [raw.internal(c) for c in f.columns]
            parts = [
                f"{_as_text(ident(c), t, tokens)} AS {ident(i)}"
                for (c, t), i in zip(cols, internal, strict=True)
            ]
            rel = raw.relation("parquet")
            engine.execute(
                f"CREATE TEMP TABLE {ident(rel)} AS SELECT CAST({f.file_id} AS INTEGER) AS __file, "
                f"CAST(file_row_number + 1 AS BIGINT) AS __row, CAST(NULL AS VARCHAR) AS __enc"
                + "".join(f", {p}" for p in parts)
                + f" FROM {src}"
            )
        except duckdb.Error as e:
            raise InputError(
                f"cannot read this Parquet file: {str(e).splitlines()[0]}", file=str(f.path)
            ) from None
        f.rows = int(engine.rows(f"SELECT count(*) FROM {ident(rel)}")[0][0])
        f.empty = f.rows == 0
        if f.empty:
            f.notes.append("the file has no rows")
        raw.add_relation(rel, internal)
