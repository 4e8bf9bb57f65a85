"""Build the column-level lineage graph of a project: mappings plus SQL models.

Nodes are columns: ``raw`` (a dump column), ``source`` (a mapping's canonical
field) and ``model`` (an output column of a model). Edges go one hop
downstream, keyed by their kind, ``value`` or ``influence``, with the sub-kind
(copy/transform/aggregate) or the clauses, the model file and the line.

Models are built upstream first (topological order of the tables they read);
each model's output columns join the schema used to qualify the next.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import networkx as nx
from sqlglot import exp

from cdcnorm.lineage.binding import Bound, EngineCheck, tables_to_bind
from cdcnorm.lineage.diagnostics import Diagnostic
from cdcnorm.lineage.models import LoadedModels, ModelStatement, load_models, paused_gc
from cdcnorm.lineage.resolve import (
    Catalog,
    Deps,
    Node,
    StatementResolver,
    close_names,
    declared_table,
    dedupe_names,
    fold,
    folded_parts,
    same_table,
    table_parts,
    written,
)
from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.types.base import FieldType

SQL_TYPES = {
    "integer": "BIGINT",
    "float": "DOUBLE",
    "boolean": "BOOLEAN",
    "date": "DATE",
    "time": "TIME",
    "timestamp": "TIMESTAMPTZ",
    "text": "TEXT",
    "bytes": "BLOB",
    "uuid": "UUID",
    "json": "JSON",
}


@dataclass
class Views:
    """Plain graphs for the questions, built once with the project: value edges only, every
    edge, and each column's influence edges in both directions."""

    value: nx.DiGraph
    every: nx.DiGraph
    influence_out: dict[Node, set[Node]]
    influence_in: dict[Node, set[Node]]


def views_of(g: nx.MultiDiGraph) -> Views:
    value = nx.DiGraph()
    value.add_nodes_from(g.nodes)
    every = nx.DiGraph()
    every.add_nodes_from(g.nodes)
    out: dict[Node, set[Node]] = {}
    into: dict[Node, set[Node]] = {}
    triples = list(g.edges(keys=True))
    every.add_edges_from((u, v) for u, v, _ in triples)
    value.add_edges_from((u, v) for u, v, k in triples if k == "value")
    for u, v, k in triples:
        if k != "value":
            out.setdefault(u, set()).add(v)
            into.setdefault(v, set()).add(u)
    return Views(value, every, out, into)


def node_name(node: Node) -> str:
    return f"{node[1]}.{node[2]}"


def node_id(node: Node) -> str:
    return f"{node[0]}:{node[1]}.{node[2]}"


@dataclass
class ModelInfo:
    name: str
    files: list[str]
    columns: list[str]
    lines: dict[str, int] = field(default_factory=dict)


@dataclass
class Project:
    graph: nx.MultiDiGraph
    catalog: Catalog
    models: dict[str, ModelInfo]
    sources: dict[str, LoadedMapping]
    diagnostics: list[Diagnostic]
    dialect: str
    order: list[str]
    tables: dict[str, dict[str, str]] | None = None
    views: Views | None = None
    #: each model's statements, the tables each reads, and which models read which (for re-resolving)
    statements: dict[str, list[ModelStatement]] = field(default_factory=dict)
    reads: dict[str, set[tuple[str, ...]]] = field(default_factory=dict)
    readers: nx.DiGraph = field(default_factory=nx.DiGraph)
    #: typed columns of tables the model files create without a query (``LoadedModels.declared``)
    declared: dict[tuple[str, ...], dict[str, str]] = field(default_factory=dict)
    #: files with a statement that could not be parsed, and their words (``LoadedModels.unparsed``)
    unparsed: dict[str, frozenset[str] | None] = field(default_factory=dict)

    def view(self) -> Views:
        if self.views is None:
            self.views = views_of(self.graph)
        return self.views

    def column_nodes(self) -> list[Node]:
        return list(self.graph.nodes)


def source_type(lm: LoadedMapping, field_name: str) -> str:
    return sql_type_of(lm.field_types[field_name])


