"""The envelope projection shared by the writers, and its order.

Columns, in this order: table, action, key, position, committed_at, values,
prior, changed, origin. ``render=True`` gives the JSON forms (decimals as
strings with their exact scale, timestamps RFC 3339 UTC with Z, bytes base64);
``render=False`` keeps native types (decimal128(p,s), timestamp[us, UTC], ...).

Events are sorted by position, then key, action and the row's own action
code. After dedupe (position, action code, key) is unique among kept rows, so
the order is total: the output never depends on the order of the input.
"""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.plan import Plan
from cdcnorm.sql import ident, lit
from cdcnorm.stages.order import position_text
from cdcnorm.types.json import RawJson
from cdcnorm.types.timestamp import timestamp_render


def envelope_columns(plan: Plan, *, render: bool, raw: RawJson | None = None) -> list[tuple[str, str]]:
    """The envelope's columns; with ``raw``, JSON values are placeholders for ``raw.line``."""
    types = plan.mapping.field_types
    names = plan.fields

    def value(i: int, prefix: str) -> str:
        col = f"{prefix}{i}"
        if raw is not None and types[names[i]].name == "json":
            return raw.placeholder(col)
        return types[names[i]].render(col) if render else col

    def struct(indices: list[int], prefix: str) -> str:
        return "{" + ", ".join(f"{lit(names[i])}: {value(i, prefix)}" for i in indices) + "}"

    every = list(range(len(names)))
    return [
        ("table", lit(plan.mapping.table)),
        ("action", "__action"),
        ("key", struct(plan.key_index, "v")),
        ("position", position_text(plan)),
        ("committed_at", timestamp_render("__cat") if render else "__cat"),
        ("values", f"CASE WHEN __action = 'upsert' THEN {struct(every, 'v')} END"),
        ("prior", f"CASE WHEN __has_prior THEN {struct(every, 'p')} END"),
        ("changed", "__changed"),
        ("origin", "{'file': f.name, 'row': __row}"),
    ]


def sort_columns(plan: Plan) -> list[tuple[str, str]]:
    keys = [(f"__k_key{j}", f"v{i}") for j, i in enumerate(plan.key_index)]
    return [
        ("__k_pos", "__pos"),
        ("__k_seq", "__seq"),
        ("__k_rank", "__rank"),
        *keys,
        ("__k_action", "__action"),
        ("__k_act", "__act"),
    ]


def project(
    plan: Plan,
    files_relation: str,
    *,
    render: bool,
    as_line: bool = False,
    sort_keys: bool = False,
    relation: str | None = None,
) -> str:
    """SQL of the envelopes (one JSON text per event as ``line`` with ``as_line``), sorted.

    ``sort_keys`` adds the sort keys as columns instead of sorting; ``relation`` reads events
    already in output order (see ``sorted_events``) and keeps their order.
    """
    raw = RawJson() if as_line else None
    cols = envelope_columns(plan, render=render, raw=raw)
    nulls = json_nulls(plan) if raw is not None else None
    select = (
        [f"{raw.line(cols)} AS line", *([f"{nulls} AS __json_nulls"] if nulls else [])]
        if raw is not None
        else [f"{e} AS {ident(n)}" for n, e in cols]
    )
    source = f"FROM {plan.rel('events')} JOIN {files_relation} f ON f.id = __file"
    keys = ""
    if relation is not None:
        select = [x.replace("f.name", "__fname") for x in select]
        sql = f"SELECT {', '.join(select)} FROM {relation}"
    elif not sort_keys:
        sql = f"SELECT {', '.join(select)} {source} ORDER BY {', '.join(e for _, e in sort_columns(plan))}"
    else:
        select += [f"{e} AS {n}" for n, e in sort_columns(plan)]
        keys = "".join(f", {n}" for n, _ in sort_columns(plan))
        sql = f"SELECT {', '.join(select)} {source}"
    return _with_json_nulls(sql, nulls, keys)


#: The envelope member a JSON Lines event has when a json field of its ``values`` or ``prior``
#: holds the JSON value ``null``, which its line can only write as ``null``, as it writes no value.
JSON_NULLS = "json_nulls"


