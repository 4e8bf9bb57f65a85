"""JSON Lines dumps (one RFC 8259 object per line), flat or nested.

Nested objects are flattened to dotted column names (``after.fare``); scalar
values become their text (numbers keep their digits), arrays and objects
under a leaf stay JSON text. A JSON null is NULL; a string equal to a null
token other than "" is NULL too. A line that is not a JSON object is kept as
malformed with its raw text; blank lines are not records.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers.base import RawSource, with_rows
from cdcnorm.sql import ident, lit

FORMAT = "jsonl"
SUFFIXES = (".jsonl", ".ndjson", ".jsonl.gz", ".ndjson.gz")


def _paths(structure: Any, leaves: set[str], prefix: tuple[str, ...] = ()) -> list[tuple[str, ...]]:
    """Flattened column paths; a path the mapping names is a leaf even when it holds an object."""
    if isinstance(structure, dict) and structure and ".".join(prefix) not in leaves:
        out: list[tuple[str, ...]] = []
        for k, v in structure.items():
            out.extend(_paths(v, leaves, (*prefix, k)))
        return out
    return [prefix] if prefix else []


def _json_path(parts: tuple[str, ...]) -> str:
    return "$" + "".join("." + json.dumps(p) for p in parts)


def read(path: Path, mapping: Mapping, engine: DuckDBEngine, name: str) -> RawSource:
    try:
        with pa.input_stream(str(path), compression="detect") as stream:
            data = stream.read()
    except OSError as e:
        raise InputError(f"cannot read this file: {e}", file=str(path)) from None
    if not data.strip():
        return RawSource(
            path, name, FORMAT, [], with_rows(pa.table({})), empty=True, notes=["the file is empty"]
        )
    if data.endswith(b"\n"):
        data = data[:-1]
    lines = pc.list_flatten(pc.split_pattern(pa.array([data], pa.large_binary()), b"\n"))
    numbers = pa.array(np.arange(1, len(lines) + 1, dtype=np.int64))
    engine.register("__jsonl_lines", pa.table({"raw": lines, "__row": numbers}))
    engine.con.execute(
        "CREATE OR REPLACE TEMP TABLE __jsonl AS "
        "SELECT __row, rtrim(try(decode(raw)), chr(13)) AS line, raw FROM __jsonl_lines "
        "WHERE NOT regexp_full_match(coalesce(try(decode(raw)), 'x'), '\\s*')"
    )
    engine.con.unregister("__jsonl_lines")
    bad = engine.arrow(
        "SELECT __row, CASE WHEN line IS NULL THEN to_base64(raw) ELSE line END AS text, "
        "CASE WHEN line IS NULL THEN 'not UTF-8 (text shown base64)' "
        "WHEN NOT json_valid(line) THEN 'not valid JSON (RFC 8259)' "
        "ELSE 'not a JSON object' END AS reason FROM __jsonl "
        "WHERE line IS NULL OR NOT json_valid(line) OR json_type(line) <> 'OBJECT' ORDER BY __row"
    )
    engine.con.execute(
        "CREATE OR REPLACE TEMP TABLE __jsonl_ok AS SELECT __row, CAST(line AS JSON) AS j FROM __jsonl "
        "WHERE line IS NOT NULL AND json_valid(line) AND json_type(line) = 'OBJECT'"
    )
    structure_text = engine.rows("SELECT json_group_structure(j) FROM __jsonl_ok")[0][0]
    structure = json.loads(structure_text) if structure_text else {}
    paths = _paths(structure, set(mapping.mapped_columns()))
    columns = [".".join(p) for p in paths]
    # A mapped dotted path under a key whose values are not always objects (so the merged
    # structure does not list it) is still read; rows where it is absent give NULL.
    for wanted in mapping.mapped_columns():
        steps = tuple(wanted.split("."))
        if wanted not in columns and len(steps) > 1 and steps[0] in structure:
            paths.append(steps)
            columns.append(wanted)
    dupes = sorted({c for c in columns if columns.count(c) > 1})
    if dupes:
        raise InputError(f"nested keys flatten to the same column names {dupes}", file=str(path))
    tokens = [t for t in mapping.nulls if t != ""]
    parts = []
    for p, col in zip(paths, columns, strict=True):
        v = f"json_extract_string(j, {lit(_json_path(p))})"
        if tokens:
            v = f"CASE WHEN {v} IN ({', '.join(lit(t) for t in tokens)}) THEN NULL ELSE {v} END"
        parts.append(f"{v} AS {ident(col)}")
    select = ", ".join([*parts, "__row"])
    table = engine.arrow(f"SELECT {select} FROM __jsonl_ok ORDER BY __row")
    engine.con.execute("DROP TABLE __jsonl; DROP TABLE __jsonl_ok")
    return RawSource(
        path, name, FORMAT, columns, with_rows(table.drop_columns(["__row"]), table["__row"]), bad
    )
