"""Whether a table that exists in the target can hold the mapping's values exactly.

``apply`` creates each table from the mapping's types when it is absent; a table made beforehand
(by hand, by another tool, by an apply under an earlier mapping) is used as it is. A column whose
declared type would change values without an error is refused before anything is written:

- a decimal in a float or integer column (rounded), or in a decimal of smaller scale (rounded);
- a float in a float of single precision, an integer or a decimal column (rounded);
- an integer in a float column (rounded above 2**53, or 2**24);
- a timestamp in a timestamp without time zone (moved into the session's zone) or a date or
  time (cut);
- text in a fixed-width ``CHAR(n)`` (padded with spaces).

SQLite has no column types, only affinities (https://www.sqlite.org/datatype3.html, section 3.1):
text it is handed in a column of INTEGER, REAL or NUMERIC affinity is turned into a number when it
looks like one (``47.50`` becomes 47.5, ``007`` becomes 7), and a float in a column of TEXT
affinity into text of 15 significant digits. cdcnorm hands SQLite every type but integer, float,
boolean and bytes as text; of those, decimals, text and JSON can look like numbers (a date, a time,
an RFC 3339 timestamp or a UUID never does, so a ``DATETIME`` column keeps them as they are).

A type that cannot take a value at all (text in an integer column, a number too large) is left to
the database, which refuses the statement in its own words. A column the table lacks is named,
with the statement that adds it.
"""

from __future__ import annotations

from sqlglot import exp

from cdcnorm.types.base import FieldType

T = exp.DataType.Type
FLOATS = {T.FLOAT, T.DOUBLE}
INTEGERS = {T.TINYINT, T.SMALLINT, T.INT, T.BIGINT, T.INT128, T.UTINYINT, T.USMALLINT, T.UINT, T.UBIGINT}


def _parsed(declared: str, dialect: str) -> exp.DataType | None:
    try:
        return exp.DataType.build(declared, dialect=dialect)
    except Exception:  # a type sqlglot does not know: the database decides what it takes
        return None


def _params(dt: exp.DataType) -> list[int]:
    return [int(p.this.this) for p in dt.expressions if isinstance(p, exp.DataTypeParam) and p.this.is_int]


def why_not_exact(declared: str, ftype: FieldType, dialect: str) -> str | None:
    """Why a column declared ``declared`` (in ``dialect``: duckdb or postgres) would change values
    of ``ftype`` without an error; None when it holds them (or refuses them loudly)."""
    dt = _parsed(declared, dialect)
    if dt is None:
        return None
    kind = dt.this
    name = ftype.name
    if name == "decimal":
        if kind in FLOATS:
            return "a float column rounds decimals to binary fractions"
        if kind in INTEGERS:
            return "an integer column rounds away the fraction"
        if kind == T.DECIMAL:
            params = _params(dt)
            scale = params[1] if len(params) > 1 else (0 if params else None)
            if not params and dialect == "duckdb":
                scale = 3  # DuckDB's DECIMAL is DECIMAL(18,3); PostgreSQL's NUMERIC has no limit
            if scale is not None and scale < ftype.params[1]:
                return f"a scale of {scale} rounds values of scale {ftype.params[1]}"
    if name == "float":
        if kind == T.FLOAT:
            return "a single-precision float column rounds doubles"
        if kind in INTEGERS or kind == T.DECIMAL:
            return "the column rounds floats"
    if name == "integer" and kind in FLOATS:
        return "a float column rounds integers beyond its mantissa (2**53, or 2**24 in single precision)"
    if name == "timestamp":
        if kind in (T.TIMESTAMP, T.TIMESTAMPNTZ, T.DATETIME):
            return "a timestamp without time zone moves each value into the session's time zone"
        if kind in (T.DATE, T.TIME):
            return "the column cuts timestamps"
    if name in ("text", "uuid", "json") and kind in (T.CHAR, T.NCHAR):
        return "a fixed-width CHAR column pads values with spaces"
    return None


def sqlite_affinity(declared: str) -> str:
    """A declared type's affinity, by the rules of https://www.sqlite.org/datatype3.html section 3.1."""
    t = declared.upper()
    if "INT" in t:
        return "INTEGER"
    if any(s in t for s in ("CHAR", "CLOB", "TEXT")):
        return "TEXT"
    if "BLOB" in t or not t.strip():
        return "BLOB"
    if any(s in t for s in ("REAL", "FLOA", "DOUB")):
        return "REAL"
    return "NUMERIC"


def why_not_exact_sqlite(declared: str, ftype: FieldType) -> str | None:
    """As ``why_not_exact``, for SQLite's affinities."""
    affinity = sqlite_affinity(declared)
    name = ftype.name
    if name == "float" and affinity == "TEXT":
        return "TEXT affinity turns floats into text of 15 significant digits"
    if name == "integer" and affinity == "REAL":
        return "REAL affinity turns integers into floats (rounded beyond 2**53)"
    # dates, times, timestamps and UUIDs are handed over as text that never reads as a number
    if name in ("decimal", "text", "json") and affinity in ("INTEGER", "REAL", "NUMERIC"):
        return (
            f"{affinity} affinity turns text that looks like a number into one (47.50 becomes 47.5, "
            "007 becomes 7)"
        )
    return None
