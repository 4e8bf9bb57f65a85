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
import multiprocessing
import secrets
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import duckdb
import sqlglot
from sqlglot import exp
from sqlglot.tokens import TokenType  # type: ignore[attr-defined]

from cdcnorm.lineage.models import LoadedModels, ModelStatement, statement_query
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
        for parts, columns in tables_to_bind(tables, {}):
            name = _create(con, parts, columns)
            values = ", ".join(_sample(con, t) for t in columns.values())
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
            try:  # a DuckDB model as its file writes it; another dialect's as sqlglot transpiles it
                query = (_query_text(st.text, dialect) if st.text else None) or _in_duckdb(st.query)
            except sqlglot.errors.SqlglotError as e:
                unavailable[model] = f"cannot transpile from {dialect}: {str(e).splitlines()[0]}"
                continue
            view = _place(con, st.target)
            cols = f" ({', '.join(ident(c) for c in st.columns)})" if st.columns else ""
            try:
                con.execute(f"CREATE VIEW {view}{cols} AS {query}")
                _run_view(con, view, st.target)
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


#: A table to build for the binder: its name's parts and its columns (name -> SQL type).
TableSpec = tuple[tuple[str, ...], dict[str, str]]
#: A model to bind: its query (or, for a process of its own, its statement's text and dialect), its
#: explicit column names, its name's parts.
Job = tuple[exp.Expr | tuple[str, str], tuple[str, ...] | None, tuple[str, ...]]
#: What the engine says of a model: its columns' names, why it refuses it, or None (it cannot tell).
Bound = list[str] | str | None


class Binder:
    """The models bound one by one, in dependency order, by the engine itself: each is created as
    an empty table from its query, over empty tables of the sources' columns and types, and
    described (graph.py asks as it resolves each model). What it refuses to bind (a misspelt struct
    member, ``s.b`` of a struct without ``b``; a function given the wrong arguments) is a gap in an
    answer the graph alone would call complete; the names it gives columns without an alias
    (``CAST(id AS INTEGER)``, ``sum(amount)``, ``(a + 1)``) are the names a reader of the model
    must use, which no rule of thumb gives. For models in DuckDB's dialect only: another dialect's
    models are not the engine's to refuse."""

    def __init__(self, tables: list[TableSpec]) -> None:
        # one thread: binding is no work for more, and a process of its own shares the machine
        self.con = duckdb.connect(":memory:", config={**OFFLINE, "threads": 1})
        for parts, columns in tables:
            # a type the engine does not know: the models reading the table are not bound
            with contextlib.suppress(duckdb.Error):
                _create(self.con, parts, columns)

    def bind(self, job: Job) -> Bound:
        given, columns, target = job
        try:
            query = self._sql_of(given, target)
        except sqlglot.errors.SqlglotError:
            return None
        if query is None:
            return None
        named = f" AS q({', '.join(ident(c) for c in columns)})" if columns else ""
        try:
            table = _place(self.con, target)
            # an empty table of the model's columns, which its readers bind against: a view would
            # be bound again with every view that reads it (a chain 7 models deep made the project's
            # build 4 times slower); the engine binds the query as it would the view's
            self.con.execute(f"CREATE OR REPLACE TABLE {table} AS SELECT * FROM ({query}){named} LIMIT 0")
            return [str(r[0]) for r in self.con.execute(f"DESCRIBE {table}").fetchall()]
        except duckdb.Error as e:
            first = str(e).strip().splitlines()[0]
            kind, _, rest = first.partition(": ")
            return rest if kind == "Binder Error" else None

    def close(self) -> None:
        self.con.close()

    @staticmethod
    def _sql_of(given: exp.Expr | tuple[str, str], target: tuple[str, ...]) -> str | None:
        """The model's query as DuckDB SQL: a DuckDB statement's own text, else sqlglot's writing
        of the parsed query (parsed here, as the loader did, when it came as text); None when the
        text is not the model's statement."""
        if not isinstance(given, tuple):
            return _in_duckdb(given)
        written = _query_text(*given)
        if written is not None:
            return written
        parsed = statement_query(*given, target)
        return None if parsed is None else _in_duckdb(parsed)


