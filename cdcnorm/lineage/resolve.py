"""Resolve one statement's output columns to the base columns they depend on.

Each statement is qualified once (sqlglot's ``qualify``: stars expanded from the
schema, columns bound to their sources), then its scope tree is walked. For
every output column the resolver collects

- value dependencies: columns whose values flow into the output, with the
  kind of flow: ``copy`` (the value as is), ``transform`` (an expression of it)
  or ``aggregate`` (an aggregate over it);
- influence dependencies: columns that decide which rows appear or how they
  are grouped or ordered, without flowing into the value, with the clause:
  ``join`` (ON/USING/NATURAL), ``where``, ``group``, ``having``, ``qualify``,
  ``distinct`` (also UNION/INTERSECT/EXCEPT without ALL), ``window`` (PARTITION
  BY/ORDER BY), ``filter`` and ``order`` (an aggregate's FILTER/ORDER BY),
  ``exists``, ``limit`` (ORDER BY under LIMIT), ``unnest``, ``intersect``,
  ``except``.

Base columns are columns of tables outside the statement: mapping tables
(source fields) and other models. CTEs, derived tables and subqueries are
resolved through, so they never appear as nodes.
"""

from __future__ import annotations

import difflib
import functools
from collections.abc import Iterable
from dataclasses import dataclass, field

from sqlglot import exp
from sqlglot.dialects.dialect import Dialect, NormalizationStrategy
from sqlglot.errors import OptimizeError, SchemaError
from sqlglot.optimizer.qualify import qualify
from sqlglot.optimizer.scope import Scope, build_scope
from sqlglot.schema import MappingSchema

from cdcnorm.lineage.diagnostics import Diagnostic
from cdcnorm.lineage.renames import expand_renames, name_unnest_columns
from cdcnorm.lineage.selectors import Refused, expand_columns

Node = tuple[str, str, str]  # (kind: source | model | raw, table, column)
RANK = {"copy": 0, "transform": 1, "aggregate": 2}


def compose(a: str, b: str) -> str:
    return a if RANK[a] >= RANK[b] else b


@dataclass
class Deps:
    """A column's sources: what flows into it (value) and what decides its rows (influence).

    Each source keeps the line where it first flows in and, apart, the line where it first decides
    rows: a column copied on one line and filtered on another is shown at each line for each edge.
    """

    value: dict[Node, str] = field(default_factory=dict)
    influence: dict[Node, set[str]] = field(default_factory=dict)
    lines: dict[Node, int] = field(default_factory=dict)
    influence_lines: dict[Node, int] = field(default_factory=dict)

    def add_value(self, node: Node, sub: str, line: int | None) -> None:
        self.value[node] = compose(self.value.get(node, sub), sub)
        if line and node not in self.lines:
            self.lines[node] = line

    def add_influence(self, node: Node, clauses: Iterable[str], line: int | None) -> None:
        self.influence.setdefault(node, set()).update(clauses)
        if line and node not in self.influence_lines:
            self.influence_lines[node] = line

    def merge(self, other: Deps, *, sub: str = "copy", as_influence: str | None = None) -> None:
        for node, s in other.value.items():
            if as_influence:
                self.add_influence(node, [as_influence], other.lines.get(node))
            else:
                self.add_value(node, compose(sub, s), other.lines.get(node))
        for node, clauses in other.influence.items():
            self.add_influence(node, clauses, other.influence_lines.get(node))

    def copy(self) -> Deps:
        return Deps(
            dict(self.value),
            {k: set(v) for k, v in self.influence.items()},
            dict(self.lines),
            dict(self.influence_lines),
        )

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Deps) and self.value == other.value and self.influence == other.influence


@dataclass
class TableInfo:
    kind: str  # source | model
    name: str  # display name: mapping table or model name
    parts: tuple[str, ...]
    columns: list[str]
    types: dict[str, str] = field(default_factory=dict)
    origin: str = ""  # mapping | catalog | model
    #: each column's name as declared (``PickupAt``), where ``columns`` holds it as the dialect
    #: matches it (``pickupat`` in DuckDB, which ignores case; ``PickupAt`` in PostgreSQL)
    display: dict[str, str] = field(default_factory=dict)

    def shown(self, column: str) -> str:
        return self.display.get(column, column)


@functools.cache
def _dialect(name: str) -> Dialect:
    return Dialect.get_or_raise(name)


@functools.cache
def fold(name: str, dialect: str) -> str:
    """A declared name as the dialect matches references to it: taken as quoted, so kept exactly
    where case matters (PostgreSQL) and in lower case where it does not (DuckDB). Where unquoted
    names fold to upper case (Snowflake), an all-lower-case name is taken as written unquoted, as
    tables there are usually made (common practice), so ``fare`` matches ``FARE`` and ``Fare``."""
    d = _dialect(dialect)
    quoted = not (d.NORMALIZATION_STRATEGY is NormalizationStrategy.UPPERCASE and name == name.lower())
    return str(d.normalize_identifier(exp.Identifier(this=name, quoted=quoted)).name)


def dedupe_names(names: list[str], dialect: str = "duckdb") -> list[str]:
    """Duplicate output names get _1, _2 ... (as DuckDB names the columns of such a view, a derived
    table or a CTE): names are the same as the dialect matches them (``Amount`` and ``amount`` in
    DuckDB), and each keeps its own spelling (``SELECT id AS "Amount", amount``: Amount, amount_1)."""
    seen: dict[str, int] = {}
    out = []
    for n in names:
        key = fold(n, dialect)
        if key in seen:
            seen[key] += 1
            candidate = f"{n}_{seen[key]}"
            while fold(candidate, dialect) in seen:
                seen[key] += 1
                candidate = f"{n}_{seen[key]}"
            seen[fold(candidate, dialect)] = 0
            out.append(candidate)
        else:
            seen[key] = 0
            out.append(n)
    return out


#: dialects whose engine names the repeated columns of a derived table or CTE as ``dedupe_names``
#: does (``SELECT * FROM (SELECT * FROM a JOIN b USING ...)``: id, id_1); others keep both names,
#: and a star over them stays unresolved (reported)
_RENAMES_REPEATS = frozenset({"duckdb"})


