"""SQLite (the embedded default): ``sqlite:///warehouse.db``.

SQLite has no decimal, date, time or timestamp storage of its own: decimals are
kept as their exact text (``"47.50"``), never as REAL, so nothing is rounded;
dates and times as their ISO 8601 text; timestamps as RFC 3339 text in UTC with
six fractional digits (``2026-03-01T08:05:10.000000Z``), fixed width so that text
order is time order; booleans as 0/1; UUIDs and JSON as text; bytes as BLOB.
Positions are TEXT, compared with SQLite's default BINARY collation (bytes).
Each transaction starts with BEGIN IMMEDIATE, so two applies into one file
take turns (each waits up to ``--wait`` seconds for the other).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager
from typing import Any

import pyarrow as pa
import sqlalchemy as sa
from sqlalchemy.dialects import sqlite

from cdcnorm.targets.base import AlchemySession, Begin, Tables, TableSpec, Target, alchemy_begin
from cdcnorm.types.base import FieldType

SCHEME = "sqlite"


class _Session(AlchemySession):
    def stage(self, tables: Tables, batch: pa.RecordBatch) -> None:
        sql = str(tables.batch.insert().compile(dialect=self.conn.dialect))
        columns = [c.to_pylist() for c in batch.columns]
        self.conn.exec_driver_sql(sql, list(zip(*columns, strict=True)))


class SQLiteTarget(Target):
    scheme = SCHEME
    has_schemas = False
    sa_dialect = sqlite.dialect()

    def declared_columns(self, table: sa.Table) -> sa.Executable:
        return sa.text("SELECT name, type FROM pragma_table_info(:t)").bindparams(t=table.name)

    def primary_key(self, table: sa.Table) -> sa.Executable:
        return sa.text("SELECT name FROM pragma_table_info(:t) WHERE pk > 0 ORDER BY pk").bindparams(
            t=table.name
        )

    def why_not_exact(self, declared: str, ftype: FieldType) -> str | None:
        from cdcnorm.targets.columns import why_not_exact_sqlite

        return why_not_exact_sqlite(declared, ftype)

    def column_type(self, ftype: FieldType) -> sa.types.TypeEngine[Any]:
        types: dict[str, sa.types.TypeEngine[Any]] = {
            "integer": sa.BigInteger(),
            "float": sa.Float(),
            "boolean": sa.Boolean(create_constraint=False),
            "bytes": sa.LargeBinary(),
        }
        return types.get(ftype.name, sa.Text())

    def batch_form(self, ftype: FieldType, v: str) -> str:
        if ftype.name in ("integer", "float", "bytes"):
            return v
        if ftype.name == "boolean":
            return f"CAST({v} AS INTEGER)"
        if ftype.name == "timestamp":  # fixed width, so text order is time order
            from cdcnorm.positions import timestamp_text

            return timestamp_text(v)
        return f"CAST({ftype.render(v)} AS VARCHAR)"

    def insert(self, table: sa.Table) -> Any:
        return sqlite.insert(table)

    def connect(self, spec: TableSpec) -> AbstractContextManager[Begin]:
        return self._connect()

    @contextmanager
    def _connect(self) -> Iterator[Begin]:
        engine = sa.create_engine(self.url, connect_args={"timeout": self.wait})

        @sa.event.listens_for(engine, "connect")
        def _no_driver_transactions(dbapi_conn: Any, _record: Any) -> None:
            dbapi_conn.isolation_level = None  # SQLAlchemy's BEGIN below decides

        @sa.event.listens_for(engine, "begin")
        def _begin_immediate(conn: sa.Connection) -> None:
            conn.exec_driver_sql("BEGIN IMMEDIATE")

        try:
            with engine.connect() as conn:
                yield alchemy_begin(conn, _Session)
        finally:
            engine.dispose()
