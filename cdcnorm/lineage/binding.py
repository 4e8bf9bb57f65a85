"""Impact checked by binding: what the engine itself refuses after a schema edit.

The graph answers which columns depend on which; some breaks only the engine
sees (``SELECT * EXCLUDE (c)`` once ``c`` is gone, a comparison of a retyped
column with a text literal). So the source tables (mappings and catalogs) are
built in an in-memory DuckDB with their types and one synthetic row each,
every model is created as a view in dependency order and run once over those
rows; then the edit is applied to the tables and everything is done again.
A model that worked before and is refused after is broken, with the engine's
reason. Models in another dialect are transpiled to DuckDB's by sqlglot; when
that fails the check says it is unavailable for the model.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import duckdb
import sqlglot
from sqlglot import exp

from cdcnorm.lineage.models import LoadedModels, ModelStatement
from cdcnorm.lineage.resolve import TableInfo
from cdcnorm.sql import ident

#: A model calling a function of an extension the engine has not installed is not bound (its
#: binding is unavailable), never a download from the network
OFFLINE: dict[str, str | bool | int | float | list[str]] = {"autoinstall_known_extensions": False}

#: Candidate texts for the synthetic row: the first that the column's type accepts is its value.
CANDIDATES = ("1", "2026-03-01", "2026-03-01 08:00:00+00", "08:00:00", "00000000-0000-4000-8000-000000000001")


def _sample(con: duckdb.DuckDBPyConnection, sql_type: str) -> str:
    for text in CANDIDATES:
        if con.execute(f"SELECT TRY_CAST('{text}' AS {sql_type}) IS NOT NULL").fetchall()[0][0]:
            return f"CAST('{text}' AS {sql_type})"
    return "NULL"


#: The engine's type of each column of each model it built: model -> column -> type.
EngineTypes = dict[str, dict[str, str]]


@dataclass
class Outcome:
    ok: dict[str, bool]
    reasons: dict[str, str]
    unavailable: dict[str, str]
    types: EngineTypes  # of each model it built


def _build(
    tables: Iterable[TableInfo], statements: list[ModelStatement], order: list[str], dialect: str
) -> Outcome:
    con = duckdb.connect(":memory:", config=OFFLINE)
    ok: dict[str, bool] = {}
    reasons: dict[str, str] = {}
    unavailable: dict[str, str] = {}
    types: EngineTypes = {}
    try:
        for info in tables:
            if info.kind != "source" or not info.columns:
                continue
            if len(info.parts) > 1:
                con.execute(f"CREATE SCHEMA IF NOT EXISTS {ident(info.parts[-2])}")
            name = ".".join(ident(p) for p in info.parts[-2:])
            cols = ", ".join(f"{ident(info.shown(c))} {info.types.get(c) or 'VARCHAR'}" for c in info.columns)
            con.execute(f"CREATE TABLE {name} ({cols})")
            values = ", ".join(_sample(con, info.types.get(c) or "VARCHAR") for c in info.columns)
            con.execute(f"INSERT INTO {name} VALUES ({values})")
        by_name: dict[str, list[ModelStatement]] = {}
        for st in statements:
            by_name.setdefault(st.name, []).append(st)
        for model in order:
            sts = [
                s for s in by_name.get(model, []) if s.kind in ("create", "select") and s.query is not None
            ]
            if not sts:
                continue
            st = sts[0]
            assert st.query is not None
            try:
                # parsed in the models' dialect, written in DuckDB's: sqlglot's transpiler
                query = st.query.sql(dialect="duckdb", unsupported_level=sqlglot.ErrorLevel.RAISE)
            except sqlglot.errors.SqlglotError as e:
                unavailable[model] = f"cannot transpile from {dialect}: {str(e).splitlines()[0]}"
                continue
            parts = st.target
            if len(parts) > 1:
                con.execute(f"CREATE SCHEMA IF NOT EXISTS {ident(parts[-2])}")
            view = ".".join(ident(p) for p in parts[-2:])
            cols = f" ({', '.join(ident(c) for c in st.columns)})" if st.columns else ""
            try:
                con.execute(f"CREATE VIEW {view}{cols} AS {query}")
                con.execute(f"SELECT * FROM {view}").fetchall()  # run it over the synthetic rows
                ok[model] = True
                types[model] = {str(r[0]): str(r[1]) for r in con.execute(f"DESCRIBE {view}").fetchall()}
            except duckdb.Error as e:
                ok[model] = False
                # a view the engine refused is missing: a model that reads one fails for that reason
                # (matched by the tables it names, never by a name's letters in the message)
                reads = {t.name.lower() for t in st.query.find_all(exp.Table)}
                refused = [
                    m
                    for m, good in ok.items()
                    if not good
                    and m != model
                    and m.split(".")[-1].lower() in reads
                    and "Catalog Error" in str(e)
                ]
                reasons[model] = (
                    f"it reads {refused[0]}, which the engine refuses" if refused else _in_our_words(str(e))
                )
    finally:
        con.close()
    return Outcome(ok, reasons, unavailable, types)


class Binder:
    """The models bound one by one, in dependency order, by the engine itself: each is created as
    an empty table from its query, over empty tables of the sources' columns and types, and
    described (graph.py calls it as it resolves each model). What it refuses to
    bind (a misspelt struct member, ``s.b`` of a struct without ``b``; a function given the wrong
    arguments) is a gap in an answer the graph alone would call complete; the names it gives
    columns without an alias (``CAST(id AS INTEGER)``, ``sum(amount)``, ``(a + 1)``) are the names
    a reader of the model must use, which no rule of thumb gives. For models in DuckDB's dialect
    only: another dialect's models are not the engine's to refuse."""

    def __init__(self, tables: Iterable[TableInfo], declared: dict[tuple[str, ...], dict[str, str]]) -> None:
        self.con = duckdb.connect(":memory:", config=OFFLINE)
        for info in tables:
            if info.kind == "source" and info.columns:
                self._table(info.parts, {info.shown(c): info.types.get(c) or "VARCHAR" for c in info.columns})
        for parts, cols in declared.items():
            if cols:
                self._table(parts, cols)

    def _schema(self, parts: tuple[str, ...]) -> str:
        if len(parts) > 1:
            self.con.execute(f"CREATE SCHEMA IF NOT EXISTS {ident(parts[-2])}")
        return ".".join(ident(p) for p in parts[-2:])

    def _table(self, parts: tuple[str, ...], columns: dict[str, str]) -> None:
        cols = ", ".join(f"{ident(c)} {t}" for c, t in columns.items())
        # a type the engine does not know: the models reading the table are not bound
        with contextlib.suppress(duckdb.Error):
            self.con.execute(f"CREATE TABLE IF NOT EXISTS {self._schema(parts)} ({cols})")

    def bind(self, st: ModelStatement) -> list[str] | str | None:
        """The engine's names of the model's columns; or why it refuses to bind it (its binder's
        words); None when it cannot tell (the model reads a table the engine lacks, a file, ...)."""
        job = self._job(st)
        return self._bind(*job) if job is not None else None

    def _job(self, st: ModelStatement) -> tuple[str, str] | None:
        if st.kind not in ("create", "select") or st.query is None:
            return None
        try:
            query = st.query.sql(dialect="duckdb", unsupported_level=sqlglot.ErrorLevel.RAISE)
        except sqlglot.errors.SqlglotError:
            return None
        named = f" AS q({', '.join(ident(c) for c in st.columns)})" if st.columns else ""
        schema = ident(st.target[-2]) if len(st.target) > 1 else None
        table = ".".join(ident(p) for p in st.target[-2:])
        # an empty table of the model's columns, which its readers bind against: a view would be
        # bound again with every view that reads it (a chain 7 models deep made the project's
        # build 4 times slower); the engine binds the query as it would the view's
        create = f"CREATE OR REPLACE TABLE {table} AS SELECT * FROM ({query}){named} LIMIT 0"
        return (f"CREATE SCHEMA IF NOT EXISTS {schema}; {create}" if schema else create), table

    def _bind(self, sql: str, table: str) -> list[str] | str | None:
        try:
            self.con.execute(sql)
            return [str(r[0]) for r in self.con.execute(f"DESCRIBE {table}").fetchall()]
        except duckdb.Error as e:
            first = str(e).strip().splitlines()[0]
            kind, _, rest = first.partition(": ")
            return rest if kind == "Binder Error" else None

    def close(self) -> None:
        self.con.close()


def _in_our_words(message: str) -> str:
    first = message.strip().splitlines()[0]
    kind, _, rest = first.partition(": ")
    what = {
        "Binder Error": "the engine cannot bind it",
        "Conversion Error": "a value fails to convert when it runs",
        "Catalog Error": "it reads something that is not there",
        "Parser Error": "the engine cannot parse it",
    }.get(kind, "the engine refuses it")
    return f"{what}: {rest or first}"


def edited_tables(
    tables: Iterable[TableInfo], table: str, column: str, kind: str, value: str | None
) -> list[TableInfo]:
    """The source tables with one column dropped, renamed or retyped."""
    out = []
    for info in tables:
        if info.kind != "source" or info.name != table:
            out.append(info)
            continue
        cols, types = [], {}
        for f in info.columns:
            c = info.shown(f)
            if c == column and kind == "drop":
                continue
            new = value if (c == column and kind == "rename" and value) else c
            cols.append(new)
            types[new] = (
                value if (c == column and kind == "retype" and value) else info.types.get(f, "VARCHAR")
            )
        out.append(TableInfo(info.kind, info.name, info.parts, cols, types))
    return out


def check_edit(
    project: Any, loaded: LoadedModels, table: str, column: str, kind: str, value: str | None
) -> tuple[dict[str, Any], tuple[EngineTypes, EngineTypes]]:
    """Models that bind and run before the edit and not after it, with the engine's reason; and
    the engine's types of the models it built, before and after the edit."""
    tables = [t for t in project.catalog.tables.values() if t.kind == "source"]
    if kind == "retype" and value:
        value = exp.DataType.build(value, dialect=project.dialect).sql(dialect="duckdb")
    before = _build(tables, loaded.statements, project.order, project.dialect)
    after = _build(
        edited_tables(tables, table, column, kind, value), loaded.statements, project.order, project.dialect
    )
    broken = [
        {"model": m, "reason": after.reasons.get(m, "")}
        for m, good in before.ok.items()
        if good and not after.ok.get(m, True)
    ]
    answer = {
        "checked": True,
        "broken": broken,
        "unavailable": [{"model": m, "reason": r} for m, r in sorted(before.unavailable.items())],
        "failing_before": sorted(m for m, good in before.ok.items() if not good),
    }
    return answer, (before.types, after.types)


__all__ = ["check_edit"]
