"""Dates and timestamps written in a layout of their own (``format`` on a date or timestamp field):
``01/03/2026 08:05:09``, ``01-MAR-2026``, ``March 1, 2026 8:05 PM``.

A format is written in strftime codes, a vetted few of them. Each value must match the pattern
the format makes (a four-digit year, two-digit minutes and seconds, up to six fractional digits,
nothing around it) before the engine's parser reads it, so that a lenient parser cannot take
``1/3/26`` for the year 26 or skip what it does not expect; the parser then checks the calendar
(no 31 February). A format without an offset (``%z``) reads local times in the field's ``zone``.
"""

from __future__ import annotations

import datetime as dt
import re
import string
from dataclasses import dataclass

from cdcnorm import zones
from cdcnorm.errors import did_you_mean
from cdcnorm.sql import lit

_MONTHS = [
    "january",
    "february",
    "march",
    "april",
    "may",
    "june",
    "july",
    "august",
    "september",
    "october",
    "november",
    "december",
]
#: code -> (what it reads, the pattern a value's part must match)
CODES: dict[str, tuple[str, str]] = {
    "%Y": ("the year, four digits", "[0-9]{4}"),
    "%m": ("the month, 1-12 (a leading zero allowed)", "[0-9]{1,2}"),
    "%b": (
        "the month's abbreviated English name, any case (Mar)",
        f"(?i:{'|'.join(m[:3] for m in _MONTHS)})",
    ),
    "%B": ("the month's English name, any case (March)", f"(?i:{'|'.join(_MONTHS)})"),
    "%d": ("the day of the month (a leading zero allowed)", "[0-9]{1,2}"),
    "%H": ("the hour, 00-23 (a leading zero allowed)", "[0-9]{1,2}"),
    "%I": ("the hour on a 12-hour clock, with %p", "[0-9]{1,2}"),
    "%p": ("AM or PM, any case", "(?i:am|pm)"),
    "%M": ("the minute, two digits", "[0-9]{2}"),
    "%S": ("the second, two digits", "[0-9]{2}"),
    "%f": ("a fraction of a second, 1 to 6 digits", "[0-9]{1,6}"),
    "%z": ("the offset from UTC, +hhmm or +hh:mm", "[+-][0-9]{2}:?[0-9]{2}"),
    "%%": ("a percent sign", "%"),
}
DATE_CODES = {"%Y", "%m", "%b", "%B", "%d", "%%"}
#: codes refused with a reason of their own
REFUSED = {
    "%y": "%y is a year without its century, which a value then does not name: write the century (%Y)",
    "%a": "%a is a weekday name, which a date already says (and could contradict): write it as text",
    "%A": "%A is a weekday name, which a date already says (and could contradict): write it as text",
    "%c": "%c is the locale's own layout: write its parts (%d/%m/%Y %H:%M:%S)",
    "%x": "%x is the locale's own layout: write its parts (%d/%m/%Y)",
    "%X": "%X is the locale's own layout: write its parts (%H:%M:%S)",
    "%n": "%n reads nanoseconds, which a timestamp does not hold: write %f (up to 6 digits)",
}
#: characters a pattern writes as themselves
_PLAIN = re.compile(r"[A-Za-z0-9 ]")


def _literal(ch: str) -> str:
    """A format's own character as a pattern that matches it alone."""
    if _PLAIN.fullmatch(ch) or not ch.isascii():
        return ch
    if ch in string.punctuation:
        return "\\" + ch
    return f"\\x{ord(ch):02x}"  # a control character: tab


#: the instant an example of a format is written from (Python's strftime)
_EXAMPLE = dt.datetime(2026, 3, 1, 20, 5, 9, 250000, tzinfo=dt.timezone(dt.timedelta(hours=1)))


@dataclass(frozen=True)
class Layout:
    """A format checked: the engine's format text, the pattern values must match, its codes."""

    text: str
    pattern: str
    codes: frozenset[str]

    @property
    def has_offset(self) -> bool:
        return "%z" in self.codes

    def example(self) -> str:
        return _EXAMPLE.strftime(self.text)