def sql_type_of(ftype: FieldType) -> str:
    """The SQL type of a mapping type (``float`` is DOUBLE: a mapping's float is a double)."""
    if ftype.name == "decimal":
        p, s = ftype.params
        return f"DECIMAL({p},{s})"
    if ftype.name == "text" and getattr(ftype, "max_length", None):
        return f"VARCHAR({ftype.max_length})"  # type: ignore[attr-defined]
    return SQL_TYPES[ftype.name]


def normalise_column(name: str, dialect: str) -> str:
    from sqlglot.optimizer.normalize_identifiers import normalize_identifiers

    return str(normalize_identifiers(exp.to_identifier(name), dialect=dialect).name)


def mapping_catalog(
    mappings: list[LoadedMapping],
    dialect: str,
    edits: dict[Node, Any] | None = None,
    tables: dict[str, dict[str, str]] | None = None,
) -> Catalog:
    """Source tables from the mappings (and plain ``tables``: name -> column -> SQL type);
    ``edits`` simulate a schema edit (see questions.impact)."""
    cat = Catalog()
    # names are kept exactly as declared (``Fleet.TripLegs``, ``PickupAt``); the catalog matches
    # references to them as the dialect does
    for name, declared in (tables or {}).items():
        kept: dict[str, str] = {}
        for c, t in declared.items():
            what, new = (edits or {}).get(("source", name, c), ("", ""))
            if what == "drop":
                continue
            kept[new if what == "rename" else c] = new if what == "retype" else t
        cat.add(
            declared_table(
                "source", name, declared_parts(name, dialect), list(kept), dialect, kept, "catalog"
            )
        )
    for lm in mappings:
        cols: list[str] = []
        types: dict[str, str] = {}
        for f in lm.mapping.fields:
            col = f
            edit = (edits or {}).get(("source", lm.table, f))
            typ = source_type(lm, f)
            if edit is not None:
                if edit[0] == "drop":
                    continue
                if edit[0] == "rename":
                    col = edit[1]
                if edit[0] == "retype":
                    typ = edit[1]
            cols.append(col)
            types[col] = typ
        cat.add(
            declared_table(
                "source", lm.table, declared_parts(lm.table, dialect), cols, dialect, types, "mapping"
            )
        )
    return cat


def declared_parts(name: str, dialect: str) -> tuple[str, ...]:
    """A declared table name (``Fleet.TripLegs``), split at its dots, as references match it."""
    return tuple(fold(p, dialect) for p in name.split("."))


#: The schema a name without one lands in (DuckDB's and PostgreSQL's default, SQLite's database).
DEFAULT_SCHEMAS = ("main", "public")


def _drop_default_prefixes(statement: exp.Expr, known: set[tuple[str, ...]]) -> None:
    """``main.stg_trips`` and ``db.main.stg_trips`` name the model ``stg_trips``: a reference in
    the default schema that names no known table as written is taken without its prefixes."""
    for t in statement.find_all(exp.Table):
        parts = table_parts(t)
        if len(parts) < 2 or parts in known or parts[-2] not in DEFAULT_SCHEMAS:
            continue
        if (parts[-1],) in known:
            t.set("db", None)
            t.set("catalog", None)


def _referenced_tables(stmt: ModelStatement, dialect: str) -> list[tuple[str, ...]]:
    """The tables a statement reads, their names folded as the dialect folds them (``STG_FARES``
    is ``stg_fares`` in DuckDB), so that the build order follows every reference."""
    ctes = {c.alias_or_name for c in stmt.statement.find_all(exp.CTE)}
    out = []
    for t in stmt.statement.find_all(exp.Table):
        if not t.name or (len(t.parts) == 1 and t.name in ctes):
            continue
        out.append(folded_parts(t, dialect))
    return out


def _written_column(col: exp.Expr, dialect: str) -> str:
    return written(col.this if isinstance(col, exp.Column) else col, dialect)


