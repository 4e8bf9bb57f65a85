"""Execution engines, one file each, looked up by name."""

from __future__ import annotations

from cdcnorm.engines.duckdb import DuckDBEngine

ENGINES = {"duckdb": DuckDBEngine}

__all__ = ["ENGINES", "DuckDBEngine"]
