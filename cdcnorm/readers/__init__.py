"""Dump readers, one file per format, looked up by name or by file suffix.

Each reader module has ``FORMAT``, ``SUFFIXES`` and ``read_files(files, mapping, engine,
raw, scratch)``, which loads a table's files of that format into the engine (see base.py).
The CSV reader's helpers are modules of their own: ``forms.py`` (how a record of each CSV form
splits and decodes) and ``count.py`` (the independent record count).
A compression suffix (``.gz``, ``.zst``, ``.bz2``, ``.xz``, ``.lz4``) after the format's suffix is
read transparently (streams.py); an archive whose name has none is refused, naming the suffix to add.
"""

from __future__ import annotations

from pathlib import Path
from types import ModuleType

from cdcnorm.errors import InputError
from cdcnorm.readers import csv, jsonl, parquet, streams
from cdcnorm.readers.base import RawFile, RawTable

READERS: dict[str, ModuleType] = {m.FORMAT: m for m in (csv, jsonl, parquet)}


def reader_for(path: Path, fmt: str | None = None) -> ModuleType:
    if fmt:
        if fmt not in READERS:
            raise InputError(
                f"unknown input format {fmt!r}; formats are {', '.join(READERS)}", file=str(path)
            )
        return READERS[fmt]
    name = streams.base_name(path).lower()
    for module in READERS.values():
        if name.endswith(module.SUFFIXES):
            return module
    suffixes = ", ".join(s for m in READERS.values() for s in m.SUFFIXES)
    raise InputError(
        "cannot tell this file's format from its name",
        file=str(path),
        expected=f"a name ending in {suffixes}, optionally followed by {', '.join(streams.COMPRESSIONS)}",
        found=path.name,
        hint=f"name the format of the table's files in its mapping (format: {' | '.join(READERS)}), or of "
        "every input with --input-format",
    )


__all__ = ["READERS", "RawFile", "RawTable", "reader_for"]
