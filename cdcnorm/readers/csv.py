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
backslash but a whole ``\\N`` cell (the record count checks, ``_EnclosedCheck``),
whose ``\\N`` cells the engine then reads as NULL; any other file goes the
careful path, which splits and decodes each record in Python.

With ``csv.escapes: none`` the files are plain delimited text: nothing is quoted
or escaped, a record is one line, every delimiter (up to 16 characters)
separates two fields. The engine's reader reads them with no quote and no escape
(a delimiter of at most 4 bytes); the careful path splits each line
(``_plain_records``), and a line of too few fields right after a record makes
that record malformed too, since a line break in its last value may have cut it.
"""

from __future__ import annotations

import codecs
import csv as stdcsv
import functools
import io
import re
from collections import deque
from collections.abc import Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

from cdcnorm.engines.duckdb import TEXT_ESCAPES, CsvSyntax, DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers import streams
from cdcnorm.readers.base import MAX_RECORD_BYTES, RawFile, RawTable

FORMAT = "csv"
SUFFIXES = (".csv", ".tsv")

#: Encodings the engine's reader decodes itself; any other goes the careful path.
ENGINE_ENCODINGS = {"utf-8": "utf-8", "iso8859-1": "latin-1"}
#: An unquoted field can never hold a bare line break, so this null token never matches:
#: it stands for "no null tokens" where the engine insists on at least one.
NEVER = "\n"
#: Block size of the independent record count: small, so its numpy buffers stay small too.
COUNT_BLOCK = 4 << 20
#: The smallest block the careful path's parser reads at a time (it reads several ahead, outside the
#: engine's memory: 4 MiB blocks held about 90 MiB more than 1 MiB blocks at 1M rows).
CAREFUL_BLOCK = 1 << 20
#: COPY's text format (PostgreSQL's documentation, COPY, "Text Format"; TEXT_ESCAPES: the letters
#: that stand for control characters after a backslash, any other character after one stands for
#: itself): ``\N`` alone is NULL; ``\.`` alone on the last line ends the data.
TEXT_NULL = "\\N"
TEXT_END = "\\."
#: ``LOAD DATA``'s escapes (MySQL's and MariaDB's documentation, LOAD DATA, "Field and Line
#: Handling"; checked against MariaDB in tests/test_mysql_dumps.py): after a backslash these letters
#: stand for control characters, any other character for itself; ``\N`` alone is NULL, quoted or not.
ENCLOSED_ESCAPES = {"0": "\0", "b": "\b", "n": "\n", "r": "\r", "t": "\t", "Z": "\x1a"}
#: With ``ENCLOSED BY``, ``LOAD DATA`` reads the unquoted word NULL as NULL (same documentation).
ENCLOSED_NULL_WORD = "NULL"
#: What a dump in the enclosed form read as RFC 4180 needs.
ENCLOSED_HINT = "if the file is one, set csv.escapes: backslash and csv.quote in the mapping"
#: The engine's reader takes a delimiter of at most this many bytes; plain text's longer ones go
#: the careful path.
ENGINE_DELIMITER = 4
#: What a tab-separated dump whose values hold quotes, read as RFC 4180, needs.
PLAIN_HINT = "if the file quotes nothing, as tab-separated and bulk-copy exports do, set csv.escapes: none"
#: Files of at most this size are read together when a table has at least JOIN_MIN of them.
SMALL_FILE = 1 << 20
JOIN_MIN = 16


def backslashed(mapping: Mapping) -> bool:
    """The table's CSV files are COPY's text format (``csv.escapes: backslash``)."""
    return mapping.csv.escapes == "backslash"


def enclosed(mapping: Mapping) -> bool:
    """The table's CSV files are MySQL's ``INTO OUTFILE`` with ``ENCLOSED BY`` (``csv.escapes:
    backslash`` and a ``csv.quote``)."""
    return backslashed(mapping) and mapping.csv.quoted


def text_format(mapping: Mapping) -> bool:
    """The table's CSV files are COPY's text format: a backslash escapes, and nothing is quoted."""
    return backslashed(mapping) and not mapping.csv.quoted


def plain(mapping: Mapping) -> bool:
    """The table's CSV files are plain delimited text (``csv.escapes: none``): nothing is quoted or
    escaped, a record is one line, and every delimiter separates two fields."""
    return mapping.csv.escapes == "none"


def _quote(mapping: Mapping) -> str | None:
    """The character that quotes a field, None where nothing is quoted."""
    return None if text_format(mapping) or plain(mapping) else mapping.csv.quote


def _counting(mapping: Mapping, delimiter: str) -> tuple[str | None, str | None, bool]:
    """How the record count (``count_blocks``) reads the table's files: the quote (None where
    nothing is quoted), the enclosed form's delimiter (None for the other forms), and whether a
    backslash may escape a line break (COPY's text format)."""
    return _quote(mapping), delimiter if enclosed(mapping) else None, text_format(mapping)


@functools.cache
def _enclosed_field(delimiter: str, quote: str) -> re.Pattern[str]:
    """The pattern of a field of the enclosed form as written (quoted, or not starting with a quote),
    then the delimiter after it or the record's end."""
    d, q = re.escape(delimiter), re.escape(quote)
    # runs of plain characters matched whole between escapes (a loop per character is 2x slower)
    quoted = f"{q}[^{q}\\\\]*(?:(?:\\\\.|{q}{q})[^{q}\\\\]*)*{q}(?={d}|$)"
    field = f"{quoted}|(?!{q})[^{d}\\\\]*(?:\\\\.[^{d}\\\\]*)*"
    return re.compile(f"({field})({d}|$)", re.S)


@functools.cache
def _enclosed_escapes(quote: str | None) -> re.Pattern[str]:
    """The pattern of the escapes in a quoted field's text (``quote``: a doubled quote is one too),
    or in an unquoted one's (None)."""
    return re.compile("\\\\(.)" + (f"|{re.escape(quote * 2)}" if quote else ""), re.S)


def split_enclosed(text: str, delimiter: str, quote: str) -> list[str] | None:
    """The fields of one record of the enclosed form, as written (quotes and escapes kept); None when
    the record does not split so (a quoted field followed by anything but the delimiter)."""
    fields = []
    pos = 0
    for m in _enclosed_field(delimiter, quote).finditer(text):
        if m.start() != pos:  # a quote opens a field it does not close, or text follows a closing one
            return None
        fields.append(m[1])
        if not m[2]:  # the record's end
            return fields
        pos = m.end()
    return None  # pragma: no cover - a field matches at the record's end, which ends the loop


def decode_enclosed(field: str, quote: str, tokens: Iterable[str]) -> str | None:
    """A field of the enclosed form as ``LOAD DATA`` reads it; None for NULL: ``\\N`` (quoted or
    not) and, unquoted, one of ``tokens`` (the word NULL and the mapping's null tokens). In quotes a
    doubled quote is one; a backslash and a character is ``ENCLOSED_ESCAPES``' control character or
    that character."""
    if len(field) >= 2 and field[0] == quote and field[-1] == quote:
        body = field[1:-1]
        if "\\" not in body and quote * 2 not in body:
            return body
        if body == TEXT_NULL:
            return None
        pattern = _enclosed_escapes(quote)
    else:
        if field == TEXT_NULL or field in tokens:
            return None
        if "\\" not in field:
            return field
        body = field
        pattern = _enclosed_escapes(None)
    return pattern.sub(lambda m: ENCLOSED_ESCAPES.get(m[1], m[1]) if m[1] else quote, body)


def split_escaped(line: str, delimiter: str) -> list[str]:
    """The fields of one line of COPY's text format, still escaped: the line split at every
    delimiter no backslash escapes."""
    fields = []
    start = 0
    for m in re.finditer(r"\\.|" + re.escape(delimiter), line, re.S):
        if m.group() == delimiter:
            fields.append(line[start : m.start()])
            start = m.end()
    fields.append(line[start:])
    return fields


def unescape(field: str) -> str | None:
    """A field of COPY's text format decoded; None when it is not one COPY writes: an octal or hex
    sequence (``\101``, ``\x41``: bytes, not characters) or a lone backslash at its end."""
    if re.search(r"\\(?:[0-7x]|$)", re.sub(r"\\\\", "", field)):
        return None
    return re.sub(r"\\(.)", lambda m: TEXT_ESCAPES.get(m[1], m[1]), field, flags=re.S)


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
    # decoded before the line end is looked for: in UTF-16 or UTF-32 a line end is not one byte,
    # and other characters hold the bytes of LF and CR (U+010A is 0A 01 in UTF-16LE). Bytes that do
    # not decode become lone surrogates (only the header row must be valid text)
    decoder = codecs.getincrementaldecoder(encoding)("surrogateescape")
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
    if any("\udc80" <= ch <= "\udcff" for ch in text):
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
            _mark_nulls(reading, first)
        if careful:
            _careful(careful, reading)
        if text_format(mapping):
            _unescape(reading, group, first)
        if mapping.csv.empty is not None:
            _mark_empty(reading, first, mapping.csv.empty)


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
        bad = r.engine.unescape_text(view, relation, cells, tokens, r.delimiter, malformed)
        r.raw.relations[i] = (view, columns)
        for file_id, n in bad.items():
            by_id[file_id].rows -= n
            by_id[file_id].malformed += n


def _mark_nulls(r: _Reading, first: int) -> None:
    """The enclosed form's relations the engine's reader read, from ``first`` on: a ``\\N`` cell is
    NULL (``_EnclosedCheck`` let no other cell read as ``\\N`` there)."""
    for i in range(first, len(r.raw.relations)):
        relation, columns = r.raw.relations[i]
        view = f"{relation}_nulls"
        r.engine.replace_cells(view, relation, [c for c in r.internal if c in columns], TEXT_NULL, None)
        r.raw.relations[i] = (view, columns)


def _mark_empty(r: _Reading, first: int, token: str) -> None:
    """The relations read from ``first`` on, whichever path read them: a cell that is exactly
    ``token`` (``csv.empty``) is an empty text."""
    for i in range(first, len(r.raw.relations)):
        relation, columns = r.raw.relations[i]
        view = f"{relation}_empty"
        r.engine.replace_cells(view, relation, [c for c in r.internal if c in columns], token, "")
        r.raw.relations[i] = (view, columns)


def count_records(
    path: Path,
    quote: str | None,
    header: bool,
    escaping: str | None = None,
    breaks: bool = True,
    lf_only: bool = False,
) -> tuple[int, bool]:
    """The number of data records by quote parity, independently of any CSV parser, and whether the
    quotes balance. A line break ends a record only outside quotes (RFC 4180 doubles a quote inside a
    quoted field, which keeps the parity); blank lines are not records. Vectorised over blocks.
    ``quote`` None (COPY's text format): nothing is quoted, and the second value says whether no
    backslash escapes a line break (which the engine's reader would take for a record's end);
    ``breaks`` False (plain text): no backslash escapes anything, and every line is a record.
    ``lf_only`` (nothing quoted, lines that end with LF): a CR before an LF is data, which the
    engine's reader may take for part of a CRLF line end and drop, so the second value is False
    where there is one.
    ``escaping``, the delimiter of the enclosed form: a backslash escapes a quote too, and the second
    value also says whether the engine's reader reads every field as ``LOAD DATA`` does
    (``_EnclosedCheck``)."""
    return count_blocks(streams.blocks(path, COUNT_BLOCK), quote, header, escaping, breaks, lf_only)


class _EnclosedCheck:
    """What the record count finds of the enclosed form's backslashes, block by block (each block
    holds every backslash run it has whole, with the two bytes after it: ``_whole_runs``): which
    quotes a backslash escapes, and whether the engine's reader, which drops a backslash before any
    character and does not look at backslashes outside quotes, reads every field as ``LOAD DATA``
    does. It does where, inside quotes, no backslash escapes 0 b n r t Z or N and no escaped
    backslash comes before an N (``"\\\\N"`` would read as ``\\N``, which stands for NULL), and
    where, outside quotes, every backslash is a whole ``\\N`` cell."""

    def __init__(self, quote: int, delimiter: str) -> None:
        self.quote = quote
        self.delimiter = ord(delimiter)
        self.last = 10  # the byte before the block (a line start at the file's start)
        self.plain = True
        self.special = np.frombuffer(b"0bnrtZN", np.uint8)

    def unquote(self, buf: np.ndarray, isq: np.ndarray, parity: int, final: bool) -> None:
        """Clear in ``isq`` (1 at each quote of ``buf``) the quotes a backslash escapes, and check the
        block's backslashes; ``parity``: of the unescaped quotes before the block. Backslashes are
        few: their runs are found among their positions, not over the block."""
        starts, ends, nxt, odd = _backslash_runs(buf)
        if len(starts):
            isq[ends[odd & (nxt == self.quote)] + 1] = 0  # an odd run escapes the quote after it
            if self.plain:
                # the quote parity before each run: no quote stands at a run's start, a backslash
                before = np.bitwise_xor.accumulate(
                    np.bitwise_xor.reduceat(isq, np.concatenate(([0], starts)))
                )
                inside = (before[:-1] ^ parity) & 1 == 1
                self._check(buf, starts, ends, nxt, odd, inside, final)
        if len(buf):
            self.last = int(buf[-1])

    def _check(
        self,
        buf: np.ndarray,
        starts: np.ndarray,
        ends: np.ndarray,
        nxt: np.ndarray,
        odd: np.ndarray,
        inside: np.ndarray,
        final: bool,
    ) -> None:
        n = len(buf)
        special = np.isin(nxt, self.special)
        if np.any(inside & special & (odd | (nxt == ord("N")))):
            self.plain = False
        out = ~inside
        if out.any():
            s, e, c = starts[out], ends[out], nxt[out]
            before = np.where(s > 0, buf[np.maximum(s - 1, 0)], self.last)
            beyond = np.where(e + 2 < n, buf[np.minimum(e + 2, n - 1)], -1)
            ends_cell = (beyond == self.delimiter) | (beyond == 10) | (beyond == 13) | (beyond == -1)
            starts_cell = (before == self.delimiter) | (before == 10) | (before == 13)
            null = (s == e) & (c == ord("N")) & starts_cell & ends_cell
            if not null.all():
                self.plain = False
        if not final and ends[-1] + 2 >= n:  # a run cut at ``_whole_runs``' limit
            self.plain = False


def _backslash_runs(buf: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The block's runs of backslashes: where each starts and ends, the byte after it (-1 where the
    block ends), and whether it is odd (its last backslash escapes that byte). Backslashes are few:
    the runs are found among their positions, not over the block."""
    bpos = np.flatnonzero(buf == 92)
    cut = np.flatnonzero(np.diff(bpos) != 1)
    starts = bpos[np.concatenate(([0], cut + 1))] if len(bpos) else bpos
    ends = bpos[np.concatenate((cut, [len(bpos) - 1]))] if len(bpos) else bpos
    after = ends + 1
    n = len(buf)
    nxt = np.where(after < n, buf[np.minimum(after, n - 1)], -1)
    return starts, ends, nxt, (ends - starts) % 2 == 0


def _whole_runs(chunks: Iterable[bytes], limit: int) -> Iterator[tuple[bytes, bool]]:
    """The blocks cut again so that each holds its backslash runs whole with the two bytes after
    them, and whether it is the last; a run longer than ``limit`` bytes is cut anyway (the check
    then finds its end beyond the block, and the file is not plain)."""
    held = b""
    for chunk in chunks:
        data = held + chunk if held else chunk
        cut = len(data)
        while cut > 0 and (b := data.rfind(b"\\", max(0, cut - 3), cut)) >= 0:
            cut = b
        if cut == 0 and len(data) > limit:
            cut = len(data)
        held = data[cut:]
        if cut:
            yield data[:cut], False
    yield held, True


def count_blocks(
    chunks: Iterable[bytes],
    quote: str | None,
    header: bool,
    escaping: str | None = None,
    breaks: bool = True,
    lf_only: bool = False,
) -> tuple[int, bool]:
    """``count_records`` over the bytes of a file given in blocks."""
    check = _EnclosedCheck(ord(quote), escaping) if escaping is not None and quote is not None else None
    # the forms a backslash escapes in see each run of backslashes whole, in one block
    breaks = breaks and quote is None
    whole = check is not None or breaks
    blocks = _whole_runs(chunks, 4 * COUNT_BLOCK) if whole else ((c, False) for c in chunks)
    q = -1 if quote is None else ord(quote)  # no byte equals -1: no quote toggles the parity
    escaped = False  # a backslash escapes a line break (COPY's text format)
    parity = 0
    last_end = -1
    pos = 0
    last_byte = 10
    count = 0
    cr_data = False  # a CR before an LF, in a file of LF line ends (``lf_only``)
    for chunk, final in blocks:
        buf = np.frombuffer(chunk, dtype=np.uint8)
        nl = np.flatnonzero(buf == 10)
        if lf_only and not cr_data and len(nl):
            cr_data = bool(np.any(buf[nl[nl > 0] - 1] == 13)) or (nl[0] == 0 and last_byte == 13)
        isq = (buf == q).view(np.uint8) if q >= 0 else np.zeros(len(buf), np.uint8)
        if check is not None:
            check.unquote(buf, isq, parity, final)
        if breaks and not escaped:
            _, ends, nxt, odd = _backslash_runs(buf)
            # a run cut at ``_whole_runs``' limit may escape what the next block starts with
            escaped = bool(np.any(odd & ((nxt == 10) | (nxt == 13)))) or (
                not final and len(ends) > 0 and ends[-1] + 2 >= len(buf)
            )
        if len(nl):
            starts = np.concatenate(([0], nl + 1))
            if starts[-1] == len(buf):
                starts = starts[:-1]
            acc = np.bitwise_xor.accumulate(np.bitwise_xor.reduceat(isq, starts)) ^ parity
            ends = nl[acc[: len(nl)] == 0] + pos  # the line breaks outside quotes
            parity = int(acc[-1])
        else:
            ends = nl
            parity ^= int(np.count_nonzero(isq) & 1)
        if len(ends):
            prev = np.empty_like(ends)
            prev[0] = last_end
            prev[1:] = ends[:-1]
            gap = ends - prev
            at = ends - 1 - pos
            before = np.where(at >= 0, buf[np.maximum(at, 0)], last_byte)
            empty = (gap == 1) | ((gap == 2) & (before == 13))
            count += int(len(ends) - np.count_nonzero(empty))
            last_end = int(ends[-1])
        pos += len(buf)
        if len(buf):
            last_byte = int(buf[-1])
    rest = pos - 1 - last_end  # bytes after the last record's line break
    if rest > 1 or (rest == 1 and last_byte != 13):
        count += 1
    plain = check is None or check.plain
    return count - (1 if header and count else 0), parity == 0 and not escaped and plain and not cr_data


def _fast(group: list[RawFile], r: _Reading) -> list[RawFile]:
    """Scan the group with the engine's reader; return the files that need the careful path."""
    opts = r.mapping.csv
    if r.encoding.lower() not in ENGINE_ENCODINGS or len(r.delimiter.encode("utf-8")) > ENGINE_DELIMITER:
        return group
    if len(group) >= JOIN_MIN:
        group = _joined(group, r)
        if not group:
            return []
    paths = {str(streams.engine_readable(f.path, r.scratch / "decompressed")): f for f in group}
    # The engine's reader does not report every broken record when it scans many files at once, so
    # every file's records are also counted independently, by a thread, while the engine scans.
    with ThreadPoolExecutor(max_workers=1) as pool:
        quote, escaping, breaks = _counting(r.mapping, r.delimiter)
        counted = {
            p: pool.submit(
                count_records,
                Path(p),
                quote,
                opts.header,
                escaping,
                breaks,
                quote is None and f.line_end == "\n",
            )
            for p, f in paths.items()
        }
        staged = r.raw.relation("csv")
        scanned = _scan(r, staged, list(paths))
        counts = {p: c.result() for p, c in counted.items()}
    if scanned is None:
        if len(group) == 1:
            return group
        # a file the strict reader cannot read at all: find it, and read the others fast
        careful: list[RawFile] = []
        for f in group:
            careful.extend(_fast([f], r))
        return careful
    rejected, spans = scanned
    good = []
    for p, f in paths.items():
        n, lo, hi = spans.get(p, (0, 0, -1))
        records, balanced = counts[p]
        if p in rejected or n != records or not balanced:
            rejected.add(p)
            continue
        if n and hi - lo + 1 != n:  # the engine's insertion order did not keep the file together
            raise InputError("the engine did not keep this file's records in order", file=str(f.path))
        f.rows = n
        good.append((p, f.file_id, lo, n))
    if good:
        view = f"{staged}_rows"
        r.engine.number_rows(view, staged, good, r.internal)
        r.raw.add_relation(view, r.internal)
    return [f for p, f in paths.items() if p in rejected]


def _body(
    f: RawFile, header: bool, counting: tuple[str | None, str | None, bool]
) -> tuple[bytes, bytes, int] | None:
    """A small file's records without its header, ending in a line end, with that line end and
    the number of records; None for a file that is not small or whose quotes do not balance."""
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
    quote, escaping, breaks = counting
    records, balanced = count_blocks([body], quote, False, escaping, breaks, quote is None and end == b"\n")
    if not balanced:
        return None
    if body and not body.endswith(b"\n"):
        body += end
    return body, end, records


def _joined(group: list[RawFile], r: _Reading) -> list[RawFile]:
    """Read many small files as one: their records, headers left out, are copied one file after
    another into a scratch file per line end (the engine's reader costs about half a millisecond a
    file, so 3,000 files cost it more than a million rows). A file's records are the rows between
    its first and the next file's first (counted by quote parity). A joined file the engine cannot
    read, that has any reject, or whose rows do not add up is not trusted: its files are returned,
    with the larger ones and those whose quotes do not balance, to be read one by one."""
    opts = r.mapping.csv
    alone: list[RawFile] = []
    by_end: dict[bytes, list[tuple[RawFile, bytes, int]]] = {}
    for f in group:
        small = _body(f, opts.header, _counting(r.mapping, r.delimiter))
        if small is None:
            alone.append(f)
        else:
            by_end.setdefault(small[1], []).append((f, small[0], small[2]))
    r.scratch.mkdir(parents=True, exist_ok=True)
    for n, members in enumerate(by_end[end] for end in sorted(by_end)):
        if len(members) < JOIN_MIN:
            alone.extend(f for f, _, _ in members)
            continue
        joined = r.scratch / f"joined-{n}.csv"
        with open(joined, "wb") as out:
            for _, body, _ in members:
                out.write(body)
        staged = r.raw.relation("joined")
        scanned = _scan(r, staged, [str(joined)], header=False)
        total = sum(records for _, _, records in members)
        n_rows, lo, hi = scanned[1].get(str(joined), (0, 0, -1)) if scanned else (0, 0, -1)
        if scanned is None or scanned[0] or n_rows != total or (n_rows and hi - lo + 1 != n_rows):
            r.engine.drop(staged)
            alone.extend(f for f, _, _ in members)
            joined.unlink()
            continue
        firsts = []
        for f, _, records in members:
            f.rows = records
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
        # and made NULL after (``_mark_nulls``); an unquoted empty field is an empty text
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


def _scan(
    r: _Reading, staged: str, paths: list[str], header: bool | None = None
) -> tuple[set[str], dict[str, tuple[int, int, int]]] | None:
    """The engine's strict scan of ``paths`` into ``staged`` (``header``: the mapping's by default)."""
    return r.engine.scan_csv(
        staged, paths, r.internal, csv_syntax(r.mapping, r.delimiter, r.encoding, header)
    )


class _Overlong(Exception):
    pass


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
        stream, encoding=encoding, errors="surrogateescape", newline="\r" if end == "\r" else "\n"
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


def _strip_end(text: str) -> str:
    if text.endswith("\r\n"):
        return text[:-2]
    if text.endswith(("\n", "\r")):
        return text[:-1]
    return text


def _records(
    lines: Iterator[str], delimiter: str, quote: str, expected: int, escape: str | None = None
) -> Iterator[tuple[str, str | None, list[str]]]:
    """(raw text of the record without its line end, None, its fields as the parser read them) for
    a good record, or (raw text, reason, []) for a malformed one; blank lines are not records.
    ``escape``: the character that escapes the next one, in quotes or not (the enclosed form's
    backslash, which the parser drops)."""
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
        reader = stdcsv.reader(
            feed(), delimiter=delimiter, quotechar=quote, doublequote=True, escapechar=escape, strict=True
        )
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
                    yield text, f"expected {expected} fields, found {len(row)}", []
                else:
                    yield text, None, row
        except (stdcsv.Error, _Overlong) as e:
            if isinstance(e, _Overlong):
                reason = f"a record longer than {MAX_RECORD_BYTES >> 20} MiB, or an unterminated quote"
            elif "unexpected end of data" in str(e):
                reason = "unterminated quote: the quoted field runs to the end of the file"
            elif "new-line character seen in unquoted field" in str(e):
                reason = "a carriage return (CR) alone in an unquoted field, in a file whose lines end with LF: quote the field"
            else:
                reason = f"broken quoting: {e}"
            if escape is None and "\\" + quote in consumed[0]:
                reason += (
                    f" (a backslash before a quote, as MySQL's INTO OUTFILE escapes one: {ENCLOSED_HINT})"
                )
            elif escape is None and delimiter == "\t":
                reason += f" ({PLAIN_HINT})"
            yield _strip_end(consumed[0]), reason, []
            rest = consumed[1:]
            consumed.clear()
            pending.extendleft(reversed(rest))  # resume at the line after the record's first line


def _escapes_its_end(text: str) -> bool:
    """``text`` ends in an odd run of backslashes: its last one escapes what follows."""
    return (len(text) - len(text.rstrip("\\"))) % 2 == 1


def _text_lines(lines: Iterator[str], ends: str = "\n") -> Iterator[str]:
    """The records of COPY's text format, each without its line end: a line whose line break a
    backslash escapes goes on with the next line (the break is data, as PostgreSQL's COPY FROM
    reads a backslash and a line break), and at the end of the file the record ends there. A
    backslash before the CR of a CRLF escapes the CR: the LF ends the record. ``ends``: the file's
    line end (``line_end``), as COPY FROM takes it from the first line: in a file of LF ends, a CR
    before an LF is data."""
    pending = ""
    for line in lines:
        record = pending + line
        cut = 2 if ends == "\r\n" and record.endswith("\r\n") else int(record.endswith(("\n", "\r")))
        body = record[: len(record) - cut]
        end = record[len(body) :]
        if end in ("\n", "\r") and _escapes_its_end(body):
            pending = record
            if len(pending) > MAX_RECORD_BYTES:
                yield pending  # too long: ``_text_records`` says so
                pending = ""
            continue
        pending = ""
        yield record[:-1] if end == "\r\n" and _escapes_its_end(body) else body
    if pending:
        yield pending


def _text_records(
    lines: Iterator[str], delimiter: str, expected: int, f: RawFile, ends: str = "\n"
) -> Iterator[tuple[str, str | None]]:
    """``_records`` for COPY's text format: a record is one line, or more where a backslash escapes
    a line break (``_text_lines``); blank lines are not records. ``\\.`` alone on the file's last
    line is COPY's end-of-data marker, not a record (noted on ``f``); anywhere else it is malformed."""
    marker: str | None = None
    for text in _text_lines(lines, ends):
        if not text:
            continue
        if marker is not None:
            yield marker, "COPY's end-of-data marker \\. before the file's last line"
            marker = None
        if text == TEXT_END:
            marker = text
            continue
        if len(text) > MAX_RECORD_BYTES:
            yield text[:1024], f"a record longer than {MAX_RECORD_BYTES >> 20} MiB"
            continue
        found = len(split_escaped(text, delimiter))
        yield text, None if found == expected else f"expected {expected} fields, found {found}"
    if marker is not None:
        f.notes.append("its last line, \\., is COPY's end-of-data marker: not a record")


def _plain_records(
    lines: Iterator[str], delimiter: str, expected: int, ends: str = "\n"
) -> Iterator[tuple[str, str | None, list[str]]]:
    """``_records`` for plain text: a record is one line (``ends``: the file's line end, as in
    ``_text_lines``), its fields split at every delimiter; blank lines are not records. Nothing
    escapes a line break, so a value holding one splits its record in two: where the break is in
    the last field, the first part has every field, and the rest is a line of too few (one, unless
    the value holds a delimiter too). Such a line is malformed, and so is the record before it,
    which may be cut short: neither is read as if whole."""
    held: tuple[str, str | None, list[str]] | None = None  # the last record, until the next line
    rest = False  # the held line has too few fields and follows a record (or such lines)
    for line in lines:
        cut = 2 if ends == "\r\n" and line.endswith("\r\n") else int(line.endswith(("\n", "\r")))
        text = line[: len(line) - cut]
        if not text:
            continue
        if len(text) > MAX_RECORD_BYTES:
            record: tuple[str, str | None, list[str]] = (
                text[:1024],
                f"a record longer than {MAX_RECORD_BYTES >> 20} MiB",
                [],
            )
            rest = False
        else:
            row = text.split(delimiter)
            found = f"expected {expected} fields, found {len(row)}"
            record = (text, None, row) if len(row) == expected else (text, found, [])
            after = held is not None and (held[1] is None or rest)
            if held is not None and held[1] is None and len(row) < expected:
                held = (held[0], PLAIN_CUT, [])
            rest = after and len(row) < expected
            if rest:
                record = (text, f"{found}, after a record: {PLAIN_REST}", [])
        if held is not None:
            yield held
        held = record
    if held is not None:
        yield held


#: Why the record before a line without a delimiter is quarantined, and why that line is.
PLAIN_CUT = (
    "the next line has too few fields, as the rest of a value with a line break would"
    " (nothing escapes one in plain text): this record may be cut short"
)
PLAIN_REST = "it may be the rest of that record's last value, cut by a line break"


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
                "text": pa.array(
                    [t.encode("utf-8", "surrogateescape").decode("utf-8", "replace") for t in bad_text]
                ),
                "reason": pa.array(bad_reason, pa.string()),
            }
        )
        r.engine.append(malformed, batch)
        for kept in (bad_files, bad_rows, bad_text, bad_reason):
            kept.clear()

    any_good = False
    longest = 0  # bytes of the longest good record written (the parser's block must hold one)
    with open(cleaned, "wb") as out:
        for f in files:
            number = 0
            good = 0
            records: Iterator[tuple[str, str | None, list[str]]]
            if copy_text:
                lines = _lines(f, r.encoding, f.line_end)
                records = (
                    (t, why, [])
                    for t, why in _text_records(lines, r.delimiter, len(r.internal), f, f.line_end)
                )
            elif bare:
                lines = _lines(f, r.encoding, f.line_end)
                records = _plain_records(lines, r.delimiter, len(r.internal), f.line_end)
            else:
                escape = "\\" if mysql else None
                lines = _lines(f, r.encoding, f.line_end)
                records = _records(lines, r.delimiter, opts.quote, len(r.internal), escape)
            if opts.header:
                next(records, None)
            for text, reason, row in records:
                number += 1
                decoded = None
                if mysql and reason is None:
                    decoded = _enclosed_record(text, row, r.delimiter, opts.quote, tokens)
                    if decoded is None:
                        reason = "broken quoting: a quote opens a field it does not close"
                if reason is None:
                    good += 1
                    if copy_text:  # the cells as written, quoted as RFC 4180 fields
                        text = ",".join(
                            '"' + c.replace('"', '""') + '"' for c in split_escaped(text, r.delimiter)
                        )
                    elif bare:  # the cells as RFC 4180 fields, a null token as an unquoted empty one
                        text = ",".join("" if c in nulls else '"' + c.replace('"', '""') + '"' for c in row)
                    elif decoded is not None:
                        text = decoded
                    line = f"{f.file_id}{sep}{number}{sep}{text}\n".encode("utf-8", "surrogateescape")
                    longest = max(longest, len(line))
                    out.write(line)
                else:
                    bad_files.append(f.file_id)
                    bad_rows.append(number)
                    bad_text.append(text)
                    bad_reason.append(reason)
                    if len(bad_rows) >= 10_000:
                        flush_bad()
            f.rows = good
            f.malformed = number - good
            fast = r.encoding.lower() in ENGINE_ENCODINGS
            why = "the fast reader rejected it" if fast else f"the fast reader does not read {r.encoding}"
            if fast and len(r.delimiter.encode("utf-8")) > ENGINE_DELIMITER:
                why = f"the fast reader takes no delimiter longer than {ENGINE_DELIMITER} bytes"
            elif fast and mysql:
                why = "the fast reader rejected it, or does not decode all its backslashes"
            f.notes.append(f"read record by record ({why})")
            any_good = any_good or good > 0
    flush_bad()
    if any_good:
        _load_cleaned(cleaned, r, longest)
    cleaned.unlink()


def _enclosed_record(text: str, row: list[str], delimiter: str, quote: str, tokens: set[str]) -> str | None:
    """A good record of the enclosed form as the careful path's scratch file holds it: its fields
    decoded (``decode_enclosed``), each quoted as an RFC 4180 field, NULL as an unquoted empty one;
    None when it does not split (``split_enclosed``). ``row``: its fields as Python's csv module read
    them, which drops each backslash: the decoding itself where the record holds none, and no field
    is a null token (an unquoted one is NULL, a quoted one is not, and the module does not say which)."""
    if "\\" not in text and tokens.isdisjoint(row):
        values: Iterable[str | None] = row
    else:
        cells = split_enclosed(text, delimiter, quote)
        if cells is None:
            return None
        values = [decode_enclosed(c, quote, tokens) for c in cells]
    return ",".join("" if v is None else '"' + v.replace('"', '""') + '"' for v in values)


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


def _load_cleaned(cleaned: Path, r: _Reading, longest: int) -> None:
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
