"""CSV dumps (RFC 4180): quoted fields with embedded delimiters, quotes and line breaks.

An unquoted empty field is NULL when "" is a null token; a quoted empty field
("") stays an empty string. Records with the wrong number of fields (an
unbalanced quote swallows the rest of the file into one record) are kept as
malformed with their raw text; cells that are not UTF-8 are flagged per cell.
"""

from __future__ import annotations

import csv as stdcsv
import io
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers.base import MALFORMED_SCHEMA, RawSource, with_rows

FORMAT = "csv"
SUFFIXES = (".csv", ".csv.gz", ".tsv")


def _header(path: Path, delimiter: str, quote: str) -> list[str]:
    with pa.input_stream(str(path), compression="detect") as stream:
        head = stream.read(1 << 20)
    head = head.removeprefix(b"\xef\xbb\xbf")  # a UTF-8 byte order mark is not part of the first name
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError as e:
        if e.start < head.find(b"\n") or head.find(b"\n") < 0:
            raise InputError("the header row is not UTF-8 text", file=str(path), line=1) from None
        text = head[: head.find(b"\n")].decode("utf-8")
    reader = stdcsv.reader(io.StringIO(text), delimiter=delimiter, quotechar=quote)
    try:
        return next(reader)
    except StopIteration:
        return []


def _layout(
    data: bytes, delimiter: str, quote: str, expected: int, header: bool
) -> tuple[np.ndarray, list[tuple[int, str, str]]]:
    """Record numbers of the good and the malformed records, by quote parity (numpy, no row loop).

    A line break ends a record only outside quotes, i.e. where the count of
    quote characters before it is even (RFC 4180 doubles quotes inside quoted
    fields, which keeps the parity). Empty lines are not records.
    """
    buf = np.frombuffer(data, dtype=np.uint8)
    inside = (np.cumsum(buf == ord(quote)) % 2).astype(bool)
    breaks = np.flatnonzero((buf == ord("\n")) & ~inside)
    ends = np.append(breaks, len(buf))
    starts = np.insert(breaks + 1, 0, 0)
    lengths = ends - starts
    cr = np.zeros(len(ends), dtype=bool)
    has = lengths > 0
    cr[has] = buf[ends[has] - 1] == ord("\r")
    real = lengths - cr.astype(np.int64) > 0
    delims = np.flatnonzero((buf == ord(delimiter)) & ~inside)
    per_record = np.bincount(np.searchsorted(ends, delims), minlength=len(ends))
    fields = per_record + 1
    idx = np.flatnonzero(real)
    if header and len(idx):
        idx = idx[1:]
    numbers = np.arange(1, len(idx) + 1, dtype=np.int64)
    bad_mask = fields[idx] != expected
    unterminated = bool(len(buf)) and bool(inside[-1])
    last = len(ends) - 1
    bad = [
        (
            int(numbers[i]),
            data[starts[r] : ends[r] - int(cr[r])].decode("utf-8", errors="replace"),
            "unterminated quote: the record runs to the end of the file"
            if unterminated and r == last
            else f"expected {expected} fields, found {int(fields[r])}",
        )
        for i, r in zip(np.flatnonzero(bad_mask), idx[bad_mask], strict=True)
    ]
    return numbers[~bad_mask], bad


def read(path: Path, mapping: Mapping, engine: DuckDBEngine, name: str) -> RawSource:
    opts = mapping.csv
    delimiter = "\t" if path.name.endswith(".tsv") and opts.delimiter == "," else opts.delimiter
    if path.stat().st_size == 0:
        return RawSource(
            path, name, FORMAT, [], with_rows(pa.table({})), empty=True, notes=["the file is empty"]
        )
    if opts.header:
        columns = _header(path, delimiter, opts.quote)
    else:
        if not opts.columns:
            raise InputError("csv.header is false but csv.columns names no columns", file=str(path))
        columns = list(opts.columns)
    if not columns:
        return RawSource(
            path, name, FORMAT, [], with_rows(pa.table({})), empty=True, notes=["the file is empty"]
        )
    dupes = sorted({c for c in columns if columns.count(c) > 1})
    if dupes:
        raise InputError(f"the header repeats column names {dupes}", file=str(path), line=1)
    if any(c.startswith("__") for c in columns):
        raise InputError("column names starting with __ are reserved", file=str(path), line=1)
    invalid: list[Any] = []

    def on_invalid(row: Any) -> str:
        invalid.append(row)
        return "skip"

    tokens = list(mapping.nulls)

    def load(kind: pa.DataType) -> pa.Table:
        return pacsv.read_csv(
            str(path),
            read_options=pacsv.ReadOptions(
                column_names=columns, skip_rows=1 if opts.header else 0, block_size=16 << 20
            ),
            parse_options=pacsv.ParseOptions(
                delimiter=delimiter,
                quote_char=opts.quote,
                double_quote=True,
                newlines_in_values=True,
                invalid_row_handler=on_invalid,
            ),
            convert_options=pacsv.ConvertOptions(
                column_types={c: kind for c in columns},
                null_values=tokens,
                strings_can_be_null=bool(tokens),
                quoted_strings_can_be_null=False,
            ),
        )

    enc_columns: list[str] = []
    try:
        table = load(pa.string())
    except pa.ArrowInvalid as e:
        if "UTF8" not in str(e) and "utf8" not in str(e).lower():
            raise InputError(f"cannot read this CSV: {e}", file=str(path)) from None
        invalid.clear()
        table = load(pa.binary())
        enc_columns = columns
    except OSError as e:
        raise InputError(f"cannot read this file: {e}", file=str(path)) from None
    rows = None
    malformed = MALFORMED_SCHEMA.empty_table()
    if invalid:
        with pa.input_stream(str(path), compression="detect") as stream:
            data = stream.read()
        good, bad = _layout(data, delimiter, opts.quote, len(columns), opts.header)
        if len(good) != table.num_rows:
            raise InputError(
                f"cannot number the records of this CSV ({len(invalid)} malformed records)", file=str(path)
            )
        rows = pa.array(good, pa.int64())
        malformed = pa.table(
            {
                "__row": pa.array([b[0] for b in bad], pa.int64()),
                "text": pa.array([b[1] for b in bad], pa.string()),
                "reason": pa.array([b[2] for b in bad], pa.string()),
            }
        )
    table = with_rows(table, rows)
    if enc_columns:
        table = engine.decode_utf8(table, enc_columns)
    return RawSource(path, name, FORMAT, columns, table, malformed)
