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
    same_key = " AND ".join(f"a.v{i} = b.v{i}" for i in keys)
    if paired_mode:
        pairs = (
            f"SELECT a.__file AS af, a.__row AS ar, b.__file AS bf, b.__row AS br, ({same_key}) AS same_key FROM "
            f"(SELECT *, count(*) OVER (PARTITION BY __pbase) AS __n FROM {kept} WHERE __act = 'after') a JOIN "
            f"(SELECT *, count(*) OVER (PARTITION BY __pbase) AS __n FROM {kept} WHERE __act = 'before') b "
            f"ON a.__pbase = b.__pbase AND (({same_key}) OR (a.__n = 1 AND b.__n = 1))"
        )
    else:
        pairs = "SELECT 0 AS af, CAST(0 AS BIGINT) AS ar, 0 AS bf, CAST(0 AS BIGINT) AS br, TRUE AS same_key WHERE FALSE"
    plan = plan.add("pair", "pairs", pairs, materialize=True)
    p = plan.rel("pairs")
    role = (
        "CASE WHEN k.__act = 'before' AND pb.bf IS NULL THEN 'unpaired_before' "
        "WHEN k.__act = 'before' AND pb.same_key THEN 'merged' ELSE 'emitted' END"
    )
    sql = (
        f"SELECT k.*, {role} AS __role, pa.bf AS __pf, pa.br AS __pr, "
        f"coalesce(pa.same_key, pb.same_key) AS __same_key, "
        f"(k.__act = 'after' AND pa.bf IS NULL AND {str(paired_mode).upper()}) AS __unpaired_after "
        f"FROM {kept} k LEFT JOIN {p} pa ON k.__file = pa.af AND k.__row = pa.ar "
        f"LEFT JOIN {p} pb ON k.__file = pb.bf AND k.__row = pb.br"
    )
    return plan.add("pair", "paired", sql)
