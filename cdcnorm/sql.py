"""Small helpers for writing plan fragments.

Plan fragments are written in DuckDB's dialect and parsed once by sqlglot into
expressions (see ``plan.py``); an engine adapter renders them for its engine,
so another engine gets them through sqlglot's transpiler.
"""

from __future__ import annotations

PLAN_DIALECT = "duckdb"


def ident(name: str) -> str:
    """A quoted identifier, whatever characters the name holds: a double quote inside is doubled
    (SQL standard), exactly as sqlglot writes it (``tests/test_sql_quoting.py`` checks both against
    sqlglot and the engine), without building an expression: thousands of file names go through here."""
    return '"' + name.replace('"', '""') + '"'


def lit(value: str) -> str:
    """A SQL string literal: a single quote inside is doubled (SQL standard); nothing else is
    escaped, as the engine's standard strings read backslashes as themselves."""
    return "'" + value.replace("'", "''") + "'"
