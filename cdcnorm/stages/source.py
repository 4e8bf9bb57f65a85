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
    if m.change.images is not None:
        return plan.add("source", "source", f"SELECT u.*, {_images(plan)} FROM ({union}) AS u")
    alternatives = m.alternatives
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


def _images(plan: Plan) -> str:
    """A record holding both images of its change: each field's text is its after-image's, but a
    delete's, which is its before-image's (its key and last image): ``__image<i>``; an update's
    before-image (its prior) is ``__prior<i>``, NULL on other rows."""
    m = plan.mapping.mapping
    act = f"u.{plan.raw(m.change.action.column)}"

    def codes(action: str) -> str:
        listed = [lit(k) for k, v in sorted(m.change.action.codes.items()) if v == action]
        return ", ".join(listed) if listed else "NULL"

    out = []
    for i, name in enumerate(plan.fields):
        after, before = plan.raw(m.raw_column(name)), plan.raw(m.before_column(name) or "")
        out.append(f"CASE WHEN {act} IN ({codes('delete')}) THEN u.{before} ELSE u.{after} END AS __image{i}")
        out.append(f"CASE WHEN {act} IN ({codes('after')}) THEN u.{before} END AS __prior{i}")
    return ", ".join(out)


def image_named(plan: Plan, name: str, prefix: str) -> str:
    """SQL: the raw column a row's value of field ``name`` was read from with ``change.images``:
    the before-image's member on a delete, else the after-image's (for messages)."""
    m = plan.mapping.mapping
    deletes = [lit(k) for k, v in sorted(m.change.action.codes.items()) if v == "delete"]
    after = lit(m.raw_column(name))
    if not deletes:
        return after
    act = f"{prefix}{plan.raw(m.change.action.column)}"
    return (
        f"CASE WHEN {act} IN ({', '.join(deletes)}) THEN {lit(m.before_column(name) or '')} ELSE {after} END"
    )
