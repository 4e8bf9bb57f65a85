"""Dump readers, one file per format, looked up by name or by file suffix."""

from __future__ import annotations

from pathlib import Path
from types import ModuleType

from cdcnorm.errors import InputError
from cdcnorm.readers import csv, jsonl, parquet
from cdcnorm.readers.base import RawSource

READERS: dict[str, ModuleType] = {m.FORMAT: m for m in (csv, jsonl, parquet)}


def reader_for(path: Path, fmt: str | None = None) -> ModuleType:
    if fmt:
        if fmt not in READERS:
            raise InputError(
                f"unknown input format {fmt!r}; formats are {', '.join(READERS)}", file=str(path)
            )
        return READERS[fmt]
    name = path.name.lower()
    for module in READERS.values():
        if name.endswith(module.SUFFIXES):
            return module
    suffixes = ", ".join(s for m in READERS.values() for s in m.SUFFIXES)
    raise InputError(
        "cannot tell this file's format from its name",
        file=str(path),
        expected=f"a name ending in {suffixes}",
    )


__all__ = ["READERS", "RawSource", "reader_for"]
