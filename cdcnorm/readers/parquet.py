"""Parquet dumps, read by the engine: typed columns as their text, BLOB as hex, nested values
(structs, lists, maps) as RFC 8259 JSON text. A mapped dotted column (``after.id``) that is not a
top-level column reads the member of a struct column, as a nested key of JSON Lines does. A string
equal to a null token other than "" is NULL."""

from __future__ import annotations

from pathlib import Path

import duckdb
from sqlglot import exp

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers.base import RawFile, RawTable

FORMAT = "parquet"
SUFFIXES = (".parquet", ".pq")


def _members(prefix: str, struct_type: str) -> list[str]:
    """Dotted names of the leaf members of a struct type, nested structs followed (sqlglot parses
    the type): the values a mapped dotted name most likely means."""
    out = []
    typ = exp.DataType.build(struct_type, dialect="duckdb")
    for member in typ.expressions:
        name = f"{prefix}.{member.name}"
        kind = member.args.get("kind")
        if isinstance(kind, exp.DataType) and kind.is_type(exp.DataType.Type.STRUCT):
            out.extend(_members(name, kind.sql(dialect="duckdb")))
        else:
            out.append(name)
    return out


def _own_names(path: Path) -> list[str] | None:
    """The file's top-level column names as its schema states them (the engine renames a name that
    differs from another only in case); None when pyarrow cannot read the schema."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        return list(pq.read_schema(path).names)
    except (pa.ArrowException, OSError):
        return None


def read_files(
    files: list[RawFile], mapping: Mapping, engine: DuckDBEngine, raw: RawTable, scratch: Path
) -> None:
    tokens = [t for t in mapping.nulls if t != ""]
    for f in files:
        f.format = FORMAT
        rel = raw.relation("parquet")
        try:
            nested = [tuple(c.split(".")) for c in mapping.mapped_columns() if "." in c]
            own = _own_names(f.path)
            repeated = sorted({n for n in own or [] if (own or []).count(n) > 1})
            if repeated:  # as a CSV header that repeats a name: which one a mapping means is unknown
                raise InputError(
                    f"the file's schema repeats column names {repeated}",
                    file=str(f.path),
                    expected="each column name once",
                    found=", ".join(own or []),
                )
            cols = engine.scan_parquet(f.path, nested, own)
            f.columns = [".".join(k) for k, _, _ in cols]
            f.members = [m for k, t, _ in cols if t.startswith("STRUCT") for m in _members(k[0], t)]
            internal = [raw.internal(c) for c in f.columns]
            engine.load_parquet_as_text(
                rel,
                f.path,
                f.file_id,
                [(e, t, i) for (_, t, e), i in zip(cols, internal, strict=True)],
                tokens,
            )
        except duckdb.Error as e:
            raise InputError(
                f"cannot read this Parquet file: {str(e).splitlines()[0]}", file=str(f.path)
            ) from None
        f.rows = engine.count(rel)
        f.empty = f.rows == 0
        if f.empty:
            f.notes.append("the file has no rows")
        raw.add_relation(rel, internal)
