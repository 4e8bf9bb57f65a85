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
from cdcnorm.types.json import json_path

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


def _guarded(batches: Iterator[pa.RecordBatch], failure: list[InputError]) -> Iterator[pa.RecordBatch]:
    """Stop cleanly on a reading error, keeping it to raise after the engine's scan: an error
    raised inside the scan would reach the user in the engine's wording."""
    try:
        yield from batches
    except InputError as e:
        failure.append(e)


def _read(f: RawFile, mapping: Mapping, engine: DuckDBEngine, raw: RawTable) -> None:
    lines = f"{raw.slug}__jsonl_lines"
    ok = f"{raw.slug}__jsonl_ok"
    failure: list[InputError] = []
    engine.load_batches(lines, pa.RecordBatchReader.from_batches(LINES, _guarded(_batches(f), failure)))
    if failure:
        engine.drop(lines)
        raise failure[0]
    malformed = raw.ensure_malformed(engine)
    # the objects on the way to a mapped nested column: a name repeated in one is ambiguous too
    structure_text = engine.split_json_lines(lines, ok, malformed, f.file_id, mapping.read_through())
    engine.drop(lines)
    f.malformed = engine.count(malformed, f"__file = {f.file_id}")
    f.rows = engine.count(ok)
    f.columns_known = f.rows > 0
    if f.rows == 0 and f.malformed == 0:
        f.empty = True
        f.notes.append("the file is empty")
        engine.drop(ok)
        return
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
    rel = raw.relation("jsonl")
    engine.json_columns(
        rel, ok, f.file_id, [(json_path(p), c) for p, c in zip(paths, internal, strict=True)], tokens
    )
    engine.drop(ok)
    raw.add_relation(rel, internal)
