"""DuckDB files: ``duckdb:///warehouse.duckdb``.

Types are DuckDB's own: DECIMAL(p,s), DOUBLE, BOOLEAN, DATE, TIME, TIMESTAMPTZ,
UUID, BLOB, JSON, VARCHAR; positions VARCHAR (DuckDB compares text as bytes).
DuckDB's SQL takes PostgreSQL's forms of CREATE, INSERT ... ON CONFLICT and
DELETE, so the shared SQLAlchemy Core statements are compiled with the
PostgreSQL dialect and run on a DuckDB connection to the file; a batch arrives
as an Arrow record batch in native types (no text round trip). A DuckDB file
has one writer process at a time: a second apply waits up to ``--wait``
seconds for the file.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager
from typing import Any

import duckdb
import pyarrow as pa
import sqlalchemy as sa
from sqlalchemy.dialects import postgresql

from cdcnorm.errors import LandingBusyError, UsageError
from cdcnorm.targets.base import Begin, Tables, TableSpec, Target
from cdcnorm.types.base import FieldType

SCHEME = "duckdb"
_DIALECT = postgresql.dialect(paramstyle="qmark")  # type: ignore[no-untyped-call]


class _Session:
    def __init__(self, con: duckdb.DuckDBPyConnection) -> None:
        self.con = con

    def run(self, statement: sa.Executable) -> list[tuple[Any, ...]]:
        compiled = statement.compile(dialect=_DIALECT)  # type: ignore[attr-defined]
        params = [compiled.params[name] for name in getattr(compiled, "positiontup", None) or []]
        cur = self.con.execute(str(compiled), params)
        return [tuple(r) for r in cur.fetchall()] if cur.description else []

    def stage(self, tables: Tables, batch: pa.RecordBatch) -> None:
        self.con.register("cdcnorm_arrow_batch", batch)
        try:
            name = _DIALECT.identifier_preparer.format_table(tables.batch)
            self.con.execute(f"INSERT INTO {name} SELECT * FROM cdcnorm_arrow_batch")
        finally:
            self.con.unregister("cdcnorm_arrow_batch")


class DuckDBTarget(Target):
    scheme = SCHEME
    sa_dialect = _DIALECT
    type_dialect = "duckdb"

    def declared_columns(self, table: sa.Table) -> sa.Executable:
        return sa.text(
            "SELECT column_name, data_type FROM information_schema.columns "
            "WHERE table_schema = :s AND table_name = :t ORDER BY ordinal_position"
        ).bindparams(s=table.schema or "main", t=table.name)

    def primary_key(self, table: sa.Table) -> sa.Executable:
        return sa.text(
            "SELECT unnest(constraint_column_names) FROM duckdb_constraints() "
            "WHERE schema_name = :s AND table_name = :t AND constraint_type = 'PRIMARY KEY'"
        ).bindparams(s=table.schema or "main", t=table.name)

    def column_type(self, ftype: FieldType) -> sa.types.TypeEngine[Any]:
        if ftype.name == "decimal":
            p, s = ftype.params
            return sa.Numeric(p, s)
        types: dict[str, sa.types.TypeEngine[Any]] = {
            "integer": sa.BigInteger(),
            "float": sa.Double(),
            "boolean": sa.Boolean(),
            "date": sa.Date(),
            "time": sa.Time(),
            "timestamp": sa.DateTime(timezone=True),
            "uuid": sa.Uuid(),
            "bytes": postgresql.BYTEA(),  # DuckDB's name for BLOB too
            "json": sa.JSON(),
        }
        return types.get(ftype.name, sa.Text())

    def batch_form(self, ftype: FieldType, v: str) -> str:
        return v

    def insert(self, table: sa.Table) -> Any:
        return postgresql.insert(table)

    def connect(self, spec: TableSpec) -> AbstractContextManager[Begin]:
        return self._connect()

    def _path(self) -> str:
        url = sa.engine.make_url(self.url)
        if not url.database:
            raise UsageError(
                "a DuckDB target needs a file", expected="duckdb:///path/to/file.duckdb", found=self.shown
            )
        return url.database

    @contextmanager
    def _connect(self) -> Iterator[Begin]:
        path = self._path()
        deadline = time.monotonic() + self.wait
        while True:
            try:
                con = duckdb.connect(path)
                break
            except duckdb.IOException as e:
                if "lock" not in str(e).lower():
                    raise
                if time.monotonic() > deadline:
                    raise LandingBusyError(
                        f"another process holds the DuckDB file {path}",
                        hint="wait for the other apply, or raise --wait",
                    ) from None
                time.sleep(0.2)
        try:
            con.execute("SET TimeZone = 'UTC'")

            @contextmanager
            def transaction(rollback: bool = False) -> Iterator[_Session]:
                con.execute("BEGIN TRANSACTION")
                try:
                    yield _Session(con)
                except BaseException:
                    con.execute("ROLLBACK")
                    raise
                con.execute("ROLLBACK" if rollback else "COMMIT")

            yield transaction
        finally:
            con.close()
