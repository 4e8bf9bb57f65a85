"""CSV dumps (RFC 4180): quoted fields with embedded delimiters, quotes and line breaks.

An unquoted field equal to a null token is NULL; a quoted field never is, so a
quoted empty field ("") stays an empty string. Two paths, one result:

- **fast**: the engine's own parallel CSV reader loads every file of a table
  (one call for files that share a header, so thousands of small files cost
  one scan), strictly: a record with a wrong field count, a quote in the wrong
  place, text that is not UTF-8 or an over-long line is a reject, and so is a
  file the strict reader cannot read at all (mixed or CR-only line ends).
  The rows of a file stay in file order, so a record's number is its place.
- **careful**: a file with any reject is read again record by record with
  Python's ``csv`` module in strict mode, which finds each record's extent.
  A record with the wrong field count is malformed as a whole; a record whose
  quoting is broken (an unterminated quote, text after a closing quote, or a
  record longer than ``MAX_RECORD_BYTES``) makes its *first line* malformed
  and reading resumes at the next line, so a stray quote never swallows the
  records after it. The good records are copied, byte for byte and numbered,
  to a scratch file that pyarrow parses (so NULL versus "" stays exact), and
  cells that are not valid text are kept as bytes (base64 in ``__enc``).
"""

from __future__ import annotations

import csv as stdcsv
import io
import json
from collections import deque
from collections.abc import Iterator
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.csv as pacsv

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers import streams
from cdcnorm.readers.base import MAX_RECORD_BYTES, RawFile, RawTable
from cdcnorm.sql import ident, lit

FORMAT = "csv"
SUFFIXES = (".csv", ".tsv")

#: Encodings the engine's reader decodes itself; any other goes the careful path.
ENGINE_ENCODINGS = {"utf-8": "utf-8", "iso8859-1": "latin-1"}
#: An unquoted field can never hold a bare line break, so this null token never matches:
#: it stands for "no null tokens" where the engine insists on at least one.
NEVER = "\n"


def _delimiter(path: Path, mapping: Mapping) -> str:
    d = mapping.csv.delimiter
    return "\t" if streams.base_name(path).lower().endswith(".tsv") and d == "," else d


def _header(f: RawFile, delimiter: str, mapping: Mapping) -> tuple[list[str], bool]:
    """The column names, and whether any record follows the header."""
    opts = mapping.csv
    head = streams.head(f.path).removeprefix(b"\xef\xbb\xbf")  # a BOM is not part of the first name
    encoding = opts.encoding
    if not opts.header:
        if not opts.columns:
            raise InputError("csv.header is false but csv.columns names no columns", file=str(f.path))
        return list(opts.columns), bool(head.strip())
    if not head.strip():
        return [], False
    ends = [i for i in (head.find(b"\n"), head.find(b"\r")) if i >= 0]
    nl = min(ends) if ends else -1  # the header's line ends at LF, CRLF or CR
    first = head if nl < 0 else head[:nl]
    try:
        text = first.decode(encoding)
    except UnicodeDecodeError:
        raise InputError(
            f"the header row is not {encoding} text", file=str(f.path), line=1, hint="set csv.encoding"
        ) from None
    columns = next(stdcsv.reader([text], delimiter=delimiter, quotechar=opts.quote), [])
    more = nl >= 0 and bool(head[nl + 1 :].strip())
    if nl >= 0 and len(head) == (1 << 20) and not more:
        more = True  # the header's line fills the first block: let the reader decide
    return columns, more


