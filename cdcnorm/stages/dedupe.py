"""Stage dedupe: drop exact duplicates, quarantine conflicting versions.

A row's identity is (position without image rank, action, key). Rows with
one identity and the same content (committed_at and every typed value) are
duplicates: the one from the first file by name, lowest record number, is
kept. Rows with one identity and different content are a conflict: every
version goes to quarantine, none is chosen.
"""

from __future__ import annotations

from cdcnorm.plan import Plan


def dedupe_rows(plan: Plan) -> Plan:
    keys = ", ".join(f"v{i}" for i in plan.key_index)
    content = "{" + ", ".join([f"'c': __cat", *(f"'v{i}': v{i}" for i in range(len(plan.fields)))]) + "}"
    window = f"PARTITION BY __pbase, __act, {keys}"
    sql = (
        f"SELECT *, CASE WHEN min({content}) OVER ({window}) IS DISTINCT FROM max({content}) OVER ({window}) "
        f"THEN 'conflict' WHEN row_number() OVER ({window} ORDER BY __file, __row) > 1 THEN 'duplicate' "
        f"ELSE 'keep' END AS __fate, count(*) OVER ({window}) AS __versions FROM {plan.rel('ordered')}"
    )
    return plan.add("dedupe", "deduped", sql, materialize=True)
