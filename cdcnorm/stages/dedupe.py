"""Stage dedupe: drop exact duplicates, quarantine conflicting versions.

A row's identity is (position without image rank, action, key). Rows with
one identity and the same content (committed_at and every typed value) are
duplicates: the one from the first file by name, lowest record number, is
kept. Rows with one identity and different content are a conflict: every
version goes to quarantine, none is chosen.

Only identities seen more than once need a closer look, so the stage first
finds those with a hash aggregate and compares the (few) rows of those
identities exactly, value by value; every other row is kept as it is.
"""

from __future__ import annotations

from cdcnorm.plan import Plan


def dedupe_rows(plan: Plan) -> Plan:
    keys = ", ".join(f"v{i}" for i in plan.key_index)
    identity = f"__pos, __seq, __act, {keys}"
    content = "{" + ", ".join(["'c': __cat", *(f"'v{i}': v{i}" for i in range(len(plan.fields)))]) + "}"
    ordered = plan.rel("ordered")
    plan = plan.add(
        "dedupe",
        "repeats",
        f"SELECT {identity}, count(*) AS __versions FROM {ordered} GROUP BY {identity} HAVING count(*) > 1",
        materialize=True,
    )
    on = " AND ".join(
        f"o.{c} = r.{c}" for c in ["__pos", "__seq", "__act", *(f"v{i}" for i in plan.key_index)]
    )
    window = f"PARTITION BY {identity}"
    plan = plan.add(
        "dedupe",
        "repeat_fates",
        f"SELECT __file, __row, __act, __versions, CASE WHEN min({content}) OVER ({window}) IS DISTINCT FROM "
        f"max({content}) OVER ({window}) THEN 'conflict' "
        f"WHEN row_number() OVER ({window} ORDER BY __file, __row) > 1 THEN 'duplicate' ELSE 'keep' END AS __fate "
        f"FROM (SELECT o.*, r.__versions FROM {ordered} o JOIN {plan.rel('repeats')} r ON {on})",
        materialize=True,
    )
    sql = (
        f"SELECT o.*, coalesce(f.__fate, 'keep') AS __fate, coalesce(f.__versions, 1) AS __versions "
        f"FROM {ordered} o LEFT JOIN {plan.rel('repeat_fates')} f ON o.__file = f.__file AND o.__row = f.__row"
    )
    return plan.add("dedupe", "deduped", sql)
