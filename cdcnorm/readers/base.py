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

import codecs
from dataclasses import dataclass, field
from pathlib import Path

from cdcnorm.engines.duckdb import DuckDBEngine


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
