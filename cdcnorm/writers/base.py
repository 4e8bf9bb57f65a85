"""The envelope projection shared by the writers.

Columns, in this order: table, action, key, position, committed_at, values,
prior, changed, origin. ``render=True`` gives the JSON forms (decimals as
strings with their exact scale, timestamps RFC 3339 UTC with Z, bytes base64);
``render=False`` keeps native types (decimal128(p,s), timestamp[us, UTC], ...).
"""

from __future__ import annotations

from cdcnorm.plan import Plan
from cdcnorm.sql import lit
from cdcnorm.types.timestamp import timestamp_render


def order_by(plan: Plan) -> str:
    """Position order; ties (one position, no sequence) broken by content, so input order never matters."""
    keys = ", ".join(f"v{i}" for i in plan.key_index)
    n = len(plan.fields)
    content = ", ".join([*(f"v{i}" for i in range(n)), *(f"p{i}" for i in range(n))])
    return f"__position, {keys}, __action, {content}, __file, __row"


def project(plan: Plan, files_relation: str, *, render: bool) -> str:
    types = plan.mapping.field_types
    names = plan.fields

    def value(i: int, prefix: str) -> str:
        col = f"{prefix}{i}"
        return types[names[i]].render(col) if render else col

    def struct(indices: list[int], prefix: str) -> str:
        return "{" + ", ".join(f"{lit(names[i])}: {value(i, prefix)}" for i in indices) + "}"

    all_idx = list(range(len(names)))
    cat = timestamp_render("__cat") if render else "__cat"
    return (
        f'SELECT {lit(plan.mapping.table)} AS "table", __action AS action, {struct(plan.key_index, "v")} AS key, '
        f"__position AS position, {cat} AS committed_at, "
        f"CASE WHEN __action = 'upsert' THEN {struct(all_idx, 'v')} END AS \"values\", "
        f"CASE WHEN __has_prior THEN {struct(all_idx, 'p')} END AS prior, "
        f"__changed AS changed, {{'file': f.name, 'row': __row}} AS origin "
        f"FROM {plan.rel('events')} JOIN {files_relation} f ON f.id = __file ORDER BY {order_by(plan)}"
    )
