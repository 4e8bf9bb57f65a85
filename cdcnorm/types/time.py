from __future__ import annotations

from cdcnorm.sql import lit
from cdcnorm.types.base import FieldType, out_of_range
from cdcnorm.types.timestamp import (
    NO_MICROSECOND,
    ONE_MICROSECOND,
    TOO_FINE,
    has_fine_digits,
    rounds_up,
    to_microseconds,
)

# RFC 3339 partial-time (hours 00-23, minutes 00-59, seconds 00-59, a fraction of up to
# microseconds; further digits must be zeros: nothing is truncated), optionally with a
# time-offset (full-time). An offset is applied and the time kept in UTC, modulo a day:
# RFC 3339 section 4.2 gives 18:50:00-04:00 as the same time as 22:50:00Z.
PARTIAL = r"([01][0-9]|2[0-3]):[0-5][0-9]:[0-5][0-9](\.[0-9]{1,6}0*)?"
PATTERN = rf"'{PARTIAL}([Zz]|[+-]([01][0-9]|2[0-3]):[0-5][0-9])?'"


class TimeType(FieldType):
    name = "time"
    sql_type = "TIME"

    @property
    def _sub(self) -> str:
        return self.spec.sub_microsecond or "reject"

    def cast(self, x: str) -> str:
        """SQL: the time of day in UTC; with ``sub_microsecond`` round or truncate, of the text to
        microseconds, one more when rounding goes up (23:59:59.9999995 rounds to 00:00:00: a time
        of day is kept modulo a day, as an offset's shift is)."""
        if self._sub == "reject":
            return self._cast(x)
        cast = self._cast(to_microseconds(x, 8))
        if self._sub == "round":
            cast = f"({cast} + CASE WHEN {rounds_up(x, 8)} THEN {ONE_MICROSECOND} ELSE {NO_MICROSECOND} END)"
        return cast

    def fine(self, x: str) -> str | None:
        return None if self._sub == "reject" else has_fine_digits(x, 8)

    def _cast(self, x: str) -> str:
        sign = f"substr({x}, length({x}) - 5, 1)"
        has_offset = f"{sign} IN ('+', '-')"
        base = f"CASE WHEN {has_offset} THEN substr({x}, 1, length({x}) - 6) ELSE rtrim(rtrim({x}, 'Z'), 'z') END"
        hours = f"CAST(substr({x}, length({x}) - 4, 2) AS INTEGER)"
        minutes = f"CAST(substr({x}, length({x}) - 1, 2) AS INTEGER)"
        shift = f"CASE WHEN {has_offset} THEN ({hours} * 60 + {minutes}) * CASE {sign} WHEN '-' THEN -1 ELSE 1 END ELSE 0 END"
        return (
            f"CASE WHEN regexp_full_match({x}, {PATTERN}) "
            f"THEN TRY_CAST({base} AS TIME) - to_minutes(CAST({shift} AS BIGINT)) END"
        )

    def explain(self, x: str) -> str:
        if self._sub != "reject":
            x = to_microseconds(x, 8)
        # a value of the right shape whose parts are out of range is told which (RFC 3339 section
        # 5.6: time-hour 00-23, time-minute 00-59, time-second 00-58, 59 or 60 where a leap second
        # falls, which only a date can tell: a timestamp takes it, a time of day cannot)
        shaped = (
            rf"regexp_full_match({x}, '[0-9]{{2}}:[0-9]{{2}}:[0-9]{{2}}(\.[0-9]{{1,6}}0*)?"
            rf"([Zz]|[+-][0-9]{{2}}:[0-9]{{2}})?')"
        )
        leap = ", a leap second: taken in a timestamp, whose date tells it, not in a time of day"
        checks = [
            (1, "hour", "> '23'", " out of range (00-23)"),
            (4, "minute", "> '59'", " out of range (00-59)"),
        ]
        checks += [(7, "second", "= '60'", leap), (7, "second", "> '59'", " out of range (00-59)")]
        return (
            rf"CASE WHEN regexp_full_match({x}, '[0-9]{{2}}:[0-9]{{2}}:[0-9]{{2}}\.[0-9]{{7,}}.*') "
            f"THEN {lit(TOO_FINE)} "
            f"{out_of_range(x, shaped, checks)}"
            "ELSE 'not an HH:MM:SS[.ffffff][offset] time' END"
        )

    def render(self, v: str) -> str:
        return f"CAST({v} AS VARCHAR)"
