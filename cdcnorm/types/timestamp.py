from __future__ import annotations

from cdcnorm import zones
from cdcnorm.sql import lit
from cdcnorm.types.base import FieldType, out_of_range
from cdcnorm.types.formats import Layout, format_cast, format_expected, format_explain, parse_layout

# RFC 3339 date-time (section 5.6) with ISO 8601's space separator, lower-case
# t/z and +hh / +hhmm offsets also accepted, and one space before the offset
# (SQL Server writes its datetimeoffset so, 2026-03-01 08:00:00.1230000 +01:00;
# PostgreSQL reads it). The fraction may have any length, but digits past
# microseconds must be zeros: nothing is truncated silently. Seconds may be 60
# (a leap second): it is taken as the first instant of the next minute, as
# PostgreSQL does, since POSIX time has no value for it.
PATTERN = (
    r"'[0-9]{4}-(0[1-9]|1[0-2])-[0-3][0-9][Tt ]([01][0-9]|2[0-3]):[0-5][0-9]:([0-5][0-9]|60)"
    r"(\.[0-9]{1,6}0*)?( ?([Zz]|[+-]([01][0-9]|2[0-3])(:?[0-5][0-9])?))?'"
)


#: why a value with non-zero digits below the microsecond is quarantined (``sub_microsecond`` reject)
TOO_FINE = "more than 6 fractional digits (would truncate; sub_microsecond: round or truncate in the mapping keeps the value)"
TOO_FINE_NS = "nanoseconds below the microsecond (would truncate; sub_microsecond: round or truncate in the mapping keeps the value)"

FIRST_US = -62135596800000000  # 0001-01-01T00:00:00Z in microseconds since 1970 (Python datetime)
LAST_US = 253402300799999999  # 9999-12-31T23:59:59.999999Z


def normalise_zone(zone: str) -> str:
    return "+00:00" if zone in ("Z", "UTC") else zone


def _leap(x: str) -> str:
    return f"substr({x}, 18, 2) = '60'"


def _unleaped(x: str) -> str:
    """SQL: the text upper-cased, without a space before its offset (which the engine's cast does
    not read), a leap second :60 written :59 (added back after the cast)."""
    upper = f"replace(replace(replace(upper({x}), ' Z', 'Z'), ' +', '+'), ' -', '-')"
    return f"CASE WHEN {_leap(x)} THEN substr({upper}, 1, 17) || '59' || substr({upper}, 20) ELSE {upper} END"


def has_offset(x: str) -> str:
    """SQL: the timestamp text ``x`` ends with an offset (``Z`` or ``+hh:mm``/``-hh:mm``)."""
    tail = f"substr(upper({x}), 20)"
    return f"(contains({tail}, 'Z') OR contains({tail}, '+') OR contains({tail}, '-'))"


def _local(x: str) -> str:
    """SQL: the text as a local TIMESTAMP (no zone), for a named zone's periods."""
    return f"TRY_CAST(replace({_unleaped(x)}, 'T', ' ') AS TIMESTAMP)"


def fine_digits(x: str, at: int) -> str:
    """SQL: the fractional digits past the sixth of time text ``x`` whose seconds end at character
    ``at`` (19 in a timestamp, 8 in a time of day): '' when there are none."""
    return f"regexp_extract({x}, '^.{{{at}}}\\.[0-9]{{6}}([0-9]*)', 1)"


def to_microseconds(x: str, at: int) -> str:
    """SQL: time text ``x`` with its fractional digits past the sixth left out (the rest as it is)."""
    return f"substr({x}, 1, {at + 7}) || substr({x}, {at + 8} + length({fine_digits(x, at)}))"


def rounds_up(x: str, at: int) -> str:
    """SQL: rounding ``x`` to the nearest microsecond goes up: its digits past the sixth are more
    than half a microsecond, or exactly half and the sixth digit is odd (ties to even, as
    PostgreSQL's input rounds)."""
    beyond = f"rtrim({fine_digits(x, at)}, '0')"
    odd = f"substr({x}, {at + 7}, 1) IN ('1', '3', '5', '7', '9')"
    return f"({beyond} > '5' OR ({beyond} = '5' AND {odd}))"


def has_fine_digits(x: str, at: int) -> str:
    """SQL: ``x`` has a non-zero digit below the microsecond (what ``sub_microsecond`` applies to)."""
    return f"regexp_matches({x}, '^.{{{at}}}\\.[0-9]{{6}}[0-9]*[1-9]')"


