"""Export the graph: DOT (always), SVG and PNG (Graphviz's dot program), GraphML and JSON node-link.

Columns are grouped by table in the drawing (one cluster per table: dump
columns, mapping tables and models apart); value edges are solid, influence
edges dashed and labelled with their clauses.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Any

import graphviz
import networkx as nx

from cdcnorm.errors import GraphvizMissing, UsageError
from cdcnorm.lineage.graph import node_id, node_name
from cdcnorm.lineage.resolve import Node

FORMATS = ("dot", "svg", "png", "graphml", "json")
COLOURS = {"raw": "#f2efe6", "source": "#dcebf7", "model": "#e4f2df"}


def around(g: nx.MultiDiGraph, node: Node, depth: int) -> nx.MultiDiGraph:
    """The neighbourhood of a column: every column within ``depth`` hops, up or down."""
    near = nx.ego_graph(g.to_undirected(as_view=True), node, radius=depth)
    return g.subgraph(near.nodes).copy()


def _dot_id(n: Node) -> str:
    # no colon: DOT would read "a:b" as node a, port b
    return f"{n[0]} {n[1]}.{n[2]}"


def to_dot(g: nx.MultiDiGraph, title: str = "column lineage") -> graphviz.Digraph:
    dot = graphviz.Digraph(
        "lineage", graph_attr={"rankdir": "LR", "label": title, "fontname": "Helvetica", "fontsize": "12"}
    )
    dot.attr("node", shape="box", style="rounded,filled", fontname="Helvetica", fontsize="10")
    dot.attr("edge", fontname="Helvetica", fontsize="8")
    tables: dict[tuple[str, str], list[Node]] = {}
    for n in sorted(g.nodes):
        tables.setdefault((n[0], n[1]), []).append(n)
    for i, ((kind, table), nodes) in enumerate(sorted(tables.items())):
        label = {
            "raw": f"dump columns of {table}",
            "source": f"{table} (mapping)",
            "model": f"{table} (model)",
        }[kind]
        with dot.subgraph(name=f"cluster_{i}") as c:
            c.attr(label=label, style="rounded", color="#999999", fontname="Helvetica", fontsize="11")
            for n in nodes:
                c.node(_dot_id(n), n[2], fillcolor=COLOURS[kind])
    for u, v, k, d in sorted(g.edges(keys=True, data=True)):
        if k == "value":
            dot.edge(_dot_id(u), _dot_id(v), label="" if d["sub"] == "copy" else d["sub"])
        else:
            dot.edge(
                _dot_id(u),
                _dot_id(v),
                style="dashed",
                color="#c0504d",
                fontcolor="#c0504d",
                label=d["clauses"],
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


def export(g: nx.MultiDiGraph, out: Path, fmt: str | None = None, title: str = "column lineage") -> Path:
    fmt = fmt or out.suffix.lstrip(".").lower()
    if fmt not in FORMATS:
        raise UsageError(f"unknown diagram format {fmt!r}; formats are {', '.join(FORMATS)}", file=str(out))
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f"{out.name}.tmp-{os.getpid()}")
    try:
        if fmt == "dot":
            tmp.write_text(to_dot(g, title).source, encoding="utf-8")
        elif fmt in ("svg", "png"):
            if shutil.which("dot") is None:
                raise GraphvizMissing(
                    f"{fmt.upper()} needs the Graphviz dot program, which is not installed",
                    hint="install it (Debian/Ubuntu: apt-get install graphviz; macOS: brew install graphviz), "
                    "or export .dot, .graphml or .json, which need nothing",
                )
            tmp.write_bytes(to_dot(g, title).pipe(format=fmt))
        elif fmt == "graphml":
            nx.write_graphml(_plain(g), tmp)
        else:
            data: dict[str, Any] = nx.node_link_data(_plain(g), edges="links")
            tmp.write_text(json.dumps(data, indent=1, sort_keys=True) + "\n", encoding="utf-8")
        os.replace(tmp, out)
    finally:
        if tmp.exists():
            tmp.unlink()
    return out