def read_files(
    files: list[RawFile], mapping: Mapping, engine: DuckDBEngine, raw: RawTable, scratch: Path
) -> None:
    """Load the table's CSV files: one fast engine scan per header, the careful path where needed."""
    groups: dict[tuple[str, tuple[str, ...]], list[RawFile]] = {}
    for f in files:
        f.format = FORMAT
        delimiter = _delimiter(f.path, mapping)
        columns, more = _header(f, delimiter, mapping)
        f.columns = columns
        if not columns or not more:
            f.empty = True
            f.notes.append("the file is empty" if not columns else "the file has a header and no rows")
            for c in columns:
                raw.internal(c)
            continue
        dupes = sorted({c for c in columns if columns.count(c) > 1})
        if dupes:
            raise InputError(f"the header repeats column names {dupes}", file=str(f.path), line=1)
        groups.setdefault((delimiter, tuple(columns)), []).append(f)
    for (delimiter, names), group in groups.items():
        internal = [raw.internal(c) for c in names]
        careful = _fast(group, internal, delimiter, mapping, engine, raw, scratch)
        for f in careful:
            _careful(f, internal, delimiter, mapping, engine, raw, scratch)


def _read_csv(paths: list[str], internal: list[str], delimiter: str, mapping: Mapping, rejects: str) -> str:
    opts = mapping.csv
    tokens = list(mapping.nulls) or [NEVER]
    cols = "{" + ", ".join(f"{lit(c)}: 'VARCHAR'" for c in internal) + "}"
    return (
        f"read_csv([{', '.join(lit(p) for p in paths)}], columns = {cols}, header = {str(opts.header).lower()}, "
        f"delim = {lit(delimiter)}, quote = {lit(opts.quote)}, escape = {lit(opts.quote)}, auto_detect = false, "
        f"allow_quoted_nulls = false, nullstr = [{', '.join(lit(t) for t in tokens)}], "
        f"encoding = {lit(ENGINE_ENCODINGS[opts.encoding.lower()])}, strict_mode = true, "
        f"ignore_errors = true, store_rejects = true, rejects_table = {lit(rejects)}, "
        f"rejects_scan = {lit(rejects + '_scan')}, max_line_size = {MAX_RECORD_BYTES}, "
        f"filename = '__fname', parallel = true)"
    )


def _fast(
    group: list[RawFile],
    internal: list[str],
    delimiter: str,
    mapping: Mapping,
    engine: DuckDBEngine,
    raw: RawTable,
    scratch: Path,
) -> list[RawFile]:
    """Scan the group with the engine's reader; return the files that need the careful path."""
    if mapping.csv.encoding.lower() not in ENGINE_ENCODINGS:
        return group
    paths = {str(streams.engine_readable(f.path, scratch / "decompressed")): f for f in group}
    staged = raw.relation("csv")
    rejects = f"{staged}_rejects"
    sql = f"SELECT * FROM {_read_csv(list(paths), internal, delimiter, mapping, rejects)}"
    try:
        engine.con.execute(f"CREATE TEMP TABLE {ident(staged)} AS {sql}")
    except duckdb.Error:
        engine.con.execute(
            f"DROP TABLE IF EXISTS {ident(rejects)}; DROP TABLE IF EXISTS {ident(rejects + '_scan')}"
        )
        if len(group) == 1:
            return group
        # one file the strict reader cannot read at all: find it, and read the others fast
        careful: list[RawFile] = []
        for f in group:
            careful.extend(_fast([f], internal, delimiter, mapping, engine, raw, scratch))
        return careful
    rejected = {
        str(p)
        for (p,) in engine.rows(
            f"SELECT DISTINCT s.file_path FROM {ident(rejects)} e JOIN {ident(rejects + '_scan')} s "
            "ON e.scan_id = s.scan_id AND e.file_id = s.file_id"
        )
    }
    engine.con.execute(f"DROP TABLE {ident(rejects)}; DROP TABLE {ident(rejects + '_scan')}")
    spans = {
        str(p): (int(n), int(lo), int(hi))
        for p, n, lo, hi in engine.rows(
            f"SELECT __fname, count(*), min(rowid), max(rowid) FROM {ident(staged)} GROUP BY __fname"
        )
    }
    good = []
    for p, f in paths.items():
        if p in rejected:
            continue
        n, lo, hi = spans.get(p, (0, 0, -1))
        if n and hi - lo + 1 != n:  # the engine's insertion order did not keep the file together
            raise InputError("the engine did not keep this file's records in order", file=str(f.path))
        f.rows = n
        good.append((p, f.file_id, lo))
    if good:
        files = "(VALUES " + ", ".join(f"({lit(p)}, {i}, {lo})" for p, i, lo in good) + ") f(path, id, base)"
        view = f"{staged}_rows"
        engine.con.execute(
            f"CREATE TEMP VIEW {ident(view)} AS SELECT f.id AS __file, CAST(r.rowid - f.base + 1 AS BIGINT) AS __row, "
            f"CAST(NULL AS VARCHAR) AS __enc, {', '.join(f'r.{ident(c)}' for c in internal)} "
            f"FROM {ident(staged)} r JOIN {files} ON r.__fname = f.path"
        )
        raw.add_relation(view, internal)
    return [f for p, f in paths.items() if p in rejected]


