"""Export the graph: DOT (always), SVG and PNG (Graphviz's dot program), GraphML, JSON node-link,
and the HTML explorer (lineage/explorer.py).

Columns are grouped by table in the drawing (one cluster per table: dump
columns, mapping tables and models apart); value edges are solid, influence
edges dashed and labelled with their clauses.
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Sequence
from pathlib import Path
from typing import Any, cast

import graphviz
import networkx as nx

from cdcnorm.errors import GraphvizMissing, UsageError, counted
from cdcnorm.lineage.graph import node_id, node_name
from cdcnorm.lineage.resolve import Node

FORMATS = ("dot", "svg", "png", "graphml", "json", "html")
COLOURS = {"raw": "#f2efe6", "source": "#dcebf7", "model": "#e4f2df"}


DIRECTIONS = ("up", "down", "both")


def neighbourhood(g: nx.MultiDiGraph, node: Node, hops: int, direction: str = "both") -> nx.MultiDiGraph:
    """The columns within ``hops`` edges of ``node`` following the edges' direction: upstream
    (what it is computed from), downstream (what is computed from it) or both, never sideways (a
    sibling that only shares a source is not a neighbour)."""
    near = {node}
    if direction in ("up", "both"):
        near |= set(nx.single_source_shortest_path_length(g.reverse(copy=False), node, cutoff=hops))
    if direction in ("down", "both"):
        near |= set(nx.single_source_shortest_path_length(g, node, cutoff=hops))
    return g.subgraph(near).copy()


def table_level(g: nx.MultiDiGraph) -> nx.MultiDiGraph:
    """One node per table (dump columns, mapping table, model); an edge per table pair and kind,
    carrying how many column edges it stands for."""
    h = nx.MultiDiGraph()
    for n, d in g.nodes(data=True):
        t = (n[0], n[1], "*")
        origin = d.get("origin") or (h.nodes[t].get("origin") if t in h else None)
        h.add_node(t, kind=n[0], table=n[1], column="*", origin=origin)
    counts: dict[tuple[Node, Node, str], int] = {}
    for u, v, k in g.edges(keys=True):
        a, b = (u[0], u[1], "*"), (v[0], v[1], "*")
        if a != b:
            counts[(a, b, k)] = counts.get((a, b, k), 0) + 1
    for (a, b, k), n in sorted(counts.items()):
        h.add_edge(
            a,
            b,
            key=k,
            kind=k,
            sub=f"{n} columns" if k == "value" else "",
            clauses=f"{n} columns" if k != "value" else "",
            file="",
            line=0,
        )
    return h


def _text(s: str) -> str:
    """A name from the project as a DOT label: as written, never an HTML-like label (``<...>``) or
    an escape of DOT's (``\\N``, the node's name; ``\\l``, a line break)."""
    return cast(str, graphviz.escape(s))  # a str that graphviz knows is no HTML: keep its class


def _dot_id(n: Node) -> str:
    # no colon: DOT would read "a:b" as node a, port b
    return f"{n[0]} {n[1]}.{n[2]}"


FOCUS = "#ffd54f"


def to_dot(g: nx.MultiDiGraph, title: str = "column lineage", focus: Node | None = None) -> graphviz.Digraph:
    dot = graphviz.Digraph(
        "lineage",
        graph_attr={"rankdir": "LR", "label": _text(title), "fontname": "Helvetica", "fontsize": "12"},
    )
    dot.attr("node", shape="box", style="rounded,filled", fontname="Helvetica", fontsize="10")
    dot.attr("edge", fontname="Helvetica", fontsize="8")
    tables: dict[tuple[str, str], list[Node]] = {}
    for n in sorted(g.nodes):
        tables.setdefault((n[0], n[1]), []).append(n)
    for i, ((kind, table), nodes) in enumerate(sorted(tables.items())):
        origins = {g.nodes[n].get("origin") for n in nodes}
        # a table no schema declares is a placeholder: dashed, its columns taken from the models' use
        placeholder = kind == "source" and bool(origins & {"inferred", "unknown"})
        label = {
            "raw": f"dump columns of {table}",
            "source": f"{table} ({'catalog' if origins == {'catalog'} else 'mapping'})",
            "model": f"{table} (model)",
        }[kind]
        if placeholder:
            label = f"{table} (no schema: columns inferred from the models)"
        with dot.subgraph(name=f"cluster_{i}") as c:
            c.attr(
                label=_text(label),
                style="rounded,dashed" if placeholder else "rounded",
                color="#999999",
                fontname="Helvetica",
                fontsize="11",
            )
            for n in nodes:
                if n == focus:  # the column asked about stands out
                    c.node(
                        _dot_id(n), _text(n[2]), fillcolor=FOCUS, penwidth="2.5", fontname="Helvetica-Bold"
                    )
                elif placeholder:
                    text = "(no columns known)" if n[2] == "*" else n[2]
                    c.node(_dot_id(n), _text(text), fillcolor="#ffffff", style="rounded,dashed,filled")
                else:
                    c.node(_dot_id(n), _text(n[2] if n[2] != "*" else table), fillcolor=COLOURS[kind])
    for u, v, k, d in sorted(g.edges(keys=True, data=True)):
        if k == "value":
            dot.edge(_dot_id(u), _dot_id(v), label="" if d["sub"] == "copy" else _text(d["sub"]))
        else:
            dot.edge(
                _dot_id(u),
                _dot_id(v),
                style="dashed",
                color="#c0504d",
                fontcolor="#c0504d",
                label=_text(d["clauses"]),
            )
    return dot


def _plain(g: nx.MultiDiGraph) -> nx.MultiDiGraph:
    """Node ids as strings and attributes as scalars, for GraphML and JSON."""
    h = nx.MultiDiGraph()
    for n, d in g.nodes(data=True):
        h.add_node(node_id(n), name=node_name(n), **{k: v for k, v in d.items() if v is not None})
    for u, v, k, d in g.edges(keys=True, data=True):
        h.add_edge(node_id(u), node_id(v), key=k, **d)
    return h


def export(
    g: nx.MultiDiGraph,
    out: Path,
    fmt: str | None = None,
    title: str = "column lineage",
    focus: Node | None = None,
    gaps: Sequence[str] = (),
) -> Path:
    """Write ``g`` to ``out`` (the format from its suffix, or ``fmt``). ``gaps`` are the unresolved
    references the graph may miss lineage through: every format says so (the drawn ones in their
    title, the explorer in a list under it, GraphML and JSON in the graph's ``unresolved``)."""
    fmt = fmt or out.suffix.lstrip(".").lower()
    if gaps:
        title = f"{title} (incomplete: {counted(len(gaps), 'unresolved reference')})"
    if fmt not in FORMATS:
        raise UsageError(f"unknown diagram format {fmt!r}; formats are {', '.join(FORMATS)}", file=str(out))
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f"{out.name}.tmp-{os.getpid()}")
    try:
        if fmt == "dot":
            tmp.write_text(to_dot(g, title, focus).source, encoding="utf-8")
        elif fmt in ("svg", "png"):
            if shutil.which("dot") is None:
                raise GraphvizMissing(
                    f"{fmt.upper()} needs the Graphviz dot program, which is not installed",
                    hint="install it (Debian/Ubuntu: apt-get install graphviz; macOS: brew install graphviz), "
                    "or export .dot, .graphml or .json, which need nothing",
                )
            tmp.write_bytes(to_dot(g, title, focus).pipe(format=fmt))
        elif fmt == "html":  # the explorer: one self-contained page
            from cdcnorm.lineage.explorer import explorer_html

            tmp.write_text(explorer_html(g, title, focus, gaps), encoding="utf-8")
        elif fmt == "graphml":
            plain = _plain(g)
            if gaps:
                plain.graph["unresolved"] = "\n".join(gaps)
            nx.write_graphml(plain, tmp)
        else:
            plain = _plain(g)
            if gaps:
                plain.graph["unresolved"] = list(gaps)
            data: dict[str, Any] = nx.node_link_data(plain, edges="links")
            tmp.write_text(json.dumps(data, indent=1, sort_keys=True) + "\n", encoding="utf-8")
        os.replace(tmp, out)
    finally:
        if tmp.exists():
            tmp.unlink()
    return out
