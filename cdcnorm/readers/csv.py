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

With ``csv.escapes: backslash`` the files are PostgreSQL's COPY text format:
nothing is quoted, a record is one line, and a backslash escapes the character
after it. Both paths split records the same way (the engine's reader where no
field holds an escaped delimiter, which a tab never is), keep the cells as
written, and the engine then decodes them (``DuckDBEngine.unescape_text``).

With ``csv.escapes: backslash`` and a ``csv.quote`` the files are MySQL's and
MariaDB's ``SELECT ... INTO OUTFILE`` with ``ENCLOSED BY``: fields may be quoted,
and a backslash escapes inside and outside quotes, read as ``LOAD DATA`` reads
them (``decode_enclosed``). The engine's reader drops a backslash before any
character, so it reads a file only where that is the whole decoding: no
``\\0 \\b \\n \\r \\t \\Z`` and no ``\\N`` inside quotes, and outside quotes no
backslash but a whole ``\\N`` cell (the record count checks, ``count._EnclosedCheck``),
whose ``\\N`` cells the engine then reads as NULL; any other file goes the
careful path, which splits and decodes each record in Python.

With ``csv.escapes: none`` the files are plain delimited text: nothing is quoted
or escaped, a record is one line, every delimiter (up to 16 characters)
separates two fields. The engine's reader reads them with no quote and no escape
(a delimiter of at most 4 bytes); the careful path splits each line
(``plain_records``), and a line of too few fields right after a record makes
that record malformed too, since a line break in its last value may have cut it.

This module routes the files and loads them; how a record of each form splits
and decodes is in ``forms.py``, the independent record count in ``count.py``.
"""

from __future__ import annotations

import base64
import codecs
import csv as stdcsv
import io
import json
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv

from cdcnorm.engines.duckdb import CsvSyntax, DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers import streams
from cdcnorm.readers.base import (
    BYTES_AS_SURROGATES,
    BYTES_ESCAPED,
    MAX_RECORD_BYTES,
    RawFile,
    RawTable,
    is_utf8,
    original_bytes,
    shown_base64,
    writing_codec,
)
from cdcnorm.readers.count import Counting, count_blocks, count_records
from cdcnorm.readers.forms import (
    ENCLOSED_NULL_WORD,
    TEXT_NULL,
    backslashed,
    counting_of,
    decode_enclosed,
    enclosed,
    enclosed_record,
    plain,
    plain_records,
    rfc_line,
    rfc_records,
    split_enclosed,
    split_escaped,
    text_format,
    text_records,
    unescape,
)
from cdcnorm.sql import ident

FORMAT = "csv"
SUFFIXES = (".csv", ".tsv")

#: Encodings the engine's reader decodes itself; any other goes the careful path.
ENGINE_ENCODINGS = {"utf-8": "utf-8", "iso8859-1": "latin-1"}
#: An unquoted field can never hold a bare line break, so this null token never matches:
#: it stands for "no null tokens" where the engine insists on at least one.
NEVER = "\n"
#: The smallest block the careful path's parser reads at a time (it reads several ahead, outside the
#: engine's memory: 4 MiB blocks held about 90 MiB more than 1 MiB blocks at 1M rows).
CAREFUL_BLOCK = 1 << 20
#: The engine's reader takes a delimiter of at most this many bytes; plain text's longer ones go
#: the careful path.
ENGINE_DELIMITER = 4
#: Files of at most this size are read together when a table has at least JOIN_MIN of them.
SMALL_FILE = 1 << 20
JOIN_MIN = 16


@dataclass(frozen=True)
class _Reading:
    """What reading one group of a table's files (one header) needs."""

    internal: list[str]
    delimiter: str
    encoding: str  # the files' codec name (csv.encoding, or UTF-8 for a file that starts with its mark)
    mapping: Mapping
    engine: DuckDBEngine
    raw: RawTable
    scratch: Path


