"""Events as JSON Lines (RFC 8259), one envelope per line."""

from __future__ import annotations

from pathlib import Path

import sqlglot

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.plan import Plan
from cdcnorm.sql import PLAN_DIALECT
from cdcnorm.writers.base import project

FORMAT = "jsonl"
SUFFIX = ".jsonl"


def write(
    plan: Plan, engine: DuckDBEngine, files_relation: str, path: Path, relation: str | None = None
) -> int:
    """Write the events; ``relation`` holds them already sorted (see base.sorted_events)."""
    query = sqlglot.parse_one(
        project(plan, files_relation, render=True, relation=relation), read=PLAN_DIALECT
    )
    return engine.copy(query, path, "json")
