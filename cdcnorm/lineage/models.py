"""Load SQL model files: every statement that defines (part of) an output table.

A model file may hold several statements. Each of CREATE VIEW/TABLE ... AS
SELECT, INSERT INTO t [(cols)] SELECT, MERGE INTO t, and a bare SELECT (named
after its file) defines the columns of one target table, the model. A file
that does not parse is reported, and the rest of the project still builds.
"""

from __future__ import annotations

import contextlib
import gc
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError
from sqlglot.tokens import TokenType  # type: ignore[attr-defined]

from cdcnorm.lineage.diagnostics import Diagnostic


@dataclass
class ModelStatement:
    file: str
    line: int
    kind: str  # create | insert | merge | select
    target: tuple[str, ...]  # normalised name parts, e.g. ("mart", "daily_revenue")
    statement: exp.Expr
    query: exp.Expr | None  # the SELECT / set operation feeding the target (None for MERGE)
    columns: list[str] | None = None  # explicit column list (CREATE VIEW v (a, b), INSERT INTO t (a, b))
    #: the statement's own text in its file, when its tokens tell it (``statement_query`` reads it back)
    text: str | None = None

    @property
    def name(self) -> str:
        return ".".join(self.target)


@dataclass
class LoadedModels:
    statements: list[ModelStatement] = field(default_factory=list)
    diagnostics: list[Diagnostic] = field(default_factory=list)
    files: list[str] = field(default_factory=list)
    #: tables a model file creates with typed columns and no query (CREATE TABLE t (a INT, ...)),
    #: by normalised name: column -> SQL type. Rows inserted later take these types.
    declared: dict[tuple[str, ...], dict[str, str]] = field(default_factory=dict)
    #: files with a statement that could not be parsed: the words of the file (its tokens'
    #: text, casefolded), or None when even those cannot be told. Such a statement defines no
    #: model, so what it reads is unknown: an answer about a table it names may miss it.
    unparsed: dict[str, frozenset[str] | None] = field(default_factory=dict)


def _declared_columns(stmt: exp.Create, dialect: str) -> dict[str, str]:
    """The typed columns of ``CREATE TABLE t (a INT, ...)``: normalised name -> SQL type."""
    from sqlglot.optimizer.normalize_identifiers import normalize_identifiers

    out: dict[str, str] = {}
    schema = stmt.this
    if isinstance(schema, exp.Schema):
        for col in schema.expressions:
            kind = col.args.get("kind") if isinstance(col, exp.ColumnDef) else None
            if isinstance(kind, exp.DataType):
                name = normalize_identifiers(col.this.copy(), dialect=dialect)
                out[name.name] = kind.sql(dialect=dialect)
    return out


def _normalise(name: exp.Expr, dialect: str) -> tuple[str, ...]:
    from sqlglot.optimizer.normalize_identifiers import normalize_identifiers

    norm = normalize_identifiers(name.copy(), dialect=dialect)
    if isinstance(norm, exp.Table):
        return tuple(p.name for p in norm.parts)
    return (norm.name,)


def _statement_tokens(tokens: list[Any]) -> list[list[Any]]:
    """The tokens of each statement (statements split at top-level semicolons)."""
    out: list[list[Any]] = []
    start = True
    for tok in tokens:
        if start:
            out.append([])
            start = False
        out[-1].append(tok)
        if tok.token_type == TokenType.SEMICOLON:
            start = True
    return out


def _column_names(schema: exp.Expr | None, dialect: str) -> list[str] | None:
    """A column list's names as the engine names the columns (see resolve.written)."""
    from cdcnorm.lineage.resolve import written

    if isinstance(schema, exp.Schema) and schema.expressions:
        names = []
        for col in schema.expressions:
            ident = col.this if isinstance(col, exp.ColumnDef) else col
            names.append(written(ident, dialect))
        return names
    return None


def _target_and_columns(target: exp.Expr, dialect: str) -> tuple[tuple[str, ...], list[str] | None]:
    if isinstance(target, exp.Schema):
        return _normalise(target.this, dialect), _column_names(target, dialect)
    return _normalise(target, dialect), None


@contextlib.contextmanager
def _quiet_parser() -> Iterator[None]:
    """sqlglot logs a warning when it falls back to reading a statement as text (an exp.Command):
    the statement is reported as a diagnostic instead, with its file and line."""
    import logging

    logger = logging.getLogger("sqlglot")
    level = logger.level
    logger.setLevel(logging.ERROR)
    try:
        yield
    finally:
        logger.setLevel(level)


def _words(tokens: Sequence[Any] | None) -> frozenset[str] | None:
    """The casefolded text of every token: the names a statement that could not be parsed may
    read (a superset: keywords and literals too). None when the file could not be tokenized."""
    return None if tokens is None else frozenset(t.text.casefold() for t in tokens)


