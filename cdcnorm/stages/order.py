"""Stage order: the sortable ``position`` of every good row.

position = normalised log position, then the zero-padded sequence (when the
mapping has one), then the image rank (before 1 < after 2; other rows 0),
joined by '.'; plain byte-wise order of the string is the change order.
"""

from __future__ import annotations

from cdcnorm import positions
from cdcnorm.plan import Plan

RANK = "CASE __act WHEN 'before' THEN 1 WHEN 'after' THEN 2 ELSE 0 END"


def order_rows(plan: Plan) -> Plan:
    base = "__pos"
    sequence = plan.mapping.mapping.change.sequence
    if sequence:
        base = f"__pos || '.' || {positions.sequence_text(sequence, '__seq')}"
    # Later stages group and join on the parts (__pos, __seq), which is cheaper than on the
    # joined string; the string is built only where it is output.
    sql = (
        f"SELECT *, {RANK} AS __rank, {base} || '.' || CAST({RANK} AS VARCHAR) AS __position "
        f"FROM {plan.rel('typed')} WHERE __ok"
    )
    return plan.add("order", "ordered", sql)
