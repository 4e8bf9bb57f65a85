"""Stage dedupe: one version per (position, sequence, action, key).

Rows with the same identity and the same typed content are duplicates: the
copy from the first file by name is kept. The same identity with different
content is a conflict, and every version goes to quarantine: none is chosen.

Across runs (a landing area), the identities earlier runs emitted or merged
(``<table>__earlier``) and the before-images still waiting (``<table>__carried``)
count too: a row repeating one of them with the same content is a duplicate of
that run; with other content it is a conflict, quarantined with the earlier
run named.

Two different changes of one key at one position and sequence (an insert
and a delete, say) cannot be ordered, except a before-image and its
after-image: all of them are quarantined as ``ambiguous order``, never guessed.

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
    # Two different changes of one key at one position and sequence cannot be ordered (an insert
    # and a delete: which came last?), except a before-image and its after-image: never guessed.
    # Found with min and max (more than one kind: they differ; two kinds that are all before and
    # after images: the exception), which cost less than counting distinct kinds of every group;
    # the kinds are counted for the (few) groups found.
    group = ", ".join(["__pos", "__seq", *keys])
    g_on = " AND ".join(f"o.{c} = g.{c}" for c in ["__pos", "__seq", *keys])
    h_on = " AND ".join(f"x.{c} = h.{c}" for c in ["__pos", "__seq", *keys])
    found = (
        f"SELECT {group} FROM {ordered} GROUP BY {group} "
        "HAVING min(__act) <> max(__act) AND NOT bool_and(__act IN ('before', 'after'))"
    )
    plan = plan.add(
        "dedupe",
        "ambiguous",
        f"SELECT o.__file, o.__row, o.__act, g.__acts FROM {ordered} o JOIN ("
        f"SELECT {group}, count(DISTINCT __act) AS __acts FROM {ordered} x SEMI JOIN ({found}) h ON {h_on} "
        f"GROUP BY {group}) g ON {g_on}",
        materialize=True,
    )
    # every row whose fate is not 'keep': an ambiguous order, a repeat of an earlier run, a repeat
    # inside this run (in that order of precedence: one fate per row)
    plan = plan.add(
        "dedupe",
        "fates",
        "SELECT __file, __row, __act, __fate, __versions, __earlier_run FROM ("
        "SELECT *, row_number() OVER (PARTITION BY __file, __row ORDER BY __rank) AS __n FROM ("
        f"SELECT __file, __row, __act, 'ambiguous' AS __fate, __acts AS __versions, "
        f"CAST(NULL AS VARCHAR) AS __earlier_run, 0 AS __rank FROM {plan.rel('ambiguous')} UNION ALL "
        "SELECT __file, __row, __act, CASE WHEN __same THEN 'duplicate' ELSE 'conflict' END, 1, __earlier_run, 1 "
        f"FROM {plan.rel('seen')} UNION ALL "
        "SELECT __file, __row, __act, __fate, __versions, CAST(NULL AS VARCHAR), 2 "
        f"FROM {plan.rel('repeat_fates')} WHERE __fate <> 'keep')) WHERE __n = 1",
        materialize=True,
    )
    sql = (
        f"SELECT o.*, coalesce(f.__fate, 'keep') AS __fate, coalesce(f.__versions, 1) AS __versions, "
        f"f.__earlier_run FROM {ordered} o LEFT JOIN {plan.rel('fates')} f ON o.__file = f.__file AND o.__row = f.__row"
    )
    return plan.add("dedupe", "deduped", sql)
