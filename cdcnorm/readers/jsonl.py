"""JSON Lines dumps (one RFC 8259 object per line), flat or nested, streamed.

The file's lines go into the engine in blocks (never the whole file in Python),
numbered by line. Nested objects are flattened to dotted column names
(``after.fare``); scalar values become their text (numbers keep their digits),
arrays and objects under a leaf stay JSON text. A JSON null is NULL; a string
equal to a null token other than "" is NULL too. A line that is not a JSON
object is kept as malformed with its raw text; blank lines are not records.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers import streams
from cdcnorm.readers.base import MAX_RECORD_BYTES, RawFile, RawTable
from cdcnorm.sql import ident, lit

FORMAT = "jsonl"
SUFFIXES = (".jsonl", ".ndjson")
LINES = pa.schema([("raw", pa.large_binary()), ("__row", pa.int64())])


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


def _batches(f: RawFile) -> Iterator[pa.RecordBatch]:
    """The file's lines with their numbers, a block at a time (split by Arrow, not a Python loop)."""
    carry = b""
    number = 0
    for block in streams.blocks(f.path):
        data = carry + block
        cut = data.rfind(b"\n")
        if cut < 0:
            carry = data
            if len(carry) > MAX_RECORD_BYTES:
                raise InputError(
                    f"line {number + 1} is longer than {MAX_RECORD_BYTES >> 20} MiB (the limit)",
                    file=str(f.path),
                )
            continue
        carry = data[cut + 1 :]
        lines = pc.list_flatten(pc.split_pattern(pa.array([data[:cut]], pa.large_binary()), b"\n"))
        rows = pa.array(np.arange(number + 1, number + 1 + len(lines), dtype=np.int64))
        number += len(lines)
        yield pa.RecordBatch.from_arrays([lines, rows], schema=LINES)
    if carry:
        yield pa.RecordBatch.from_arrays(
            [pa.array([carry], pa.large_binary()), pa.array([number + 1], pa.int64())], schema=LINES
        )


def read_files(
    files: list[RawFile], mapping: Mapping, engine: DuckDBEngine, raw: RawTable, scratch: Path
) -> None:
    for f in files:
        f.format = FORMAT
        _read(f, mapping, engine, raw)


def _read(f: RawFile, mapping: Mapping, engine: DuckDBEngine, raw: RawTable) -> None:
    lines = f"{raw.slug}__jsonl_lines"
    engine.con.register("__jsonl_batches", pa.RecordBatchReader.from_batches(LINES, _batches(f)))
    try:
        engine.execute(
            f"CREATE OR REPLACE TEMP TABLE {ident(lines)} AS SELECT __row, rtrim(try(decode(raw)), chr(13)) AS line, "
            "raw FROM __jsonl_batches"
        )
    finally:
        engine.con.unregister("__jsonl_batches")
    src = ident(lines)
    engine.execute(
        f"DELETE FROM {src} WHERE line IS NOT NULL AND regexp_full_match(line, '\\s*')"  # blank lines
    )
    malformed = raw.ensure_malformed(engine)
    engine.execute(
        f"INSERT INTO {ident(malformed)} SELECT {f.file_id}, __row, "
        "CASE WHEN line IS NULL THEN to_base64(raw) ELSE line END, "
        "CASE WHEN line IS NULL THEN 'not UTF-8 (text shown base64)' "
        "WHEN NOT json_valid(line) THEN 'not valid JSON (RFC 8259)' "
        f"ELSE 'not a JSON object' END FROM {src} "
        "WHERE line IS NULL OR NOT json_valid(line) OR json_type(line) <> 'OBJECT'"
    )
    f.malformed = int(
        engine.rows(f"SELECT count(*) FROM {ident(malformed)} WHERE __file = {f.file_id}")[0][0]
    )
    ok = f"{raw.slug}__jsonl_ok"
    engine.execute(
        f"CREATE OR REPLACE TEMP TABLE {ident(ok)} AS SELECT __row, CAST(line AS JSON) AS j FROM {src} "
        "WHERE line IS NOT NULL AND json_valid(line) AND json_type(line) = 'OBJECT'"
    )
    engine.drop(lines)
    f.rows = int(engine.rows(f"SELECT count(*) FROM {ident(ok)}")[0][0])
    if f.rows == 0 and f.malformed == 0:
        f.empty = True
        f.notes.append("the file is empty")
        engine.drop(ok)
        return
    structure_text = engine.rows(f"SELECT json_group_structure(j) FROM {ident(ok)}")[0][0]
    structure = json.loads(structure_text) if structure_text else {}
    paths = _paths(structure, set(mapping.mapped_columns()))
    columns = [".".join(p) for p in paths]
    # A mapped dotted path under a key whose values are not always objects (so the merged
    # structure does not list it) is still read; rows where it is absent give NULL.
    for wanted in mapping.mapped_columns():
        steps = tuple(wanted.split("."))
        if wanted not in columns and len(steps) > 1 and isinstance(structure, dict) and steps[0] in structure:
            paths.append(steps)
            columns.append(wanted)
    dupes = sorted({c for c in columns if columns.count(c) > 1})
    if dupes:
        raise InputError(f"nested keys flatten to the same column names {dupes}", file=str(f.path))
    f.columns = columns
    internal = [raw.internal(c) for c in columns]
    tokens = [t for t in mapping.nulls if t != ""]
    parts = []
    for p, col in zip(paths, internal, strict=True):
        v = f"json_extract_string(j, {lit(_json_path(p))})"
        if tokens:
            v = f"CASE WHEN {v} IN ({', '.join(lit(t) for t in tokens)}) THEN NULL ELSE {v} END"
        parts.append(f"{v} AS {ident(col)}")
    rel = raw.relation("jsonl")
    engine.execute(
        f"CREATE TEMP TABLE {ident(rel)} AS SELECT CAST({f.file_id} AS INTEGER) AS __file, __row, "
        f"CAST(NULL AS VARCHAR) AS __enc{''.join(', ' + p for p in parts)} FROM {ident(ok)}"
    )
    engine.drop(ok)
    raw.add_relation(rel, internal)