def _delimiter(path: Path, mapping: Mapping) -> str:
    d = mapping.csv.delimiter
    return "\t" if streams.base_name(path).lower().endswith(".tsv") and d == "," else d


def _encoding(f: RawFile, raw: bytes, mapping: Mapping) -> str:
    """The codec of a file starting with ``raw``: ``csv.encoding``, unless the file starts with
    UTF-8's byte order mark and ``csv.encoding`` is an 8-bit codec: then UTF-8, with a note. The
    mark names the encoding, as the WHATWG Encoding Standard's decode has a byte order mark override
    the label (from memory); read as cp1252 or latin-1, every non-ASCII character of a UTF-8 dump
    would turn into two or three others without an error."""
    encoding = mapping.csv.encoding
    if raw.startswith(b"\xef\xbb\xbf") and not encoding.startswith(("utf-8", "utf-16", "utf-32")):
        f.notes.append(
            f"read as UTF-8, not as csv.encoding's {encoding}: the file starts with UTF-8's byte order mark"
        )
        return "utf-8"
    return encoding


def _header(f: RawFile, delimiter: str, mapping: Mapping) -> tuple[list[str], bool, str]:
    """The column names, whether any record follows the header, and the file's codec."""
    opts = mapping.csv
    raw = streams.head(f.path)
    if wrong := streams.parquet_read_as_text(f.path, raw, "csv"):
        raise wrong
    encoding = _encoding(f, raw, mapping)
    wide = streams.wide_unicode(raw)
    if wide and not codecs.lookup(encoding).name.startswith(("utf-16", "utf-32")):
        # read as 8-bit text, its NUL bytes would be part of every name and value
        raise InputError(
            f"the file is {wide} text, and csv.encoding is {encoding}",
            file=str(f.path),
            line=1,
            expected=f"{encoding} text",
            found=wide,
            hint=f"set csv.encoding: {wide.lower()[:-2]}-{wide.lower()[-2:]} in the mapping",
        )
    # decoded before the line end is looked for: in UTF-16 or UTF-32 a line end is not one byte,
    # and other characters hold the bytes of LF and CR (U+010A is 0A 01 in UTF-16LE). Bytes that do
    # not decode become lone surrogates (only the header row must be valid text)
    decoder = codecs.getincrementaldecoder(encoding)(BYTES_AS_SURROGATES)
    start = raw
    if not encoding.startswith(("utf-16", "utf-32")):  # the codec's own name (mapping/model.py)
        start = raw.removeprefix(b"\xef\xbb\xbf")  # UTF-8's byte order mark, before any 8-bit text too
    try:
        head = decoder.decode(start, final=False).removeprefix("\ufeff")  # a BOM is not part of a name
    except UnicodeError as e:  # utf-16 and utf-32 without a byte order mark, or bytes no handler takes
        why = e.reason if isinstance(e, UnicodeDecodeError) else str(e)
        raise InputError(
            f"the file's start is not {encoding} text: {why}",
            file=str(f.path),
            line=1,
            hint="set csv.encoding (utf-16-le or utf-16-be for UTF-16 without a byte order mark)",
        ) from None
    f.line_end = line_end(head, opts.header)
    if not opts.header:
        if not opts.columns:
            raise InputError("csv.header is false but csv.columns names no columns", file=str(f.path))
        return list(opts.columns), bool(head.strip()), encoding
    if not head.strip():
        return [], False, encoding
    ends = [i for i in (head.find("\n"), head.find("\r")) if i >= 0]
    nl = min(ends) if ends else -1  # the header's line ends at LF, CRLF or CR
    text = head if nl < 0 else head[:nl]
    if any("\udc00" <= ch <= "\udcff" for ch in text):
        raise InputError(
            f"the header row is not {encoding} text", file=str(f.path), line=1, hint="set csv.encoding"
        )
    if enclosed(mapping):
        names = split_enclosed(text, delimiter, opts.quote)
        decoded = [decode_enclosed(n, opts.quote, ()) for n in names or []]
        if names is None or any(p is None for p in decoded):
            raise InputError(
                "the header row does not split into names: a quote opens a name it does not close, or a name is \\N",
                file=str(f.path),
                line=1,
                hint="csv.escapes: backslash with a csv.quote reads MySQL's SELECT ... INTO OUTFILE ... ENCLOSED BY",
            )
        columns = [p for p in decoded if p is not None]
    elif text_format(mapping):
        columns = []
        for i, name in enumerate(split_escaped(text, delimiter)):
            name_text = unescape(name)
            if name_text is None:
                raise InputError(
                    f"the header's column {i + 1} ({name}) is not COPY text: an octal or hex sequence, or a lone backslash",
                    file=str(f.path),
                    line=1,
                    hint="csv.escapes: backslash reads PostgreSQL's COPY text format",
                )
            columns.append(name_text)
    elif plain(mapping):
        columns = text.split(delimiter)
    else:
        columns = next(stdcsv.reader([text], delimiter=delimiter, quotechar=opts.quote), [])
    more = nl >= 0 and bool(head[nl + 1 :].strip())
    if nl >= 0 and len(raw) == (1 << 20) and not more:
        more = True  # the header's line fills the first block: let the reader decide
    return columns, more, encoding


