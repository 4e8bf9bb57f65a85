"""Stage source: one relation of every dump file's raw rows for a table."""

from __future__ import annotations

from cdcnorm.plan import Plan


def unite_sources(plan: Plan) -> Plan:
    """Union the table's raw relations, keeping file id, record number and the mapped raw columns
    (under their internal names; a relation without a column gives NULL)."""
    cols = [plan.internal[c] for c in plan.mapping.mapping.mapped_columns()]
    return plan.add("source", "source", plan.raw_union(cols))
