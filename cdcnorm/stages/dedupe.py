"""Stage dedupe: one version per (position, sequence, action, key).

Rows with the same identity and the same typed content are duplicates: the
copy from the first file by name is kept. The same identity with different
content is a conflict, and every version goes to quarantine: none is chosen.

Across runs (a landing area), the identities earlier runs emitted or merged
(``<table>__earlier``) and the before-images still waiting (``<table>__carried``)
count too: a row repeating one of them with the same content is a duplicate of
that run; with other content it is a conflict, quarantined with the earlier
run named.

Only identities seen more than once need a closer look, so the stage first
finds those with a hash aggregate and compares the (few) rows of those
identities exactly, value by value; every other row is kept as it is.
"""

from __future__ import annotations

from cdcnorm.plan import Plan


def dedupe_rows(plan: Plan) -> Plan:
    keys = [f"v{i}" for i in plan.key_index]
    identity = ", ".join(["__pos", "__seq", "__act", *keys])
    content = "{" + ", ".join(["'c': __cat", *(f"'v{i}': v{i}" for i in range(len(plan.fields)))]) + "}"
    ordered = plan.rel("ordered")
    plan = plan.add(
        "dedupe",
        "repeats",
        f"SELECT {identity}, count(*) AS __versions FROM {ordered} GROUP BY {identity} HAVING count(*) > 1",
        materialize=True,
    )
    on = " AND ".join(f"o.{c} = r.{c}" for c in ["__pos", "__seq", "__act", *keys])
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
    earlier_cols = ", ".join(["__pos", "__seq", "__act", *keys])
    carried_cols = ", ".join(["__pos", "__seq", "'before' AS __act", *keys])  # carried rows are before-images
    seen_on = " AND ".join(f"o.{c} = e.{c}" for c in ["__pos", "__seq", "__act", *keys])
    plan = plan.add(
        "dedupe",
        "seen",
        f"SELECT o.__file, o.__row, o.__act, bool_and(e.__hash = {plan.content('o.')}) AS __same, "
        f"min(e.__run) AS __earlier_run FROM {ordered} o JOIN ("
        f"SELECT {earlier_cols}, __hash, __run FROM {plan.rel('earlier')} UNION ALL "
        f"SELECT {carried_cols}, {plan.content()} AS __hash, __run FROM {plan.rel('carried')}) e ON {seen_on} "
        "GROUP BY o.__file, o.__row, o.__act",
        materialize=True,
    )
    # every row whose fate is not 'keep': a repeat inside this run, or of an earlier run
    plan = plan.add(
        "dedupe",
        "fates",
        "SELECT coalesce(s.__file, f.__file) AS __file, coalesce(s.__row, f.__row) AS __row, "
        "coalesce(s.__act, f.__act) AS __act, "
        "CASE WHEN s.__same THEN 'duplicate' WHEN NOT s.__same THEN 'conflict' ELSE f.__fate END AS __fate, "
        "coalesce(f.__versions, 1) AS __versions, s.__earlier_run AS __earlier_run "
        f"FROM {plan.rel('seen')} s FULL JOIN (SELECT * FROM {plan.rel('repeat_fates')} WHERE __fate <> 'keep') f "
        "ON s.__file = f.__file AND s.__row = f.__row",
        materialize=True,
    )
    sql = (
        f"SELECT o.*, coalesce(f.__fate, 'keep') AS __fate, coalesce(f.__versions, 1) AS __versions, "
        f"f.__earlier_run FROM {ordered} o LEFT JOIN {plan.rel('fates')} f ON o.__file = f.__file AND o.__row = f.__row"
    )
    return plan.add("dedupe", "deduped", sql)
