"""The lineage explorer: one self-contained HTML file (no CDN, no server, works offline).

Tables are cards laid out left to right by depth (dump columns, mapping tables, then models in
dependency order); a card opens to its columns. Search finds a column; clicking a column
highlights it, everything upstream (what it is computed from) and downstream (what is computed
from it); influence edges can be switched off by kind, which also stops the highlighting from
following them; hovering shows where a column is defined and where each edge comes from
(file:line). The graph is embedded as JSON; the page draws it with plain DOM and SVG.
"""

from __future__ import annotations

import html
import json
from collections.abc import Sequence
from typing import Any

import networkx as nx

from cdcnorm.lineage.graph import node_id, node_name
from cdcnorm.lineage.resolve import Node


def _depths(g: nx.MultiDiGraph) -> dict[tuple[str, str], int]:
    """Each table's column in the layout: dump columns 0, mapping tables 1, a model one more than
    the deepest table it reads (a cycle is cut where it closes)."""
    tables = nx.DiGraph()
    for n in g.nodes:
        tables.add_node((n[0], n[1]))
    for u, v in g.edges():
        a, b = (u[0], u[1]), (v[0], v[1])
        if a != b:
            tables.add_edge(a, b)
    depth: dict[tuple[str, str], int] = {}
    dag = nx.condensation(tables)
    for c in nx.topological_sort(dag):
        members = dag.nodes[c]["members"]
        base = max((depth[p] + 1 for m in members for p in tables.predecessors(m) if p in depth), default=0)
        for m in members:
            floor = {"raw": 0, "source": 1}.get(m[0], 2)
            depth[m] = max(base, floor)
    return depth


def explorer_data(
    g: nx.MultiDiGraph, title: str, focus: Node | None = None, gaps: Sequence[str] = ()
) -> dict[str, Any]:
    from cdcnorm.lineage.questions import KIND_NAMES, kinds_of

    depth = _depths(g)
    defined: dict[Node, str] = {}
    for _, v, d in g.in_edges(data=True):
        if d.get("file") and v not in defined:
            defined[v] = f"{d['file']}:{d.get('line') or ''}".rstrip(":")
    tables: dict[tuple[str, str], list[Node]] = {}
    for n in sorted(g.nodes):
        tables.setdefault((n[0], n[1]), []).append(n)
    return {
        "title": title,
        "focus": node_id(focus) if focus else None,
        "unresolved": list(gaps),
        "kinds": list(KIND_NAMES),
        "tables": [
            {
                "id": f"{kind}:{table}",
                "kind": kind,
                "name": table,
                "depth": depth[(kind, table)],
                # a table no schema declares: drawn as a placeholder, its columns inferred from use
                "placeholder": any(g.nodes[n].get("origin") in ("inferred", "unknown") for n in cols),
                "columns": [
                    {"id": node_id(n), "name": node_name(n), "column": n[2], "where": defined.get(n, "")}
                    for n in cols
                ],
            }
            for (kind, table), cols in sorted(tables.items(), key=lambda t: (depth[t[0]], t[0][1], t[0][0]))
        ],
        "edges": [
            {
                "from": node_id(u),
                "to": node_id(v),
                "edge": k,
                "how": d.get("sub", "") if k == "value" else d.get("clauses", ""),
                "kinds": [] if k == "value" else kinds_of(d.get("clauses", "")),
                "where": f"{d.get('file', '')}:{d.get('line') or ''}".rstrip(":"),
            }
            for u, v, k, d in sorted(g.edges(keys=True, data=True))
        ],
    }


def explorer_html(
    g: nx.MultiDiGraph, title: str = "column lineage", focus: Node | None = None, gaps: Sequence[str] = ()
) -> str:
    data = json.dumps(explorer_data(g, title, focus, gaps), separators=(",", ":")).replace("</", "<\\/")
    return PAGE.replace("__TITLE__", html.escape(title)).replace("__DATA__", data)


