"""Stage order: the image rank of every good row, and how its ``position`` is written.

The change order is (position key, sequence key, image rank): before 1 < after 2;
other rows 0. Later stages group, join and sort on these fixed-width keys; the
``position`` text (``position_text``) is built only where it is output: the
normalised log position, the fixed-width sequence (when the mapping has one)
and the rank joined by '.', so plain byte-wise order of the text is the change
order too.
"""

from __future__ import annotations

from cdcnorm import positions
from cdcnorm.plan import Plan

RANK = "CASE __act WHEN 'before' THEN 1 WHEN 'after' THEN 2 ELSE 0 END"


def position_text(plan: Plan, pos: str = "__pos", seq: str = "__seq", rank: str = "__rank") -> str:
    """SQL: the ``position`` text of a row from its keys."""
    change = plan.mapping.mapping.change
    parts = [positions.position_text(change.position, pos)]
    if change.sequence:
        parts.append(positions.sequence_text(change.sequence, change.position, seq))
    parts.append(f"CAST({rank} AS VARCHAR)")
    return " || '.' || ".join(parts)


def order_rows(plan: Plan) -> Plan:
    sql = f"SELECT *, {RANK} AS __rank FROM {plan.rel('typed')} WHERE __ok"
    return plan.add("order", "ordered", sql)
