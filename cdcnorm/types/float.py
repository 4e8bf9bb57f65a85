from __future__ import annotations

from cdcnorm.types.base import FieldType

PATTERN = r"'[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?'"


class FloatType(FieldType):
    """IEEE 754 double; NaN and infinities are rejected (JSON cannot carry them)."""

    name = "float"
    sql_type = "DOUBLE"

    def cast(self, x: str) -> str:
        return (
            f"CASE WHEN regexp_full_match({x}, {PATTERN}) AND NOT isinf(TRY_CAST({x} AS DOUBLE)) "
            f"THEN TRY_CAST({x} AS DOUBLE) END"
        )

    def explain(self, x: str) -> str:
        return (
            f"CASE WHEN NOT regexp_full_match({x}, {PATTERN}) THEN 'not a number' "
            "ELSE 'outside the double range' END"
        )
