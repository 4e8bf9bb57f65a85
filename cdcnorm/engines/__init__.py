"""Execution engines, one file each, looked up by name."""

from __future__ import annotations

from collections.abc import Callable

from sqlglot import exp

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.engines.spark import SparkEngine
from cdcnorm.errors import UsageError, did_you_mean

ENGINES: dict[str, type[DuckDBEngine] | type[SparkEngine]] = {"duckdb": DuckDBEngine, "spark": SparkEngine}


def renderer(name: str) -> Callable[[exp.Expr], str]:
    """How the engine ``name`` writes a plan step as SQL for people (no session needed)."""
    if name not in ENGINES:
        raise UsageError(
            f"unknown engine {name!r}{did_you_mean(name, ENGINES)}", expected=" or ".join(ENGINES)
        )
    return ENGINES[name].pretty


__all__ = ["ENGINES", "DuckDBEngine", "SparkEngine", "renderer"]
