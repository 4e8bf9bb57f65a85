"""Stage envelope: one upsert or delete event per change, in position order.

- insert, snapshot, after: upsert; a paired after carries its before-image as
  ``prior`` and the names of the fields that differ as ``changed``.
- a key-changing update: delete of the old key (prior = before-image) at the
  before's position, then upsert of the new key at the after's position.
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
    paired = plan.rel("paired")
    vals = ", ".join(f"e.v{i}" for i in range(n))
    has_prior = "(e.__act = 'after' AND coalesce(e.__same_key, FALSE))"
    priors = ", ".join(f"CASE WHEN {has_prior} THEN e.p{i} END AS p{i}" for i in range(n))
    own_priors = ", ".join(f"e.v{i} AS p{i}" for i in range(n))
    changed = (
        "list_filter(["
        + ", ".join(f"CASE WHEN e.v{i} IS DISTINCT FROM e.p{i} THEN {lit(names[i])} END" for i in range(n))
        + "], x -> x IS NOT NULL)"
    )
    has_image = " OR ".join(f"e.v{i} IS NOT NULL" for i in nonkey)
    common = "e.__position, e.__pbase, e.__act, e.__cat, e.__file, e.__row"
    sql = f"""
    SELECT 'upsert' AS __action, {common}, {vals}, {has_prior} AS __has_prior, {priors},
           CASE WHEN {has_prior} THEN {changed} END AS __changed
    FROM {paired} e WHERE e.__act IN ('insert', 'snapshot', 'after')
    UNION ALL
    SELECT 'delete' AS __action, {common}, {vals}, TRUE AS __has_prior, {own_priors}, NULL AS __changed
    FROM {paired} e WHERE e.__act = 'before' AND e.__role = 'emitted'
    UNION ALL
    SELECT 'delete' AS __action, {common}, {vals}, ({has_image}) AS __has_prior,
           {", ".join(f"CASE WHEN {has_image} THEN e.v{i} END AS p{i}" for i in range(n))}, NULL AS __changed
    FROM {paired} e WHERE e.__act = 'delete'
    """
    plan = plan.add("envelope", "events", sql)
    return plan