class _Overlong(Exception):
    pass


def _lines(f: RawFile, encoding: str) -> Iterator[str]:
    """The file's text lines, each with its own line end (LF, CRLF or CR); bytes that do not
    decode stay as lone surrogates and are written back unchanged."""
    stream = io.BufferedReader(_BlockReader(f.path), buffer_size=1 << 20)
    text = io.TextIOWrapper(stream, encoding=encoding, errors="surrogateescape", newline="")
    first = True
    for line in text:
        if first:
            line = line.removeprefix("\ufeff")
            first = False
        yield line


class _BlockReader(io.RawIOBase):
    """A raw byte stream over the (decompressed) blocks of a file."""

    def __init__(self, path: Path) -> None:
        self._blocks = streams.blocks(path, 1 << 20)
        self._left = b""

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: memoryview) -> int:  # type: ignore[override]
        while not self._left:
            block = next(self._blocks, None)
            if block is None:
                return 0
            self._left = block
        n = min(len(buffer), len(self._left))
        buffer[:n] = self._left[:n]
        self._left = self._left[n:]
        return n


def _strip_end(text: str) -> str:
    if text.endswith("\r\n"):
        return text[:-2]
    if text.endswith(("\n", "\r")):
        return text[:-1]
    return text


def _records(
    lines: Iterator[str], delimiter: str, quote: str, expected: int
) -> Iterator[tuple[str, str | None]]:
    """(raw text of the record without its line end, None) for a good record, or
    (raw text, reason) for a malformed one; blank lines are not records."""
    pending: deque[str] = deque()
    consumed: list[str] = []
    size = [0]

    def feed() -> Iterator[str]:
        while True:
            if pending:
                line = pending.popleft()
            else:
                nxt = next(lines, None)
                if nxt is None:
                    return
                line = nxt
            consumed.append(line)
            size[0] += len(line)
            if size[0] > MAX_RECORD_BYTES:
                raise _Overlong
            yield line

    while True:
        reader = stdcsv.reader(feed(), delimiter=delimiter, quotechar=quote, doublequote=True, strict=True)
        try:
            while True:
                consumed.clear()
                size[0] = 0
                row = next(reader, None)
                if row is None:
                    return
                if not row:
                    continue  # a blank line
                text = _strip_end("".join(consumed))
                if len(row) != expected:
                    yield text, f"expected {expected} fields, found {len(row)}"
                else:
                    yield text, None
        except (stdcsv.Error, _Overlong) as e:
            if isinstance(e, _Overlong):
                reason = f"a record longer than {MAX_RECORD_BYTES >> 20} MiB, or an unterminated quote"
            elif "unexpected end of data" in str(e):
                reason = "unterminated quote: the quoted field runs to the end of the file"
            else:
                reason = f"broken quoting: {e}"
            yield _strip_end(consumed[0]), reason
            rest = consumed[1:]
            consumed.clear()
            pending.extendleft(reversed(rest))  # resume at the line after the record's first line