def _merge_query(
    resolver: StatementResolver, stmt: ModelStatement, catalog: Catalog, dialect: str
) -> list[tuple[str, Deps]] | None:
    """MERGE INTO t USING s ON c WHEN ...: each SET/INSERT column as a SELECT over t JOIN s ON c."""
    merge = stmt.statement
    target = merge.this
    using = merge.args.get("using")
    on = merge.args.get("on")
    whens = merge.args.get("whens")
    clauses = whens.expressions if isinstance(whens, exp.Whens) else (merge.expressions or [])
    assignments: list[tuple[str, exp.Expr, exp.Expr | None, bool]] = []
    for when in clauses:
        then = when.args.get("then")
        cond = when.args.get("condition")
        matched = bool(when.args.get("matched"))
        if isinstance(then, exp.Update):
            for eq in then.expressions:
                assignments.append((_written_column(eq.this, dialect), eq.expression, cond, matched))
        elif isinstance(then, exp.Insert):
            cols = then.this.expressions if isinstance(then.this, exp.Tuple) else []
            vals = then.expression.expressions if isinstance(then.expression, exp.Tuple) else []
            for c, v in zip(cols, vals, strict=False):
                assignments.append((_written_column(c, dialect), v, cond, matched))
        elif isinstance(then, exp.Var) and then.name.upper() == "DELETE":
            assignments.append(("", exp.null(), cond, matched))  # no value: it decides rows only
    if not assignments:
        return []
    names = dedupe_names(list(dict.fromkeys(a[0] for a in assignments if a[0])), dialect)
    parts = folded_parts(target, dialect) if isinstance(target, exp.Table) else stmt.target
    if catalog.find(tuple(parts)) is None:
        catalog.add(declared_table("model", stmt.name, tuple(parts), names, dialect, origin="model"))
    out: dict[str, Deps] = {}
    # what decides which rows the MERGE adds (WHEN NOT MATCHED ... INSERT) or removes (... DELETE):
    # a column no clause sets gains only these
    rows, deletes = Deps(), Deps()
    for name, value, cond, matched in assignments:
        where = f" WHERE {cond.sql(dialect=dialect)}" if cond is not None else ""
        join = "JOIN" if matched else "RIGHT JOIN"
        sql = (
            f"SELECT {value.sql(dialect=dialect)} AS {exp.to_identifier(name or 'x').sql(dialect=dialect)} "
            f"FROM {target.sql(dialect=dialect)} {join} {using.sql(dialect=dialect) if using else ''} "
            f"ON {on.sql(dialect=dialect) if on else 'TRUE'}{where}"
        )
        from sqlglot import parse_one

        query = parse_one(sql, read=dialect)
        for n in query.find_all(exp.Identifier):
            n.meta.setdefault("line", stmt.line)
        res = resolver.resolve(query)
        if not res:
            continue
        if not matched or not name:
            rows.merge(resolver.row_deps)
        if not name:
            deletes.merge(resolver.row_deps)
            continue
        d = out.setdefault(name, Deps())
        d.merge(res[0][1])
    for d in out.values():  # a row removed is removed with every column
        d.merge(deletes)
    resolver.row_deps = rows
    return [(n, out.get(n, Deps())) for n in names]


@dataclass
class Resolved:
    """One model resolved: its columns in order, each column's dependencies, what it reported."""

    columns: list[str]
    lines: dict[str, int]
    merged: dict[str, Deps]
    diagnostics: list[Diagnostic]
    unknown_tables: set[str]
    inferred: set[Node]


