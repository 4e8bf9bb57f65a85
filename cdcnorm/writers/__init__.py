"""Event writers, one file per format, looked up by name."""

from __future__ import annotations

from types import ModuleType

from cdcnorm.writers import jsonl, parquet

WRITERS: dict[str, ModuleType] = {m.FORMAT: m for m in (jsonl, parquet)}

__all__ = ["WRITERS"]