def read_files(
    files: list[RawFile], mapping: Mapping, engine: DuckDBEngine, raw: RawTable, scratch: Path
) -> None:
    """Load the table's CSV files: one fast engine scan per header, the careful path where needed."""
    groups: dict[tuple[str, tuple[str, ...], str], list[RawFile]] = {}
    for f in files:
        f.format = FORMAT
        delimiter = _delimiter(f.path, mapping)
        columns, more, encoding = _header(f, delimiter, mapping)
        f.columns = columns
        f.encoding = "UTF-8" if encoding.lower().replace("_", "-") in ("utf-8", "utf8") else encoding
        if not columns or not more:
            f.empty = True
            f.columns_known = bool(columns)
            f.notes.append("the file is empty" if not columns else "the file has a header and no rows")
            for c in columns:
                raw.internal(c)
            continue
        dupes = sorted({c for c in columns if columns.count(c) > 1})
        if dupes:
            raise InputError(f"the header repeats column names {dupes}", file=str(f.path), line=1)
        groups.setdefault((delimiter, tuple(columns), encoding), []).append(f)
    for (delimiter, names, encoding), group in groups.items():
        internal = [raw.internal(c) for c in names]
        reading = _Reading(internal, delimiter, encoding, mapping, engine, raw, scratch)
        first = len(raw.relations)
        careful = _fast(group, reading)
        if enclosed(mapping):
            _replace_cells(reading, first, TEXT_NULL, None, "nulls")
        if careful:
            _careful(careful, reading)
        if text_format(mapping):
            _unescape(reading, group, first)
        if mapping.csv.empty is not None:
            _replace_cells(reading, first, mapping.csv.empty, "", "empty")
    for f in files:
        f.note_blank()


def _unescape(r: _Reading, group: list[RawFile], first: int) -> None:
    """Decode the cells of COPY's text format in the relations read from ``first`` on; a record
    with a cell COPY does not write (``unescape``) becomes malformed, counted on its file."""
    tokens = [TEXT_NULL, *(t for t in r.mapping.nulls if t != "")]  # an empty cell is an empty text
    named = [(c, r.raw.columns[int(c[1:])]) for c in r.internal]
    malformed = r.raw.ensure_malformed(r.engine)
    by_id = {f.file_id: f for f in group}
    for i in range(first, len(r.raw.relations)):
        relation, columns = r.raw.relations[i]
        view = f"{relation}_text"
        cells = [(c, name) for c, name in named if c in columns]
        bad = r.engine.unescape_text(view, relation, cells, tokens, r.delimiter, malformed, r.encoding)
        r.raw.relations[i] = (view, columns)
        for file_id, n in bad.items():
            by_id[file_id].rows -= n
            by_id[file_id].malformed += n


