"""Stage source: one relation of every dump file's raw rows for a table."""

from __future__ import annotations

from cdcnorm.plan import Plan
from cdcnorm.sql import ident


def unite_sources(plan: Plan) -> Plan:
    """Union the table's raw relations, keeping file id, record number and the mapped raw columns
    (under their internal names; a relation without a column gives NULL)."""
    cols = [plan.internal[c] for c in plan.mapping.mapping.mapped_columns()]
    parts = []
    for rel in plan.relations:
        picked = [ident(c) if c in rel.columns else f"CAST(NULL AS VARCHAR) AS {ident(c)}" for c in cols]
        parts.append(f"SELECT __file, __row, __enc, {', '.join(picked)} FROM {ident(rel.name)}")
    if not parts:
        nulls = ", ".join(f"CAST(NULL AS VARCHAR) AS {ident(c)}" for c in cols)
        parts.append(
            f"SELECT CAST(0 AS INTEGER) AS __file, CAST(0 AS BIGINT) AS __row, CAST(NULL AS VARCHAR) AS __enc, "
            f"{nulls} WHERE FALSE"
        )
    return plan.add("source", "source", " UNION ALL ".join(parts))