def tables_to_bind(
    tables: Iterable[TableInfo], declared: dict[tuple[str, ...], dict[str, str]]
) -> list[TableSpec]:
    """The source tables (mappings, catalogs) and the tables the models declare, as the binder
    builds them."""
    out: list[TableSpec] = [
        (info.parts, {info.shown(c): info.types.get(c) or "VARCHAR" for c in info.columns})
        for info in tables
        if info.kind == "source" and info.columns
    ]
    return out + [(parts, cols) for parts, cols in declared.items() if cols]


def _query_text(text: str, dialect: str) -> str | None:
    """The query of a DuckDB model's statement as its file writes it: all of a SELECT, what follows
    the ``AS`` of a CREATE (found among the statement's tokens, outside any parentheses). The
    engine then binds the model as written, and names its unaliased columns as it would when the
    model runs; None for another dialect (sqlglot writes it in DuckDB's) or another statement."""
    if dialect != "duckdb":
        return None
    try:
        tokens = [
            t
            for t in sqlglot.Dialect.get_or_raise(dialect).tokenize(text)
            if t.token_type != TokenType.SEMICOLON
        ]
    except sqlglot.errors.SqlglotError:
        return None
    if not tokens:
        return None
    end = tokens[-1].end + 1
    if tokens[0].token_type in (TokenType.SELECT, TokenType.WITH, TokenType.L_PAREN, TokenType.FROM):
        return text[tokens[0].start : end]
    if tokens[0].token_type != TokenType.CREATE:
        return None
    depth = 0
    for i, tok in enumerate(tokens):
        if tok.token_type == TokenType.L_PAREN:
            depth += 1
        elif tok.token_type == TokenType.R_PAREN:
            depth -= 1
        elif tok.token_type == TokenType.ALIAS and depth == 0 and i + 1 < len(tokens):
            return text[tokens[i + 1].start : end]
    return None


def job_of(st: ModelStatement, dialect: str | None = None) -> Job | None:
    """What the binder needs of a model, or None for a model it does not take (an INSERT, a MERGE).
    The query goes as it is; with ``dialect``, the statement's text, which the binder reads again
    (``_query_text``; ``statement_query`` in another dialect): a process of its own would receive a
    parsed query pickled as the name of every node's class (28 MB for 2,000 models, 2 s to read
    back), where the text is 1 MB."""
    if st.kind not in ("create", "select") or st.query is None:
        return None
    query: exp.Expr | tuple[str, str] = st.query if dialect is None or st.text is None else (st.text, dialect)
    return query, tuple(st.columns) if st.columns else None, st.target


#: Names the rows of a view while they are copied: no model's name, whatever its files say
_TOKEN = secrets.token_hex(8)


def _run_view(con: duckdb.DuckDBPyConnection, view: str, parts: tuple[str, ...]) -> None:
    """Run a model's view over the synthetic rows, and keep its rows as a table of the same name,
    with the same columns and types: its readers then read them, instead of binding and running
    this view again under each of them (a chain 7 models deep made the check of a 200-model project
    take 11 s). When it fails to run, the view stays, and its readers fail as before."""
    rows = _place(con, (*parts[:-1], f"__cdcnorm_rows_{_TOKEN}"))
    con.execute(f"CREATE OR REPLACE TABLE {rows} AS SELECT * FROM {view}")
    con.execute(f"DROP VIEW {view}")
    con.execute(f"ALTER TABLE {rows} RENAME TO {ident(parts[-1])}")


def _in_duckdb(query: exp.Expr) -> str:
    """The query, parsed in the models' dialect, written in DuckDB's (sqlglot's transpiler); a
    ``SqlglotError`` when it cannot be."""
    return query.sql(dialect="duckdb", unsupported_level=sqlglot.ErrorLevel.RAISE)


