"""Small helpers for writing plan fragments.

Plan fragments are written in DuckDB's dialect and parsed once by sqlglot into
expressions (see ``plan.py``); an engine adapter renders them for its engine,
so another engine gets them through sqlglot's transpiler.
"""

from __future__ import annotations

from sqlglot import exp

PLAN_DIALECT = "duckdb"


def ident(name: str) -> str:
    """A quoted identifier, whatever characters the name holds."""
    return exp.to_identifier(name, quoted=True).sql(PLAN_DIALECT)


def lit(value: str) -> str:
    """A SQL string literal."""
    return exp.Literal.string(value).sql(PLAN_DIALECT)
