"""Events as JSON Lines (RFC 8259), one envelope per line."""

from __future__ import annotations

from pathlib import Path

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.plan import Plan
from cdcnorm.writers.base import write_events

FORMAT = "jsonl"
SUFFIX = ".jsonl"


def write(
    plan: Plan, engine: DuckDBEngine, files_relation: str, path: Path, relation: str | None = None
) -> int:
    return write_events(plan, engine, files_relation, path, relation, fmt="json")