#: one microsecond more, or none (rounding up)
ONE_MICROSECOND = "INTERVAL 1 MICROSECOND"
NO_MICROSECOND = "INTERVAL 0 MICROSECOND"


def timestamp_cast(x: str, zone: str, sub: str = "reject") -> str:
    """SQL: raw text -> TIMESTAMPTZ in UTC, NULL when invalid. ``sub`` (``sub_microsecond``) says
    what a value with non-zero digits below the microsecond becomes: NULL (reject), rounded to the
    nearest microsecond (round), or cut (truncate)."""
    if sub == "reject":
        return _timestamp_cast(x, x, zone, None)
    up = rounds_up(x, 19) if sub == "round" else None
    return _timestamp_cast(to_microseconds(x, 19), x, zone, up)


def _timestamp_cast(x: str, raw: str, zone: str, up: str | None) -> str:
    """SQL: text ``x`` (``raw``'s, to microseconds) -> TIMESTAMPTZ; one microsecond more when ``up``."""
    # the pattern has been matched, so plain string tests suffice below
    zone = normalise_zone(zone)
    leap = _leap(x)
    unleaped = _unleaped(x)
    offset = has_offset(x)
    # Each part is written once (a part used twice is bound twice: the plan of a table with two
    # timestamp fields took 18 ms more to bind when the text held each part up to eight times).
    if zones.is_fixed(zone):
        zoned = f"{unleaped} || CASE WHEN {offset} THEN '' ELSE {lit(zone)} END"
        cast = f"TRY_CAST({zoned} AS TIMESTAMPTZ)"
    else:  # a named zone: a local time joins the zone's periods (zones.py)
        cast = (
            f"CASE WHEN {offset} THEN TRY_CAST({unleaped} AS TIMESTAMPTZ) "
            f"ELSE {zones.local_to_utc(_local(x), zone)} END"
        )
    adjusted = f"{cast} + CASE WHEN {leap} THEN INTERVAL 1 SECOND ELSE INTERVAL 0 SECOND END"
    # Most values need none of that: no leap second, no lower-case t or z, no space before the
    # offset, and an offset (or the engine's own zone, UTC, is the mapping's): the engine's cast
    # takes them as they are.
    plain = f"NOT {leap} AND NOT contains({x}, 't') AND NOT contains({x}, 'z') AND NOT contains(substr({x}, 20), ' ')"
    if zone != "+00:00":
        plain += f" AND {offset}"
    value = f"CASE WHEN {plain} THEN TRY_CAST({x} AS TIMESTAMPTZ) ELSE {adjusted} END"
    if up is not None:  # rounded: checked for the range as it is, 9999-12-31T23:59:59.9999995Z is not
        value = f"({value} + CASE WHEN {up} THEN {ONE_MICROSECOND} ELSE {NO_MICROSECOND} END)"
    # RFC 3339 has years 0000-9999; in UTC a time must stay within 0001-01-01 and 9999-12-31
    # (9999-12-31T23:00:00-02:00 is in year 10000: it would sort before year 0001 as text)
    # only a year 0000, 0001 or 9999 can leave the range once an offset or a leap second applies
    in_range = f"(substr({x}, 1, 4) NOT IN ('0000', '0001', '9999') OR epoch_us({value}) BETWEEN {FIRST_US} AND {LAST_US})"
    return f"CASE WHEN regexp_full_match({x}, {PATTERN}) AND {in_range} THEN {value} END"


def timestamp_explain(x: str, zone: str = "+00:00", sub: str = "reject") -> str:
    """SQL: why text ``x`` is no timestamp (only evaluated when it is not). Read with ``sub`` round
    or truncate, what is wrong is told of its text to microseconds."""
    if sub != "reject":
        x = to_microseconds(x, 19)
    named = ""
    if not zones.is_fixed(zone):
        local = _local(x)
        offset = has_offset(x)
        n = zones.matches(local, zone)
        where = f"regexp_full_match({x}, {PATTERN}) AND NOT {offset} AND {local} IS NOT NULL"
        named = (
            f"WHEN {where} AND {n} = 0 AND year({local}) BETWEEN {zones.FIRST_YEAR} AND {zones.LAST_YEAR} "
            f"THEN {lit(f'no such local time in {zone}: the clocks jumped over it (a DST gap)')} "
            f"WHEN {where} AND {n} = 0 THEN {lit(f'outside the years {zones.FIRST_YEAR} to {zones.LAST_YEAR} that the zone table of {zone} covers')} "
            f"WHEN {where} AND {n} > 1 THEN {lit(f'this local time happened twice in {zone} (the clocks went back, a DST overlap): add its offset')} "
        )
    return (
        f"CASE {named}WHEN regexp_full_match({x}, '.{{19}}\\.[0-9]{{7,}}.*') "
        f"THEN {lit(TOO_FINE)} "
        f"WHEN regexp_full_match({x}, {PATTERN}) AND substr({x}, 1, 4) IN ('0000', '0001', '9999') "
        f"AND TRY_CAST(substr({x}, 1, 10) AS DATE) IS NOT NULL "
        "THEN 'outside the years 0001 to 9999 in UTC' "
        f"WHEN regexp_full_match({x}, {PATTERN}) THEN 'no such calendar date' "
        f"{_out_of_range(x)}"
        "ELSE 'not an RFC 3339 timestamp' END"
    )


