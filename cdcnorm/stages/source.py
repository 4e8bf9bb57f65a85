"""Stage source: one relation of every dump file's raw rows for a table."""

from __future__ import annotations

from cdcnorm.plan import Plan
from cdcnorm.sql import ident, lit


def unite_sources(plan: Plan) -> Plan:
    """Union the table's raw relations, keeping file id, record number and the mapped raw columns
    (under their internal names; a relation without a column gives NULL). A field whose ``from``
    lists alternatives gets a column ``__from<i>`` of the first of them each row's file has."""
    m = plan.mapping.mapping
    cols = [plan.internal[c] for c in m.mapped_columns()]
    union = plan.raw_union(cols)
    alternatives = m.alternatives()
    if not alternatives:
        return plan.add("source", "source", union)
    picks = []
    for i, name in enumerate(plan.fields):
        if name not in alternatives:
            continue
        whens = " ".join(
            f"WHEN u.__file IN ({', '.join(map(str, ids))}) THEN u.{plan.raw(col)}"
            for col, ids in plan.alternative_files(name)
            if ids
        )
        picks.append(f"{f'CASE {whens} END' if whens else 'CAST(NULL AS VARCHAR)'} AS {ident(f'__from{i}')}")
    return plan.add("source", "source", f"SELECT u.*, {', '.join(picks)} FROM ({union}) AS u")


def alternative_named(plan: Plan, name: str, prefix: str) -> str:
    """SQL: the raw column a row of field ``name`` was read from (its file's alternative), for
    messages."""
    whens = " ".join(
        f"WHEN {prefix}__file IN ({', '.join(map(str, ids))}) THEN {lit(col)}"
        for col, ids in plan.alternative_files(name)
        if ids
    )
    return f"CASE {whens} END" if whens else "CAST(NULL AS VARCHAR)"