def load_model_file(path: Path, dialect: str, root: Path | None = None) -> LoadedModels:
    shown = path.relative_to(root).as_posix() if root and path.is_relative_to(root) else str(path)
    out = LoadedModels(files=[shown])
    try:
        sql = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as e:
        out.diagnostics.append(
            Diagnostic(shown, None, path.stem, "parse error", f"cannot read the file: {e}")
        )
        out.unparsed[shown] = None
        return out
    d = sqlglot.Dialect.get_or_raise(dialect)
    tokens = None
    try:
        tokens = d.tokenize(sql)  # once: for the parser and for each statement's first line
        with _quiet_parser():
            statements = d.parser().parse(tokens, sql)
        each = _statement_tokens(tokens)
        lines = [t[0].line for t in each]
    except (ParseError, TokenError) as e:
        errs = getattr(e, "errors", None) or [{}]
        line = errs[0].get("line") if isinstance(errs[0], dict) else None
        message = str(e).splitlines()[0]
        out.diagnostics.append(Diagnostic(shown, line, path.stem, "parse error", message))
        out.unparsed[shown] = _words(tokens)
        return out
    # each statement's text, where the statements and the groups of tokens between semicolons are
    # as many (a comment after the last semicolon, say, parses as one statement more: then none)
    texts = [sql[t[0].start : t[-1].end + 1] for t in each] if len(each) == len(statements) else []
    stmts = [(s, texts[k] if texts else None) for k, s in enumerate(statements) if s is not None]
    for i, (stmt, own_text) in enumerate(stmts):
        line = lines[i] if i < len(lines) else 1
        if isinstance(
            stmt, (exp.Alias, exp.Column, exp.Identifier, exp.Literal, exp.Paren, exp.Binary, exp.Func)
        ):
            # a bare expression where a statement should be, e.g. a misspelt keyword: "SELEC x"
            text = stmt.sql(dialect=dialect)
            out.diagnostics.append(
                Diagnostic(shown, line, path.stem, "parse error", f"not a SQL statement: {text[:80]}")
            )
            out.unparsed[shown] = _words(tokens)
            continue
        if isinstance(stmt, exp.Command):
            # syntax sqlglot only passes on as text (CREATE VIEW v AS PIVOT ..., CREATE TYPE, CALL):
            # what it defines and reads is unknown, as for a statement that cannot be parsed. Before,
            # sqlglot's warning went to standard error and the statement was passed over, so an
            # answer through a table it reads said "complete".
            toks = each[i] if i < len(each) else []
            text = (
                " ".join(sql[toks[0].start : toks[-1].end + 1].split()) if toks else stmt.sql(dialect=dialect)
            )
            out.diagnostics.append(
                Diagnostic(
                    shown,
                    line,
                    path.stem,
                    "parse error",
                    f"sqlglot reads this statement only as text, in dialect {dialect}: "
                    f"{text[:80]}{'...' if len(text) > 80 else ''}",
                )
            )
            words = _words(toks or tokens)
            known = out.unparsed.get(shown, frozenset())
            out.unparsed[shown] = None if words is None or known is None else known | words
            continue
        ms = _classify(stmt, path.stem, shown, line, dialect)
        if ms is not None:
            ms.text = own_text
        if ms is None and isinstance(stmt, exp.Create) and isinstance(stmt.this, exp.Schema):
            typed = _declared_columns(stmt, dialect)
            if typed and isinstance(stmt.this.this, exp.Table):
                out.declared[_normalise(stmt.this.this, dialect)] = typed
        if ms is None:
            why = unsupported(stmt)
            if why:
                # an UPDATE, DELETE, ALTER, DROP or TRUNCATE is charged to each table it changes,
                # so the answers that pass through that table show it
                models = [".".join(_normalise(t, dialect)) for t in changed_tables(stmt)] or [path.stem]
                for model in models:
                    out.diagnostics.append(Diagnostic(shown, line, model, "unsupported", why))
            continue
        out.statements.append(ms)
    return out


def statement_query(text: str, dialect: str, target: tuple[str, ...]) -> exp.Expr | None:
    """The query of a CREATE ... AS or a SELECT model from its statement's text (``ModelStatement.text``),
    parsed again, as the loader takes it; None when the text does not parse to one such statement
    of that target (a CREATE of another name), which no loaded statement's text does."""
    try:
        with _quiet_parser():
            parsed = sqlglot.parse(text, read=dialect)
    except (ParseError, TokenError):
        return None
    if len(parsed) != 1 or parsed[0] is None:
        return None
    ms = _classify(parsed[0], target[-1], "", 1, dialect)
    if ms is None or ms.kind not in ("create", "select") or (ms.kind == "create" and ms.target != target):
        return None
    return ms.query


