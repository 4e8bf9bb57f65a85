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
        config: dict[str, Any] = {"preserve_insertion_order": True}
        if memory_limit:
            config["memory_limit"] = memory_limit
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

    # --- reading helpers used by readers --------------------------------------------------

    def parquet_as_text(self, path: Path) -> tuple[list[str], pa.Table]:
        """Every column of a Parquet file as text (BLOB as hex), with its 1-based row number."""
        src = f"read_parquet({lit(str(path))}, file_row_number = true)"
        described = self.con.execute(f"DESCRIBE SELECT * FROM {src}").fetchall()
        cols = [(r[0], r[1]) for r in described if r[0] != "file_row_number"]
        parts = []
        for name, typ in cols:
            col = ident(name)
            expr = f"hex({col})" if typ == "BLOB" else f"CAST({col} AS VARCHAR)"
            parts.append(f"{expr} AS {col}")
        parts.append("CAST(file_row_number + 1 AS BIGINT) AS __row")
        table = self.arrow(f"SELECT {', '.join(parts)} FROM {src} ORDER BY file_row_number")
        return [c for c, _ in cols], table

    def decode_utf8(self, table: pa.Table, columns: list[str]) -> pa.Table:
        """Binary columns -> text; invalid UTF-8 cells become NULL and are listed, base64, in __enc."""
        self.register("__decode_in", table)
        parts = []
        bad = []
        for name in columns:
            col = ident(name)
            parts.append(f"try(decode({col})) AS {col}")
            key = lit(name.replace("\\", "\\\\").replace('"', '\\"'))
            bad.append(
                f"CASE WHEN {col} IS NOT NULL AND try(decode({col})) IS NULL "
                f"THEN '\"' || {key} || '\":\"' || to_base64({col}) || '\"' END"
            )
        enc = f"CASE WHEN concat_ws(',', {', '.join(bad)}) = '' THEN NULL ELSE '{{' || concat_ws(',', {', '.join(bad)}) || '}}' END"
        rest = [c for c in table.column_names if c not in columns and c != "__enc"]
        parts.extend(ident(c) for c in rest)
        out = self.arrow(f"SELECT {', '.join(parts)}, {enc} AS __enc FROM __decode_in")
        self.con.unregister("__decode_in")
        return out
