"""JSON Lines dumps (one RFC 8259 object per line), flat or nested, streamed.

The file's lines go into the engine in blocks (never the whole file in Python),
numbered by line. Nested objects are flattened to dotted column names
(``after.fare``); scalar values become their text (numbers keep their digits),
arrays and objects under a leaf stay JSON text. A JSON null is NULL; a string
equal to a null token other than "" is NULL too. A line that is not a JSON
object, or whose member on the way to a mapped nested column is there but is not
an object, is kept as malformed with its raw text; blank lines are not records.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.quarantine import meta_column
from cdcnorm.readers import streams
from cdcnorm.readers.base import MAX_RECORD_BYTES, RawFile, RawTable
from cdcnorm.sql import ident
from cdcnorm.types.json import json_path

FORMAT = "jsonl"
SUFFIXES = (".jsonl", ".ndjson")
BOM = b"\xef\xbb\xbf"  # U+FEFF in UTF-8
LINES = pa.schema([("raw", pa.large_binary()), ("__row", pa.int64()), ("__file", pa.int32())])
#: Files of at most this size are read together, as one scan, when a table has at least JOIN_MIN
#: of them (each scan costs tens of milliseconds of statements, whatever its size).
SMALL_FILE = 1 << 20
JOIN_MIN = 16


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
    import pyarrow.compute as pc  # imported by the JSON Lines reader alone (a tenth of a second)

    carry = b""
    number = 0

    def batch(lines: pa.Array, first: int) -> pa.RecordBatch:
        rows = _numbers(np.arange(first, first + len(lines), dtype=np.int64), pa.int64())
        ids = _numbers(np.full(len(lines), f.file_id, dtype=np.int32), pa.int32())
        return pa.RecordBatch.from_arrays([lines, rows, ids], schema=LINES)

    first = True
    for block in streams.blocks(f.path):
        data = carry + block
        if first and (
            wrong := streams.parquet_read_as_text(f.path, data, "jsonl") or _not_utf8(f.path, data)
        ):
            raise wrong
        if first and not (len(data) < len(BOM) and BOM.startswith(data)):  # else: wait for more
            # RFC 8259, section 8.1: a parser may ignore a byte order mark rather than treat it as
            # an error; as in a CSV file, it is not part of the first record
            data = data.removeprefix(BOM)
            first = False
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
        lines = pc.list_flatten(pc.split_pattern(_one_value(memoryview(data)[:cut]), b"\n"))
        yield batch(lines, number + 1)
        number += len(lines)
    if carry:
        yield batch(_one_value(carry), number + 1)


def _not_utf8(path: Path, start: bytes) -> InputError | None:
    """The error for a file in UTF-16 or UTF-32, which JSON Lines are not (RFC 8259, section 8.1:
    JSON exchanged between systems is UTF-8). Read line by line, its every line would be quarantined
    as bytes, the records miscounted at each 0A byte."""
    found = streams.wide_unicode(start)
    if found is None:
        return None
    return InputError(
        f"the file is {found} text, and JSON Lines are UTF-8 (RFC 8259, section 8.1)",
        file=str(path),
        expected="UTF-8 text",
        found=found,
        hint=f"write it as UTF-8 (for instance: iconv -f {found} -t UTF-8)",
    )


def _numbers(values: np.ndarray[Any, Any], typ: pa.DataType) -> pa.Array:
    """An Arrow array over ``values`` (of ``typ``'s width), not copied. Arrays here are built from
    their buffers: ``pa.array`` makes pyarrow import pandas (a fifth of a second) to check what
    it was given, a list or a NumPy array alike."""
    return pa.Array.from_buffers(typ, len(values), [None, pa.py_buffer(values)])


def _one_value(data: bytes | memoryview) -> pa.Array:
    """One large-binary value over ``data``'s bytes, not copied (see ``_numbers``)."""
    offsets = np.array([0, len(data)], dtype=np.int64)
    return pa.Array.from_buffers(pa.large_binary(), 1, [None, pa.py_buffer(offsets), pa.py_buffer(data)])


def read_files(
    files: list[RawFile], mapping: Mapping, engine: DuckDBEngine, raw: RawTable, scratch: Path
) -> None:
    """Each large file by itself; small files (when there are many) together, as one scan."""
    small = [f for f in files if f.path.stat().st_size <= SMALL_FILE]
    if len(small) < JOIN_MIN:
        small = []
    together = {f.file_id for f in small}  # by id: a list test compares every field, per file
    for f in files:
        f.format = FORMAT
        if f.file_id not in together:
            _read([f], mapping, engine, raw)
    if small:
        _read(small, mapping, engine, raw)


def _guarded(
    batches: Iterator[pa.RecordBatch], failure: list[InputError | KeyboardInterrupt]
) -> Iterator[pa.RecordBatch]:
    """Stop cleanly on a reading error or Ctrl-C, keeping it to raise after the engine's scan: raised
    inside the scan, it would reach the user in the engine's wording (Ctrl-C as an "Invalid Input
    Error" with a Python traceback in its text)."""
    try:
        yield from batches
    except (InputError, KeyboardInterrupt) as e:
        failure.append(e)


def _lines_of(files: list[RawFile]) -> Iterator[pa.RecordBatch]:
    for f in files:
        yield from _batches(f)


def _columns(f: RawFile, structure_text: str | None, mapping: Mapping) -> list[tuple[str, ...]]:
    """The file's columns as key paths, from the merged structure of its objects."""
    structure = json.loads(structure_text) if structure_text else {}
    paths = _paths(structure, set(mapping.mapped_columns()))
    columns = [".".join(p) for p in paths]
    # A mapped dotted path under a key whose values are not always objects (so the merged
    # structure does not list it) is still read: rows where the key is null or absent give NULL
    # (a row where it is another value was malformed: engine.split_json_lines).
    for wanted in mapping.mapped_columns():
        steps = tuple(wanted.split("."))
        if wanted not in columns and len(steps) > 1 and isinstance(structure, dict) and steps[0] in structure:
            paths.append(steps)
            columns.append(wanted)
    dupes = sorted({c for c in columns if columns.count(c) > 1})
    if dupes:
        raise InputError(f"nested keys flatten to the same column names {dupes}", file=str(f.path))
    return paths


def _read(files: list[RawFile], mapping: Mapping, engine: DuckDBEngine, raw: RawTable) -> None:
    """Read files in one scan: their lines, the checks of every line, and the columns of each file
    (a file's rows have no value in a column only another file of the scan has)."""
    lines = f"{raw.slug}__jsonl_lines"
    ok = f"{raw.slug}__jsonl_ok"
    failure: list[InputError | KeyboardInterrupt] = []
    engine.load_batches(lines, pa.RecordBatchReader.from_batches(LINES, _guarded(_lines_of(files), failure)))
    if failure:
        engine.drop(lines)
        raise failure[0]
    malformed = raw.ensure_malformed(engine)
    # the objects on the way to a mapped nested column: a name repeated in one is ambiguous too
    structures = engine.split_json_lines(lines, ok, malformed, mapping.read_through())
    every_line = dict(engine.rows(f"SELECT __file, count(*) FROM {ident(lines)} GROUP BY ALL"))
    engine.drop(lines)
    ids = ", ".join(str(f.file_id) for f in files)
    bad = dict(
        engine.rows(f"SELECT __file, count(*) FROM {ident(malformed)} WHERE __file IN ({ids}) GROUP BY ALL")
    )
    good = dict(engine.rows(f"SELECT __file, count(*) FROM {ident(ok)} GROUP BY ALL"))
    read: dict[str, tuple[str, list[int]]] = {}  # column -> (JSON path, the files that have it)
    for f in files:
        f.malformed = int(bad.get(f.file_id, 0))
        f.rows = int(good.get(f.file_id, 0))
        f.blank = int(every_line.get(f.file_id, 0)) - f.rows - f.malformed  # lines neither good nor bad
        f.note_blank()
        f.columns_known = f.rows > 0
        if f.rows == 0 and f.malformed == 0:
            f.empty = True
            f.notes.append("the file is empty")
            continue
        if f.rows == 0:  # every line quarantined: likely no JSON Lines at all (a CSV file, say)
            f.notes.append(
                f"no line of it is a JSON object ({f.malformed:,} quarantined): is it JSON Lines? "
                "(--input-format reads every input as one format)"
            )
        paths = _columns(f, structures.get(f.file_id), mapping)
        f.columns = [".".join(p) for p in paths]
        for p, c in zip(paths, f.columns, strict=True):
            read.setdefault(raw.internal(c), (json_path(p), []))[1].append(f.file_id)
    if not any(f.rows for f in files):
        engine.drop(ok)
        return
    tokens = [t for t in mapping.nulls if t != ""]
    rel = raw.relation("jsonl")
    every = len([f for f in files if f.rows])
    engine.json_columns(
        rel,
        ok,
        [(path, col, None if len(having) == every else having) for col, (path, having) in read.items()],
        tokens,
        {f.file_id: name for f in files if (name := meta_column(f.columns))},
    )
    engine.drop(ok)
    raw.add_relation(rel, list(read))