def _replace_cells(r: _Reading, first: int, token: str, to: str | None, name: str) -> None:
    """The relations read from ``first`` on, whichever path read them, under a view (``name`` its
    suffix) in which a cell that is exactly ``token`` is the text ``to`` (NULL for None): the
    enclosed form's ``\\N`` (``count._EnclosedCheck`` let no other cell read as ``\\N`` where the
    engine's reader read it), ``csv.empty``'s empty text."""
    for i in range(first, len(r.raw.relations)):
        relation, columns = r.raw.relations[i]
        view = f"{relation}_{name}"
        r.engine.replace_cells(view, relation, [c for c in r.internal if c in columns], token, to)
        r.raw.relations[i] = (view, columns)


def _fast(group: list[RawFile], r: _Reading) -> list[RawFile]:
    """Scan the group with the engine's reader; return the files that need the careful path."""
    if len(r.delimiter.encode("utf-8")) > ENGINE_DELIMITER:
        return group
    if r.encoding.lower() not in ENGINE_ENCODINGS:
        return _fast_transcoded(group, r)
    if len(group) >= JOIN_MIN:
        group = _joined(group, r)
        if not group:
            return []
    paths = {str(streams.engine_readable(f.path, r.scratch / "decompressed")): f for f in group}
    return _fast_paths(paths, r)


def _fast_transcoded(group: list[RawFile], r: _Reading) -> list[RawFile]:
    """``_fast`` for files in an encoding the engine's reader does not decode (cp1252, UTF-16, ...):
    each is copied as UTF-8 to scratch (``streams.transcoded``) and scanned as such; a file with a
    byte that does not decode goes the careful path, which keeps that cell as bytes. Record by
    record, a 1M-row dump took 3 to 4 times as long. The copies go once the rows are read."""
    paths: dict[str, RawFile] = {}
    careful: list[RawFile] = []
    for f in group:
        copy = streams.transcoded(f.path, r.scratch / "transcoded", r.encoding)
        if copy is None:
            careful.append(f)
        else:
            paths[str(copy)] = f
    try:
        if paths:
            careful += _fast_paths(paths, replace(r, encoding="utf-8"))
    finally:
        for p in paths:
            Path(p).unlink(missing_ok=True)
    return careful


def _fast_paths(paths: dict[str, RawFile], r: _Reading) -> list[RawFile]:
    """Scan the files at ``paths`` (each a file of the group, or a copy the engine's reader can
    read) with the engine's reader; return the files that need the careful path."""
    opts = r.mapping.csv
    # The engine's reader does not report every broken record when it scans many files at once, so
    # every file's records are also counted independently, by a thread, while the engine scans.
    with ThreadPoolExecutor(max_workers=1) as pool:
        how = _counting(r)
        counted = {
            p: pool.submit(count_records, Path(p), opts.header, how.with_lines_ending(f.line_end == "\n"))
            for p, f in paths.items()
        }
        staged = r.raw.relation("csv")
        scanned = _scan(r, staged, list(paths))
        counts = {p: c.result() for p, c in counted.items()}
    if scanned is None:
        if len(paths) == 1:
            return list(paths.values())
        # a file the strict reader cannot read at all: find it, and read the others fast
        careful: list[RawFile] = []
        for p, f in paths.items():
            careful.extend(_fast_paths({p: f}, r))
        return careful
    rejected, spans = scanned
    good = []
    for p, f in paths.items():
        n, lo, hi = spans.get(p, (0, 0, -1))
        records, balanced, blank = counts[p]
        if p in rejected or n != records or not balanced:
            rejected.add(p)
            continue
        if n and hi - lo + 1 != n:  # the engine's insertion order did not keep the file together
            raise InputError("the engine did not keep this file's records in order", file=str(f.path))
        f.rows, f.blank = n, blank
        good.append((p, f.file_id, lo, n))
    if good:
        view = f"{staged}_rows"
        r.engine.number_rows(view, staged, good, r.internal)
        r.raw.add_relation(view, r.internal)
    return [f for p, f in paths.items() if p in rejected]