PAGE = r"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>__TITLE__</title>
<style>
  body { font: 13px/1.35 system-ui, sans-serif; margin: 0; color: #222; }
  header { position: sticky; top: 0; z-index: 3; background: #fafafa; border-bottom: 1px solid #ddd;
           padding: 8px 12px; display: flex; gap: 16px; align-items: center; flex-wrap: wrap; }
  header h1 { font-size: 15px; margin: 0; }
  #search { width: 320px; padding: 4px 6px; }
  #status { color: #555; }
  label.kind { margin-right: 8px; white-space: nowrap; }
  .table.placeholder { border-style: dashed; background: #fff; }
  #board { position: relative; display: flex; gap: 90px; padding: 16px 24px; align-items: flex-start; }
  .layer { display: flex; flex-direction: column; gap: 12px; min-width: 190px; z-index: 1; }
  .table { background: #fff; border: 1px solid #aaa; border-radius: 6px; }
  .table.raw .head { background: #f2efe6; } .table.source .head { background: #dcebf7; }
  .table.model .head { background: #e4f2df; }
  .head { padding: 4px 8px; cursor: pointer; border-radius: 6px 6px 0 0; font-weight: 600; }
  .head .count { color: #666; font-weight: 400; }
  ul.cols { list-style: none; margin: 0; padding: 2px 0; border-top: 1px solid #ccc; }
  ul.cols[hidden] { display: none; }
  li.col { padding: 1px 8px; cursor: pointer; white-space: nowrap; }
  li.col:hover { background: #f0f0f0; }
  .dim li.col, .dim .head { opacity: .35; }
  .dim li.col.focus, .dim li.col.up, .dim li.col.down, .dim .head.up, .dim .head.down, .dim .head.focus { opacity: 1; }
  li.col.focus, .head.focus { background: #ffd54f; font-weight: 700; }
  li.col.up, .head.up { background: #cfe3ff; } li.col.down, .head.down { background: #d9f2d0; }
  svg#wires { position: absolute; left: 0; top: 0; pointer-events: none; z-index: 0; overflow: visible; }
  svg#wires path { fill: none; stroke: #9aa; stroke-width: 1; }
  svg#wires path.influence { stroke: #c0504d; stroke-dasharray: 4 3; }
  svg#wires path.lit { stroke-width: 2.2; stroke: #1b5fbf; }
  svg#wires path.influence.lit { stroke: #c0504d; }
  .dim svg#wires path:not(.lit) { opacity: .15; }
  #gaps { background: #fff4d6; border-bottom: 1px solid #e0c060; padding: 6px 12px; }
  #gaps summary { cursor: pointer; font-weight: 600; }
  #gaps ul { margin: 4px 0 0; padding-left: 20px; font-family: ui-monospace, monospace; font-size: 12px; }
</style>
</head>
<body>
<header>
  <h1>__TITLE__</h1>
  <input id="search" list="names" placeholder="find a column: table.column" autocomplete="off">
  <datalist id="names"></datalist>
  <span id="kinds"></span>
  <span id="status">click a column to see what it comes from and what it feeds</span>
</header>
<details id="gaps" hidden><summary></summary><ul></ul></details>
<div id="board"><svg id="wires"></svg></div>
<script>
"use strict";
const DATA = __DATA__;
const board = document.getElementById("board"), wires = document.getElementById("wires");
const byId = new Map(), tableOf = new Map(), heads = new Map(), lists = new Map();
const enabled = new Set(DATA.kinds);
let focus = null;

// what the graph may miss: the unresolved references, listed under the title
if (DATA.unresolved.length) {
  const gaps = document.getElementById("gaps"), n = DATA.unresolved.length;
  gaps.querySelector("summary").textContent =
    `incomplete: ${n} unresolved reference${n === 1 ? "" : "s"}: the lineage through ${n === 1 ? "it" : "them"} may be missing`;
  for (const text of DATA.unresolved) {
    const li = document.createElement("li"); li.textContent = text; gaps.querySelector("ul").appendChild(li);
  }
  gaps.hidden = false;
}

// cards, one layer per depth
const layers = new Map();
for (const t of DATA.tables) {
  if (!layers.has(t.depth)) {
    const div = document.createElement("div"); div.className = "layer"; layers.set(t.depth, div);
  }
  const card = document.createElement("div"); card.className = "table " + t.kind; card.dataset.table = t.id;
  const head = document.createElement("div"); head.className = "head";
  head.innerHTML = `<span class="name"></span> <span class="count">(${t.columns.length})</span>`;
  head.querySelector(".name").textContent = t.name + (t.kind === "raw" ? " (dump)" : "");
  head.title = t.placeholder ? "no schema: columns inferred from the models" : t.kind === "model" ? "model" : t.kind === "source" ? "source table" : "dump columns";
  if (t.placeholder) { card.classList.add("placeholder"); head.querySelector(".name").textContent += " (no schema)"; }
  const ul = document.createElement("ul"); ul.className = "cols"; ul.hidden = true;
  for (const c of t.columns) {
    const li = document.createElement("li"); li.className = "col"; li.dataset.id = c.id;
    li.textContent = c.column; li.title = c.name + (c.where ? "  —  " + c.where : "");
    li.addEventListener("click", ev => { ev.stopPropagation(); select(c.id); });
    ul.appendChild(li); byId.set(c.id, li); tableOf.set(c.id, t.id);
  }
  head.addEventListener("click", () => { ul.hidden = !ul.hidden; draw(); });
  card.append(head, ul); heads.set(t.id, head); lists.set(t.id, ul);
  layers.get(t.depth).appendChild(card);
}
[...layers.keys()].sort((a, b) => a - b).forEach(d => board.appendChild(layers.get(d)));

// influence kinds: switch them off to hide their edges and stop following them
const kinds = document.getElementById("kinds");
kinds.appendChild(document.createTextNode("influence: "));
for (const k of DATA.kinds) {
  const label = document.createElement("label"); label.className = "kind";
  const box = document.createElement("input"); box.type = "checkbox"; box.checked = true; box.dataset.kind = k;
  box.addEventListener("change", () => { box.checked ? enabled.add(k) : enabled.delete(k); highlight(); draw(); });
  label.append(box, document.createTextNode(" " + k)); kinds.appendChild(label);
}
const live = e => e.edge === "value" || e.kinds.some(k => enabled.has(k));
const ups = new Map(), downs = new Map();
for (const e of DATA.edges) {
  (ups.get(e.to) || ups.set(e.to, []).get(e.to)).push(e);
  (downs.get(e.from) || downs.set(e.from, []).get(e.from)).push(e);
}
function reach(start, adj, key) {
  const seen = new Set(), todo = [start];
  while (todo.length) {
    const n = todo.pop();
    for (const e of adj.get(n) || []) if (live(e) && !seen.has(e[key])) { seen.add(e[key]); todo.push(e[key]); }
  }
  return seen;
}
let upSet = new Set(), downSet = new Set();
function highlight() {
  document.querySelectorAll(".focus,.up,.down").forEach(el => el.classList.remove("focus", "up", "down"));
  if (!focus) { document.body.classList.remove("dim"); return; }
  upSet = reach(focus, ups, "from"); downSet = reach(focus, downs, "to");
  document.body.classList.add("dim");
  byId.get(focus).classList.add("focus"); heads.get(tableOf.get(focus)).classList.add("focus");
  for (const [set, cls] of [[upSet, "up"], [downSet, "down"]])
    for (const id of set) { byId.get(id)?.classList.add(cls); heads.get(tableOf.get(id))?.classList.add(cls); }
  document.getElementById("status").textContent =
    `${byId.get(focus).title}: ${upSet.size} columns upstream, ${downSet.size} downstream`;
}
function select(id) {
  if (!byId.has(id)) return;
  focus = id; lists.get(tableOf.get(id)).hidden = false;
  highlight(); draw(); byId.get(id).scrollIntoView({block: "nearest", inline: "nearest"});
}

// search by name
const names = document.getElementById("names"), search = document.getElementById("search");
const byName = new Map();
for (const t of DATA.tables) for (const c of t.columns) {
  const label = (t.kind === "raw" ? "dump " : "") + c.name; byName.set(label, c.id); byName.set(c.name, byName.get(c.name) || c.id);
  const o = document.createElement("option"); o.value = label; names.appendChild(o);
}
function find(text) {
  text = text.trim(); if (byName.has(text)) return byName.get(text);
  const hit = [...byName.keys()].find(k => k.endsWith(text) || k.includes(text)); return hit ? byName.get(hit) : null;
}
search.addEventListener("keydown", ev => { if (ev.key === "Enter") { const id = find(search.value); if (id) select(id); } });
search.addEventListener("change", () => { const id = find(search.value); if (id) select(id); });

// wires between visible columns (or their table's head when the card is closed)
function anchor(id, right) {
  const li = byId.get(id), head = heads.get(tableOf.get(id));
  const el = lists.get(tableOf.get(id)).hidden ? head : li;
  const r = el.getBoundingClientRect(), b = board.getBoundingClientRect();
  return [right ? r.right - b.left : r.left - b.left, r.top - b.top + r.height / 2];
}
// text from the project (file names, clauses) in the wires' markup: as text, never as markup
function esc(text) {
  return String(text).replace(/[&<>"']/g, ch => `&#${ch.charCodeAt(0)};`);
}
function draw() {
  wires.setAttribute("width", board.scrollWidth); wires.setAttribute("height", board.scrollHeight);
  const seen = new Set(), parts = [];
  for (const e of DATA.edges) {
    if (!live(e)) continue;
    const [x1, y1] = anchor(e.from, true), [x2, y2] = anchor(e.to, false);
    const key = `${x1},${y1},${x2},${y2},${e.edge}`; if (seen.has(key)) continue; seen.add(key);
    const lit = focus && (e.to === focus || upSet.has(e.to)) && (e.from === focus || upSet.has(e.from))
             || focus && (e.from === focus || downSet.has(e.from)) && (e.to === focus || downSet.has(e.to));
    const mid = (x1 + x2) / 2;
    parts.push(`<path class="${e.edge}${lit ? " lit" : ""}" d="M${x1},${y1} C${mid},${y1} ${mid},${y2} ${x2},${y2}"><title>${esc(e.edge)} (${esc(e.how)}) ${esc(e.where)}</title></path>`);
  }
  wires.innerHTML = parts.join("");
}
window.addEventListener("resize", draw);
draw();
if (DATA.focus) select(DATA.focus);
document.body.dataset.ready = "1";
</script>
</body>
</html>
"""
