from __future__ import annotations

from cdcnorm.types.base import FieldType

PATTERN = "'[0-9]{4}-[0-9]{2}-[0-9]{2}'"


class DateType(FieldType):
    """Calendar date YYYY-MM-DD (RFC 3339 full-date); impossible dates are rejected."""

    name = "date"
    sql_type = "DATE"

    def cast(self, x: str) -> str:
        return f"CASE WHEN regexp_full_match({x}, {PATTERN}) THEN TRY_CAST({x} AS DATE) END"

    def explain(self, x: str) -> str:
        return (
            f"CASE WHEN NOT regexp_full_match({x}, {PATTERN}) THEN 'not a YYYY-MM-DD date' "
            "ELSE 'no such calendar date' END"
        )

    def render(self, v: str) -> str:
        return f"strftime({v}, '%Y-%m-%d')"