def resolve_model(
    name: str,
    sts: list[ModelStatement],
    catalog: Catalog,
    dialect: str,
    created: dict[tuple[str, ...], dict[str, str]] | None = None,
) -> Resolved:
    """Resolve every statement of one model against ``catalog`` (the tables it may read);
    ``created``: the columns of tables the model files create without a query
    (``LoadedModels.declared``), which an INSERT into one of them fills."""
    merged: dict[str, Deps] = {}
    diagnostics: list[Diagnostic] = []
    unknown_tables: set[str] = set()
    inferred: set[Node] = set()
    columns: list[str] = []
    lines: dict[str, int] = {}
    # INSERT or MERGE into a table a mapping or catalog declares: the model is that table, with
    # its full column list, and its rows so far are the declared table's
    declared = catalog.find(sts[0].target)
    if declared is not None and declared.kind == "source" and sts[0].kind in ("insert", "merge"):
        for c in (declared.shown(f) for f in declared.columns):
            merged[c] = Deps()
            merged[c].add_value(("source", declared.name, c), "copy", None)
            columns.append(c)
            lines[c] = sts[0].line
    # CREATE TABLE t (a, b) then INSERT INTO t: the model has t's columns, in t's order, and an
    # INSERT without a column list fills them by position (not under the query's own names)
    made = (created or {}).get(sts[0].target) if sts[0].kind in ("insert", "merge") else None
    if made and not columns:
        for c in made:
            merged[c] = Deps()
            columns.append(c)
            lines[c] = sts[0].line
    for st in sts:
        resolver = StatementResolver(catalog, dialect, st.file, name, st.line)
        if st.kind == "merge":
            outs = _merge_query(resolver, st, catalog, dialect)
        else:
            assert st.query is not None
            outs = resolver.resolve(st.query)
        diagnostics.extend(resolver.diagnostics)
        unknown_tables |= resolver.unknown_tables
        inferred |= resolver.inferred
        if outs is None:
            continue
        names = [n for n, _ in outs]
        if st.columns is not None:
            if len(st.columns) != len(outs):
                diagnostics.append(
                    Diagnostic(
                        st.file,
                        st.line,
                        name,
                        "unsupported",
                        f"column list names {len(st.columns)} columns, the query has {len(outs)}",
                    )
                )
            names = list(st.columns[: len(outs)]) + names[len(st.columns) :]
        elif st.kind == "insert" and columns:  # no column list: by position, as the table has them
            names = columns[: len(outs)] + names[len(columns) :]
        names = dedupe_names(names, dialect) if st.kind != "insert" else names
        into_declared = st.kind in ("insert", "merge") and (
            (declared is not None and declared.kind == "source") or bool(made)
        )
        known = (
            list(declared.columns) if declared is not None and declared.kind == "source" else list(made or [])
        )
        if columns:  # a name the table has, in another case, is that column (as the dialect folds)
            same = {fold(c, dialect): c for c in columns}
            names = [same.get(fold(n, dialect), n) for n in names]
        if into_declared:
            extra = [n for n in names if fold(n, dialect) not in known]
            if extra:
                diagnostics.append(
                    Diagnostic(
                        st.file,
                        st.line,
                        name,
                        "not in schema",
                        f"{name}.{extra[0]}",
                        tuple(close_names(extra[0], columns)),
                    )
                )
        earlier = list(columns)
        for n, (_, d) in zip(names, outs, strict=False):
            if into_declared and n not in columns:
                continue  # not a column of the declared table: reported above
            if n not in merged:
                merged[n] = Deps()
                columns.append(n)
                lines[n] = st.line
            merged[n].merge(d)
        if st.kind in ("insert", "merge"):
            # a column the statement does not set still gains rows: only what decides them
            for c in earlier:
                if c not in names:
                    merged[c].merge(resolver.row_deps)
    return Resolved(columns, lines, merged, diagnostics, unknown_tables, inferred)


def _named_by_engine(proj: exp.Expr) -> bool:
    """A column of a query the engine names itself: no alias, no plain column, no star."""
    return not isinstance(proj, (exp.Alias, exp.Column, exp.Star))


def _selects(st: ModelStatement) -> list[exp.Expr]:
    return st.query.selects if isinstance(st.query, exp.Query) else []


def _may_rename(st: ModelStatement) -> bool:
    """The model has a column the engine names itself (and no column list naming them all)."""
    return not st.columns and any(_named_by_engine(p) for p in _selects(st))


@contextmanager
def _closing(binder: EngineCheck | None) -> Iterator[None]:
    try:
        yield
    finally:
        if binder is not None:
            binder.close()


