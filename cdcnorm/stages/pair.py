"""Stage pair: fold before-images into their after-images; a before-image waits for its partner.

Paired mode: a before row and an after row at one position (and sequence)
form one update. Within a position, a before pairs with the after of the same
key; when a position holds exactly one before and one after that share their
key with no image of the other kind, the update changed the key; several such
befores and afters cannot be paired but by guess: they are quarantined
(``unpairable``) as an ambiguous pairing. An after with no before is an upsert,
counted as unpaired. A before with no after is **pending**: it waits, in the
landing area, for its after-image to arrive in a later run
(``<table>__carried`` brings the waiting ones back), unless the run settles
it (``Plan.settle``) or quarantined an after-image at its position and
sequence (a bad value, a conflict): then it is quarantined, with the reason. An after-image an earlier run
already emitted unpaired (``__unpaired`` in ``<table>__earlier``) stands in
for the after of a late before-image (a *ghost*: nothing is emitted for it
again). In after-only mode a before row is quarantined.
"""

from __future__ import annotations

from cdcnorm.plan import Plan


def pair_images(plan: Plan) -> Plan:
    change = plan.mapping.mapping.change
    one_record = change.images is not None  # each record holds both images (b0..bn: the before's)
    paired_mode = change.updates == "paired" and not one_record
    keys = plan.key_index
    n = len(plan.fields)
    values = ", ".join(f"v{i}" for i in range(n))
    befores_in = ", " + ", ".join(f"b{i}" for i in range(n)) if one_record else ""
    types = dict(_value_types(plan))
    no_befores = ", " + ", ".join(f"CAST(NULL AS {types[i]}) AS b{i}" for i in range(n)) if one_record else ""
    deduped = plan.rel("deduped")
    plan = plan.add(
        "pair",
        "candidates",
        f"SELECT __file, __row, __act, __pos, __seq, __cat, __rank, {values}{befores_in}, FALSE AS __carried "
        f"FROM {deduped} WHERE __fate = 'keep' UNION ALL "
        f"SELECT __file, __row, 'before', __pos, __seq, __cat, 1, {values}{no_befores}, TRUE FROM {plan.rel('carried')}",
    )
    candidates = plan.rel("candidates")
    same_key = " AND ".join(f"a.v{i} = b.v{i}" for i in keys)
    # Images of one position and sequence that no image of the other kind shares a key with
    # ("lone") pair as a key change only one to one; several lone befores and afters there cannot
    # be told apart: all of them are quarantined as an ambiguous pairing, never paired by guess.
    # Lone images are only looked for where an unpairable set can be: at a position and sequence
    # with images of both kinds and more than two of them (one of each always pairs), which an
    # aggregate finds without comparing keys.
    other = "CASE a.__act WHEN 'before' THEN 'after' ELSE 'before' END"
    busy = (
        f"SELECT __pos, __seq FROM {candidates} WHERE __act IN ('before', 'after') GROUP BY __pos, __seq "
        "HAVING count(*) FILTER (WHERE __act = 'before') >= 1 AND count(*) FILTER (WHERE __act = 'after') >= 1 "
        "AND count(*) > 2"
    )
    lone = (
        f"SELECT a.__file, a.__row, a.__act, a.__pos, a.__seq FROM {candidates} a "
        f"SEMI JOIN ({busy}) g ON a.__pos = g.__pos AND a.__seq = g.__seq "
        f"WHERE a.__act IN ('before', 'after') AND NOT EXISTS (SELECT 1 FROM {candidates} b "
        f"WHERE b.__act = {other} AND b.__pos = a.__pos AND b.__seq = a.__seq AND {same_key})"
    )
    unpairable = (
        "SELECT __file, __row, __act, __befores, __afters FROM (SELECT *, "
        "count(*) FILTER (WHERE __act = 'before') OVER w AS __befores, "
        "count(*) FILTER (WHERE __act = 'after') OVER w AS __afters "
        f"FROM ({lone}) WINDOW w AS (PARTITION BY __pos, __seq)) "
        "WHERE __befores >= 1 AND __afters >= 1 AND NOT (__befores = 1 AND __afters = 1)"
    )
    if not paired_mode:
        unpairable += " AND FALSE"
    plan = plan.add("pair", "unpairable", unpairable, materialize=True)
    plan = plan.add(
        "pair",
        "kept",
        f"SELECT * FROM {candidates} c WHERE NOT EXISTS (SELECT 1 FROM {plan.rel('unpairable')} u "
        "WHERE u.__file = c.__file AND u.__row = c.__row)",
        materialize=True,
    )
    kept = plan.rel("kept")
    carried = ", ".join(
        [
            "a.__pos AS a_pos, a.__seq AS a_seq, a.__cat AS a_cat",
            "b.__pos AS b_pos, b.__seq AS b_seq, b.__cat AS b_cat",
            *(f"a.v{i} AS a{i}" for i in range(n)),
            *(f"b.v{i} AS p{i}" for i in range(n)),
        ]
    )
    ghost_values = ", ".join(
        f"e.v{i}" if i in keys else f"CAST(NULL AS {t}) AS v{i}" for i, t in _value_types(plan)
    )
    if one_record:
        # An update's record holds its before-image: the row pairs with itself, a key change when
        # the before-image's key differs. A before-image of the key alone (some databases write no
        # more) is no image to show as prior: the update's prior, and its changed, stay null.
        nonkey = [i for i in range(n) if i not in keys] or keys
        before_key = " AND ".join(f"k.b{i} IS NOT NULL" for i in keys)
        pairs = (
            "SELECT k.__file AS af, k.__row AS ar, FALSE AS ghost, k.__file AS bf, k.__row AS br, "
            f"({' AND '.join(f'k.b{i} = k.v{i}' for i in keys)}) AS same_key, "
            "k.__pos AS a_pos, k.__seq AS a_seq, k.__cat AS a_cat, k.__pos AS b_pos, k.__seq AS b_seq, "
            f"k.__cat AS b_cat, {', '.join(f'k.v{i} AS a{i}' for i in range(n))}, "
            f"{', '.join(f'k.b{i} AS p{i}' for i in range(n))}, "
            f"({' OR '.join(f'k.b{i} IS NOT NULL' for i in nonkey)}) AS __img "
            f"FROM {kept} k WHERE k.__act = 'after' AND {before_key}"
        )
    elif paired_mode:
        # the after-images, and the ghosts of those emitted earlier: a step of its own, read twice
        plan = plan.add(
            "pair",
            "afters",
            f"SELECT __file, __row, __pos, __seq, __cat, {values}, FALSE AS __ghost FROM {kept} WHERE __act = 'after' "
            f"UNION ALL SELECT CAST(NULL AS INTEGER), CAST(NULL AS BIGINT), e.__pos, e.__seq, "
            f"CAST(NULL AS TIMESTAMPTZ), {ghost_values}, TRUE FROM {plan.rel('earlier')} e "
            f"WHERE e.__unpaired AND EXISTS (SELECT 1 FROM {kept} b WHERE b.__act = 'before' "
            "AND b.__pos = e.__pos AND b.__seq = e.__seq)",
        )
        afters = plan.rel("afters")
        befores = f"(SELECT * FROM {kept} WHERE __act = 'before')"
        # Same-key pairs are one equi-join. The images of a position and sequence that share no key
        # with one of the other kind ("lone": an anti-join finds them, and they are few) pair as a
        # key change only where that position and sequence has exactly one lone before and one
        # lone after; the two kinds of pair never overlap (a lone image has no same-key partner).
        lone = (
            "SELECT *, count(*) OVER (PARTITION BY __pos, __seq) AS __n FROM {side} x WHERE NOT EXISTS "
            "(SELECT 1 FROM {other} y WHERE y.__pos = x.__pos AND y.__seq = x.__seq AND {same})"
        )
        same_xy = " AND ".join(f"x.v{i} = y.v{i}" for i in keys)
        lone_a = lone.format(side=afters, other=befores, same=same_xy)
        lone_b = lone.format(side=befores, other=afters, same=same_xy)
        pick = "a.__file AS af, a.__row AS ar, a.__ghost AS ghost, b.__file AS bf, b.__row AS br"
        pairs = (
            f"SELECT {pick}, TRUE AS same_key, {carried}, TRUE AS __img FROM {afters} a JOIN {befores} b "
            f"ON a.__pos = b.__pos AND a.__seq = b.__seq AND {same_key} UNION ALL "
            f"SELECT {pick}, FALSE, {carried}, TRUE FROM ({lone_a}) a JOIN ({lone_b}) b "
            "ON a.__pos = b.__pos AND a.__seq = b.__seq WHERE a.__n = 1 AND b.__n = 1"
        )
    else:
        pairs = (
            f"SELECT a.__file AS af, a.__row AS ar, FALSE AS ghost, a.__file AS bf, a.__row AS br, TRUE AS same_key, "
            f"{carried}, TRUE AS __img FROM {kept} a, {kept} b WHERE FALSE"
        )
    plan = plan.add("pair", "pairs", pairs, materialize=True)
    p = plan.rel("pairs")
    # before-images without an after-image: they wait (pending), or this run settles them
    if plan.settle == "all":
        settled = "TRUE"
    elif plan.settle is not None:
        settled = f"k.__pos < {plan.settle}"
    else:
        settled = "FALSE"
    # an after-image this run rejected at the same position and sequence (a bad value, a conflict)
    # will not come again: its before-image waits no more, and says why
    rejected_after = (
        f"EXISTS (SELECT 1 FROM {plan.rel('typed')} t WHERE t.__act = 'after' AND t.__pos = k.__pos "
        f"AND t.__seq = k.__seq AND (NOT t.__ok OR EXISTS (SELECT 1 FROM {plan.rel('fates')} f "
        "WHERE f.__fate IN ('conflict', 'ambiguous') AND f.__file = t.__file AND f.__row = t.__row)))"
    )
    partner = f"({str(paired_mode).upper()} AND {rejected_after})"
    waiting = (
        f"SELECT k.*, (NOT {str(paired_mode).upper()} OR {settled} OR {partner}) AS __settled, "
        f"{partner} AS __partner_rejected FROM {kept} k "
        f"WHERE k.__act = 'before' AND NOT EXISTS (SELECT 1 FROM {p} q WHERE q.bf = k.__file AND q.br = k.__row)"
    )
    plan = plan.add("pair", "waiting", waiting, materialize=True)
    nulls = ", ".join(f"NULL AS p{i}" for i in range(n))
    priors = ", ".join(f"p{i}" for i in range(n))
    plan = plan.add(
        "pair",
        "links",
        f"SELECT af AS f, ar AS r, same_key, {priors} FROM {p} WHERE NOT ghost "
        # (a record holding both images is one row: its before-image is no row of its own)
        f"UNION ALL SELECT bf, br, same_key, {nulls} FROM {p}{' WHERE FALSE' if one_record else ''}",
    )
    # `paired` is what --stop-after pair shows: every kept row with its role. The envelope
    # stage reads `pairs` and `kept` directly, and the ledger counts from their aggregates.
    role = (
        "CASE WHEN k.__act = 'before' AND l.f IS NULL THEN 'pending' "
        "WHEN k.__act = 'before' AND l.same_key THEN 'merged' ELSE 'emitted' END"
    )
    sql = (
        f"SELECT k.*, {role} AS __role, l.same_key AS __same_key, "
        f"(k.__act = 'after' AND l.f IS NULL AND {str(paired_mode or one_record).upper()}) AS __unpaired_after, "
        f"{', '.join(f'l.p{i}' for i in range(n))} "
        f"FROM {kept} k LEFT JOIN {plan.rel('links')} l ON k.__file = l.f AND k.__row = l.r"
    )
    return plan.add("pair", "paired", sql)


def _value_types(plan: Plan) -> list[tuple[int, str]]:
    types = plan.types()
    return [(i, types[f"v{i}"]) for i in range(len(plan.fields))]
