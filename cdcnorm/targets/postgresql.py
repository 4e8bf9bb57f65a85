"""PostgreSQL servers: ``postgresql://user@host:5432/database`` (psycopg 3).

Types: BIGINT, NUMERIC(p,s), DOUBLE PRECISION, BOOLEAN, DATE, TIME,
TIMESTAMPTZ, UUID, BYTEA, JSONB, TEXT. Positions are TEXT with the "C"
collation, so they compare as bytes whatever the database's locale. A batch is
rendered by the engine as CSV text (PostgreSQL's input forms: decimals exact,
timestamps RFC 3339, bytea as ``\\x`` and hex) and loaded with COPY into a
temporary table. Applies into one table take turns through an advisory lock
held for the apply.
"""

from __future__ import annotations

import io
import zlib
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager
from typing import Any

import pyarrow as pa
import pyarrow.csv as pacsv
import sqlalchemy as sa
from sqlalchemy.dialects import postgresql

from cdcnorm.targets.base import (
    POSITION,
    AlchemySession,
    Begin,
    Refusal,
    Tables,
    TableSpec,
    Target,
    alchemy_begin,
)
from cdcnorm.types.base import FieldType

SCHEME = "postgresql"


class _Session(AlchemySession):
    def stage(self, tables: Tables, batch: pa.RecordBatch) -> None:
        prep = self.conn.dialect.identifier_preparer
        cols = ", ".join(prep.quote(c.name) for c in tables.batch.columns)
        sql = f"COPY {prep.format_table(tables.batch)} ({cols}) FROM STDIN (FORMAT csv, HEADER false)"
        buf = io.BytesIO()
        # every column is text; a NULL is written as an empty field, an empty text as ""
        pacsv.write_csv(batch, buf, pacsv.WriteOptions(include_header=False, quoting_style="needed"))
        raw = self.conn.connection.driver_connection
        assert raw is not None
        with raw.cursor() as cur, cur.copy(sql) as copy:
            copy.write(buf.getvalue())


class PostgreSQLTarget(Target):
    scheme = SCHEME
    max_name_bytes = 63  # longer identifiers are cut by the server
    sa_dialect = postgresql.dialect()  # type: ignore[no-untyped-call]

    def declared_columns(self, table: sa.Table) -> sa.Executable:
        name = self.sa_dialect.identifier_preparer.format_table(table)
        return sa.text(
            "SELECT attname, format_type(atttypid, atttypmod) FROM pg_attribute "
            "WHERE attrelid = to_regclass(:t) AND attnum > 0 AND NOT attisdropped ORDER BY attnum"
        ).bindparams(t=name)

    def primary_key(self, table: sa.Table) -> sa.Executable:
        return sa.text(
            "SELECT a.attname FROM pg_index i JOIN pg_attribute a "
            "ON a.attrelid = i.indrelid AND a.attnum = ANY(i.indkey) "
            "WHERE i.indrelid = to_regclass(:t) AND i.indisprimary"
        ).bindparams(t=self.sa_dialect.identifier_preparer.format_table(table))

    def position_collation(self, table: sa.Table) -> sa.Executable | None:
        # the column's own collation, or the database's when it has the default one
        return sa.text(
            "SELECT COALESCE(NULLIF(c.collname, 'default'), "
            "(SELECT datcollate FROM pg_database WHERE datname = current_database())) "
            "FROM pg_attribute a LEFT JOIN pg_collation c ON c.oid = a.attcollation "
            "WHERE a.attrelid = to_regclass(:t) AND a.attname = :c"
        ).bindparams(t=self.sa_dialect.identifier_preparer.format_table(table), c=POSITION)

    def column_type(self, ftype: FieldType) -> sa.types.TypeEngine[Any]:
        if ftype.name == "decimal":
            p, s = ftype.params
            return sa.Numeric(p, s)
        types: dict[str, sa.types.TypeEngine[Any]] = {
            "integer": sa.BigInteger(),
            "float": postgresql.DOUBLE_PRECISION(),
            "boolean": sa.Boolean(),
            "date": sa.Date(),
            "time": sa.Time(),
            "timestamp": postgresql.TIMESTAMP(timezone=True),
            "uuid": postgresql.UUID(),
            "bytes": postgresql.BYTEA(),
            "json": postgresql.JSONB(),
        }
        return types.get(ftype.name, sa.Text())

    def position_type(self) -> sa.types.TypeEngine[Any]:
        return sa.Text(collation="C")

    def batch_form(self, ftype: FieldType, v: str) -> str:
        if ftype.name == "bytes":
            return f"'\\x' || lower(hex({v}))"
        return f"CAST({ftype.render(v)} AS VARCHAR)"

    def insert(self, table: sa.Table) -> Any:
        return postgresql.insert(table)

    def cannot_hold(self, ftype: FieldType, v: str) -> Refusal | None:
        # PostgreSQL's documentation (Character Types, from memory): the character with code zero
        # (NUL) cannot be stored; jsonb refuses the escape \u0000 for the same reason (JSON Types,
        # from memory). tests/test_state.py checks both against the server. An escape is a
        # backslash after an even number of backslashes.
        if ftype.name == "text":
            return Refusal(f"contains({v}, chr(0))", "the NUL character (U+0000)")
        if ftype.name == "json":
            return Refusal(
                rf"regexp_matches(CAST({v} AS VARCHAR), '(^|[^\\])(\\\\)*\\u0000')",
                "the escape \\u0000 (the NUL character)",
            )
        return None

    def connect(self, spec: TableSpec) -> AbstractContextManager[Begin]:
        return self._connect(spec)

    @contextmanager
    def _connect(self, spec: TableSpec) -> Iterator[Begin]:
        url = sa.engine.make_url(self.url).set(drivername="postgresql+psycopg")
        engine = sa.create_engine(url, connect_args={"connect_timeout": max(1, int(self.wait))})
        lock = zlib.crc32(f"cdcnorm:{spec.schema}.{spec.name}".encode())
        try:
            with engine.connect() as conn:
                conn.execute(sa.text("SELECT pg_advisory_lock(:k)"), {"k": lock})
                conn.commit()

                try:
                    yield alchemy_begin(conn, _Session)
                finally:
                    conn.execute(sa.text("SELECT pg_advisory_unlock(:k)"), {"k": lock})
                    conn.commit()
        finally:
            engine.dispose()
