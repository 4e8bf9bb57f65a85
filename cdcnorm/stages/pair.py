"""Stage pair: fold before-images into their after-images.

Paired mode: a before row and an after row at one position (and sequence)
form one update. Within a position, a before pairs with the after of the same
key; when a position holds exactly one before and one after with different
keys, the update changed the key. A before with no after is quarantined; an
after with no before is an upsert, counted as unpaired. In after-only mode a
before row is quarantined.
"""

from __future__ import annotations

from cdcnorm.plan import Plan


def pair_images(plan: Plan) -> Plan:
    paired_mode = plan.mapping.mapping.change.updates == "paired"
    keys = plan.key_index
    deduped = plan.rel("deduped")
    plan = plan.add("pair", "kept", f"SELECT * FROM {deduped} WHERE __fate = 'keep'")
    kept = plan.rel("kept")
    n = len(plan.fields)
    same_key = " AND ".join(f"a.v{i} = b.v{i}" for i in keys)
    # a pair carries both images, so the envelope stage needs no join of its own
    before_values = ", ".join(
        [
            "a.__pos AS a_pos, a.__seq AS a_seq, a.__cat AS a_cat",
            "b.__pos AS b_pos, b.__seq AS b_seq, b.__cat AS b_cat",
            *(f"a.v{i} AS a{i}" for i in range(n)),
            *(f"b.v{i} AS p{i}" for i in range(n)),
        ]
    )
    if paired_mode:
        pairs = (
            f"SELECT a.__file AS af, a.__row AS ar, b.__file AS bf, b.__row AS br, ({same_key}) AS same_key, "
            f"{before_values} FROM "
            f"(SELECT *, count(*) OVER (PARTITION BY __pos, __seq) AS __n FROM {kept} WHERE __act = 'after') a JOIN "
            f"(SELECT *, count(*) OVER (PARTITION BY __pos, __seq) AS __n FROM {kept} WHERE __act = 'before') b "
            f"ON a.__pos = b.__pos AND a.__seq = b.__seq AND (({same_key}) OR (a.__n = 1 AND b.__n = 1))"
        )
    else:
        pairs = (
            f"SELECT a.__file AS af, a.__row AS ar, a.__file AS bf, a.__row AS br, TRUE AS same_key, "
            f"{before_values} FROM {kept} a, {kept} b WHERE FALSE"
        )
    plan = plan.add("pair", "pairs", pairs, materialize=True)
    p = plan.rel("pairs")
    nulls = ", ".join(f"NULL AS p{i}" for i in range(n))
    priors = ", ".join(f"p{i}" for i in range(n))
    plan = plan.add(
        "pair",
        "links",
        f"SELECT af AS f, ar AS r, same_key, {priors} FROM {p} UNION ALL SELECT bf, br, same_key, {nulls} FROM {p}",
    )
    # `paired` is what --stop-after pair shows: every kept row with its role. The envelope
    # stage reads `pairs` and `kept` directly, and the ledger counts from their aggregates.
    role = (
        "CASE WHEN k.__act = 'before' AND l.f IS NULL THEN 'unpaired_before' "
        "WHEN k.__act = 'before' AND l.same_key THEN 'merged' ELSE 'emitted' END"
    )
    sql = (
        f"SELECT k.*, {role} AS __role, l.same_key AS __same_key, "
        f"(k.__act = 'after' AND l.f IS NULL AND {str(paired_mode).upper()}) AS __unpaired_after, "
        f"{', '.join(f'l.p{i}' for i in range(n))} "
        f"FROM {kept} k LEFT JOIN {plan.rel('links')} l ON k.__file = l.f AND k.__row = l.r"
    )
    return plan.add("pair", "paired", sql)