def _out_of_range(x: str) -> str:
    """SQL: CASE branches naming the part out of range of a value of RFC 3339's shape (section 5.6,
    from memory: date-month 01-12, time-hour 00-23, time-minute 00-59, time-second up to 60, a leap
    second; an offset's hour and minute likewise)."""
    shaped = (
        f"regexp_full_match({x}, '[0-9]{{4}}-[0-9]{{2}}-[0-9]{{2}}[Tt ][0-9]{{2}}:[0-9]{{2}}:[0-9]{{2}}"
        "(\\.[0-9]+)?( ?([Zz]|[+-][0-9]{2}(:?[0-9]{2})?))?')"
    )
    checks = [(6, "month", "NOT BETWEEN '01' AND '12'", " out of range (01-12)")]
    checks += [
        (12, "hour", "> '23'", " out of range (00-23)"),
        (15, "minute", "> '59'", " out of range (00-59)"),
    ]
    checks += [(18, "second", "> '60'", " out of range (00-60, 60 only for a leap second)")]
    return out_of_range(x, shaped, checks)


def timestamp_render(v: str) -> str:
    """SQL: RFC 3339 in UTC with Z, a fraction only when there is one, without trailing zeros.

    From year 1 on, the engine's own text of the UTC time is that form but for the ``T`` and the
    ``Z`` (and costs less than formatting the parts); year 0 it writes as ``0001 (BC)``, so the
    few times before year 1 are formatted part by part."""
    parts = (
        f"strftime({v}, '%Y-%m-%dT%H:%M:%S') || CASE WHEN epoch_us({v}) % 1000000 = 0 THEN '' "
        f"ELSE rtrim(strftime({v}, '.%f'), '0') END || 'Z'"
    )
    text = f"replace(CAST(CAST({v} AS TIMESTAMP) AS VARCHAR), ' ', 'T') || 'Z'"
    return f"CASE WHEN {v} >= TIMESTAMPTZ '0001-01-01 00:00:00+00' THEN {text} ELSE {parts} END"


def timestamp_canonical(v: str) -> str:
    """SQL: a timestamp's text in the content digest: its microseconds since 1970-01-01T00:00:00Z
    (one integer: as exact as its RFC 3339 form, and cheaper)."""
    return f"CAST(epoch_us({v}) AS VARCHAR)"


#: Epoch units (``epoch``): the name of what a value counts since 1970-01-01T00:00:00Z, and the
#: exact factor (a DECIMAL: multiplied, it stays exact) that makes it microseconds.
EPOCH_UNITS = {
    "s": ("seconds", "CAST(1000000 AS DECIMAL(7,0))", 1_000_000),
    "ms": ("milliseconds", "CAST(1000 AS DECIMAL(4,0))", 1_000),
    "us": ("microseconds", "CAST(1 AS DECIMAL(1,0))", 1),
    "ns": ("nanoseconds", "CAST(0.001 AS DECIMAL(4,3))", None),
}
EPOCH_PATTERN = "'[+-]?[0-9]+'"
#: digits of a count read: more than any count of years 0001-9999 needs (21 in nanoseconds)
_EPOCH_DIGITS = 22


def epoch_expected(unit: str) -> str:
    return f"a whole number of {EPOCH_UNITS[unit][0]} since 1970-01-01T00:00:00Z"


