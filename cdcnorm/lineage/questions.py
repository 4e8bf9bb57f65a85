"""Questions over the graph: trace a column upstream, the impact of a column downstream,
and the simulated effect of a schema edit (drop, rename, retype).

A source is in the *value* lineage of C when a path of value edges connects
it to C; in the *influence* lineage when some path to C holds at least one
influence edge. Dependents downstream are split the same way.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import networkx as nx
import sqlglot
from sqlglot import exp

from cdcnorm.errors import LineageError, did_you_mean
from cdcnorm.lineage.diagnostics import Diagnostic
from cdcnorm.lineage.graph import Project, declared_parts, node_name, normalise_column, simulate
from cdcnorm.lineage.models import LoadedModels
from cdcnorm.lineage.resolve import Node, same_table
from cdcnorm.mapping.load import LoadedMapping


def _closure(g: nx.DiGraph, starts: set[Node], up: bool) -> set[Node]:
    """Every node reachable from any of ``starts`` (ancestors when ``up``), the starts included:
    one multi-source search, however many starts."""
    if not starts:
        return set()
    view = g.reverse(copy=False) if up else g
    return set(nx.multi_source_dijkstra_path_length(view, starts))


def find_column(project: Project, text: str) -> Node:
    """A column written <table>.<column>: a mapping field, a model column, or a raw dump column
    (in that order); ``dump:``, ``field:`` or ``model:`` in front picks one kind."""
    # a prefix picks the kind where a dump column and a field share a name: dump:, field:, model:
    prefixes = {"dump": "raw", "field": "source", "model": "model"}
    head, _, rest = text.partition(":")
    kinds: tuple[str, ...] = ("source", "model", "raw")
    if rest and head in prefixes:
        kinds, text = (prefixes[head],), rest
    if "." not in text:
        raise LineageError(f"write a column as <table>.<column>, not {text!r}")
    table, column = text.rsplit(".", 1)
    g = project.graph
    # as written first, then as the dialect folds unquoted names
    folded_table = ".".join(normalise_column(p, project.dialect) for p in table.split("."))
    for kind in kinds:
        for t, col in ((table, column), (folded_table, normalise_column(column, project.dialect))):
            node: Node = (kind, t, col)
            if node in g:
                return node
    # a name in another case, where only one column matches it so (``fleet.triplegs.pickupat``)
    same: list[Node] = [n for n in g.nodes if n[0] in kinds and node_name(n).lower() == text.lower()]
    if len({n[0] for n in same}) == len(same) and same:
        best: Node = sorted(same, key=lambda n: kinds.index(n[0]))[0]
        return best
    names = sorted({node_name(n) for n in g.nodes})
    raise LineageError(
        f"no column {text} in the mappings or models{did_you_mean(text, names)}{_may_define(project, table)}"
    )


def _may_define(project: Project, name: str) -> str:
    """For a name no model defines: the files that could not be parsed and name it (they may define
    it), so a user is not sent to look for a misspelling."""
    said = [f"{d.file}:{d.line}" if d.line else d.file for d in _parse_errors(project, {name})]
    if not said:
        return ""
    return f"; {', '.join(dict.fromkeys(said))} could not be parsed and may define it (see lineage --json)"


def model_columns(project: Project, name: str) -> list[Node]:
    if name in project.models:
        return [("model", name, c) for c in project.models[name].columns]
    names = list(project.models)
    raise LineageError(f"no model {name!r}{did_you_mean(name, names)}; models are {', '.join(sorted(names))}")


def _reach(project: Project, node: Node, up: bool) -> tuple[set[Node], set[Node]]:
    """Columns in the value lineage (value edges only) and in the influence lineage (through at
    least one influence edge) of ``node``: upstream when ``up``, downstream otherwise."""
    v = project.view()
    step = nx.ancestors if up else nx.descendants
    crossing = v.influence_in if up else v.influence_out
    value = step(v.value, node)
    every = step(v.every, node) | {node}
    ends = {e for n in every for e in crossing.get(n, ())}
    return value, _closure(v.every, ends, up=up)


def _upstream(project: Project, node: Node) -> tuple[set[Node], set[Node]]:
    return _reach(project, node, up=True)


def _downstream(project: Project, node: Node) -> tuple[set[Node], set[Node]]:
    return _reach(project, node, up=False)


#: How many simple paths ``_paths`` looks at for one source when more than one is asked for: the
#: influence paths are those with an influence edge, among all simple paths.
PATHS_LOOKED_AT = 10_000


def _path_counts(project: Project, node: Node) -> tuple[dict[Node, int], dict[Node, int]]:
    """How many paths lead from each ancestor of ``node`` to it: of value edges alone, and of any
    edges. One pass over its ancestors in topological order (the graph of models is acyclic), so
    ``trace`` knows which sources have more paths than it shows without listing them."""
    views = project.view()
    counted = []
    for view in (views.value, views.every):
        reverse = view.reverse(copy=False)
        ways: dict[Node, int] = {node: 1}
        for n in reversed(list(nx.dfs_postorder_nodes(reverse, node))):
            if n != node:
                ways[n] = sum(ways.get(m, 0) for m in view.successors(n))
        counted.append(ways)
    return counted[0], counted[1]


def _crosses_influence(project: Project, nodes: list[Node]) -> bool:
    """A step of the path ``nodes`` has an influence edge."""
    return any(project.graph.has_edge(u, v, "influence") for u, v in itertools.pairwise(nodes))


def _influence_path(project: Project, a: Node, b: Node) -> list[Node]:
    """A shortest path from ``a`` to ``b`` with at least one influence edge: networkx's shortest path
    when it has one (as a single path has always been chosen), else a breadth-first search over
    (node, influence crossed yet) pairs."""
    g = project.graph
    first: list[Node] = nx.shortest_path(g, a, b)
    if _crosses_influence(project, first):
        return first
    every = project.view().every
    start = (a, False)
    came: dict[tuple[Node, bool], tuple[Node, bool] | None] = {start: None}
    todo = deque([start])
    while todo:
        u, crossed = here = todo.popleft()
        if u == b and crossed:
            path = []
            at: tuple[Node, bool] | None = here
            while at is not None:
                path.append(at[0])
                at = came[at]
            return path[::-1]
        for v in every.successors(u):
            there = (v, crossed or g.has_edge(u, v, "influence"))
            if there not in came:
                came[there] = here
                todo.append(there)
    return first  # not reached for a source in the influence lineage


def _paths(project: Project, a: Node, b: Node, value_only: bool, most: int) -> list[list[dict[str, Any]]]:
    """Up to ``most`` paths from ``a`` to ``b``, shortest first (networkx's shortest simple paths):
    for value lineage the paths of value edges, for influence lineage the paths with at least one
    influence edge (the shortest path of all may have none: a source copied to one column and
    filtering through another would show no influence)."""
    view = project.view().value if value_only else project.view().every
    first = nx.shortest_path(view, a, b) if value_only else _influence_path(project, a, b)
    found: list[list[Node]] = [first]
    if most > 1:
        for looked, nodes in enumerate(nx.shortest_simple_paths(view, a, b), start=1):
            if (value_only or _crosses_influence(project, nodes)) and nodes not in found:
                found.append(nodes)
            if len(found) == most or looked >= PATHS_LOOKED_AT:
                break
    return [_steps(project, n, value_only) for n in found]


def _steps(project: Project, nodes: list[Node], value_only: bool) -> list[dict[str, Any]]:
    """A path's steps: for value lineage its value edges, else an influence edge where a step has one."""
    g = project.graph
    steps = []
    for u, v in itertools.pairwise(nodes):
        edges = g.get_edge_data(u, v)
        key = "value" if "value" in edges and (value_only or "influence" not in edges) else "influence"
        data = edges[key]
        steps.append(
            {
                "from": node_name(u),
                "to": node_name(v),
                "edge": key,
                "how": data["sub"] if key == "value" else data["clauses"],
                "file": data["file"],
                "line": data["line"],
            }
        )
    return steps


def _computed_from(project: Project, node: Node) -> set[Node]:
    """The columns downstream of ``node`` that some value route reaches through a computation (a
    transform or an aggregate): a column is a plain copy only when every route to it copies (a
    UNION of a copy and a computed column computes)."""
    value, g = project.view().value, project.graph
    reach = nx.descendants(value, node) | {node}
    seeds = {v for u in reach for v in value.successors(u) if g.get_edge_data(u, v)["value"]["sub"] != "copy"}
    computed: set[Node] = set()
    for seed in seeds:
        if seed not in computed:  # reached from an earlier seed: so is everything after it
            computed |= nx.descendants(value, seed) | {seed}
    return computed


def unresolved_on(project: Project, nodes: set[Node]) -> list[dict[str, Any]]:
    """The diagnostics of every model among ``nodes``: references the answer could not follow."""
    models = {n[1] for n in nodes if n[0] == "model"}
    return [d.as_dict() for d in project.diagnostics if d.model in models and d.unresolved]


def unresolved_models(project: Project) -> dict[str, list[dict[str, Any]]]:
    """Models whose query could not be resolved at all (no column of theirs is known): what they
    read and show is missing from the graph, so an answer they may be part of cannot be complete."""
    out: dict[str, list[dict[str, Any]]] = {}
    for d in project.diagnostics:
        info = project.models.get(d.model)
        if d.unresolved and info is not None and not info.columns:
            out.setdefault(d.model, []).append(d.as_dict())
    return out


def _unresolved_readers(project: Project, nodes: set[Node]) -> list[dict[str, Any]]:
    """The diagnostics of unresolved models that read a table among ``nodes``: dependents the
    graph cannot show."""
    opaque = unresolved_models(project)
    if not opaque:
        return []
    tables = {declared_parts(n[1], project.dialect) for n in nodes if n[0] in ("source", "raw", "model")}
    return [
        d
        for name, diags in sorted(opaque.items())
        if any(same_table(r, t) for r in project.reads.get(name, set()) for t in tables)
        for d in diags
    ]


def _unparsed_readers(project: Project, nodes: set[Node]) -> list[dict[str, Any]]:
    """The parse errors of files that may read a table among ``nodes``: a statement that could not
    be parsed defines no model, so its dependents are unknown. A file counts when one of its words
    is the name (or the last part of the name) of such a table, or when its words cannot be told."""
    tables = {n[1] for n in nodes if n[0] in ("source", "raw", "model")}
    return [d.as_dict() for d in _parse_errors(project, tables)]


def _parse_errors(project: Project, tables: set[str]) -> list[Diagnostic]:
    """The parse errors of the files whose words name one of ``tables`` (the whole name or its
    last part, in any case), or whose words cannot be told."""
    if not project.unparsed:
        return []
    names = {t.casefold() for t in tables} | {t.rsplit(".", 1)[-1].casefold() for t in tables}
    hit = {f for f, words in project.unparsed.items() if words is None or not names.isdisjoint(words)}
    return [d for d in project.diagnostics if d.reason == "parse error" and d.file in hit]


def _unresolved_answer(column: str, diagnostics: list[dict[str, Any]]) -> dict[str, Any]:
    """``trace`` of a model whose query could not be resolved, or of a column of it: nothing is
    known, and the answer says why (never an empty answer that looks complete)."""
    return {
        "inferred": [],
        "column": column,
        "value": [],
        "influence": [],
        "influence_kinds": {},
        "raw": [],
        "paths": [],
        "more_paths": {"value": [], "influence": []},
        "unresolved": diagnostics,
        "complete": False,
    }


def inferred_on(project: Project, nodes: set[Node]) -> list[str]:
    """Columns among ``nodes`` of tables no schema declares, taken from how the models use them."""
    g = project.graph
    return sorted(node_name(n) for n in nodes if g.nodes[n].get("inferred"))


#: Influence kinds people read, from the resolver's clauses.
KINDS = {
    "join": "join",
    "where": "filter",
    "having": "filter",
    "qualify": "filter",
    "filter": "filter",
    "group": "grouping",
    "distinct": "grouping",
    "intersect": "grouping",
    "except": "grouping",
    "order": "ordering",
    "limit": "ordering",
    "window": "window",
    "exists": "existence",
    "unnest": "unnest",
}
KIND_NAMES = tuple(dict.fromkeys(KINDS.values()))


def kinds_of(clauses: str) -> list[str]:
    return sorted({KINDS.get(c, c) for c in clauses.split(",") if c})


def with_influence(project: Project, kinds: Iterable[str]) -> Project:
    """The project with only the influence edges of ``kinds`` (``--influence``): answers then
    show and follow those kinds alone."""
    wanted = set(kinds)
    unknown = wanted - set(KIND_NAMES)
    if unknown:
        bad = sorted(unknown)[0]
        raise LineageError(
            f"unknown influence kind {bad!r}{did_you_mean(bad, KIND_NAMES)}; kinds are {', '.join(KIND_NAMES)}"
        )
    h = project.graph.copy()
    drop = [
        (u, v, k)
        for u, v, k, d in h.edges(keys=True, data=True)
        if k == "influence" and not set(kinds_of(d.get("clauses", ""))) & wanted
    ]
    h.remove_edges_from(drop)
    return dataclasses.replace(project, graph=h, views=None)


def trace(project: Project, column: str, paths: int = 1) -> dict[str, Any]:
    """Where ``column``'s values come from and what decides its rows; ``paths``: how many paths to
    show per source and lineage, shortest first."""
    node = find_column(project, column)
    value, influence = _upstream(project, node)
    vsrc = sorted(n for n in value if n[0] == "source")
    isrc = sorted(n for n in influence if n[0] == "source")
    raw = sorted({r for s in (*vsrc, *isrc) for r in project.graph.predecessors(s) if r[0] == "raw"})
    if node[0] == "source":
        raw = sorted({*raw, *(r for r in project.graph.predecessors(node) if r[0] == "raw")})
    shown: list[dict[str, Any]] = []
    more: dict[str, list[str]] = {"value": [], "influence": []}
    kinds: dict[str, set[str]] = {}  # an influence source's kinds, along the paths shown
    by_value, by_any = _path_counts(project, node)
    for lineage, sources in (("value", vsrc), ("influence", isrc)):
        for s in sources:
            found = _paths(project, s, node, lineage == "value", paths)
            there = by_value.get(s, 0) if lineage == "value" else by_any.get(s, 0) - by_value.get(s, 0)
            if there > len(found):
                more[lineage].append(node_name(s))
            for steps in found:
                entry: dict[str, Any] = {"source": node_name(s), "lineage": lineage, "steps": steps}
                if lineage == "influence":  # the kinds of this path's influence edges
                    entry["kinds"] = sorted(
                        {k for st in steps if st["edge"] == "influence" for k in kinds_of(st["how"])}
                    )
                    kinds.setdefault(entry["source"], set()).update(entry["kinds"])
                shown.append(entry)
    on_the_way = {node} | value | influence
    # a file that could not be parsed and names a table on the way may define it or write to it
    unresolved = unresolved_on(project, on_the_way) + _unparsed_readers(project, on_the_way)
    return {
        "inferred": inferred_on(project, {node} | value | influence),
        "column": node_name(node),
        "value": [node_name(n) for n in vsrc],
        "influence": [node_name(n) for n in isrc],
        "influence_kinds": {source: sorted(k) for source, k in kinds.items()},
        "raw": [node_name(n) for n in raw],
        "paths": shown,
        # the sources with more paths than shown, by lineage (``paths`` per source are shown)
        "more_paths": more,
        "unresolved": unresolved,
        "complete": not unresolved,
    }


def find_model(project: Project, text: str) -> str | None:
    """The model a name written by a user means: as written, as the dialect folds it (each part;
    a part in double quotes as written inside them), or the one model equal to it but for case."""
    names = set(project.models) | set(unresolved_models(project))
    if text in names:
        return text
    parts = [p[1:-1] if len(p) > 1 and p[0] == p[-1] == '"' else p for p in text.split(".")]
    for candidate in (".".join(parts), ".".join(normalise_column(p, project.dialect) for p in parts)):
        if candidate in names:
            return candidate
    same = [n for n in names if n.lower() == ".".join(parts).lower()]
    return same[0] if len(same) == 1 else None


def trace_target(project: Project, target: str, paths: int = 1) -> list[dict[str, Any]]:
    """``trace model`` answers for each of its columns; ``trace table.column`` for one (``paths``
    per source, as ``trace`` shows them)."""
    opaque = unresolved_models(project)
    named = find_model(project, target)
    if named is not None:
        target = named
    if target in opaque:
        return [_unresolved_answer(target, opaque[target])]
    if target in project.models:
        return [trace(project, node_name(n), paths) for n in model_columns(project, target)]
    if "." not in target.removeprefix("model:").removeprefix("field:").removeprefix("dump:"):
        # before: "write a column as <table>.<column>" for a model name in another case
        models = sorted(project.models)
        raise LineageError(
            f"no model {target!r}{did_you_mean(target, models)}; write a model's name, or a column as "
            f"<table>.<column>{_may_define(project, target)}"
        )
    model = target.rpartition(".")[0].removeprefix("model:")
    if model in opaque:
        return [_unresolved_answer(target, opaque[model])]
    return [trace(project, target, paths)]


@dataclass
class Edit:
    kind: str  # drop | rename | retype
    value: str | None = None

    def as_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "value": self.value}