def _body(f: RawFile, header: bool, how: Counting) -> tuple[bytes, bytes, int, int] | None:
    """A small file's records without its header, ending in a line end, with that line end, the
    number of records and of blank lines; None for a file that is not small or whose quotes do not
    balance."""
    if f.path.stat().st_size > SMALL_FILE:
        return None
    data = b""
    for block in streams.blocks(f.path, SMALL_FILE):
        data += block
        if len(data) > 4 * SMALL_FILE:  # a small archive of a large file
            return None
    data = data.removeprefix(b"\xef\xbb\xbf")
    nl = data.find(b"\n")
    if nl < 0:
        return None
    end = b"\r\n" if nl and data[nl - 1] == 13 else b"\n"  # the first line's end is the file's
    body = data[nl + 1 :] if header else data
    records, balanced, blank = count_blocks([body], False, how.with_lines_ending(end == b"\n"))
    if not balanced:
        return None
    if body and not body.endswith(b"\n"):
        body += end
    return body, end, records, blank


def _joined(group: list[RawFile], r: _Reading) -> list[RawFile]:
    """Read many small files as one: their records, headers left out, are copied one file after
    another into a scratch file per line end (the engine's reader costs about half a millisecond a
    file, so 3,000 files cost it more than a million rows). A file's records are the rows between
    its first and the next file's first (counted by quote parity). A joined file the engine cannot
    read, that has any reject, or whose rows do not add up is not trusted: its files are returned,
    with the larger ones and those whose quotes do not balance, to be read one by one."""
    opts = r.mapping.csv
    alone: list[RawFile] = []
    by_end: dict[bytes, list[tuple[RawFile, bytes, int, int]]] = {}
    how = _counting(r)
    for f in group:
        small = _body(f, opts.header, how)
        if small is None:
            alone.append(f)
        else:
            body, end, records, blank = small
            by_end.setdefault(end, []).append((f, body, records, blank))
    r.scratch.mkdir(parents=True, exist_ok=True)
    for n, members in enumerate(by_end[end] for end in sorted(by_end)):
        if len(members) < JOIN_MIN:
            alone.extend(f for f, _, _, _ in members)
            continue
        joined = r.scratch / f"joined-{n}.csv"
        with open(joined, "wb") as out:
            for _, body, _, _ in members:
                out.write(body)
        staged = r.raw.relation("joined")
        scanned = _scan(r, staged, [str(joined)], header=False)
        total = sum(records for _, _, records, _ in members)
        n_rows, lo, hi = scanned[1].get(str(joined), (0, 0, -1)) if scanned else (0, 0, -1)
        if scanned is None or scanned[0] or n_rows != total or (n_rows and hi - lo + 1 != n_rows):
            r.engine.drop(staged)
            alone.extend(f for f, _, _, _ in members)
            joined.unlink()
            continue
        firsts = []
        for f, _, records, blank in members:
            f.rows, f.blank = records, blank
            if records:
                firsts.append((f.file_id, lo, records))
                lo += records
        view = f"{staged}_rows"
        r.engine.number_joined_rows(view, staged, firsts, r.internal)
        r.raw.add_relation(view, r.internal)
        joined.unlink()
    return alone