def _place(con: duckdb.DuckDBPyConnection, parts: tuple[str, ...]) -> str:
    """The name of a table or view of these name parts in the engine's database (schema and name;
    the schema made first, if it has one)."""
    if len(parts) > 1:
        con.execute(f"CREATE SCHEMA IF NOT EXISTS {ident(parts[-2])}")
    return ".".join(ident(p) for p in parts[-2:])


def _create(con: duckdb.DuckDBPyConnection, parts: tuple[str, ...], columns: dict[str, str]) -> str:
    """An empty table of these columns (name -> SQL type); its name."""
    name = _place(con, parts)
    con.execute(
        f"CREATE TABLE IF NOT EXISTS {name} ({', '.join(f'{ident(c)} {t}' for c, t in columns.items())})"
    )
    return name


#: From this many models up, the binder works in a process of its own, beside the resolver (the
#: engine's binding takes about 2 ms a model, resolving about 4 ms; a process takes about 0.5 s
#: to start). Both give the same answers.
PROCESS_MODELS = 300


class EngineCheck:
    """The binder as the graph build uses it: models submitted in dependency order, each one's
    answer asked for when needed (at once, for a model whose column names it may change; at the
    end, for the others). A large project's binder runs in a process of its own: the resolver and
    the engine then share the machine's cores, not one interpreter."""

    def __init__(self, tables: list[TableSpec], models: int, dialect: str = "duckdb") -> None:
        self._dialect = dialect
        self._results: dict[str, Bound] = {}
        self._local: Binder | None = None
        self._process: Any = None
        self._lost = False
        if models < PROCESS_MODELS:
            self._local = Binder(tables)
            return
        ctx = multiprocessing.get_context("spawn")  # never fork a process holding the engine's threads
        jobs_in, self._jobs = ctx.Pipe(duplex=False)
        self._answers, answers_out = ctx.Pipe(duplex=False)
        try:
            self._process = ctx.Process(target=_serve, args=(tables, jobs_in, answers_out), daemon=True)
            self._process.start()
        except OSError:  # no process to be had (a limit on them): the binder works here
            self._process = None
            self._local = Binder(tables)
        finally:
            jobs_in.close()
            answers_out.close()

    def submit(self, name: str, st: ModelStatement) -> None:
        job = job_of(st, self._dialect)
        if self._local is not None:
            self._results[name] = self._local.bind(job) if job is not None else None
            return
        self._drain(block=False)
        if self._lost:
            self._results[name] = None
            return
        try:
            self._jobs.send((name, job))
        except OSError:  # the process ended
            self._lost = True
            self._results[name] = None
        except Exception:  # a query too deep to pickle, say: this model is not bound
            self._results[name] = None

    def result(self, name: str) -> Bound:
        while name not in self._results and not self._lost:
            self._drain(block=True)
        return self._results.get(name)

    def _drain(self, *, block: bool) -> None:
        """Take the answers the process has sent (waiting for one with ``block``); a process that
        ended leaves the rest of the models unbound (the graph's answer stands for them)."""
        try:
            while block or self._answers.poll():
                name, bound = self._answers.recv()
                self._results[name] = bound
                block = False
        except (EOFError, OSError):
            self._lost = True

    def close(self) -> None:
        if self._local is not None:
            self._local.close()
        if self._process is None:
            return
        with contextlib.suppress(OSError):
            self._jobs.send(None)
            self._jobs.close()
        self._process.join(timeout=10)
        if self._process.is_alive():
            self._process.terminate()
            self._process.join()


def _serve(tables: list[TableSpec], jobs: Any, answers: Any) -> None:
    """The binder's process: binds each model sent, in order, and sends back what the engine says.
    Ctrl-C reaches it with the build's process: it ends without a word (the build says it)."""
    binder: Binder | None = None
    try:
        binder = Binder(tables)
        while (message := jobs.recv()) is not None:
            name, job = message
            try:
                bound = binder.bind(job) if job is not None else None
            except Exception:
                bound = None
            answers.send((name, bound))
    except (EOFError, OSError, KeyboardInterrupt):
        pass
    finally:
        if binder is not None:
            binder.close()


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