def _kind_of_type(sql_type: str, dialect: str) -> tuple[str, int | None, int | None]:
    """(class, width, scale): exact | float | text | other, for comparing a retype."""
    try:
        dt = exp.DataType.build(sql_type, dialect=dialect)
    except Exception:  # an unknown type name: compare by its text only
        return ("other", None, None)
    t = dt.this
    params = [int(p.this.this) for p in dt.expressions if isinstance(p, exp.DataTypeParam) and p.this.is_int]
    if t in exp.DataType.REAL_TYPES - {exp.DataType.Type.DECIMAL}:
        return ("float", None, None)
    if t == exp.DataType.Type.DECIMAL:
        return ("exact", params[0] if params else 18, params[1] if len(params) > 1 else 0)
    widths = {
        exp.DataType.Type.TINYINT: 8,
        exp.DataType.Type.SMALLINT: 16,
        exp.DataType.Type.INT: 32,
        exp.DataType.Type.BIGINT: 64,
    }
    if t in widths:
        return ("integer", widths[t], None)
    if t in exp.DataType.TEXT_TYPES:
        return ("text", params[0] if params else None, None)
    return ("other", None, None)


def _type_change(old: str, new: str, dialect: str) -> str | None:
    a, b = _kind_of_type(old, dialect), _kind_of_type(new, dialect)
    if a[0] == "exact" and b[0] == "float":
        return f"an exact decimal becomes a float ({old} -> {new}): values become approximate"
    if a[0] == b[0] == "exact" and ((b[1] or 0) < (a[1] or 0) or (b[2] or 0) < (a[2] or 0)):
        return f"the decimal narrows ({old} -> {new}): larger or finer values no longer fit"
    if a[0] == b[0] == "integer" and (b[1] or 0) < (a[1] or 0):
        return f"the integer narrows ({old} -> {new}): large values no longer fit"
    if a[0] == b[0] == "text" and b[1] is not None and (a[1] is None or b[1] < a[1]):
        return f"the text narrows ({old} -> {new}): longer values no longer fit"
    if a[0] == "integer" and b[0] == "float" and (a[1] or 0) > 53:
        return f"a 64-bit integer becomes a float ({old} -> {new}): values above 2**53 lose precision"
    if _written(old, dialect) != _written(new, dialect):
        return f"the type changes ({old} -> {new})"
    return None