def csv_syntax(mapping: Mapping, delimiter: str, encoding: str, header: bool | None = None) -> CsvSyntax:
    """What the engine's reader is told of a table's CSV files (``header``: the mapping's by default)."""
    opts = mapping.csv
    if enclosed(mapping):
        # the engine's reader takes no null token holding its escape: ``\\N`` is read as written
        # and made NULL after (``_replace_cells``); an unquoted empty field is an empty text
        tokens = (ENCLOSED_NULL_WORD, *(t for t in mapping.nulls if t and "\\" not in t))
        nulls = tuple(dict.fromkeys(tokens))
    else:
        # COPY's text format: the cells are kept as written (null tokens too), then decoded
        nulls = (tuple(mapping.nulls) or (NEVER,)) if not backslashed(mapping) else (NEVER,)
    return CsvSyntax(
        header=opts.header if header is None else header,
        delimiter=delimiter,
        quote=opts.quote if opts.quoted else "",  # the engine's reader: "" quotes nothing
        escape="\\" if enclosed(mapping) else (opts.quote if opts.quoted else ""),
        nulls=nulls,
        encoding=ENGINE_ENCODINGS[encoding.lower()],
        max_line=MAX_RECORD_BYTES,
    )


def _counting(r: _Reading) -> Counting:
    """How the record count reads the files of ``r`` (``forms.counting_of``), with the delimiter
    (which COPY's text format may escape) and what it needs to find the records whose trailing null
    tokens the engine's reader would drop (``count._TrailingNulls``): the column count and the null
    tokens, as bytes of the encoding the engine's reader reads."""
    codec = ENGINE_ENCODINGS[r.encoding.lower()]
    tokens = []
    for t in csv_syntax(r.mapping, r.delimiter, r.encoding).nulls:
        if t == NEVER:  # no null tokens
            continue
        try:
            tokens.append(t.encode(codec))
        except UnicodeEncodeError:  # no text of the file reads as this token
            continue
    how = counting_of(r.mapping, r.delimiter)
    return how.with_nulls(len(r.internal), r.delimiter.encode(codec), tuple(tokens))


def _scan(
    r: _Reading, staged: str, paths: list[str], header: bool | None = None
) -> tuple[set[str], dict[str, tuple[int, int, int]]] | None:
    """The engine's strict scan of ``paths`` into ``staged`` (``header``: the mapping's by default)."""
    return r.engine.scan_csv(
        staged, paths, r.internal, csv_syntax(r.mapping, r.delimiter, r.encoding, header)
    )


def line_end(head: str, header: bool) -> str:
    """The line end of a file that starts with ``head``: its first line's (LF, CRLF or CR). A CR
    alone ends the lines only where the header row ends so, or, in a file with no header row, where
    CRs alone outnumber LFs (a line break in a quoted field is the exception, not the rule);
    elsewhere a CR alone is data: MySQL's SELECT ... INTO OUTFILE writes one as it is (a test
    against MariaDB shows it), and read as a line end it would cut a value short."""
    lf, cr = head.find("\n"), head.find("\r")
    if header and cr >= 0 and (lf < 0 or cr < lf) and head[cr + 1 : cr + 2] != "\n":
        return "\r"
    if not header and head.count("\r") - head.count("\r\n") > head.count("\n"):
        return "\r"
    return "\r\n" if lf > 0 and head[lf - 1] == "\r" else "\n"


def _lines(f: RawFile, encoding: str, end: str) -> Iterator[str]:
    """The file's text lines, each with its own line end (``end`` being the file's, ``line_end``:
    lines end at each CR where it is CR, else at each LF, with a CR before it where there is one);
    bytes that do not decode stay as lone surrogates and are written back unchanged."""
    stream = io.BufferedReader(_BlockReader(f.path), buffer_size=1 << 20)
    text = io.TextIOWrapper(
        stream, encoding=encoding, errors=BYTES_AS_SURROGATES, newline="\r" if end == "\r" else "\n"
    )
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


