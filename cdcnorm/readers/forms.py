"""The forms a CSV dump comes in, and how a record of each splits and decodes when it is read
record by record (the careful path of readers/csv.py):

- RFC 4180 (``csv.escapes: quotes``, the default): fields may be quoted, a quote in quotes is
  doubled; Python's ``csv`` module splits the records (``rfc_records``).
- PostgreSQL's COPY text format (``csv.escapes: backslash``): nothing is quoted, a backslash
  escapes the character after it (``split_escaped``, ``unescape``, ``text_records``).
- MySQL's and MariaDB's ``INTO OUTFILE ... ENCLOSED BY`` (``csv.escapes: backslash`` and a
  ``csv.quote``): quoted *and* escaped (``split_enclosed``, ``decode_enclosed``).
- Plain delimited text (``csv.escapes: none``): nothing quoted or escaped (``plain_records``).

Each record iterator yields (raw text of the record without its line end, None or the reason it is
malformed, its fields), and a malformed record never swallows the records after it.
"""

from __future__ import annotations

import csv as stdcsv
import functools
import re
from collections import deque
from collections.abc import Iterable, Iterator

from cdcnorm.engines.duckdb import TEXT_ESCAPES
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers.base import MAX_RECORD_BYTES, RawFile
from cdcnorm.readers.count import Counting

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


#: What a tab-separated dump whose values hold quotes, read as RFC 4180, needs.
PLAIN_HINT = "if the file quotes nothing, as tab-separated and bulk-copy exports do, set csv.escapes: none"


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


def quote_of(mapping: Mapping) -> str | None:
    """The character that quotes a field, None where nothing is quoted."""
    return None if text_format(mapping) or plain(mapping) else mapping.csv.quote


def counting_of(mapping: Mapping, delimiter: str) -> Counting:
    """How the record count reads the table's files: the quote (None where nothing is quoted), the
    enclosed form's delimiter, and whether a backslash may escape a line break or the delimiter
    (COPY's text format)."""
    return Counting(quote_of(mapping), delimiter if enclosed(mapping) else None, text_format(mapping))


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


def strip_end(text: str) -> str:
    if text.endswith("\r\n"):
        return text[:-2]
    if text.endswith(("\n", "\r")):
        return text[:-1]
    return text


class Overlong(Exception):
    pass


def rfc_records(
    lines: Iterator[str], delimiter: str, quote: str, expected: int, f: RawFile, escape: str | None = None
) -> Iterator[tuple[str, str | None, list[str]]]:
    """(raw text of the record without its line end, None, its fields as the parser read them) for
    a good record, or (raw text, reason, []) for a malformed one; blank lines are not records
    (counted on ``f``).
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
                raise Overlong
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
                if not row:  # a blank line
                    f.blank += 1
                    continue
                text = strip_end("".join(consumed))
                if len(row) != expected:
                    yield text, f"expected {expected} fields, found {len(row)}", []
                else:
                    yield text, None, row
        except (stdcsv.Error, Overlong) as e:
            if isinstance(e, Overlong):
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
            yield strip_end(consumed[0]), reason, []
            rest = consumed[1:]
            consumed.clear()
            pending.extendleft(reversed(rest))  # resume at the line after the record's first line


def _escapes_its_end(text: str) -> bool:
    """``text`` ends in an odd run of backslashes: its last one escapes what follows."""
    return (len(text) - len(text.rstrip("\\"))) % 2 == 1


def text_lines(lines: Iterator[str], ends: str = "\n") -> Iterator[str]:
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
                yield pending  # too long: ``text_records`` says so
                pending = ""
            continue
        pending = ""
        yield record[:-1] if end == "\r\n" and _escapes_its_end(body) else body
    if pending:
        yield pending


def text_records(
    lines: Iterator[str], delimiter: str, expected: int, f: RawFile, ends: str = "\n"
) -> Iterator[tuple[str, str | None]]:
    """``rfc_records`` for COPY's text format: a record is one line, or more where a backslash escapes
    a line break (``text_lines``); blank lines are not records (counted on ``f``). ``\\.`` alone on the file's last
    line is COPY's end-of-data marker, not a record (noted on ``f``); anywhere else it is malformed."""
    marker: str | None = None
    for text in text_lines(lines, ends):
        if not text:
            f.blank += 1
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


def plain_records(
    lines: Iterator[str], delimiter: str, expected: int, f: RawFile, ends: str = "\n"
) -> Iterator[tuple[str, str | None, list[str]]]:
    """``rfc_records`` for plain text: a record is one line (``ends``: the file's line end, as in
    ``text_lines``), its fields split at every delimiter; blank lines are not records (counted on
    ``f``). Nothing
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
            f.blank += 1
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


def rfc_line(values: Iterable[str | None]) -> str:
    """Values as one RFC 4180 record (no line end), as the careful path's scratch file holds them:
    each text quoted, a quote doubled, NULL an unquoted empty field."""
    return ",".join("" if v is None else '"' + v.replace('"', '""') + '"' for v in values)


def enclosed_record(text: str, row: list[str], delimiter: str, quote: str, tokens: set[str]) -> str | None:
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
    return rfc_line(values)
