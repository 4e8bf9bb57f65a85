"""Events as Parquet with native Arrow types (decimal128(p,s), timestamp[us, UTC], ...)."""

from __future__ import annotations

from pathlib import Path

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.plan import Plan
from cdcnorm.writers.base import write_events

FORMAT = "parquet"
SUFFIX = ".parquet"


def write(
    plan: Plan, engine: DuckDBEngine, files_relation: str, path: Path, relation: str | None = None
) -> int:
    return write_events(plan, engine, files_relation, path, relation, fmt="parquet")