def _engine_check(one: Resolved, st: ModelStatement, bound: Bound, name: str) -> None:
    """What the engine's binding of the model adds to its resolution: a refusal the resolver did not
    see is a gap (``refused by the engine``), and a column without an alias that is no plain column
    (``CAST(id AS INTEGER)``, ``sum(amount)``) takes the engine's name, the one readers must use; so
    does a name the engine spells otherwise (``Amount``, an alias of a CTE read by a star)."""
    if bound is None or any(d.unresolved for d in one.diagnostics):
        return
    if isinstance(bound, str):
        one.diagnostics.append(Diagnostic(st.file, st.line, name, "refused by the engine", bound))
        return
    selects = _selects(st)
    if st.columns or len(bound) != len(one.columns):
        return
    lined_up = len(selects) == len(bound)
    renamed = {
        old: new
        for at, (old, new) in enumerate(zip(one.columns, bound, strict=True))
        if old != new
        and new not in one.columns
        # the engine's spelling of the same name (an alias's case, through a star over a CTE), or
        # the engine's name of a column without an alias
        and (fold(old, "duckdb") == fold(new, "duckdb") or (lined_up and _named_by_engine(selects[at])))
    }
    if not renamed:
        return
    one.columns[:] = [renamed.get(c, c) for c in one.columns]
    for old, new in renamed.items():
        one.lines[new] = one.lines.pop(old)
        one.merged[new] = one.merged.pop(old)


def _visible(name: str, columns: list[str], edits: dict[Node, Any] | None) -> list[str]:
    """The columns readers of the model see, with a simulated edit of one of them applied."""
    visible = list(columns)
    for (kind, table, col), (what, new) in (edits or {}).items():
        if kind == "model" and table == name and col in visible:
            visible.remove(col)
            if what == "rename" and new:
                visible.append(new)
    return visible


def build_project(
    models_dir: Path | None,
    mappings: list[LoadedMapping],
    dialect: str = "duckdb",
    *,
    loaded: LoadedModels | None = None,
    edits: dict[Node, Any] | None = None,
    tables: dict[str, dict[str, str]] | None = None,
) -> Project:
    """Load, order and resolve every model; return the graph with its diagnostics.

    ``tables`` adds source tables known by schema only (name -> column -> SQL type).
    """
    with paused_gc():
        return _build_project(models_dir, mappings, dialect, loaded, edits, tables)


