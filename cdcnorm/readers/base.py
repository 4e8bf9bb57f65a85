"""What readers produce: a table's raw rows in the engine, every value as text.

A reader never holds a dump in Python. It loads the rows into engine tables
(which the engine spills to disk beyond its memory limit) and describes each
file in a :class:`RawFile`. All files of one table share one :class:`RawTable`:

- every raw column name any of its files has gets a positional internal name,
  ``c0``, ``c1``, ... (``RawTable.internal``), so no name in a dump (``__row``,
  ``__$start_lsn``, ``v0``, ``a "b".c``) can collide with the plan's own columns;
- ``relations`` are engine relations with the columns ``__file`` (file id),
  ``__row`` (the record's 1-based number in its file: the data record for CSV,
  the line for JSON Lines, the row for Parquet), ``__enc`` (NULL, or a JSON
  object of the cells that were not valid text, base64) and the internal
  columns; a relation may lack some internal columns (NULL);
- ``malformed`` rows are records that could not be split into columns at all,
  with their raw text and the reason.
"""

from __future__ import annotations

import base64
import codecs
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.readers import streams


def _bytes_as_surrogates(e: UnicodeError) -> tuple[str | bytes, int]:
    """Decoding: each byte that does not decode becomes the lone surrogate U+DC00 + byte; encoding:
    such a surrogate becomes its byte again. Python's ``surrogateescape`` does the same for bytes
    0x80-0xFF only, but a unit UTF-16 cannot decode (an unpaired surrogate, 00 D8) holds a byte below
    0x80 too: it raised, and a UTF-16 dump read record by record ended in a traceback. The bytes are
    kept as they were, so a cell holding them is not valid text and is quarantined as bytes."""
    if isinstance(e, UnicodeDecodeError):
        return "".join(chr(0xDC00 + b) for b in e.object[e.start : e.end]), e.end
    if isinstance(e, UnicodeEncodeError):
        held = e.object[e.start : e.end]
        if all("\udc00" <= c <= "\udcff" for c in held):
            return bytes(ord(c) - 0xDC00 for c in held), e.end
    raise e


#: The error handler the readers decode and write back undecodable bytes with (``_bytes_as_surrogates``).
BYTES_AS_SURROGATES = "cdcnorm-bytes"
codecs.register_error(BYTES_AS_SURROGATES, _bytes_as_surrogates)


def _bytes_escaped(e: UnicodeError) -> tuple[str | bytes, int]:
    """Encoding to UTF-8: each undecodable byte ``b`` (the lone surrogate U+DC00 + b) becomes the two
    bytes 0xF8 + b // 64, 0x80 + b % 64. Neither is ASCII, so no byte of a file in UTF-16 or another
    encoding whose bytes are not UTF-8's (a 0x2C unit, a comma) can split or quote a field of the
    careful path's UTF-8 scratch file, and 0xF8-0xFB start no UTF-8 sequence (RFC 3629, section 3), so
    the cell stays not valid text. Decoding UTF-8: such a pair becomes the surrogate again
    (``original_bytes``)."""
    if isinstance(e, UnicodeEncodeError):
        held = e.object[e.start : e.end]
        if all("\udc00" <= c <= "\udcff" for c in held):
            return b"".join(bytes((0xF8 | (ord(c) - 0xDC00) >> 6, 0x80 | ord(c) & 0x3F)) for c in held), e.end
    if isinstance(e, UnicodeDecodeError):
        pair = e.object[e.start : e.start + 2]
        if len(pair) == 2 and 0xF8 <= pair[0] <= 0xFB and 0x80 <= pair[1] <= 0xBF:
            return chr(0xDC00 + ((pair[0] & 0x03) << 6 | pair[1] & 0x3F)), e.start + 2
    raise e


#: The error handler of the careful path's scratch file for dumps not in UTF-8 (``_bytes_escaped``).
BYTES_ESCAPED = "cdcnorm-escaped"
codecs.register_error(BYTES_ESCAPED, _bytes_escaped)


def writing_codec(encoding: str, start: bytes) -> str:
    """The codec that writes text back to the bytes it was read from, in a file in ``encoding`` that
    starts with ``start``: a codec that takes its byte order from a byte order mark (utf-16, utf-32)
    becomes the order the file's mark gives or, without one, the machine's, as Python's decoder
    reads it; utf-8-sig becomes utf-8 (the mark is not a record's)."""
    name = codecs.lookup(encoding).name
    if name in ("utf-16", "utf-32"):
        found = (streams.wide_unicode(start) or "").lower().replace("-", "")  # utf16le, say
        order = found[-2:] if found.startswith(name.replace("-", "")) else sys.byteorder[0] + "e"
        return f"{name}-{order}"
    return "utf-8" if name == "utf-8-sig" else name


