"""Stage source: one relation of every dump file's raw rows for a table."""

from __future__ import annotations

from collections.abc import Callable

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
    picks = [
        f"{_by_file(plan, name, 'u.', lambda col: f'u.{plan.raw(col)}')} AS {ident(f'__from{i}')}"
        for i, name in enumerate(plan.fields)
        if name in alternatives
    ]
    return plan.add("source", "source", f"SELECT u.*, {', '.join(picks)} FROM ({union}) AS u")


def _by_file(plan: Plan, name: str, prefix: str, then: Callable[[str], str]) -> str:
    """SQL: ``then(column)`` of the alternative of field ``name`` each row's file reads."""
    whens = " ".join(
        f"WHEN {prefix}__file IN ({', '.join(map(str, ids))}) THEN {then(col)}"
        for col, ids in plan.alternative_files(name)
        if ids
    )
    return f"CASE {whens} END" if whens else "CAST(NULL AS VARCHAR)"


def alternative_named(plan: Plan, name: str, prefix: str) -> str:
    """SQL: the raw column a row of field ``name`` was read from (its file's alternative), for
    messages."""
    return _by_file(plan, name, prefix, lit)


def _codes(plan: Plan, action: str) -> str:
    """SQL: the raw action codes mapped to ``action``, listed for IN (empty when none is)."""
    return ", ".join(
        lit(k) for k, v in sorted(plan.mapping.mapping.change.action.codes.items()) if v == action
    )


def _by_image(plan: Plan, prefix: str, before: str, after: str) -> str:
    """SQL: ``before`` on a delete's row (its key and last image are its before-image's), else
    ``after``, with ``change.images``."""
    deletes = _codes(plan, "delete")
    if not deletes:
        return after
    act = f"{prefix}{plan.raw(plan.mapping.mapping.change.action.column)}"
    return f"CASE WHEN {act} IN ({deletes}) THEN {before} ELSE {after} END"


def _images(plan: Plan) -> str:
    """A record holding both images of its change: each field's text is its after-image's, but a
    delete's, which is its before-image's (its key and last image): ``__image<i>``; an update's
    before-image (its prior) is ``__prior<i>``, NULL on other rows."""
    m = plan.mapping.mapping
    act = f"u.{plan.raw(m.change.action.column)}"
    updates = _codes(plan, "after") or "NULL"
    out = []
    for i, name in enumerate(plan.fields):
        after, before = f"u.{plan.raw(m.raw_column(name))}", f"u.{plan.raw(m.before_column(name) or '')}"
        out.append(f"{_by_image(plan, 'u.', before, after)} AS __image{i}")
        out.append(f"CASE WHEN {act} IN ({updates}) THEN {before} END AS __prior{i}")
    return ", ".join(out)


def image_named(plan: Plan, name: str, prefix: str) -> str:
    """SQL: the raw column a row's value of field ``name`` was read from with ``change.images``:
    the before-image's member on a delete, else the after-image's (for messages)."""
    m = plan.mapping.mapping
    return _by_image(plan, prefix, lit(m.before_column(name) or ""), lit(m.raw_column(name)))