def json_nulls(plan: Plan) -> str | None:
    """SQL: a JSON Lines event's ``json_nulls`` member as JSON text, ``{"values": [...], "prior":
    [...]}`` (the json fields holding the JSON null in each), or NULL when no field does; None for
    a table without json fields."""
    names = plan.fields
    types = plan.mapping.field_types
    json_fields = [i for i, n in enumerate(names) if types[n].name == "json"]
    if not json_fields:
        return None

    def held(prefix: str, when: str) -> str:
        items = ", ".join(
            f"CASE WHEN {when} AND CAST({prefix}{i} AS VARCHAR) = 'null' THEN {lit(names[i])} END"
            for i in json_fields
        )
        return f"list_filter([{items}], lambda x: x IS NOT NULL)"

    values, prior = held("v", "__action = 'upsert'"), held("p", "__has_prior")
    return (
        f"CASE WHEN len({values}) + len({prior}) > 0 "
        f"THEN CAST(to_json({{'values': {values}, 'prior': {prior}}}) AS VARCHAR) END"
    )


def _with_json_nulls(sql: str, nulls: str | None, keys: str = "") -> str:
    """The lines of ``sql`` with the ``json_nulls`` member added as their last member where they
    need it (every other line stays as it was); the order of the rows is ``sql``'s."""
    if nulls is None:
        return sql
    return (
        f"SELECT CASE WHEN __json_nulls IS NULL THEN line ELSE substr(line, 1, length(line) - 1) || "
        f"',\"{JSON_NULLS}\":' || __json_nulls || '}}' END AS line{keys} FROM ({sql})"
    )


def write_events(
    plan: Plan, engine: DuckDBEngine, files_relation: str, path: Path, relation: str | None, *, fmt: str
) -> int:
    """Write the events (one RFC 8259 JSON text per line for json, native types for parquet); rows
    written. ``relation`` holds them already sorted (see ``sorted_events``): Parquet's columns are
    written from it. A JSON Lines event is made one line of text first (the engine's ``to_json``,
    JSON values spliced in as written: ``RawJson``), and the lines are sorted by the events' keys:
    moving one text per event costs the sort much less than moving the envelope's columns (the
    benchmark's 666,630 events, the same bytes: 1.4-2.4 s against 2.4-3.3 s in one process; the
    whole 1M-row run 0.88x the time). The lines are made into a table first, then sorted as they
    stream to the file (``DuckDBEngine.copy``): made and sorted in one statement, under
    ``--memory-limit 500MB`` the sort could not pin its blocks (exit 12) where this spills."""
    if fmt != "json":
        return engine.copy(project(plan, files_relation, render=False, relation=relation), path, fmt)
    table = plan.relation("event_lines")
    engine.materialize(table, project(plan, files_relation, render=True, as_line=True, sort_keys=True))
    try:
        keys = ", ".join(n for n, _ in sort_columns(plan))
        return engine.copy(f"SELECT line FROM {ident(table)} ORDER BY {keys}", path, "lines")
    finally:
        engine.drop(table)


def sorted_events(plan: Plan, files_relation: str) -> str:
    """SQL: the flat events with their file names, in output order. Sorting the flat rows and
    building the nested envelopes afterwards costs much less than sorting the envelopes."""
    order = ", ".join(f"e.{e}" for _, e in sort_columns(plan))
    return (
        f"SELECT e.*, f.name AS __fname FROM {plan.rel('events')} e JOIN {files_relation} f "
        f"ON f.id = e.__file ORDER BY {order}"
    )


def sorted_envelopes(
    plan: Plan, engine: DuckDBEngine, files_relation: str, *, render: bool, as_line: bool = False
) -> pa.Table:
    """The envelopes in output order, as an Arrow table (the library API): the engine
    computes them with their sort keys, Arrow sorts by the keys and gathers the rows."""
    import pyarrow.compute as pc  # the library API's alone: a tenth of a second to import

    sql = project(plan, files_relation, render=render, as_line=as_line, sort_keys=True)
    table = engine.arrow(sql)
    keys = [n for n, _ in sort_columns(plan)]
    sortable = pa.table({k: _sortable(table[k]) for k in keys})
    order = pc.sort_indices(sortable, sort_keys=[(k, "ascending") for k in keys])
    return table.drop_columns(keys).take(order)


def _sortable(column: pa.ChunkedArray) -> pa.ChunkedArray:
    """Extension types (uuid, json) sort by their storage: bytes, as the engine does."""
    if isinstance(column.type, pa.ExtensionType):
        return pa.chunked_array([c.storage for c in column.chunks], type=column.type.storage_type)
    return column
