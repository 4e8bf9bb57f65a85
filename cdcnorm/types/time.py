from __future__ import annotations

from cdcnorm.types.base import FieldType

# RFC 3339 partial-time: hours 00-23, minutes 00-59, seconds 00-59, a fraction
# of up to microseconds (further digits must be zeros: nothing is truncated).
PATTERN = r"'([01][0-9]|2[0-3]):[0-5][0-9]:[0-5][0-9](\.[0-9]{1,6}0*)?'"


class TimeType(FieldType):
    name = "time"
    sql_type = "TIME"

    def cast(self, x: str) -> str:
        return f"CASE WHEN regexp_full_match({x}, {PATTERN}) THEN TRY_CAST({x} AS TIME) END"

    def explain(self, x: str) -> str:
        return (
            rf"CASE WHEN regexp_full_match({x}, '[0-9]{{2}}:[0-9]{{2}}:[0-9]{{2}}\.[0-9]{{7,}}') "
            "THEN 'more than 6 fractional digits (would truncate)' "
            "ELSE 'not an HH:MM:SS[.ffffff] time' END"
        )

    def render(self, v: str) -> str:
        return f"CAST({v} AS VARCHAR)"