def _build_project(
    models_dir: Path | None,
    mappings: list[LoadedMapping],
    dialect: str,
    loaded: LoadedModels | None,
    edits: dict[Node, Any] | None,
    tables: dict[str, dict[str, str]] | None,
) -> Project:
    if loaded is None:
        loaded = (
            load_models(models_dir, dialect)
            if models_dir is not None and models_dir.exists()
            else LoadedModels()
        )
    if tables:
        # a catalog read from the warehouse holds the models' own views: a model defines its table
        made: dict[str, list[tuple[str, ...]]] = {}  # by the last part of the name
        for st in loaded.statements:
            if st.kind in ("create", "select"):
                made.setdefault(st.target[-1], []).append(st.target)
        named = {name: declared_parts(name, dialect) for name in tables}
        tables = {
            name: cols
            for name, cols in tables.items()
            if not any(same_table(named[name], m) for m in made.get(named[name][-1], []))
        }
    catalog = mapping_catalog(mappings, dialect, edits, tables)
    g = nx.MultiDiGraph()
    for info in catalog.tables.values():
        for col in info.columns:
            g.add_node(
                ("source", info.name, info.shown(col)),
                kind="source",
                table=info.name,
                column=info.shown(col),
                type=info.types.get(col),
                origin=info.origin,
            )
    diagnostics = list(loaded.diagnostics)
    # mapping layer: raw dump column -> canonical field
    for lm in mappings:
        for f in lm.mapping.fields:
            col = f
            node: Node = ("source", lm.table, col)
            edit = (edits or {}).get(node)
            # a from of alternatives: the field reads whichever of them a file has
            raws: list[Node] = [("raw", lm.table, c) for c in lm.mapping.raw_columns(f)]
            before = lm.mapping.before_column(f)  # change.images: a delete's value is its before-image's
            if before is not None:
                raws.append(("raw", lm.table, before))
            for raw in raws:
                g.add_node(raw, kind="raw", table=lm.table, column=raw[2])
            if edit is not None and edit[0] in ("drop", "rename"):
                continue
            ftype = lm.field_types[f]
            sub = "copy" if ftype.name == "text" and not getattr(ftype, "max_length", None) else "transform"
            g.add_node(
                node, kind="source", table=lm.table, column=col, type=source_type(lm, f), origin="mapping"
            )
            for raw in raws:
                g.add_edge(
                    raw,
                    node,
                    key="value",
                    kind="value",
                    sub=sub,
                    clauses="",
                    file=lm.path.name,
                    line=lm.field_lines.get(f, 0),
                )
    by_model: dict[str, list[ModelStatement]] = defaultdict(list)
    for st in loaded.statements:
        by_model[st.name].append(st)
    parts_of = {name: sts[0].target for name, sts in by_model.items()}
    known_tables = set(parts_of.values()) | set(catalog.tables)
    for sts in by_model.values():
        for st in sts:
            _drop_default_prefixes(st.statement, known_tables)
    deps = nx.DiGraph()
    deps.add_nodes_from(by_model)
    reads: dict[str, set[tuple[str, ...]]] = {}
    by_last: dict[str, list[tuple[str, tuple[str, ...]]]] = {}  # models by the last part of their name
    for other, oparts in parts_of.items():
        by_last.setdefault(oparts[-1], []).append((other, oparts))
    for name, sts in by_model.items():
        for st in sts:
            for parts in _referenced_tables(st, dialect):
                reads.setdefault(name, set()).add(parts)
                for other, oparts in by_last.get(parts[-1], []):
                    if other != name and (oparts == parts or oparts[-len(parts) :] == parts):
                        deps.add_edge(other, name)
    # Upstream first. Models that read each other (a cycle) cannot be ordered: each cycle is one
    # diagnostic naming its models and files, its models are resolved in name order (their
    # references into the cycle stay unresolved), and every model outside it resolves as usual.
    scc = nx.condensation(deps)
    members = {c: sorted(scc.nodes[c]["members"]) for c in scc.nodes}
    order = []
    for c in nx.lexicographical_topological_sort(scc, key=lambda c: members[c][0]):
        group = members[c]
        order.extend(group)
        if len(group) > 1:
            loop = nx.find_cycle(deps.subgraph(group))
            files = sorted({st.file for m in group for st in by_model[m]})
            diagnostics.extend(
                Diagnostic(
                    by_model[m][0].file,
                    by_model[m][0].line,
                    m,
                    "cycle",
                    "models read each other: "
                    + " -> ".join([a for a, _ in loop] + [loop[0][0]])
                    + f" (files: {', '.join(files)})",
                )
                for m in group
            )
    models: dict[str, ModelInfo] = {}
    catalog.pending = set(parts_of.values())
    unknown_tables: set[str] = set()
    # the engine binds DuckDB's models as they are (a simulated edit is impact's binding check's)
    binder = (
        EngineCheck(tables_to_bind(catalog.tables.values(), loaded.declared), len(order), dialect)
        if dialect == "duckdb" and not edits
        else None
    )
    later: list[tuple[Resolved, ModelStatement, str]] = []  # checked when the build is done
    with _closing(binder):
        for name in order:
            sts = by_model[name]
            checked = binder if len(sts) == 1 else None  # one statement: a query to bind
            if checked is not None:
                checked.submit(name, sts[0])
            one = resolve_model(name, sts, catalog, dialect, loaded.declared)
            if checked is not None:
                if _may_rename(sts[0]):  # its readers must see the engine's names
                    _engine_check(one, sts[0], checked.result(name), name)
                else:
                    later.append((one, sts[0], name))
            diagnostics.extend(one.diagnostics)
            unknown_tables |= one.unknown_tables
            for guess in one.inferred:
                g.add_node(
                    guess, kind="source", table=guess[1], column=guess[2], origin="inferred", inferred=True
                )
            columns, lines, merged = one.columns, one.lines, one.merged
            models[name] = ModelInfo(name, sorted({s.file for s in sts}), columns, lines)
            visible = _visible(name, columns, edits)
            catalog.add(declared_table("model", name, parts_of[name], visible, dialect, origin="model"))
            catalog.pending.discard(parts_of[name])
            file_of = sts[0].file
            batch: list[tuple[Node, Node, str, dict[str, Any]]] = []  # added at once: far cheaper
            for col in columns:
                target: Node = ("model", name, col)
                g.add_node(target, kind="model", table=name, column=col)
                d = merged[col]
                edges = [(src, "value", sub, "", d.lines.get(src)) for src, sub in d.value.items()]
                edges += [
                    (src, "influence", "", ",".join(sorted(cs)), d.influence_lines.get(src))
                    for src, cs in d.influence.items()
                ]
                for src, kind, sub, clauses, at in edges:
                    if src == target:
                        continue
                    if src not in g:
                        g.add_node(src, kind=src[0], table=src[1], column=src[2])
                    line = at or lines[col]
                    batch.append(
                        (
                            src,
                            target,
                            kind,
                            {"kind": kind, "sub": sub, "clauses": clauses, "file": file_of, "line": line},
                        )
                    )
            g.add_edges_from(batch)
        for one, st, name in later:
            had = len(one.diagnostics)
            _engine_check(one, st, binder.result(name) if binder is not None else None, name)
            diagnostics.extend(one.diagnostics[had:])
    # a table without a schema from which no column could be inferred is still drawn, as a placeholder
    drawn = {n[1] for n in g.nodes if n[0] == "source"}
    for t in sorted(unknown_tables - drawn):
        g.add_node(("source", t, "*"), kind="source", table=t, column="*", origin="unknown", placeholder=True)
    catalog.pending = set()
    return Project(
        g,
        catalog,
        models,
        {m.table: m for m in mappings},
        diagnostics,
        dialect,
        order,
        tables,
        views_of(g),
        dict(by_model),
        reads,
        deps,
        loaded.declared,
        loaded.unparsed,
    )