def _careful(files: list[RawFile], r: _Reading) -> None:
    """Read files record by record, all into one relation: their good records numbered into one
    scratch file (file id, record number, the record's text) that is parsed and decoded once, their
    malformed records into the table's malformed relation. One relation for all of them, not one a
    file: 1,500 small files with CR-only line ends took 25 s, most of it a few statements per file
    and a plan whose union read 1,500 relations."""
    opts = r.mapping.csv
    stdcsv.field_size_limit(MAX_RECORD_BYTES)
    r.scratch.mkdir(parents=True, exist_ok=True)
    cleaned = r.scratch / f"careful-{files[0].file_id}.csv"
    bad_files: list[int] = []
    bad_rows: list[int] = []
    bad_text: list[str] = []
    bad_reason: list[str] = []
    malformed = r.raw.ensure_malformed(r.engine)
    copy_text = text_format(r.mapping)
    mysql = enclosed(r.mapping)
    bare = plain(r.mapping)
    nulls = set(r.mapping.nulls)
    tokens = {ENCLOSED_NULL_WORD, *(t for t in r.mapping.nulls if t)}
    sep, _, _ = _cleaned_syntax(r)

    def flush_bad() -> None:
        if not bad_rows:
            return
        batch = pa.table(
            {
                "__file": pa.array(bad_files, pa.int32()),
                "__row": pa.array(bad_rows, pa.int64()),
                "text": pa.array(bad_text, pa.string()),
                "reason": pa.array(bad_reason, pa.string()),
            }
        )
        r.engine.append(malformed, batch)
        for kept in (bad_files, bad_rows, bad_text, bad_reason):
            kept.clear()

    any_good = False
    longest = 0  # bytes of the longest good record written (the parser's block must hold one)
    # A byte that does not decode is written to the scratch file as itself where the dump is UTF-8,
    # escaped where it is not (BYTES_ESCAPED: a UTF-16 unit's byte may be a comma or a quote), and
    # each file's codec writes such a cell back to its bytes once the rows are read.
    utf8 = is_utf8(r.encoding)
    undecoded = BYTES_AS_SURROGATES if utf8 else BYTES_ESCAPED
    writing: dict[int, str] = {}
    with open(cleaned, "wb") as out:
        for f in files:
            codec = writing[f.file_id] = (
                "utf-8" if utf8 else writing_codec(r.encoding, streams.head(f.path, 4))
            )
            number = 0
            good = 0
            f.blank = 0
            records: Iterator[tuple[str, str | None, list[str]]]
            lines = _lines(f, r.encoding, f.line_end)
            if copy_text:
                records = (
                    (t, why, [])
                    for t, why in text_records(lines, r.delimiter, len(r.internal), f, f.line_end)
                )
            elif bare:
                records = plain_records(lines, r.delimiter, len(r.internal), f, f.line_end)
            else:
                escape = "\\" if mysql else None
                records = rfc_records(lines, r.delimiter, opts.quote, len(r.internal), f, escape)
            if opts.header:
                next(records, None)
            for text, reason, row in records:
                number += 1
                decoded = None
                if mysql and reason is None:
                    decoded = enclosed_record(text, row, r.delimiter, opts.quote, tokens)
                    if decoded is None:
                        reason = "broken quoting: a quote opens a field it does not close"
                if reason is None:
                    good += 1
                    if copy_text:  # the cells as written, decoded later
                        text = rfc_line(split_escaped(text, r.delimiter))
                    elif bare:  # a null token is NULL
                        text = rfc_line(None if c in nulls else c for c in row)
                    elif decoded is not None:
                        text = decoded
                    line = f"{f.file_id}{sep}{number}{sep}{text}\n".encode("utf-8", undecoded)
                    longest = max(longest, len(line))
                    out.write(line)
                else:
                    shown = shown_base64(text, codec)  # not a replacement character for a byte
                    bad_files.append(f.file_id)
                    bad_rows.append(number)
                    bad_text.append(text if shown is None else shown)
                    bad_reason.append(
                        reason if shown is None else f"{reason}; not {r.encoding} text (text shown base64)"
                    )
                    if len(bad_rows) >= 10_000:
                        flush_bad()
            f.rows = good
            f.malformed = number - good
            why = "the fast reader rejected it"
            if len(r.delimiter.encode("utf-8")) > ENGINE_DELIMITER:
                why = f"the fast reader takes no delimiter longer than {ENGINE_DELIMITER} bytes"
            elif mysql:
                why = "the fast reader rejected it, or does not decode all its backslashes"
            elif r.encoding.lower() not in ENGINE_ENCODINGS:  # read as a UTF-8 copy where it decodes
                why = f"the fast reader rejected it, or a byte of it is not {r.encoding} text"
            f.notes.append(f"read record by record ({why})")
            any_good = any_good or good > 0
    flush_bad()
    if any_good:
        staged = _load_cleaned(cleaned, r, longest)
        if not utf8:
            _restore_bytes(staged, r, writing)
    cleaned.unlink()