def parse_layout(text: str, kind: str) -> Layout:
    """The layout of format ``text`` for a ``kind`` (date or timestamp) field; ValueError with a
    readable message when it names an unknown or refused code, a code twice, or not every part
    a value of the kind needs (a format without a year would take 1900 for it)."""
    parts: list[str] = []
    codes: list[str] = []
    i = 0
    while i < len(text):
        if text[i] != "%":
            parts.append(_literal(text[i]))
            i += 1
            continue
        code = text[i : i + 2]
        if code in REFUSED:
            raise ValueError(f"layout {text!r}: {REFUSED[code]}")
        if code not in CODES:
            raise ValueError(
                f"layout {text!r}: {code!r} is not a code a layout reads{did_you_mean(code, CODES)}; "
                f"they are {', '.join(CODES)}"
            )
        if code != "%%" and code in codes:
            raise ValueError(f"layout {text!r} names {code} twice; name each part once")
        if kind == "date" and code not in DATE_CODES:
            raise ValueError(f"layout {text!r}: a date has no time of day or offset ({code}); remove it")
        codes.append(code)
        parts.append(CODES[code][1])
        i += 2
    found = set(codes)
    need = [("%Y", "year (%Y)"), ("%d", "day of the month (%d)")]
    missing = [what for code, what in need if code not in found]
    if not found & {"%m", "%b", "%B"}:
        missing.insert(1, "month (%m, %b or %B)")
    if kind == "timestamp":
        if not found & {"%H", "%I"}:
            missing.append("hour (%H, or %I with %p)")
        if "%M" not in found:
            missing.append("minute (%M)")
    if missing:
        raise ValueError(f"layout {text!r} names no {', no '.join(missing)}; a value needs every part")
    if len(found & {"%m", "%b", "%B"}) > 1:
        raise ValueError(f"layout {text!r} names the month twice; write one of %m, %b and %B")
    if len(found & {"%H", "%I"}) > 1:
        raise ValueError(f"layout {text!r} names the hour twice; write %H, or %I with %p")
    if ("%I" in found) != ("%p" in found):
        raise ValueError(f"layout {text!r}: %I (a 12-hour clock) and %p (AM or PM) go together")
    if "%f" in found and "%S" not in found:
        raise ValueError(f"layout {text!r}: a fraction (%f) needs the second (%S) it is a fraction of")
    return Layout(text, "".join(parts), frozenset(found))


def _matches(x: str, layout: Layout) -> str:
    return f"regexp_full_match({x}, {lit(layout.pattern)})"


def _parsed(x: str, layout: Layout) -> str:
    """SQL: the engine's parse of ``x``: a TIMESTAMP (local), or a TIMESTAMPTZ with ``%z``."""
    return f"try_strptime({x}, {lit(layout.text)})"


def _minutes(zone: str) -> int:
    """The minutes east of UTC of a fixed offset as a mapping writes one (``zones.FIXED``:
    ``Z``, ``UTC``, ``+05:30``, ``-0800``)."""
    if zone in ("Z", "UTC"):
        return 0
    sign = -1 if zone.startswith("-") else 1
    digits = zone[1:].replace(":", "")
    return sign * (int(digits[:2]) * 60 + int(digits[2:]))


def _instant(x: str, layout: Layout, zone: str) -> str:
    """SQL: the UTC instant of ``x`` (matched), NULL when the parser or the zone has none."""
    parsed = _parsed(x, layout)
    if layout.has_offset:
        return parsed
    if not zones.is_fixed(zone):
        return zones.local_to_utc(parsed, zone)
    shift = _minutes(zone)  # a local time east of UTC is that much later than UTC's
    if not shift:
        return f"CAST({parsed} AS TIMESTAMPTZ)"
    return f"(CAST({parsed} AS TIMESTAMPTZ) {'-' if shift > 0 else '+'} INTERVAL {abs(shift)} MINUTE)"


def format_cast(x: str, layout: Layout, kind: str, zone: str) -> str:
    """SQL: raw text ``x`` in ``layout`` -> DATE or TIMESTAMPTZ (UTC), NULL when invalid: no match
    of the layout's pattern, no such date or time, a local time a named zone does not have once,
    or an instant outside years 0001-9999 in UTC."""
    from cdcnorm.types.timestamp import FIRST_US, LAST_US

    if kind == "date":
        return f"CASE WHEN {_matches(x, layout)} THEN CAST({_parsed(x, layout)} AS DATE) END"
    value = _instant(x, layout, zone)
    return f"CASE WHEN {_matches(x, layout)} AND epoch_us({value}) BETWEEN {FIRST_US} AND {LAST_US} THEN {value} END"


def format_expected(layout: Layout, kind: str) -> str:
    return f'a {kind} written as "{layout.text}" ({layout.example()})'


def format_explain(x: str, layout: Layout, kind: str, zone: str) -> str:
    """SQL: why ``x`` is no value in ``layout`` (only evaluated when it is not)."""
    shape = lit(f'not a {kind} written as "{layout.text}" (such as "{layout.example()}")')
    parsed = _parsed(x, layout)
    branches = f"WHEN NOT {_matches(x, layout)} THEN {shape} "
    branches += f"WHEN {parsed} IS NULL THEN 'no such calendar date or time of day' "
    if kind == "timestamp" and not layout.has_offset and not zones.is_fixed(zone):
        n = zones.matches(parsed, zone)
        branches += (
            f"WHEN {n} = 0 AND year({parsed}) BETWEEN {zones.FIRST_YEAR} AND {zones.LAST_YEAR} "
            f"THEN {lit(f'no such local time in {zone}: the clocks jumped over it (a DST gap)')} "
            f"WHEN {n} = 0 THEN {lit(f'outside the years {zones.FIRST_YEAR} to {zones.LAST_YEAR} that the zone table of {zone} covers')} "
            f"WHEN {n} > 1 THEN {lit(f'this local time happened twice in {zone} (the clocks went back, a DST overlap): write its offset (%z)')} "
        )
    return f"CASE {branches}ELSE 'outside the years 0001 to 9999 in UTC' END"
