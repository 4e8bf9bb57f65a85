"""Stage dedupe: one version per (position, sequence, action, key).

Rows with the same identity and the same typed content are duplicates: the
copy from the first file by name is kept. The same identity with different
content is a conflict, and every version goes to quarantine: none is chosen.

Across runs (a landing area), the identities earlier runs emitted or merged
(``<table>__earlier``) and the before-images still waiting (``<table>__carried``)
count too: a row repeating one of them with the same content is a duplicate of
that run; with other content it is a conflict, quarantined with the earlier
run named. So do the identities an earlier run quarantined as conflicts
(``conflicted``, remembered in the index): a later version of such a change is
quarantined too, whatever its content, until a version is fed back from the
quarantine file (a re-delivery of one version must not settle what none was
chosen for); once one is emitted, repeats are compared with it.

Two different changes of one key at one position and sequence (an insert
and a delete, say) cannot be ordered, except a before-image and its
after-image: all of them are quarantined as ``ambiguous order``, never guessed.

Only keys seen more than once at a position and sequence need a closer look,
so the stage first finds those groups with one hash aggregate and compares the
(few) rows of those groups exactly, value by value; every other row is kept as
it is.
"""

from __future__ import annotations

from cdcnorm.plan import INDEX_FORMAT, Plan


def dedupe_rows(plan: Plan) -> Plan:
    keys = [f"v{i}" for i in plan.key_index]
    identity = ", ".join(["__pos", "__seq", "__act", *keys])
    content = "{" + ", ".join(["'c': __cat", *(f"'v{i}': v{i}" for i in range(len(plan.fields)))]) + "}"
    ordered = plan.rel("ordered")
    # One aggregate finds the few groups of a key at a position and sequence that need a closer
    # look: a repeated identity (more rows than kinds of change: one kind, or a before and an
    # after) or an ambiguous order (kinds that are not just a before and an after; found with min
    # and max, which cost less than counting distinct kinds of every group). Their rows, few, are
    # compared exactly below; every other row is kept as it is.
    group = ", ".join(["__pos", "__seq", *keys])
    mixed = "min(__act) <> max(__act) AND NOT bool_and(__act IN ('before', 'after'))"
    on = " AND ".join(f"o.{c} = g.{c}" for c in ["__pos", "__seq", *keys])
    plan = plan.add(
        "dedupe",
        "crowded",
        f"SELECT o.*, g.__ambiguous FROM {ordered} o JOIN (SELECT {group}, ({mixed}) AS __ambiguous "
        f"FROM {ordered} GROUP BY {group} HAVING count(*) > CASE WHEN min(__act) = max(__act) THEN 1 ELSE 2 END "
        f"OR ({mixed})) g ON {on}",
        materialize=True,
    )
    crowded = plan.rel("crowded")
    # per repeated identity: its versions, and whether their contents differ (an aggregate; the
    # same comparison as window functions costs several times more)
    versions = (
        f"SELECT {identity}, count(*) AS __versions, min({content}) IS DISTINCT FROM max({content}) AS __conflict "
        f"FROM {crowded} GROUP BY {identity} HAVING count(*) > 1"
    )
    c_id = ", ".join(f"c.{col}" for col in ["__pos", "__seq", "__act", *keys])
    v_on = " AND ".join(f"c.{col} = v.{col}" for col in ["__pos", "__seq", "__act", *keys])
    plan = plan.add(
        "dedupe",
        "repeat_fates",
        "SELECT c.__file, c.__row, c.__act, v.__versions, CASE WHEN v.__conflict THEN 'conflict' "
        f"WHEN row_number() OVER (PARTITION BY {c_id} ORDER BY c.__file, c.__row) > 1 THEN 'duplicate' ELSE 'keep' END "
        f"AS __fate FROM {crowded} c JOIN ({versions}) v ON {v_on}",
        materialize=True,
    )
    earlier_cols = ", ".join(["__pos", "__seq", "__act", *keys])
    carried_cols = ", ".join(["__pos", "__seq", "'before' AS __act", *keys])  # carried rows are before-images
    seen_on = " AND ".join(f"o.{c} = e.{c}" for c in ["__pos", "__seq", "__act", *keys])
    # identities from an older index format hold the digest it stored: formats 1 and 2 the engine's
    # text of the row (Plan.legacy_content), format 3 an empty bytes value as NULL's text (the same
    # digest as the current one for a table without a bytes field)
    digest_3 = plan.content("o.", format_3=True)
    format_3 = f"WHEN e.__format = 3 THEN {digest_3} " if digest_3 != plan.content("o.") else ""
    # identities written before the mapping's fields were reordered: their digest's field order
    reordered = "".join(
        f"WHEN e.__order = {k} THEN {plan.content('o.', order=order)} "
        for k, order in enumerate(plan.earlier_orders, start=1)
    )
    same = (
        f"e.__hash = CASE WHEN e.__format <= 2 THEN {plan.legacy_content('o.')} {format_3}{reordered}"
        f"ELSE {plan.content('o.')} END"
    )
    # An identity an earlier run emitted is compared with what it emitted; one it only quarantined
    # as a conflict (no version emitted since) makes every later version a conflict too, but a
    # version fed back from the quarantine file, which settles it.
    emitted = "NOT e.__conflicted"
    fed_back = ", ".join(map(str, plan.fed_back))
    settles = f"o.__file IN ({fed_back})" if fed_back else "FALSE"
    plan = plan.add(
        "dedupe",
        "seen",
        "SELECT * FROM ("
        f"SELECT o.__file, o.__row, o.__act, coalesce(bool_and({same}) FILTER (WHERE {emitted}), FALSE) AS __same, "
        f"coalesce(bool_or(e.__other_fields) FILTER (WHERE {emitted}), FALSE) AS __other_fields, "
        # compared with identities written before fields were added: on the fields they digested
        f"coalesce(bool_or(e.__order IN ({', '.join(map(str, [-1, *plan.fewer_orders]))})) FILTER (WHERE {emitted}), FALSE) AS __fewer, "
        f"NOT bool_or({emitted}) AS __unsettled, bool_or({settles}) AS __settles, "
        f"coalesce(min(e.__run) FILTER (WHERE {emitted}), min(e.__run)) AS __earlier_run FROM {ordered} o JOIN ("
        f"SELECT {earlier_cols}, __hash, __format, __run, __other_fields, __order, __conflicted FROM {plan.rel('earlier')} "
        f"UNION ALL SELECT {carried_cols}, {plan.content()} AS __hash, {INDEX_FORMAT}, __run, FALSE, 0, FALSE "
        f"FROM {plan.rel('carried')}) e "
        f"ON {seen_on} "
        "GROUP BY o.__file, o.__row, o.__act) WHERE NOT (__unsettled AND __settles)",
        materialize=True,
    )
    # Two different changes of one key at one position and sequence cannot be ordered (an insert
    # and a delete: which came last?), except a before-image and its after-image: never guessed.
    # The kinds are counted for the (few) groups found above.
    g_on = " AND ".join(f"c.{col} = g.{col}" for col in ["__pos", "__seq", *keys])
    plan = plan.add(
        "dedupe",
        "ambiguous",
        f"SELECT c.__file, c.__row, c.__act, g.__acts FROM {crowded} c JOIN ("
        f"SELECT {group}, count(DISTINCT __act) AS __acts FROM {crowded} WHERE __ambiguous GROUP BY {group}) g "
        f"ON {g_on}",
        materialize=True,
        frees=("crowded",),  # the crowded groups' rows are read no more
    )
    # every row whose fate is not 'keep': an ambiguous order, a repeat of an earlier run, a repeat
    # inside this run (in that order of precedence: one fate per row)
    plan = plan.add(
        "dedupe",
        "fates",
        "SELECT __file, __row, __act, __fate, __versions, __earlier_run, __other_fields, __unsettled FROM ("
        "SELECT *, row_number() OVER (PARTITION BY __file, __row ORDER BY __rank) AS __n FROM ("
        f"SELECT __file, __row, __act, 'ambiguous' AS __fate, __acts AS __versions, "
        f"CAST(NULL AS VARCHAR) AS __earlier_run, FALSE AS __other_fields, FALSE AS __unsettled, 0 AS __rank "
        f"FROM {plan.rel('ambiguous')} UNION ALL "
        "SELECT __file, __row, __act, CASE WHEN __same AND NOT __unsettled THEN 'duplicate' ELSE 'conflict' END, 1, "
        f"__earlier_run, __other_fields, __unsettled, 1 FROM {plan.rel('seen')} UNION ALL "
        "SELECT __file, __row, __act, __fate, __versions, CAST(NULL AS VARCHAR), FALSE, FALSE, 2 "
        f"FROM {plan.rel('repeat_fates')} WHERE __fate <> 'keep')) WHERE __n = 1",
        materialize=True,
    )
    # the identities of this run's conflicts (no earlier run involved), and each version's digest:
    # the index remembers them, so that a later delivery of one version does not settle them
    keep_cols = ", ".join(f"o.{c}" for c in ["__pos", "__seq", "__act", *keys])
    plan = plan.add(
        "dedupe",
        "conflicted",
        f"SELECT {keep_cols}, {plan.content('o.')} AS __content FROM {ordered} o JOIN {plan.rel('fates')} f "
        "ON o.__file = f.__file AND o.__row = f.__row WHERE f.__fate = 'conflict' AND f.__earlier_run IS NULL",
        materialize=True,
    )
    sql = (
        f"SELECT o.*, coalesce(f.__fate, 'keep') AS __fate, coalesce(f.__versions, 1) AS __versions, "
        f"f.__earlier_run FROM {ordered} o LEFT JOIN {plan.rel('fates')} f ON o.__file = f.__file AND o.__row = f.__row"
    )
    return plan.add("dedupe", "deduped", sql)