def name_repeated_columns(root: Scope | None, dialect: str) -> bool:
    """Give the repeated output names of every derived table and CTE of a qualified query (its
    scopes' ``root``) the names the engine gives them (``dedupe_names``), in place; whether any
    changed. sqlglot leaves a star over such a table unexpanded (``SELECT a.* FROM (SELECT * FROM
    b JOIN p ON ...) a``, both with a column pid) and binds ``a.pid`` to the last of them, where
    DuckDB has pid and pid_1, ``a.pid`` the first."""
    if dialect not in _RENAMES_REPEATS or root is None:
        return False
    changed = False
    for scope in root.traverse():
        if scope is root or not (scope.is_derived_table or scope.is_cte):
            continue
        holder = scope.expression.parent
        alias = holder.args.get("alias") if holder is not None else None
        if isinstance(alias, exp.TableAlias) and alias.columns:
            continue  # named by its column list
        if not isinstance(scope.expression, exp.Query):
            continue
        projections = scope.expression.selects
        if any(isinstance(p, exp.Star) or isinstance(p.this, exp.Star) for p in projections):
            continue  # a star left unexpanded (its sources unknown): reported where it is read
        names = [p.alias_or_name for p in projections]
        for proj, old, new in zip(projections, names, dedupe_names(names, dialect), strict=True):
            if old != new:
                inner = proj.this if isinstance(proj, exp.Alias) else proj
                proj.replace(exp.alias_(inner.copy(), exp.to_identifier(new)))
                changed = True
    return changed


def _qualify_words(message: str) -> str:
    """sqlglot's qualification error in words that say what is wrong in the model."""
    head, _, name = message.partition("Cannot automatically join: ")
    if not head and name:
        return f"JOIN ... USING ({name}): a table on one side of the join has no column {name}"
    return message


def same_table(a: tuple[str, ...], b: tuple[str, ...]) -> bool:
    """One name with or without its schema (and database) prefix names the other's table."""
    n = min(len(a), len(b))
    return a[-n:] == b[-n:]


def folded_name(ident: exp.Expr, dialect: str) -> str:
    """A name as the dialect folds it: unquoted ``STG_FARES`` is ``stg_fares`` in DuckDB."""
    quoted = bool(ident.args.get("quoted")) if isinstance(ident, exp.Identifier) else False
    return str(_dialect(dialect).normalize_identifier(exp.Identifier(this=ident.name, quoted=quoted)).name)


def written(ident: exp.Expr, dialect: str) -> str:
    """The name an engine gives a column a query names: as written where the dialect ignores case
    (DuckDB keeps ``AS TotalFare``), folded where it folds unquoted names (PostgreSQL)."""
    if _dialect(dialect).NORMALIZATION_STRATEGY is NormalizationStrategy.CASE_INSENSITIVE:
        return str(ident.name)
    return folded_name(ident, dialect)


def declared_table(
    kind: str,
    name: str,
    parts: tuple[str, ...],
    shown: list[str],
    dialect: str,
    types: dict[str, str] | None = None,
    origin: str = "",
) -> TableInfo:
    """A table whose columns are given as declared or shown (``shown``; ``types`` keyed the same)."""
    cols = [fold(c, dialect) for c in shown]
    return TableInfo(
        kind,
        name,
        parts,
        cols,
        {f: (types or {}).get(c, "") for f, c in zip(cols, shown, strict=True) if (types or {}).get(c)},
        origin,
        {f: c for f, c in zip(cols, shown, strict=True) if f != c},
    )


class Catalog:
    """The tables a statement may read: mapping tables and the models built so far."""

    def __init__(self) -> None:
        self.tables: dict[tuple[str, ...], TableInfo] = {}
        self._by_name: dict[str, list[TableInfo]] = {}
        #: models not resolved yet (inside a cycle): never taken for tables without a schema
        self.pending: set[tuple[str, ...]] = set()

    def add(self, info: TableInfo) -> None:
        old = self.tables.get(info.parts)
        self.tables[info.parts] = info
        same = [t for t in self._by_name.get(info.parts[-1], []) if t is not old]
        self._by_name[info.parts[-1]] = [*same, info]

    def find(self, parts: tuple[str, ...]) -> TableInfo | None:
        if parts in self.tables:
            return self.tables[parts]
        # a suffix match either way ends in the same table name: look among those only
        same_name = self._by_name.get(parts[-1], []) if parts else []
        matches = [t for t in same_name if same_table(t.parts, parts)]
        return matches[0] if len(matches) == 1 else None

    def schema(self, dialect: str, query: exp.Expr | None = None) -> MappingSchema:
        """The catalog as a sqlglot schema; with ``query``, only the tables it names (building the
        whole catalog for every statement would make a project's build quadratic)."""
        tables = self.tables
        if query is not None:
            tables = {}
            for t in query.find_all(exp.Table):
                if not t.name:
                    continue
                info = self.find(table_parts(t)) or self.find(folded_parts(t, dialect))
                if info is not None:
                    tables[info.parts] = info
        depth = max((len(p) for p in tables), default=1)
        pad = ("memory", "main")
        nested: dict[str, object] = {}
        for parts, info in tables.items():
            full = (*pad[len(pad) - (depth - len(parts)) :], *parts) if len(parts) < depth else parts
            cur = nested
            for p in full[:-1]:
                cur = cur.setdefault(p, {})  # type: ignore[assignment]
            cur[full[-1]] = {c: info.types.get(c, "TEXT") or "TEXT" for c in info.columns}
        return MappingSchema(nested, dialect=dialect, normalize=False)


def _with_column(schema: MappingSchema, query: exp.Expr, column: str, dialect: str) -> MappingSchema:
    """A copy of ``schema`` in which every table the query reads also has ``column``."""
    copy = MappingSchema(schema.mapping, dialect=dialect, normalize=False)
    for t in query.find_all(exp.Table):
        try:
            cols = copy.column_names(t)
        except Exception:  # a CTE or unknown table: nothing to extend
            continue
        if cols and column not in cols:
            try:
                copy.add_table(t, {**{c: "TEXT" for c in cols}, column: "TEXT"}, dialect=dialect)
            except SchemaError:  # a name shorter than the schema's nesting: left as it is
                continue
    return copy


#: a star's lists of column names: EXCLUDE, REPLACE, RENAME (sqlglot's argument names)
_STAR_LISTS = ("except_", "replace", "rename")
#: the lists whose every name the engine requires among the star's columns: DuckDB refuses an
#: EXCLUDE or REPLACE of a column the star does not cover, and passes over such a RENAME
_STAR_LISTS_CHECKED = ("except_", "replace")


def _source_names(select: exp.Select) -> list[str]:
    """The names a qualified query's FROM and JOINs give their sources, in order."""
    from_ = select.args.get("from_")
    sources = [from_.this] if isinstance(from_, exp.From) else []
    sources += [j.this for j in select.args.get("joins") or []]
    return [str(x.alias_or_name) for x in sources]