def _as_mapping_type(value: str) -> str:
    """A retype of a mapping's field as SQL: a mapping type's SQL type (``float`` -> DOUBLE,
    ``text(12)`` -> VARCHAR(12)); any other text as written (an SQL type)."""
    from cdcnorm.errors import MappingError
    from cdcnorm.lineage.graph import sql_type_of
    from cdcnorm.mapping.model import FieldSpec
    from cdcnorm.types import resolve

    try:
        return sql_type_of(resolve(FieldSpec(type=value)))
    except (MappingError, ValueError, KeyError):
        return value


def _written(type_text: str, dialect: str) -> str:
    """A type as the dialect writes it (``decimal(12,2)`` and ``DECIMAL(12, 2)`` are one type)."""
    try:
        return str(exp.DataType.build(type_text, dialect=dialect).sql(dialect=dialect))
    except (ValueError, sqlglot.errors.ParseError):
        return type_text.lower()


def impact(
    project: Project,
    column: str,
    edit: Edit | None,
    *,
    mappings: list[LoadedMapping],
    loaded: LoadedModels | None = None,
) -> dict[str, Any]:
    node = find_column(project, column)
    value, influence = _downstream(project, node)
    vdep = sorted(n for n in value if n[0] == "model")
    idep = sorted(n for n in influence if n[0] == "model")
    result: dict[str, Any] = {
        "column": node_name(node),
        "edit": edit.as_dict() if edit else None,
        "value_dependents": [node_name(n) for n in vdep],
        "influence_dependents": [node_name(n) for n in idep],
        "broken_models": [],
        "broken_mappings": [],
        "value_changes": [],
        "row_changes": [],
    }
    # the models the answer passes through: what they could not resolve may hide dependents
    # and the models whose query could not be resolved that read a table on the way
    on_the_way = {node} | value | influence
    result["unresolved"] = (
        unresolved_on(project, on_the_way)
        + _unresolved_readers(project, on_the_way)
        + _unparsed_readers(project, on_the_way)
    )
    result["complete"] = not result["unresolved"]
    result["inferred"] = inferred_on(project, {node} | value | influence)
    if edit is None:
        return result
    g = project.graph
    if edit.kind == "retype" and edit.value and node[0] in ("raw", "source") and node[1] in project.sources:
        # a mapping's field takes a mapping's type (``float`` is a double, not SQL's 4-byte FLOAT)
        edit = Edit(edit.kind, _as_mapping_type(edit.value))
    # the dump columns and canonical fields the edit touches (a raw column edit reaches its fields)
    if node[0] == "raw":
        # a field whose from lists alternatives still reads the others: it does not break
        raws = [node]
        fields = [
            s
            for s in g.successors(node)
            if s[0] == "source" and sum(1 for r in g.predecessors(s) if r[0] == "raw") == 1
        ]
    elif node[0] == "source":
        raws, fields = [r for r in g.predecessors(node) if r[0] == "raw"], [node]
    else:
        raws, fields = [], []
    # a dump column dropped or renamed needs a mapping fix; a canonical field renamed does not
    # (its readers break instead, below)
    if edit.kind == "drop" or (edit.kind == "rename" and node[0] == "raw"):
        for r in raws:
            for f in g.successors(r):
                if f[0] != "source":
                    continue
                lm = project.sources[f[1]]
                fix = (
                    f"set fields.{f[2]}.from: {edit.value}"
                    if edit.kind == "rename"
                    else f"remove field {f[2]} (and what reads it)"
                )
                if node[0] == "raw" and f not in fields:
                    # one of the field's from alternatives: dropped, the field still reads the
                    # others (a dump with none of them stops as drift); renamed, the list needs the name
                    if edit.kind != "rename":
                        continue
                    listed = lm.mapping.raw_columns(f[2])
                    fix = f"set fields.{f[2]}.from: {json.dumps([edit.value if c == r[2] else c for c in listed])}"
                result["broken_mappings"].append(
                    {
                        "mapping": lm.path.name,
                        "table": f[1],
                        "field": f[2],
                        "raw_column": r[2],
                        "reason": "the raw column is dropped"
                        if edit.kind == "drop"
                        else f"the raw column is renamed to {edit.value}",
                        "fix": fix,
                    }
                )
    # A source column renamed at the source keeps its canonical field (the mapping's `from`
    # follows it), so only the mapping breaks; dropped, the field loses its data and every
    # reference to it breaks. A model column's drop or rename breaks its readers.
    resimulate = (
        (node[0] == "model" and edit.kind in ("drop", "rename"))
        or (fields and edit.kind == "drop")
        or (node[0] == "source" and edit.kind == "rename")  # the canonical field itself renamed
    )
    if resimulate:
        targets = [node] if node[0] == "model" else fields
        edits: dict[Node, Any] = {t: (edit.kind, edit.value) for t in targets}
        before = {(d.model, d.reason, d.reference) for d in project.diagnostics}
        # only the models the edit reaches are resolved again
        for d in simulate(project, edits):
            if d.unresolved and (d.model, d.reason, d.reference) not in before:
                result["broken_models"].append(d.as_dict())
    # the engine's own answer: bind and run every model before and after the edit
    binding_targets = (
        fields if node[0] in ("raw", "source") and (edit.kind == "drop" or node[0] == "source") else []
    )
    engine_types = None  # the binding check's types (before, after) of the models it built
    if binding_targets and loaded is not None:
        from cdcnorm.lineage.binding import check_edit

        answers = [check_edit(project, loaded, t[1], t[2], edit.kind, edit.value) for t in binding_targets]
        checks = [c for c, _ in answers]
        engine_types = answers[0][1] if len(answers) == 1 else None
        result["binding"] = {
            "checked": True,
            "broken": [b for c in checks for b in c["broken"]],
            "unavailable": [u for c in checks for u in c["unavailable"]]
            + [
                {
                    "model": "*",
                    "reason": f"{t[1]} has no schema (its columns are inferred): the engine cannot build it",
                }
                for t in binding_targets
                if g.nodes[t].get("inferred")
            ],
        }
    else:
        result["binding"] = {
            "checked": False,
            "broken": [],
            "unavailable": [{"model": "*", "reason": "the edit is not of a source table's column"}],
        }
    if edit.kind == "retype" and edit.value:
        from cdcnorm.lineage.annotate import type_models

        affected = {n[1] for n in vdep}
        if node[0] == "model":  # a model's column: its type is its query's, as sqlglot types it
            affected.add(node[1])
            typed_before = type_models(project, only=affected)
            old = typed_before.get(node, "UNKNOWN")
            retyped: dict[Node, Any] = {node: ("retype", edit.value)}
        else:
            old = g.nodes[node].get("type") or ("UNKNOWN" if g.nodes[node].get("inferred") else "TEXT")
            retyped = {f: ("retype", edit.value) for f in fields}
        change = _type_change(old, edit.value, project.dialect)
        if change:
            # each dependent's type before and after, from sqlglot's type annotation
            if node[0] != "model":
                typed_before = type_models(project, only=affected)
            typed_after = type_models(project, retyped, only=affected)
            computed = _computed_from(project, node)
            for n in vdep:
                copies = n not in computed
                a, b = typed_before.get(n, "UNKNOWN"), typed_after.get(n, "UNKNOWN")
                typed_by = "sqlglot"
                # the engine's types where it built the model before and after (its own answer)
                was, now = (
                    (engine_types[0].get(n[1], {}).get(n[2]), engine_types[1].get(n[1], {}).get(n[2]))
                    if engine_types
                    else (None, None)
                )
                if was is not None and now is not None:
                    a, b, typed_by = was, now, "duckdb"
                if a != b:
                    what = f"its type changes ({a} -> {b}); the source: {change}"
                else:
                    what = f"its type stays {a}; a column it is computed from changes: {change}"
                result["value_changes"].append(
                    {
                        "column": node_name(n),
                        "how": "copied: the output's type changes with it"
                        if copies and a != b
                        else "computed from it: results may change",
                        "type_before": a,
                        "type_after": b,
                        "types_from": typed_by,
                        "change": what,
                    }
                )
    # the edited column decides rows through these influence edges (join, filter, group keys ...)
    # (each clause's edge ends, then one search downstream per clause: linear, however many dependents)
    reach = nx.descendants(g, node) | {node}
    ends: dict[str, set[Node]] = {}
    for u in reach:
        for _, v, k, d in g.out_edges(u, keys=True, data=True):
            if k == "influence":
                for c in d["clauses"].split(","):
                    if c:
                        ends.setdefault(c, set()).add(v)
    every = project.view().every
    reached = {c: _closure(every, vs, up=False) for c, vs in ends.items()}
    for n in idep:
        clauses = sorted(c for c, r in reached.items() if n in r)
        result["row_changes"].append({"column": node_name(n), "clauses": clauses})
    return result


def breaks(result: dict[str, Any]) -> bool:
    binding = result.get("binding") or {}
    return bool(result["broken_models"] or result["broken_mappings"] or binding.get("broken"))