def _restore_bytes(relation: str, r: _Reading, writing: dict[int, str]) -> None:
    """The cells of ``relation`` that are not valid text hold the careful path's scratch bytes (good
    characters as UTF-8, undecodable bytes escaped): give them the bytes the dump holds, in each
    file's codec (``writing``), as ``__enc`` shows them. Only the rows with such a cell are looked at."""
    bad = r.engine.arrow(f"SELECT __file, __row, __enc FROM {ident(relation)} WHERE __enc IS NOT NULL")
    if not bad.num_rows:
        return
    encs = []
    for file_id, enc in zip(bad["__file"].to_pylist(), bad["__enc"].to_pylist(), strict=True):
        cells = json.loads(enc)
        restored = (
            (name, base64.b64encode(original_bytes(base64.b64decode(b64), writing[file_id])).decode("ascii"))
            for name, b64 in cells.items()
        )
        # the form decode_text writes (json.dumps of each name, no spaces)
        encs.append("{" + ",".join(f"{json.dumps(n)}:{json.dumps(b)}" for n, b in restored) + "}")
    r.engine.set_column(
        relation, "__enc", bad.select(["__file", "__row"]).append_column("__enc", pa.array(encs))
    )


def _cleaned_syntax(r: _Reading) -> tuple[str, str, list[str]]:
    """How the careful path's scratch file is written and parsed: (delimiter, quote, null tokens).
    A CSV record is copied as it is; COPY text's cells are written as RFC 4180 fields, kept as
    written (null tokens too) until ``_unescape`` decodes them; the enclosed form's cells are
    written decoded, as RFC 4180 fields, a NULL as an unquoted empty field."""
    if text_format(r.mapping):
        return ",", '"', []
    if enclosed(r.mapping) or plain(r.mapping):  # an unquoted empty field is NULL, "" an empty text
        return ",", '"', [""]
    return r.delimiter, r.mapping.csv.quote, list(r.mapping.nulls)


def _load_cleaned(cleaned: Path, r: _Reading, longest: int) -> str:
    """Parse the numbered good records (cells as bytes), then decode them in the engine. A block
    holds two of the ``longest`` records and is at least CAREFUL_BLOCK: the parser's blocks (a few
    at a time, parsed in parallel) are outside the engine's memory, so they stay as small as the
    records allow, not sized for the longest record possible."""
    delimiter, quote, tokens = _cleaned_syntax(r)
    names = ["__file", "__row", *r.internal]
    reader = pacsv.open_csv(
        str(cleaned),
        read_options=pacsv.ReadOptions(column_names=names, block_size=max(CAREFUL_BLOCK, 2 * longest)),
        parse_options=pacsv.ParseOptions(
            delimiter=delimiter, quote_char=quote, double_quote=True, newlines_in_values=True
        ),
        convert_options=pacsv.ConvertOptions(
            column_types={"__file": pa.int32(), "__row": pa.int64(), **{c: pa.binary() for c in r.internal}},
            null_values=tokens,
            strings_can_be_null=bool(tokens),
            quoted_strings_can_be_null=False,
        ),
    )
    staged = r.raw.relation("careful")
    r.engine.load_batches(staged + "_bin", reader)
    r.engine.decode_text(staged, staged + "_bin", [(c, r.raw.columns[int(c[1:])]) for c in r.internal])
    r.engine.drop(staged + "_bin")
    r.raw.add_relation(staged, r.internal)
    return staged