def close_names(name: str, names: Iterable[str], n: int = 3, cutoff: float = 0.6) -> list[str]:
    """The names closest to ``name``, ignoring case: where case matters (PostgreSQL's quoted
    ``"ID"`` is not ``id``) a name that differs only in case is the likeliest one meant, and
    difflib, which compares case, would not offer it."""
    by_fold: dict[str, list[str]] = {}
    for x in names:
        by_fold.setdefault(x.casefold(), []).append(x)
    out: list[str] = []
    for f in difflib.get_close_matches(name.casefold(), list(by_fold), n=n, cutoff=cutoff):
        out += [x for x in by_fold[f] if x not in out]
    return out[:n]


#: How a query reads a member of a struct: ``s.info.f``, ``s.info['f']``, ``struct_extract(s.info, 'f')``
_MEMBER_ACCESS = (exp.Dot, exp.Bracket, exp.StructExtract)


def _member_path(node: exp.Expr) -> tuple[exp.Column, list[str]] | None:
    """A column and the member names read from it (``s.info.f.g``: ``s.info``, [f, g]); None for
    anything else (a list's element by position, a function's result)."""
    members: list[str] = []
    while not isinstance(node, exp.Column):
        if isinstance(node, exp.Dot) and isinstance(node.expression, exp.Identifier):
            members.append(node.expression.name)
        elif (
            isinstance(node, exp.Bracket)
            and len(node.expressions) == 1
            and isinstance(node.expressions[0], exp.Literal)
            and node.expressions[0].is_string
        ):
            members.append(node.expressions[0].name)
        elif (
            isinstance(node, exp.StructExtract)
            and isinstance(node.expression, exp.Literal)
            and node.expression.is_string
        ):
            members.append(node.expression.name)
        else:
            return None
        node = node.this
    if not isinstance(node.this, exp.Identifier):
        return None
    return node, members[::-1]


def _line(node: exp.Expr) -> int | None:
    for n in (node, getattr(node, "this", None)):
        if isinstance(n, exp.Expr):
            line = n.meta.get("line") if n.meta else None
            if line:
                return int(line)
    return None


def table_parts(table: exp.Table) -> tuple[str, ...]:
    if isinstance(table.this, exp.Func):
        # FROM read_parquet('trips.parquet'): the call names the source (it has no name parts, and
        # its columns were inferred into a table named "")
        return (table.this.sql(dialect="duckdb", normalize_functions="lower"),)
    return tuple(p.name for p in table.parts)


def folded_parts(table: exp.Table, dialect: str) -> tuple[str, ...]:
    """The table's name parts as the dialect folds them (unquoted ``STG_FARES`` is ``stg_fares``
    in DuckDB), without copying the table."""
    return tuple(folded_name(p, dialect) for p in table.parts)