def _careful(
    f: RawFile,
    internal: list[str],
    delimiter: str,
    mapping: Mapping,
    engine: DuckDBEngine,
    raw: RawTable,
    scratch: Path,
) -> None:
    opts = mapping.csv
    stdcsv.field_size_limit(MAX_RECORD_BYTES)
    scratch.mkdir(parents=True, exist_ok=True)
    cleaned = scratch / f"careful-{f.file_id}.csv"
    bad_rows: list[int] = []
    bad_text: list[str] = []
    bad_reason: list[str] = []
    malformed = raw.ensure_malformed(engine)

    def flush_bad() -> None:
        if not bad_rows:
            return
        batch = pa.table(
            {
                "__file": pa.array([f.file_id] * len(bad_rows), pa.int32()),
                "__row": pa.array(bad_rows, pa.int64()),
                "text": pa.array(
                    [t.encode("utf-8", "surrogateescape").decode("utf-8", "replace") for t in bad_text]
                ),
                "reason": pa.array(bad_reason, pa.string()),
            }
        )
        engine.register("__malformed_batch", batch)
        engine.execute(f"INSERT INTO {ident(malformed)} SELECT * FROM __malformed_batch")
        engine.unregister("__malformed_batch")
        bad_rows.clear()
        bad_text.clear()
        bad_reason.clear()

    number = 0
    good = 0
    with open(cleaned, "wb") as out:
        records = _records(_lines(f, opts.encoding), delimiter, opts.quote, len(internal))
        if opts.header:
            next(records, None)
        for text, reason in records:
            number += 1
            if reason is None:
                good += 1
                out.write(f"{number}{delimiter}{text}\n".encode("utf-8", "surrogateescape"))
            else:
                bad_rows.append(number)
                bad_text.append(text)
                bad_reason.append(reason)
                if len(bad_rows) >= 10_000:
                    flush_bad()
    flush_bad()
    f.rows = good
    f.malformed = number - good
    f.notes.append("read record by record (the fast reader rejected it)")
    if good:
        _load_cleaned(f, cleaned, internal, delimiter, mapping, engine, raw)
    cleaned.unlink()


def _load_cleaned(
    f: RawFile,
    cleaned: Path,
    internal: list[str],
    delimiter: str,
    mapping: Mapping,
    engine: DuckDBEngine,
    raw: RawTable,
) -> None:
    """Parse the numbered good records (cells as bytes), then decode them in the engine."""
    tokens = list(mapping.nulls)
    names = ["__row", *internal]
    reader = pacsv.open_csv(
        str(cleaned),
        read_options=pacsv.ReadOptions(column_names=names, block_size=MAX_RECORD_BYTES * 2),
        parse_options=pacsv.ParseOptions(
            delimiter=delimiter, quote_char=mapping.csv.quote, double_quote=True, newlines_in_values=True
        ),
        convert_options=pacsv.ConvertOptions(
            column_types={"__row": pa.int64(), **{c: pa.binary() for c in internal}},
            null_values=tokens,
            strings_can_be_null=bool(tokens),
            quoted_strings_can_be_null=False,
        ),
    )
    staged = raw.relation("careful")
    engine.con.register("__careful_batches", reader)
    try:
        engine.execute(f"CREATE TEMP TABLE {ident(staged + '_bin')} AS SELECT * FROM __careful_batches")
    finally:
        engine.con.unregister("__careful_batches")
    cells = []
    bad = []
    for c in internal:
        col = ident(c)
        cells.append(f"try(decode({col})) AS {col}")
        key = lit(json.dumps(raw.columns[int(c[1:])]) + ":")
        bad.append(
            f"CASE WHEN {col} IS NOT NULL AND try(decode({col})) IS NULL THEN {key} || to_json(to_base64({col})) END"
        )
    enc = f"CASE WHEN concat_ws(',', {', '.join(bad)}) <> '' THEN '{{' || concat_ws(',', {', '.join(bad)}) || '}}' END"
    engine.execute(
        f"CREATE TEMP TABLE {ident(staged)} AS SELECT CAST({f.file_id} AS INTEGER) AS __file, __row, "
        f"{enc} AS __enc, {', '.join(cells)} FROM {ident(staged + '_bin')}"
    )
    engine.drop(staged + "_bin")
    raw.add_relation(staged, internal)
