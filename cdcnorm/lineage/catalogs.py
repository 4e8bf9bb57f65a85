"""Catalogs beyond the mappings: the schemas of tables no mapping declares (a calendar, exchange
rates, reference data), so that values computed from them keep those sources.

``--catalog`` (repeatable) takes:

- a ``.sql`` file of CREATE TABLE statements in the models' dialect (parsed by sqlglot);
- a ``.yaml``/``.yml``/``.json`` file of our own design, validated on load::

      tables:
        ref.calendar:
          day: date
          is_holiday: boolean

- a database: a SQLite file (``.db``, ``.sqlite``, ``.sqlite3``) or ``sqlite:///...`` URL, or a
  PostgreSQL URL, read through SQLAlchemy's inspection; a DuckDB file (``.duckdb`` or
  ``duckdb:///...``), read through its information schema. A password never appears in messages.

Each gives table name -> column -> SQL type.
"""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path
from typing import Any

import sqlglot
import yaml
from pydantic import BaseModel, ConfigDict, ValidationError
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError

from cdcnorm.errors import UsageError
from cdcnorm.lineage.resolve import written

Tables = dict[str, dict[str, str]]

_SQLITE = (".db", ".sqlite", ".sqlite3")


class CatalogFile(BaseModel):
    """A schema file: ``tables: {name: {column: type}}``."""

    model_config = ConfigDict(extra="forbid")
    tables: dict[str, dict[str, str]]


def load_catalog(spec: str, dialect: str) -> Tables:
    if "://" in spec:
        return _database(spec)
    path = Path(spec)
    if not path.exists():
        raise UsageError(
            f"--catalog {spec}: no such file",
            expected="a .sql file of CREATE TABLE statements, a .yaml/.json schema file, a database file or URL",
            found=spec,
        )
    suffix = path.suffix.lower()
    if suffix == ".sql":
        return _create_tables(path, dialect)
    if suffix in (".yaml", ".yml", ".json"):
        return _schema_file(path)
    if suffix in _SQLITE:
        return _database(f"sqlite:///{path}")
    if suffix == ".duckdb":
        return _duckdb(path)
    raise UsageError(
        f"--catalog {spec}: unknown kind of catalog",
        expected=".sql, .yaml, .yml, .json, .db, .sqlite, .sqlite3, .duckdb, or a database URL",
        found=path.suffix or "no suffix",
    )


def _create_tables(path: Path, dialect: str) -> Tables:
    try:
        statements = sqlglot.parse(path.read_text(encoding="utf-8"), read=dialect)
    except (ParseError, TokenError) as e:
        raise UsageError(f"{path}: not SQL the {dialect} dialect reads: {str(e).splitlines()[0]}") from None
    out: Tables = {}
    for stmt in statements:
        if not isinstance(stmt, exp.Create) or not isinstance(stmt.this, exp.Schema):
            continue  # only CREATE TABLE t (columns) declares a schema
        table = stmt.this.this
        # names as the database would store them: unquoted ones folded where the dialect folds
        name = ".".join(written(p, dialect) for p in table.parts)
        cols = {}
        for col in stmt.this.expressions:
            if isinstance(col, exp.ColumnDef):
                kind = col.args.get("kind")
                cols[written(col.this, dialect)] = (
                    kind.sql(dialect=dialect) if isinstance(kind, exp.Expr) else "TEXT"
                )
        out[name] = cols
    if not out:
        raise UsageError(
            f"{path}: no CREATE TABLE statement with columns", hint="--catalog takes table schemas"
        )
    return out


def _schema_file(path: Path) -> Tables:
    from cdcnorm.mapping.load import parse_yaml, repeated_key

    text = path.read_text(encoding="utf-8")

    def once(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
        # a name stated twice in one object: json keeps the last without a word (RFC 7493,
        # section 2.3, asks a parser to reject it)
        data = dict(pairs)
        if len(data) < len(pairs):
            twice = next(k for k, n in Counter(k for k, _ in pairs).items() if n > 1)
            raise UsageError(
                f"{path}: the key {twice!r} is stated twice in one object", hint="keep one of them"
            )
        return data

    try:
        if path.suffix.lower() == ".json":
            data = json.loads(text, object_pairs_hook=once)
        else:
            node, data = parse_yaml(text)
            repeated = repeated_key(node) if node is not None else None
            if repeated is not None:
                key, first, second = repeated
                raise UsageError(
                    f"{path}:{second}: the key {'.'.join(map(str, key))} is stated twice "
                    f"(lines {first} and {second})",
                    hint="keep one of them",
                )
        return CatalogFile.model_validate(data).tables
    except (json.JSONDecodeError, yaml.YAMLError) as e:
        raise UsageError(f"{path}: not readable: {str(e).splitlines()[0]}") from None
    except ValidationError as e:
        err = e.errors()[0]
        where = ".".join(str(p) for p in err["loc"])
        raise UsageError(
            f"{path}: {where}: {err['msg']}",
            expected="tables: {<table>: {<column>: <type>}}",
            found=str(err.get("input"))[:80],
        ) from None


def _database(url: str) -> Tables:
    import sqlalchemy as sa

    shown = sa.engine.make_url(url).render_as_string(hide_password=True)
    if url.startswith("duckdb:"):
        return _duckdb(Path(sa.engine.make_url(url).database or ""))
    if url.startswith("postgresql:"):
        url = (
            sa.engine.make_url(url).set(drivername="postgresql+psycopg").render_as_string(hide_password=False)
        )
    try:
        engine = sa.create_engine(url)
        out: Tables = {}
        with engine.connect() as conn:
            inspector = sa.inspect(conn)
            default = inspector.default_schema_name
            schemas = [
                s for s in inspector.get_schema_names() if s not in ("information_schema", "pg_catalog")
            ]
            for schema in schemas:
                for table in inspector.get_table_names(schema=schema) + inspector.get_view_names(
                    schema=schema
                ):
                    name = table if schema == default else f"{schema}.{table}"
                    cols = inspector.get_columns(table, schema=schema)
                    out[name] = {c["name"]: str(c["type"]) for c in cols}
        engine.dispose()
        return out
    except sa.exc.SQLAlchemyError as e:
        first = str(getattr(e, "orig", None) or e).strip().splitlines()[0]
        raise UsageError(f"--catalog {shown}: {first}") from None


def _duckdb(path: Path) -> Tables:
    import duckdb

    if not path.exists():
        raise UsageError(f"--catalog {path}: no such DuckDB file")
    con = duckdb.connect(str(path), read_only=True)
    try:
        rows = con.execute(
            "SELECT table_schema, table_name, column_name, data_type FROM information_schema.columns "
            "WHERE table_catalog = current_database() ORDER BY table_schema, table_name, ordinal_position"
        ).fetchall()
    finally:
        con.close()
    out: Tables = {}
    for schema, table, column, typ in rows:
        name = table if schema == "main" else f"{schema}.{table}"
        out.setdefault(name, {})[column] = typ
    return out


def load_catalogs(specs: list[str], dialect: str) -> Tables:
    out: Tables = {}
    for spec in specs:
        out.update(load_catalog(spec, dialect))
    return out