def is_utf8(encoding: str) -> bool:
    """Text in ``encoding`` is written to UTF-8 as its own bytes, undecodable ones too."""
    return codecs.lookup(encoding).name in ("utf-8", "utf-8-sig", "ascii")


def original_bytes(cell: bytes, codec: str) -> bytes:
    """The bytes in the dump of a cell that the careful path wrote to its scratch file with
    ``BYTES_ESCAPED`` (its good characters as UTF-8, each undecodable byte escaped): its text
    written back in ``codec`` (``writing_codec``), each undecodable byte as it was."""
    return written(cell.decode("utf-8", BYTES_ESCAPED), codec)


def written(text: str, codec: str) -> bytes:
    """``text`` in ``codec``, each undecodable byte (a lone surrogate U+DC00 + byte) as it was. Not
    through the codec's error handler: UTF-16's and UTF-32's take only whole units from one, and a
    file's last, odd byte is not one."""
    return b"".join(
        bytes(ord(c) - 0xDC00 for c in piece) if _UNDECODED.match(piece) else piece.encode(codec)
        for piece in _PIECES.findall(text)
    )


def shown_base64(text: str, codec: str) -> str | None:
    """The bytes of a record's text, base64, where it holds a byte that did not decode (the
    quarantine shows such a record so, not with a replacement character); None where it is text."""
    if not _UNDECODED.search(text):
        return None
    return base64.b64encode(written(text, codec)).decode("ascii")


_UNDECODED = re.compile("[\udc00-\udcff]")
_PIECES = re.compile("[\udc00-\udcff]+|[^\udc00-\udcff]+")

#: The longest record (or field) the readers take, in bytes. A longer CSV record is quarantined
#: as malformed (its first line, with the reason) and reading resumes at the next line.
MAX_RECORD_BYTES = 32 << 20


@dataclass
class RawFile:
    """One dump file as read."""

    file_id: int
    path: Path
    name: str
    format: str = ""
    columns: list[str] = field(default_factory=list)
    rows: int = 0  # records split into columns
    malformed: int = 0  # records that could not be
    blank: int = 0  # blank lines: not records (a note says how many)
    empty: bool = False
    # False when the file states no columns to hold against the mapping: a file of no bytes, or
    # JSON Lines with no line that parses (its columns come from its objects)
    columns_known: bool = True
    # dotted names of nested leaf members a mapped column could read (Parquet struct members): the
    # candidates a drift message suggests for a dotted name the file lacks
    members: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    #: the codec its text was read with (a CSV file's csv.encoding); a cell its bytes do not decode
    #: in is quarantined as "not <encoding> text"
    encoding: str = "UTF-8"
    #: a CSV file's line end, as its first line shows it (readers/csv.py: line_end)
    line_end: str = "\n"

    @property
    def rows_read(self) -> int:
        return self.rows + self.malformed

    def note_blank(self) -> None:
        """Say how many blank lines the file had, if any: they are not records, so no count shows them."""
        if self.blank:
            lines = "a blank line" if self.blank == 1 else f"{self.blank:,} blank lines"
            self.notes.append(f"{lines}: not records, not counted as read")


@dataclass
class RawTable:
    """Every file of one table, loaded into the engine."""

    slug: str
    files: list[RawFile] = field(default_factory=list)
    columns: list[str] = field(default_factory=list)  # raw names; the i-th is stored as c{i}
    relations: list[tuple[str, list[str]]] = field(default_factory=list)  # (relation, internal columns)
    _internal: dict[str, str] = field(default_factory=dict)

    def internal(self, raw: str) -> str:
        """The internal column name of a raw column, given on first sight."""
        if raw not in self._internal:
            self._internal[raw] = f"c{len(self.columns)}"
            self.columns.append(raw)
        return self._internal[raw]

    def relation(self, kind: str) -> str:
        return f"{self.slug}__{kind}{len(self.relations)}"

    @property
    def malformed_relation(self) -> str:
        return f"{self.slug}__malformed"

    def ensure_malformed(self, engine: DuckDBEngine) -> str:
        engine.create_malformed(self.malformed_relation)
        return self.malformed_relation

    def add_relation(self, relation: str, internal_columns: list[str]) -> None:
        self.relations.append((relation, internal_columns))

    @property
    def rows_read(self) -> int:
        return sum(f.rows_read for f in self.files)