def _classify(stmt: exp.Expr, stem: str, file: str, line: int, dialect: str) -> ModelStatement | None:
    if isinstance(stmt, exp.Create):
        query = stmt.expression
        if not isinstance(query, exp.Query):
            return None  # CREATE TABLE t (a INT) without AS: no lineage
        target, cols = _target_and_columns(stmt.this, dialect)
        return ModelStatement(file, line, "create", target, stmt, query, cols)
    if isinstance(stmt, exp.Insert):
        query = stmt.expression
        if not isinstance(query, exp.Query):
            return None  # INSERT ... VALUES: constants only
        target, cols = _target_and_columns(stmt.this, dialect)
        return ModelStatement(file, line, "insert", target, stmt, query, cols)
    if isinstance(stmt, exp.Merge):
        target, _ = _target_and_columns(stmt.this, dialect)
        return ModelStatement(file, line, "merge", target, stmt, None)
    if isinstance(stmt, exp.Query):
        return ModelStatement(file, line, "select", _normalise(exp.to_identifier(stem), dialect), stmt, stmt)
    return None


def changed_tables(stmt: exp.Expr) -> list[exp.Table]:
    """The tables an UPDATE, DELETE, ALTER, DROP or TRUNCATE changes (none for another statement)."""
    if isinstance(stmt, (exp.Update, exp.Delete, exp.Alter)):
        found = [stmt.this]
    elif isinstance(stmt, exp.Drop):
        found = list(stmt.args.get("tables") or [stmt.this])
    elif isinstance(stmt, exp.TruncateTable):
        found = list(stmt.expressions)
    else:
        found = []
    return [t for t in found if isinstance(t, exp.Table)]


def unsupported(stmt: exp.Expr) -> str | None:
    """Why a statement that changes data or a table's shape is not traced (None for one that is,
    or that changes nothing lineage follows: a CREATE TABLE of columns only, INSERT ... VALUES,
    a COMMENT)."""
    if isinstance(stmt, (exp.Create, exp.Insert, exp.Merge, exp.Query, exp.Comment)):
        return None
    targets = ", ".join(t.sql() for t in changed_tables(stmt)) or "?"
    if isinstance(stmt, (exp.Update, exp.Delete, exp.TruncateTable)):
        kind = {exp.Update: "UPDATE", exp.Delete: "DELETE"}.get(type(stmt), "TRUNCATE")
        return f"{kind} of {targets} is not traced: the lineage of {targets} misses what it changes"
    if isinstance(stmt, exp.Alter):
        # before: charged to the file, so trace of the table's columns said "complete" although
        # a column was renamed, added or dropped, or the table renamed
        return (
            f"ALTER of {targets} is not traced: its columns or its name after the ALTER may differ "
            "from the lineage shown; write the model's final shape in its CREATE"
        )
    if isinstance(stmt, exp.Drop):
        return f"DROP of {targets} is not traced: the lineage shows {targets} as though it still existed"
    kind = "UNPIVOT" if isinstance(stmt, exp.Pivot) and stmt.args.get("unpivot") else stmt.key.upper()
    return f"{'an' if kind[0] in 'AEIOU' else 'a'} {kind} statement is not traced"


@contextlib.contextmanager
def paused_gc() -> Iterator[None]:
    """The build makes millions of objects that all live on (parsed models, the graph): the cyclic
    collector's passes over them would find nothing to free, so it waits until the build is done.

    Then they go straight to the collector's oldest generation (``gc.freeze`` then ``gc.unfreeze``,
    which moves them there and clears the young generation's count): re-enabled as they were, the
    collector made two full passes over them, one at once and one at the first question (1.1 s
    and 1.7 s after a 2,000-model build). The build's own scratch in cycles (the qualified copies
    of the queries: 1.6 million objects for 2,000 models) goes at the oldest generation's next pass. An application that froze
    objects itself keeps them frozen: then this is not done."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if gc.get_freeze_count() == 0:
            gc.freeze()
            gc.unfreeze()
        if was:
            gc.enable()


def load_models(folder: Path, dialect: str) -> LoadedModels:
    """Every ``*.sql`` file under ``folder`` (recursively), in path order."""
    with paused_gc():
        return _load_models(folder, dialect)


def _load_models(folder: Path, dialect: str) -> LoadedModels:
    out = LoadedModels()
    paths = [folder] if folder.is_file() else sorted(folder.rglob("*.sql"))
    root = folder if folder.is_dir() else folder.parent
    defined: dict[str, ModelStatement] = {}
    for p in paths:
        one = load_model_file(p, dialect, root)
        for st in one.statements:
            first = defined.setdefault(st.name, st) if st.kind in ("create", "select") else st
            if first is not st and first.file != st.file:
                # two files define one model: the first (in path order) is the model, never a merge
                out.diagnostics.append(
                    Diagnostic(
                        st.file,
                        st.line,
                        st.name,
                        "duplicate model",
                        f"{st.name} is defined in {first.file}:{first.line} and again here; this one is left out",
                    )
                )
                continue
            out.statements.append(st)
        out.diagnostics.extend(one.diagnostics)
        out.files.extend(one.files)
        out.unparsed.update(one.unparsed)
        for name, typed in one.declared.items():
            out.declared.setdefault(name, typed)
    return out