def _span(unit: str, sub: str = "reject") -> tuple[int, int]:
    """The counts of ``unit`` whose instants lie in years 0001-9999 (UTC), read with ``sub``."""
    per = EPOCH_UNITS[unit][2]
    if per is None and sub == "round":  # half a microsecond either side, ties to the even one
        # (the first microsecond is even, the last odd: a tie below the first rounds up to it,
        # a tie above the last up past it)
        return FIRST_US * 1000 - 500, LAST_US * 1000 + 499
    if per is None:  # nanoseconds: any in the first to the last microsecond
        return FIRST_US * 1000, LAST_US * 1000 + 999
    return -(-FIRST_US // per), LAST_US // per


def _count(x: str) -> str:
    """SQL: the count ``x`` holds, an exact DECIMAL (NULL for more than 22 digits)."""
    return f"TRY_CAST({x} AS DECIMAL({_EPOCH_DIGITS},0))"


def _in_span(x: str, unit: str, sub: str = "reject") -> str:
    lo, hi = _span(unit, sub)
    return f"{_count(x)} BETWEEN {lo} AND {hi}"


def epoch_fine(x: str) -> str:
    """SQL: a count of nanoseconds ``x`` (read) is no whole number of microseconds."""
    return f"{_count(x)} % 1000 <> 0"


def epoch_cast(x: str, unit: str, sub: str = "reject") -> str:
    """SQL: raw text ``x``, a whole number of ``unit`` since 1970-01-01T00:00:00Z -> TIMESTAMPTZ,
    NULL when it is no such number, lies outside years 0001-9999, or (nanoseconds, ``sub`` reject)
    would lose digits below the microsecond; with ``sub`` round they are rounded to the nearest
    microsecond (ties to the even one), with truncate cut (towards the earlier instant). Exact:
    the count is a DECIMAL scaled by a DECIMAL factor, never a floating-point number (years
    0001-9999 need 58 bits of microseconds)."""
    us = f"{_count(x)} * {EPOCH_UNITS[unit][1]}"
    whole = f" AND {_count(x)} % 1000 = 0" if unit == "ns" and sub == "reject" else ""
    micros = f"CAST({us} AS BIGINT)"
    if unit == "ns" and sub == "truncate":
        micros = f"CAST(floor({us}) AS BIGINT)"
    elif unit == "ns" and sub == "round":
        below = f"({us} - floor({us}))"
        up = f"({below} > 0.5 OR ({below} = 0.5 AND floor({us}) % 2 <> 0))"
        micros = f"(CAST(floor({us}) AS BIGINT) + CASE WHEN {up} THEN 1 ELSE 0 END)"
    return (
        f"CASE WHEN regexp_full_match({x}, {EPOCH_PATTERN}) AND {_in_span(x, unit, sub)}{whole} "
        f"THEN CAST(make_timestamp({micros}) AS TIMESTAMPTZ) END"
    )


def epoch_explain(x: str, unit: str, sub: str = "reject") -> str:
    below = ""
    if unit == "ns" and sub == "reject":
        below = f"ELSE {lit(TOO_FINE_NS)} "
    return (
        f"CASE WHEN NOT regexp_full_match({x}, {EPOCH_PATTERN}) THEN {lit('not ' + epoch_expected(unit))} "
        f"WHEN NOT coalesce({_in_span(x, unit, sub)}, FALSE) THEN 'outside the years 0001 to 9999 in UTC' "
        f"{below}END"
    )


class TimestampType(FieldType):
    name = "timestamp"
    sql_type = "TIMESTAMPTZ"

    @property
    def _layout(self) -> Layout | None:
        return parse_layout(self.spec.layout, "timestamp") if self.spec.layout else None

    def expected(self) -> str:
        if self._layout:
            return format_expected(self._layout, "timestamp")
        return epoch_expected(self.spec.epoch) if self.spec.epoch else self.describe()

    def cast(self, x: str) -> str:
        sub = self.spec.sub_microsecond or "reject"
        if self._layout:
            return format_cast(x, self._layout, "timestamp", self.spec.zone or "+00:00")
        if self.spec.epoch:
            return epoch_cast(x, self.spec.epoch, sub)
        return timestamp_cast(x, self.spec.zone or "+00:00", sub)

    def explain(self, x: str) -> str:
        sub = self.spec.sub_microsecond or "reject"
        if self._layout:
            return format_explain(x, self._layout, "timestamp", self.spec.zone or "+00:00")
        if self.spec.epoch:
            return epoch_explain(x, self.spec.epoch, sub)
        return timestamp_explain(x, self.spec.zone or "+00:00", sub)

    def fine(self, x: str) -> str | None:
        if not self.spec.sub_microsecond or self.spec.sub_microsecond == "reject":
            return None
        return epoch_fine(x) if self.spec.epoch else has_fine_digits(x, 19)

    def render(self, v: str) -> str:
        return timestamp_render(v)

    def canonical(self, v: str) -> str:
        return timestamp_canonical(v)
