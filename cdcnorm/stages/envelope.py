"""Stage envelope: one upsert or delete event per change, in position order.

- insert, snapshot, after: upsert; a paired after carries its before-image as
  ``prior`` and the names of the fields that differ as ``changed``.
- a key-changing update: delete of the old key (prior = before-image) at the
  before's position, then upsert of the new key at the after's position. When
  the after-image was emitted by an earlier run (a ghost), only the delete is.
- delete: ``values`` null, ``prior`` the row's image when the dump has one
  (some non-key field is not NULL).
"""

from __future__ import annotations

from cdcnorm.plan import Plan
from cdcnorm.sql import lit


def build_envelopes(plan: Plan) -> Plan:
    n = len(plan.fields)
    names = plan.fields
    keys = plan.key_index
    nonkey = [i for i in range(n) if i not in keys] or keys
    kept = plan.rel("kept")
    pairs = plan.rel("pairs")
    nulls = ", ".join(f"NULL AS p{i}" for i in range(n))
    changed = (
        "list_filter(["
        + ", ".join(f"CASE WHEN p.a{i} IS DISTINCT FROM p.p{i} THEN {lit(names[i])} END" for i in range(n))
        + "], lambda x: x IS NOT NULL)"
    )
    # whether a delete has an image: computed once per row (written into each field's CASE, the
    # text grew with the square of the fields: 90,000 tests for 300 fields, 2.5 s to bind)
    has_image = " OR ".join(f"e.v{i} IS NOT NULL" for i in nonkey)
    vals = ", ".join(f"e.v{i}" for i in range(n))
    own = "e.__pos, e.__seq, e.__rank, e.__act, e.__cat, e.__file, e.__row"
    lonely_after = (
        f"NOT EXISTS (SELECT 1 FROM {pairs} q WHERE NOT q.ghost AND q.af = e.__file AND q.ar = e.__row)"
    )
    sql = f"""
    SELECT 'upsert' AS __action, {own}, {vals}, FALSE AS __has_prior, {nulls}, NULL AS __changed
    FROM {kept} e WHERE e.__act IN ('insert', 'snapshot') OR (e.__act = 'after' AND {lonely_after})
    UNION ALL
    SELECT 'upsert', p.a_pos, p.a_seq, 2, 'after', p.a_cat, p.af, p.ar, {", ".join(f"p.a{i}" for i in range(n))},
           p.same_key AND p.__img, {", ".join(f"CASE WHEN p.same_key AND p.__img THEN p.p{i} END" for i in range(n))},
           CASE WHEN p.same_key AND p.__img THEN {changed} END
    FROM {pairs} p WHERE NOT p.ghost
    UNION ALL
    SELECT 'delete', p.b_pos, p.b_seq, 1, 'before', p.b_cat, p.bf, p.br, {", ".join(f"p.p{i}" for i in range(n))},
           p.__img, {", ".join(f"CASE WHEN p.__img THEN p.p{i} END" for i in range(n))}, NULL
    FROM {pairs} p WHERE NOT p.same_key
    UNION ALL
    SELECT 'delete', {own}, {vals}, e.__image,
           {", ".join(f"CASE WHEN e.__image THEN e.v{i} END" for i in range(n))}, NULL
    FROM (SELECT *, ({has_image}) AS __image FROM {kept} e WHERE e.__act = 'delete') e
    """
    plan = plan.add("envelope", "events", sql)
    return plan