def _reads_table(reads: set[tuple[str, ...]], parts: tuple[str, ...]) -> bool:
    return any(same_table(r, parts) for r in reads)


def simulate(project: Project, edits: dict[Node, Any]) -> list[Diagnostic]:
    """What the models would report after a schema edit, re-resolving only the models it reaches.

    A model is re-resolved when it reads an edited table; its readers only when the columns it
    shows them change (a column dropped from a ``SELECT *``), and so on downstream. Every other
    model reports what it reported before. Equal to a full rebuild's diagnostics (tested)."""
    dialect = project.dialect
    catalog = mapping_catalog(list(project.sources.values()), dialect, edits, project.tables)
    g = project.graph
    for (kind, table, col), (what, new) in edits.items():
        if kind != "source" or catalog.find(declared_parts(table, dialect)) is not None:
            continue
        # a table no schema declares: its schema is the columns the models were seen to read, and
        # the edit applies to those (a reader of a dropped column then breaks, as it would)
        seen = sorted(
            n[2] for n in g.nodes if n[0] == "source" and n[1] == table and g.nodes[n].get("inferred")
        )
        if col not in seen:
            continue
        cols = [c for c in seen if c != col] + ([new] if what == "rename" and new else [])
        if what == "retype":
            cols = seen
        catalog.add(
            declared_table("source", table, declared_parts(table, dialect), cols, dialect, origin="inferred")
        )
    edited_sources = [catalog.find(declared_parts(t, dialect)) for k, t, _ in edits if k == "source"]
    source_parts = {info.parts for info in edited_sources if info is not None}
    todo = {
        name
        for name, reads in project.reads.items()
        if any(_reads_table(reads, parts) for parts in source_parts)
    }
    for kind, table, _ in edits:
        if kind == "model" and table in project.readers:
            todo |= set(project.readers.successors(table))
    for info in project.catalog.tables.values():
        if info.kind == "model" and info.name not in todo:
            cols = (
                _visible(info.name, project.models[info.name].columns, edits)
                if info.name in project.models
                else [info.shown(c) for c in info.columns]
            )
            catalog.add(declared_table("model", info.name, info.parts, cols, dialect, origin="model"))
    out: list[Diagnostic] = []
    for name in project.order:
        if name not in todo:
            continue
        sts = project.statements[name]
        one = resolve_model(name, sts, catalog, dialect, project.declared)
        out.extend(one.diagnostics)
        visible = _visible(name, one.columns, edits)
        if visible != _visible(name, project.models[name].columns, edits):
            todo |= set(project.readers.successors(name))
        catalog.add(declared_table("model", name, sts[0].target, visible, dialect, origin="model"))
    return out
