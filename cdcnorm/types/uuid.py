from __future__ import annotations

from cdcnorm.types.base import FieldType

# RFC 9562 section 4: 8-4-4-4-12 hex digits, case-insensitive on input.
PATTERN = "'[0-9A-Fa-f]{8}-[0-9A-Fa-f]{4}-[0-9A-Fa-f]{4}-[0-9A-Fa-f]{4}-[0-9A-Fa-f]{12}'"


class UuidType(FieldType):
    name = "uuid"
    sql_type = "UUID"

    def cast(self, x: str) -> str:
        return f"CASE WHEN regexp_full_match({x}, {PATTERN}) THEN TRY_CAST({x} AS UUID) END"

    def explain(self, x: str) -> str:
        return "'not an 8-4-4-4-12 hex UUID'"

    def render(self, v: str) -> str:
        return f"lower(CAST({v} AS VARCHAR))"
