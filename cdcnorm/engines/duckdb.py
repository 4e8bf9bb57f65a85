"""The DuckDB adapter: everything that is specific to running plans on DuckDB.

Plans are sqlglot expressions; this adapter renders them in DuckDB's dialect,
registers Arrow tables as relations, materialises steps and writes files.
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
from sqlglot import exp

from cdcnorm.errors import CdcnormError
from cdcnorm.sql import ident, lit

#: Share of the machine's physical memory the engine may use when no limit is given; beyond its
#: limit the engine spills to the run's temporary folder.
DEFAULT_MEMORY_SHARE = 0.5


def default_memory_limit() -> str:
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return "4GB"
    return f"{int(total * DEFAULT_MEMORY_SHARE) >> 20}MB"


class DuckDBEngine:
    name = "duckdb"
    dialect = "duckdb"

    def __init__(
        self,
        *,
        memory_limit: str | None = None,
        threads: int | None = None,
        temp_directory: str | None = None,
    ) -> None:
        config: dict[str, Any] = {
            "preserve_insertion_order": True,
            "memory_limit": memory_limit or default_memory_limit(),
        }
        if threads:
            config["threads"] = threads
        if temp_directory:
            config["temp_directory"] = temp_directory
        self.con = duckdb.connect(":memory:", config=config)
        with contextlib.suppress(duckdb.Error):
            # Without the ICU extension DuckDB already treats TIMESTAMPTZ as UTC.
            self.con.execute("SET TimeZone = 'UTC'")
        # keep Arrow tables alive while DuckDB scans them
        self._registered: dict[str, pa.Table] = {}

    def render(self, expression: exp.Expr | str) -> str:
        if isinstance(expression, str):
            return expression
        return expression.sql(dialect=self.dialect)

    def register(self, name: str, table: pa.Table) -> None:
        self._registered[name] = table
        self.con.register(name, table)

    def unregister(self, name: str) -> None:
        self.con.unregister(name)
        self._registered.pop(name, None)

    def drop(self, name: str) -> None:
        self.con.execute(f"DROP TABLE IF EXISTS {ident(name)}")

    def execute(self, expression: exp.Expr | str) -> None:
        self.con.execute(self.render(expression))

    def materialize(self, name: str, expression: exp.Expr) -> None:
        self._run(name, f"CREATE OR REPLACE TEMP TABLE {ident(name)} AS {self.render(expression)}")

    def view(self, name: str, expression: exp.Expr) -> None:
        self._run(name, f"CREATE OR REPLACE TEMP VIEW {ident(name)} AS {self.render(expression)}")

    def _run(self, name: str, sql: str) -> None:
        try:
            self.con.execute(sql)
        except duckdb.Error as e:
            first = str(e).splitlines()[0]
            raise CdcnormError(
                f"the engine could not run plan step {name}: {first}",
                hint="this is a bug in cdcnorm; `cdcnorm convert --show-plan` prints the SQL for a report",
            ) from None

    def arrow(self, expression: exp.Expr | str) -> pa.Table:
        return self.con.sql(self.render(expression)).to_arrow_table()

    def rows(self, expression: exp.Expr | str) -> list[tuple[Any, ...]]:
        return self.con.execute(self.render(expression)).fetchall()

    def copy(self, expression: exp.Expr, path: Path, fmt: str) -> int:
        """Write a query's rows to ``path`` atomically (temporary name, then rename); rows written."""
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
        options = {"json": "FORMAT JSON", "parquet": "FORMAT PARQUET"}[fmt]
        try:
            written = self.con.execute(
                f"COPY ({self.render(expression)}) TO {lit(str(tmp))} ({options})"
            ).fetchone()
            os.replace(tmp, path)
            return int(written[0]) if written else 0
        finally:
            if tmp.exists():
                tmp.unlink()
