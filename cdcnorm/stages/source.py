"""Stage source: one relation of every dump file's raw rows for a table."""

from __future__ import annotations

from cdcnorm.plan import Plan
from cdcnorm.sql import ident


def unite_sources(plan: Plan) -> Plan:
    """Union the table's dump files, keeping file id, record number and the mapped raw columns."""
    cols = plan.mapping.mapping.mapped_columns()
    parts = []
    for src in plan.sources:
        picked = [f"{ident(c)}" if c in src.columns else f"CAST(NULL AS VARCHAR) AS {ident(c)}" for c in cols]
        parts.append(
            f"SELECT {src.file_id} AS __file, __row, __enc, {', '.join(picked)} FROM {ident(src.relation)}"
        )
    if not parts:
        nulls = ", ".join(f"CAST(NULL AS VARCHAR) AS {ident(c)}" for c in cols)
        parts.append(
            f"SELECT 0 AS __file, CAST(0 AS BIGINT) AS __row, CAST(NULL AS VARCHAR) AS __enc, {nulls} WHERE FALSE"
        )
    return plan.add("source", "source", " UNION ALL ".join(parts))