class StatementResolver:
    def __init__(self, catalog: Catalog, dialect: str, file: str, model: str, default_line: int) -> None:
        self.catalog = catalog
        self.dialect = dialect
        self.file = file
        self.model = model
        self.default_line = default_line
        self.diagnostics: list[Diagnostic] = []
        self._memo: dict[int, list[tuple[str, Deps]]] = {}
        self._rows_memo: dict[int, Deps] = {}
        self._busy: set[int] = set()
        self._partial: dict[int, list[tuple[str, Deps]]] = {}
        self._scope_of: dict[int, Scope] = {}
        self._reported: set[tuple[str, str]] = set()
        #: tables read that no mapping, catalog or model declares, and the columns inferred in them
        self.unknown_tables: set[str] = set()
        self.inferred: set[Node] = set()
        self.row_deps = Deps()  # what decides the statement's rows (after resolve)

    # --- entry points ---------------------------------------------------------------------

    def resolve(self, query: exp.Expr, schema: MappingSchema | None = None) -> list[tuple[str, Deps]] | None:
        schema = schema or self.catalog.schema(self.dialect, query)
        query = name_unnest_columns(expand_renames(query, schema, self.dialect), self.dialect)
        if query.find(exp.Columns):
            try:
                query = expand_columns(query, schema, self.dialect)
            except Refused as e:
                self._diag(_line(query), "unsupported", str(e))
                return None
        self._check_star_lists(query, schema)
        written_query = query  # its output names as written (``_shown``)
        qualified = None
        named_repeats = False
        for _ in range(20):
            try:
                qualified = self._qualify(query.copy(), schema)
                break
            except OptimizeError as e:
                message = str(e).splitlines()[0]
                missing = (
                    message.removeprefix("Unknown column: ").strip()
                    if message.startswith("Unknown column:")
                    else None
                )
                if not missing:
                    self._diag(_line(query), "unsupported", _qualify_words(message))
                    return None
                if not named_repeats:  # a name the engine gives a repeated column (j.id_1)?
                    named_repeats = True
                    named = self._with_repeats_named(query, schema)
                    if named is not None:
                        query = named
                        continue
                # A qualified reference to a column its table lacks: let qualification go on with a
                # stand-in column; the resolver reports the reference as "not in schema".
                schema = _with_column(schema, query, missing, self.dialect)
        if qualified is None:
            self._diag(_line(query), "unsupported", "too many unknown columns")
            return None
        root = build_scope(qualified)
        if name_repeated_columns(root, self.dialect):  # and expand the stars over them now
            try:
                qualified = self._qualify(qualified, schema)
            except OptimizeError as e:
                self._diag(_line(query), "unsupported", _qualify_words(str(e).splitlines()[0]))
                return None
            root = build_scope(qualified)
        unnamed = (
            [p for p in qualified.selects if not p.alias_or_name] if isinstance(qualified, exp.Query) else []
        )
        if unnamed:  # e.g. PIVOT ... IN (TRUE, FALSE): sqlglot derives no name for its columns
            self._diag(
                _line(query),
                "unsupported",
                "a column of the query gets no name here (a PIVOT over values that are not text or "
                "numbers?): give its values aliases, IN (TRUE AS yes, FALSE AS no)",
            )
            return None
        if root is None:
            self._diag(_line(query), "unsupported", "no query to resolve")
            return None
        for s in root.traverse():
            self._scope_of[id(s.expression)] = s
            for source in s.sources.values():
                if (
                    isinstance(source, exp.Table)
                    and source.name
                    and self.catalog.find(table_parts(source)) is None
                ):
                    self.unknown_tables.add(".".join(table_parts(source)))
        outs = self.outputs(root)
        self.row_deps = self.rows(root)
        self._bind_the_rest(root)
        return self._shown(written_query, outs)

    def _qualify(self, query: exp.Expr, schema: MappingSchema, *, partial: bool = False) -> exp.Expr:
        """sqlglot's qualification as the resolver uses it: stars expanded, every column given its
        source, names left unquoted; ``partial`` leaves a column it cannot place as it is."""
        return qualify(
            query,
            schema=schema,
            dialect=self.dialect,
            validate_qualify_columns=False,
            quote_identifiers=False,
            allow_partial_qualification=partial,
        )

    def _with_repeats_named(self, query: exp.Expr, schema: MappingSchema) -> exp.Expr | None:
        """``query`` qualified as far as it goes, with the repeated names of its derived tables and
        CTEs named as the engine names them (``name_repeated_columns``); None when none repeats. A
        reference to such a name (``j.id_1``) is unknown to qualification until they are."""
        if self.dialect not in _RENAMES_REPEATS:
            return None
        try:
            partial = self._qualify(query.copy(), schema, partial=True)
        except OptimizeError:
            return None
        return partial if name_repeated_columns(build_scope(partial), self.dialect) else None

    def _bind_the_rest(self, root: Scope) -> None:
        """Resolve every column of every query the statement reads, as the engine binds them: a
        misspelt name in a derived table or a CTE whose columns the outer query does not use
        (``SELECT count(*) FROM (SELECT idd FROM t)``) was passed over, the answer complete. A CTE
        no query reads is not bound (DuckDB creates the view), and is left alone here too."""
        scopes = list(root.traverse())
        read = {
            id(src) for s in scopes for _node, src in s.selected_sources.values() if isinstance(src, Scope)
        }
        for s in scopes:
            if s.is_cte and id(s) not in read and id(self._canonical(s)) not in read:
                continue
            if id(s) not in self._busy:
                self.outputs(s)

    def _shown(self, query: exp.Expr, outs: list[tuple[str, Deps]]) -> list[tuple[str, Deps]]:
        """The statement's output names as the engine shows them: an alias as written (per the
        dialect), a column passed through under its declared name (``PickupAt``)."""
        aliases: dict[str, str] = {}
        for proj in query.selects if isinstance(query, exp.Query) else []:
            ident = proj.args.get("alias") if isinstance(proj, exp.Alias) else None
            if isinstance(ident, exp.Identifier):
                aliases.setdefault(folded_name(ident, self.dialect), written(ident, self.dialect))
        for pivot in query.find_all(exp.Pivot):
            for made in self._pivot_names(pivot):
                aliases.setdefault(fold(made, self.dialect), made)
        # Projection by projection where they line up (no star): a name the dialect folds to an
        # alias's is that alias only at the alias's own place. DuckDB names "SELECT id AS "Amount",
        # amount" Amount and amount_1; by name alone, the second was shown as Amount too.
        selects = query.selects if isinstance(query, exp.Query) else []
        lined_up = len(selects) == len(outs) and not any(
            isinstance(p, exp.Star) or isinstance(p.this, exp.Star) for p in selects
        )
        out = []
        for at, (name, deps) in enumerate(outs):
            shown = aliases.get(name)
            if lined_up:
                ident = selects[at].args.get("alias") if isinstance(selects[at], exp.Alias) else None
                shown = written(ident, self.dialect) if isinstance(ident, exp.Identifier) else None
            if shown is None:
                copies = {
                    n[2]
                    for n, sub in deps.value.items()
                    if sub == "copy" and fold(n[2], self.dialect) == name
                }
                shown = copies.pop() if len(copies) == 1 else name
            out.append((shown, deps))
        return out

    def _pivot_names(self, p: exp.Pivot) -> list[str]:
        """The names the engine gives a PIVOT's columns, where they follow from the query: the value
        (its alias, a string's text) or, for an aggregate with an alias, ``<value>_<alias>``."""
        if p.args.get("unpivot"):
            return []
        aggs = list(p.expressions)
        values = [
            v.alias or (v.this.name if isinstance(v.this, exp.Literal) and v.this.is_string else "")
            if isinstance(v, exp.PivotAlias)
            else (v.name if isinstance(v, exp.Literal) and v.is_string else v.sql(self.dialect))
            for f in p.fields
            for v in f.expressions
        ]
        if len(aggs) == 1 and not aggs[0].alias:
            return [v for v in values if v]
        return [f"{v}_{a.alias}" for v in values if v for a in aggs if a.alias]

    # --- scopes -----------------------------------------------------------------------------

    def outputs(self, scope: Scope) -> list[tuple[str, Deps]]:
        key = id(scope)
        if key in self._memo:
            return self._memo[key]
        if key in self._busy:
            return self._partial.get(key, [])
        self._busy.add(key)
        try:
            e = scope.expression
            if isinstance(e, exp.SetOperation):
                result = self._set_operation(scope)
            elif scope.is_udtf:
                result = self._udtf(scope)
            elif isinstance(e, exp.Select):
                result = self._select(scope)
            else:
                result = []
        finally:
            self._busy.discard(key)
        self._memo[key] = result
        return result

    def _select(self, scope: Scope) -> list[tuple[str, Deps]]:
        sel = scope.expression
        rows = self.rows(scope)
        outs: list[tuple[str, Deps]] = []
        for proj in sel.expressions:
            target = proj.this if isinstance(proj, exp.Alias) else proj
            if isinstance(target, exp.Star) or (
                isinstance(target, exp.Column) and isinstance(target.this, exp.Star)
            ):
                self._diag(
                    _line(proj) or self.default_line, "star over unknown sources", proj.sql(self.dialect)
                )
                continue
            d = Deps()
            self.expr(target, scope, d, "copy", None)
            for node, clauses in rows.influence.items():
                d.add_influence(node, clauses, rows.influence_lines.get(node))
            outs.append((proj.alias_or_name, d))
        return outs

    def _set_operation(self, scope: Scope) -> list[tuple[str, Deps]]:
        e = scope.expression
        left_scope, right_scope = scope.set_operation_scopes
        result: list[tuple[str, Deps]] = []
        for _ in range(4):  # a recursive CTE refers to itself: iterate to a fixed point
            left = self.outputs(left_scope) if id(left_scope) not in self._busy else []
            self._partial[id(scope)] = result or left
            self._memo.pop(id(right_scope), None)
            self._rows_memo.pop(id(right_scope), None)
            right = self.outputs(right_scope)
            new = self._combine(e, left, right)
            if new == result:
                break
            result = new
        self._partial.pop(id(scope), None)
        return result

    def _combine(
        self, e: exp.Expr, left: list[tuple[str, Deps]], right: list[tuple[str, Deps]]
    ) -> list[tuple[str, Deps]]:
        by_name = bool(e.args.get("by_name"))
        right_map = dict(right)
        out: list[tuple[str, Deps]] = []
        names = [n for n, _ in left]
        if by_name:
            names += [n for n, _ in right if n not in names]
        left_map = dict(left)
        for i, name in enumerate(names):
            d = left_map[name].copy() if name in left_map else Deps()
            other = right_map.get(name) if by_name else (right[i][1] if i < len(right) else None)
            if other is not None:
                if isinstance(e, exp.Union):
                    d.merge(other)
                else:
                    for _, r in right:
                        d.merge(r, as_influence="intersect" if isinstance(e, exp.Intersect) else "except")
            out.append((name, d))
        if e.args.get("distinct"):  # UNION, INTERSECT, EXCEPT without ALL remove duplicate rows
            every = Deps()
            for _, d in out:
                every.merge(d, as_influence="distinct")
            for _, d in out:
                for node, clauses in every.influence.items():
                    if "distinct" in clauses:
                        d.add_influence(node, ["distinct"], every.influence_lines.get(node))
        return out

    def _lateral_query(self, e: exp.Expr) -> Scope | None:
        inner = e.this.this if isinstance(e, exp.Lateral) and isinstance(e.this, exp.Subquery) else None
        return self._scope_of.get(id(inner)) if inner is not None else None

    def _udtf(self, scope: Scope) -> list[tuple[str, Deps]]:
        e = scope.expression
        sub = self._lateral_query(e)
        if sub is not None:  # LATERAL (SELECT ...): a correlated derived table
            return self.outputs(sub)
        d = Deps()
        exprs = e.expressions if isinstance(e, exp.Unnest) else [e]
        for x in exprs:
            self.expr(x, scope, d, "transform", None)
        alias = e.args.get("alias")
        names = [c.name for c in alias.columns] if isinstance(alias, exp.TableAlias) and alias.columns else []
        if not names:
            names = [alias.name] if isinstance(alias, exp.TableAlias) and alias.name else ["unnest"]
        return [(n, d.copy()) for n in names]

    def rows(self, scope: Scope) -> Deps:
        """Columns that decide which rows the scope yields (influence only)."""
        key = id(scope)
        if key in self._rows_memo:
            return self._rows_memo[key]
        d = Deps()
        self._rows_memo[key] = d
        e = scope.expression
        if isinstance(e, exp.SetOperation):
            for part in scope.set_operation_scopes:
                d.merge(self.rows(part))
            self._rows_memo[key] = d
            return d
        if scope.is_udtf:
            sub = self._lateral_query(e)
            if sub is not None:
                d.merge(self.rows(sub))
                return d
            exprs = e.expressions if isinstance(e, exp.Unnest) else [e]
            for x in exprs:
                self.expr(x, scope, d, "copy", "unnest")
            return d
        if not isinstance(e, exp.Select):
            return d
        where = e.args.get("where")
        if where is not None:
            self.expr(where.this, scope, d, "copy", "where")
        for join in e.args.get("joins") or []:
            on = join.args.get("on")
            if on is not None:
                self.expr(on, scope, d, "copy", "join")
            using = join.args.get("using") or []
            natural = str(join.args.get("method") or "").upper() == "NATURAL"
            if using or natural:
                self._join_columns(scope, join, [u.name for u in using], natural, d)
        group = e.args.get("group")
        if group is not None:
            for g in group.expressions:
                self.expr(g, scope, d, "copy", "group")
            if group.args.get("all"):  # GROUP BY ALL: every projection without an aggregate
                for proj in e.expressions:
                    target = proj.this if isinstance(proj, exp.Alias) else proj
                    if not target.find(exp.AggFunc) and not target.find(exp.Window):
                        self.expr(target, scope, d, "copy", "group")
            for k in ("rollup", "cube", "grouping_sets"):
                for g in group.args.get(k) or []:
                    self.expr(g, scope, d, "copy", "group")
        for clause in ("having", "qualify"):
            node = e.args.get(clause)
            if node is not None:
                self.expr(node.this, scope, d, "copy", clause)
        distinct = e.args.get("distinct")
        if distinct is not None and distinct.args.get("on") is not None:
            # DISTINCT ON (k): k decides the groups, the ORDER BY which row of each is kept
            self.expr(distinct.args["on"], scope, d, "copy", "distinct")
            order = e.args.get("order")
            for o in order.expressions if order is not None else []:
                self.expr(o, scope, d, "copy", "order")
        elif distinct is not None:
            for proj in e.expressions:
                self.expr(proj, scope, d, "copy", "distinct")
        # a set-returning function in the select list (UNNEST) repeats every row per element
        for proj in e.expressions:
            for srf in proj.find_all(exp.Explode, exp.Unnest):
                for arg in [srf.this, *srf.expressions] if isinstance(srf, exp.Unnest) else [srf.this]:
                    if isinstance(arg, exp.Expr):
                        self.expr(arg, scope, d, "copy", "unnest")
        order = e.args.get("order")
        if order is not None:
            # under LIMIT or OFFSET the order decides which rows appear; alone it decides none, but
            # a name it reads must still exist (the engine refuses the query otherwise)
            limited = e.args.get("limit") is not None or e.args.get("offset") is not None
            for o in order.expressions:
                self.expr(o, scope, d if limited else Deps(), "copy", "limit")
        # a LIMIT or OFFSET that is a query (LIMIT (SELECT count(x) FROM r)) decides how many rows
        # appear, and a name it reads must exist: it was passed over
        for clause in ("limit", "offset"):
            bound = e.args.get(clause)
            if (
                bound is not None
                and isinstance(bound.expression, exp.Expr)
                and not isinstance(bound.expression, exp.Literal)
            ):
                self.expr(bound.expression, scope, d, "copy", "limit")
        self._pivot_rows(scope, d)
        for _alias, (_node, source) in scope.selected_sources.items():
            if isinstance(source, Scope):
                canonical = self._canonical(source)
                if id(canonical) not in self._busy:
                    d.merge(self.rows(canonical))
        return d

    @staticmethod
    def _named_windows(node: exp.Window, scope: Scope) -> list[exp.Window]:
        """The definitions a window names (``OVER w`` with ``WINDOW w AS (...)``), and theirs."""
        defs = {
            w.this.name: w
            for w in (scope.expression.args.get("windows") or [])
            if isinstance(w, exp.Window) and isinstance(w.this, exp.Identifier)
        }
        out: list[exp.Window] = []
        name = node.args.get("alias")
        while isinstance(name, exp.Identifier) and name.name in defs and defs[name.name] not in out:
            out.append(defs[name.name])
            name = defs[name.name].args.get("alias")
        return out

    def _join_columns(self, scope: Scope, join: exp.Join, names: list[str], natural: bool, d: Deps) -> None:
        """USING and NATURAL joins: the shared columns of both sides decide the rows."""
        cols: dict[str, list[str]] = {}
        for alias in scope.selected_sources:
            cols[alias] = self._source_columns(scope, alias)
        joined = join.this.alias_or_name
        if natural:
            others = {c for a, cs in cols.items() if a != joined for c in cs}
            names = [c for c in cols.get(joined, []) if c in others]
            known = all(
                isinstance(src, Scope) or self.catalog.find(table_parts(src)) is not None
                for a, src in scope.sources.items()
                if a in cols and isinstance(src, (Scope, exp.Table))
            )
            if not names and known and cols.get(joined):
                # the engine refuses it ("no columns found to join on"): never a complete answer
                self._diag(
                    _line(join) or self.default_line,
                    "unsupported",
                    f"NATURAL JOIN {joined}: it shares no column with the tables before it, so the "
                    "engine refuses the query",
                )
        for name in names:
            for alias, cs in cols.items():
                if name in cs:
                    ref = self.column(exp.column(name, table=alias), scope)
                    d.merge(ref, as_influence="join")

    def _source_columns(self, scope: Scope, alias: str) -> list[str]:
        src = scope.sources.get(alias)
        if isinstance(src, Scope):
            return [n for n, _ in self.outputs(src)]
        if isinstance(src, exp.Table):
            info = self.catalog.find(table_parts(src))
            return list(info.columns) if info else []
        return []

    # --- expressions --------------------------------------------------------------------------

    def expr(self, node: exp.Expr, scope: Scope, d: Deps, ctx: str, infl: str | None) -> None:
        if isinstance(node, exp.Column):
            if isinstance(node.this, exp.Star):
                self._diag(_line(node), "star over unknown sources", node.sql(self.dialect))
                return
            ref = self.column(node, scope)
            if infl:
                d.merge(ref, as_influence=infl)
            else:
                d.merge(ref, sub=ctx)
            return
        if isinstance(node, (exp.Literal, exp.Null, exp.Boolean, exp.Star, exp.DataType, exp.Var)):
            return
        if isinstance(node, (exp.Alias, exp.Paren)):
            self.expr(node.this, scope, d, ctx, infl)
            return
        if isinstance(node, exp.Window):
            self.expr(node.this, scope, d, ctx, infl)
            for w in [node, *self._named_windows(node, scope)]:
                for p in w.args.get("partition_by") or []:
                    self.expr(p, scope, d, ctx, infl or "window")
                order = w.args.get("order")
                if order is not None:
                    for o in order.expressions:
                        self.expr(o, scope, d, ctx, infl or "window")
            return
        if isinstance(node, exp.Filter):
            self.expr(node.this, scope, d, ctx, infl)
            self.expr(node.expression, scope, d, ctx, infl or "filter")
            return
        if isinstance(node, exp.WithinGroup):
            self.expr(node.this, scope, d, ctx, infl)
            self.expr(node.expression, scope, d, ctx, infl or "order")
            return
        if isinstance(node, exp.Order) and ctx == "aggregate":
            if node.this is not None:
                self.expr(node.this, scope, d, ctx, infl)
            for o in node.expressions:
                self.expr(o, scope, d, ctx, infl or "order")
            return
        if isinstance(node, exp.Exists):
            self._subquery(node.this, d, "copy", infl or "exists", exists=True)
            return
        if isinstance(node, (exp.Subquery, exp.Select, exp.SetOperation)):
            inner = node.this if isinstance(node, exp.Subquery) else node
            self._subquery(
                inner, d, compose(ctx, "transform") if ctx != "copy" else "copy", infl, exists=False
            )
            return
        if isinstance(node, exp.AggFunc):
            for arg in node.iter_expressions():
                self.expr(arg, scope, d, "aggregate", infl)
            return
        if isinstance(node, _MEMBER_ACCESS) and self._member(node, scope, d, ctx, infl):
            return
        sub = compose(ctx, "transform")
        for part in node.iter_expressions():
            self.expr(part, scope, d, sub, infl)

    def _member(self, node: exp.Expr, scope: Scope, d: Deps, ctx: str, infl: str | None) -> bool:
        """A member of a struct a CTE or derived table builds (``s.info.f`` over ``{'f': fare, 'n':
        seats} AS info``): only that member's sources flow in, with the rows of the query that
        builds it. False when the member's expression cannot be told (a struct from a table, a
        function's result, a set operation): the whole struct's sources are taken, as before."""
        path = _member_path(node)
        if path is None or not path[1]:
            return False
        col, members = path
        src = self._built_in(col, scope)
        if src is None:
            return False
        found = self._member_of(col.name, members, src)
        if found is None:
            return False
        member, inner = found
        m = Deps()
        self.expr(member, inner, m, "copy", None)
        rows = self.rows(src)
        for n, clauses in rows.influence.items():
            m.add_influence(n, clauses, rows.influence_lines.get(n))
        if infl:
            d.merge(m, as_influence=infl)
        else:
            d.merge(m, sub=ctx)
        return True

    def _built_in(self, col: exp.Column, scope: Scope) -> Scope | None:
        """The CTE or derived table ``col`` reads, when it is one and is not being resolved now."""
        src = self._find_source(col.table, scope) if col.table else None
        if not isinstance(src, Scope):
            return None
        src = self._canonical(src)
        return None if id(src) in self._busy else src

    def _member_of(self, name: str, members: list[str], src: Scope) -> tuple[exp.Expr, Scope] | None:
        """The expression of member path ``members`` of output ``name`` of ``src``, and the scope
        it is read in; None when it cannot be told."""
        sel = src.expression
        if not isinstance(sel, exp.Select) or src.is_udtf:
            return None
        projs = [p for p in sel.expressions if p.alias_or_name == name]
        if len(projs) != 1:
            return None
        e: exp.Expr = projs[0].this if isinstance(projs[0], exp.Alias) else projs[0]
        while True:
            while isinstance(e, exp.Paren):
                e = e.this
            if not members:
                return e, src
            if isinstance(e, exp.Struct):
                items = [
                    (i.this.name, i.expression)
                    for i in e.expressions
                    if isinstance(i, exp.PropertyEQ) and isinstance(i.this, exp.Identifier | exp.Literal)
                ]
                same = [v for k, v in items if k == members[0]]
                if len(same) != 1:  # a member named in another case: the one that matches, if one does
                    same = [v for k, v in items if k.lower() == members[0].lower()]
                if len(same) != 1:
                    return None
                e, members = same[0], members[1:]
                continue
            # a struct the query takes from one of its own sources, whole or a member of it
            path = _member_path(e)
            inner = self._built_in(path[0], src) if path is not None else None
            if path is None or inner is None:
                return None
            return self._member_of(path[0].name, [*path[1], *members], inner)

    def _subquery(self, inner: exp.Expr, d: Deps, sub: str, infl: str | None, *, exists: bool) -> None:
        scope = self._scope_of.get(id(inner))
        if scope is None:
            return
        outs = self.outputs(scope)
        for _, o in outs:
            if exists or infl:
                d.merge(o, as_influence=infl or "exists")
            else:
                d.merge(o, sub=sub)
        rows = self.rows(scope)
        d.merge(rows)

    @staticmethod
    def _pivots(scope: Scope) -> dict[str, exp.Pivot]:
        """The PIVOT and UNPIVOT clauses of the scope's FROM and JOINs, by the alias their rows take."""
        sel = scope.expression
        if not isinstance(sel, exp.Select):
            return {}
        out: dict[str, exp.Pivot] = {}
        for holder in [sel.args.get("from_"), *(sel.args.get("joins") or [])]:
            if holder is None:
                continue
            for p in holder.this.args.get("pivots") or []:
                out[p.alias or holder.this.alias_or_name] = p
        return out

    @staticmethod
    def _pivot_outputs(p: exp.Pivot) -> list[str]:
        """The columns a PIVOT makes (one per value and aggregate), or an UNPIVOT's value and name
        columns; the source's other columns pass through."""
        if p.args.get("unpivot"):
            return [e.name for e in p.expressions] + [f.this.name for f in p.fields]
        return [c.name for c in p.args.get("columns") or []]

    def _pivot_column(self, p: exp.Pivot, name: str, scope: Scope, line: int | None) -> Deps:
        source = p.parent.alias_or_name if p.parent is not None else ""
        if name not in self._pivot_outputs(p):  # a column passing through (a PIVOT's group key)
            return self._column_of(source, name, scope, line)
        d = Deps()
        if p.args.get("unpivot"):
            values = [e.name for e in p.expressions]
            if name in values:  # the unpivoted columns' values (the i-th of each tuple)
                i = values.index(name)
                for f in p.fields:
                    for item in f.expressions:
                        x = item.expressions[i] if isinstance(item, exp.Tuple) else item
                        self.expr(x, scope, d, "copy", None)
            return d  # the name column holds the names of columns, not their values
        aggs = list(p.expressions)
        if len(aggs) > 1:  # several aggregates: the column is named <value>_<aggregate's alias>
            aggs = [a for a in aggs if name.endswith("_" + a.alias)] or aggs
        for a in aggs:
            self.expr(a, scope, d, "copy", None)
        for f in p.fields:  # the FOR column decides which rows each aggregate counts
            self.expr(f.this, scope, d, "copy", "filter")
        return d

    def _pivot_rows(self, scope: Scope, d: Deps) -> None:
        """A PIVOT groups by the columns passing through; an UNPIVOT leaves out NULL values
        unless told to keep them."""
        for p in self._pivots(scope).values():
            source = p.parent.alias_or_name if p.parent is not None else ""
            if p.args.get("unpivot"):
                if not p.args.get("include_nulls"):
                    for f in p.fields:
                        for item in f.expressions:
                            self.expr(item, scope, d, "copy", "filter")
                continue
            used = {c.name for x in [*p.expressions, *p.fields] for c in x.find_all(exp.Column)}
            for c in self._source_columns(scope, source):
                if c not in used:
                    d.merge(self._column_of(source, c, scope, _line(p)), as_influence="group")

    def column(self, col: exp.Column, scope: Scope) -> Deps:
        table = col.table
        name = col.name
        line = _line(col)
        pivot = self._pivots(scope).get(table) if table else None
        if pivot is not None:
            return self._pivot_column(pivot, name, scope, line)
        if not table:
            alias = self._projection_alias(scope, name)
            if alias is not None:  # ORDER BY / GROUP BY naming an output column by its alias
                d = Deps()
                self.expr(alias, scope, d, "copy", None)
                return d
            holders = [a for a in scope.selected_sources if name in self._source_columns(scope, a)]
            # a table without a schema anywhere may own it: inferred only when it is the one such
            # source in scope and no declared source has the column
            unknown = [
                (a, src)
                for a, (_node, src) in scope.selected_sources.items()
                if isinstance(src, exp.Table) and self.catalog.find(table_parts(src)) is None
            ]
            if len(holders) > 1:
                self._diag(line, "ambiguous", name, [f"{a}.{name}" for a in holders])
            elif not holders and len(unknown) == 1:
                return self._infer(unknown[0][1], name, line)
            elif not holders and len(unknown) > 1:
                owners = [".".join(table_parts(t)) for _, t in unknown]
                self._diag(
                    line,
                    "ambiguous",
                    f"{name} (no schema says which of {', '.join(owners)} has it)",
                    [f"{t}.{name}" for t in owners],
                )
            else:
                self._not_in_scope(scope, name, line)
            return Deps()
        return self._column_of(table, name, scope, line)

    def _not_in_scope(self, scope: Scope, name: str, line: int | None) -> None:
        """A name without its table that no source in scope has: the tables searched and the names
        close to it."""
        shown: dict[str, str] = {}
        searched = []  # the tables (by name) and CTEs or derived tables (by alias) in scope
        for a in scope.selected_sources:
            src = scope.sources.get(a)
            info = self.catalog.find(table_parts(src)) if isinstance(src, exp.Table) else None
            searched.append(".".join(table_parts(src)) if isinstance(src, exp.Table) else a)
            for c in self._source_columns(scope, a):
                shown.setdefault(c, info.shown(c) if info else c)
        close = close_names(name, sorted(shown))
        self._diag(line, "not in schema", name, [shown[c] for c in close], searched)

    def _inside(self, scope: Scope, lateral: Scope) -> bool:
        """Whether ``scope`` is the query of LATERAL ``lateral``, or inside it."""
        sub = self._lateral_query(lateral.expression)
        s: Scope | None = scope
        while s is not None and sub is not None:
            if s is sub:
                return True
            s = s.parent
        return False

    def _column_of(self, table: str, name: str, scope: Scope, line: int | None) -> Deps:
        """Column ``name`` of the source ``table`` names in scope."""
        src = self._find_source(table, scope)
        if src is None:
            self._diag(
                line,
                "unknown table",
                f"{table}.{name}",
                close_names(table, list(scope.sources)),
            )
            return Deps()
        if isinstance(src, Scope):
            src = self._canonical(src)
            if src.is_udtf and self._inside(scope, src):
                # A LATERAL query cannot read its own output: sqlglot's qualify gives a name that no
                # source in reach has the LATERAL's own alias (x.toolz inside "LATERAL (SELECT toolz
                # FROM loans l2) x"), and the name was passed over without a word.
                self._not_in_scope(scope, name, line)
                return Deps()
            outs = dict(self.outputs(src))
            if name in outs:
                return outs[name]
            if id(src) in self._busy:
                return Deps()
            self._diag(line, "not in schema", f"{table}.{name}", close_names(name, list(outs)))
            return Deps()
        if isinstance(src, exp.Table):
            parts = table_parts(src)
            info = self.catalog.find(parts)
            if info is None:  # named with its table: the column is the table's, though no schema says so
                return self._infer(src, name, line)
            if name not in info.columns:
                self._diag(
                    line,
                    "not in schema",
                    f"{info.name}.{name}",
                    [info.shown(c) for c in close_names(name, info.columns)],
                )
                return Deps()
            d = Deps()
            d.add_value((info.kind, info.name, info.shown(name)), "copy", line)
            return d
        return Deps()

    def _infer(self, table: exp.Table, name: str, line: int | None) -> Deps:
        """A column of a table no schema declares, taken as that table's (marked ``inferred``). A
        table name close to a declared one is more likely a typo: that stays unresolved."""
        parts = table_parts(table)
        tname = ".".join(parts)
        if any(p == parts or p[-len(parts) :] == parts for p in self.catalog.pending):
            # where the table is named, once: a model of the cycle, not resolved when this one is;
            # or this model itself (a view defined by reading itself)
            itself = tname == self.model or self.model.endswith("." + tname)
            why = "the model reads itself" if itself else "a model in the cycle, not resolved yet"
            self._diag(_line(table) or line, "unknown table", f"{tname} ({why})")
            return Deps()
        close = close_names(tname, [t.name for t in self.catalog.tables.values()], cutoff=0.8)
        if close:
            self._diag(_line(table) or line, "unknown table", tname, close)
        node: Node = ("source", tname, name)
        self.inferred.add(node)
        self._diag(line, "inferred", f"{tname}.{name}")
        d = Deps()
        d.add_value(node, "copy", line)
        return d

    def _projection_alias(self, scope: Scope, name: str) -> exp.Expr | None:
        sel = scope.expression
        if not isinstance(sel, exp.Select):
            return None
        for proj in sel.expressions:
            if (
                isinstance(proj, exp.Alias)
                and proj.alias == name
                and not isinstance(proj.this, exp.Column | exp.Star)
            ):
                return proj.this  # type: ignore[no-any-return]
            if (
                isinstance(proj, exp.Alias)
                and proj.alias == name
                and isinstance(proj.this, exp.Column)
                and proj.this.table
            ):
                return proj.this
        return None

    def _canonical(self, src: Scope) -> Scope:
        """A recursive CTE's self-reference is bound to a scope of its anchor SELECT: use the CTE's own."""
        parent = src.expression.parent
        if src.is_cte and isinstance(parent, exp.SetOperation) and id(parent) in self._scope_of:
            return self._scope_of[id(parent)]
        return src

    def _find_source(self, alias: str, scope: Scope) -> Scope | exp.Table | None:
        s: Scope | None = scope
        while s is not None:
            if alias in s.sources:
                found = s.sources[alias]
                if isinstance(found, (Scope, exp.Table)):
                    return found
                return None
            s = s.parent
        return None

    def _check_star_lists(self, query: exp.Expr, schema: MappingSchema) -> None:
        """A star's EXCLUDE and REPLACE lists name columns its sources must have: the engine refuses
        the query otherwise, while qualification drops the name without a word (the answer would
        look complete). Each star with such a list is expanded alone, without it, to learn
        the columns it covers, and a listed name not among them is reported as not in schema."""
        stars = [s for s in query.find_all(exp.Star) if any(s.args.get(k) for k in _STAR_LISTS_CHECKED)]
        if not stars:
            return
        selects = list(query.find_all(exp.Select))
        for star in stars:
            select = star.find_ancestor(exp.Select)
            at = next((i for i, x in enumerate(selects) if x is select), None)
            if select is None or at is None:
                continue
            nth = next(i for i, x in enumerate(select.find_all(exp.Star)) if x is star)
            probe = query.copy()
            probe_select = list(probe.find_all(exp.Select))[at]
            probe_star = list(probe_select.find_all(exp.Star))[nth]
            projection = probe_star.parent if isinstance(probe_star.parent, exp.Column) else probe_star
            if not any(p is projection for p in probe_select.expressions):
                continue  # not a projection of its query (a function's argument): nothing to check
            for k in _STAR_LISTS:
                probe_star.set(k, None)
            probe_select.set("expressions", [projection])
            try:
                qualified = qualify(
                    probe,
                    schema=schema,
                    dialect=self.dialect,
                    validate_qualify_columns=False,
                    quote_identifiers=False,
                )
            except (OptimizeError, SchemaError):
                continue  # the query's own qualification reports what is wrong
            expanded = list(qualified.find_all(exp.Select))
            if len(expanded) != len(selects):
                continue
            outs = expanded[at].selects
            if any(isinstance(p, exp.Star) or isinstance(p.this, exp.Star) for p in outs):
                continue  # over a table without a schema: reported as a star over unknown sources
            names = [p.alias_or_name for p in outs]
            folded = {folded_name(exp.to_identifier(n, quoted=True), self.dialect) for n in names}
            loose = _dialect(self.dialect).NORMALIZATION_STRATEGY is NormalizationStrategy.CASE_INSENSITIVE
            table = star.parent.table if isinstance(star.parent, exp.Column) else ""
            sources = [table] if table else _source_names(expanded[at])
            for key in _STAR_LISTS_CHECKED:
                for item in star.args.get(key) or []:
                    ident = (item.args.get("alias") if key == "replace" else item.this) or item
                    if isinstance(ident, exp.Column):
                        ident = ident.this
                    name = str(ident.name)
                    if folded_name(ident, self.dialect) in folded or (
                        loose and name.casefold() in {n.casefold() for n in names}
                    ):
                        continue
                    self._diag(
                        _line(item) or _line(star) or _line(select),
                        "not in schema",
                        f"{table}.{name}" if table else name,
                        close_names(name, names),
                        [] if table else sources,
                    )

    def _diag(
        self,
        line: int | None,
        reason: str,
        reference: str,
        candidates: Iterable[str] = (),
        searched: Iterable[str] = (),
    ) -> None:
        key = (reason, reference)
        if key in self._reported:
            return
        self._reported.add(key)
        self.diagnostics.append(
            Diagnostic(
                self.file,
                line or self.default_line,
                self.model,
                reason,
                reference,
                tuple(candidates),
                tuple(searched),
            )
        )
