"""Dates and timestamps written in a layout of their own (``layout`` in strftime codes).

Oracles: Python's ``datetime.strftime`` writes the texts and ``datetime.strptime`` reads them
(the same codes, the C locale's English month names), ``zoneinfo`` turns local times into UTC."""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from cdcnorm.mapping.model import FieldSpec
from tests.conftest import ConvertFn
from tests.typing_helper import type_values, typed_text

#: layouts real exports write: a European and a US spreadsheet's, Oracle's default text of a
#: TIMESTAMP (DD-MON-YYYY HH.MI.SSXFF AM, with a four-digit year), a log's, a written-out date
LAYOUTS = [
    "%d/%m/%Y %H:%M:%S",
    "%m/%d/%Y %I:%M:%S %p",
    "%d-%b-%Y %I.%M.%S.%f %p",
    "%Y%m%d %H%M%S",
    "%B %d, %Y %H:%M",
    "%d.%m.%Y %H:%M:%S.%f %z",
    "[%Y-%m-%d|%H:%M:%S]",
]


def _instant(value: str) -> dt.datetime:
    return dt.datetime.fromisoformat(value.replace("Z", "+00:00"))


@settings(max_examples=300, deadline=None)
@given(
    st.datetimes(dt.datetime(1000, 1, 1, 0, 0), dt.datetime(9998, 12, 31, 0, 0)),
    st.sampled_from(LAYOUTS),
    st.sampled_from(["+00:00", "+05:30", "-08:00", "+0530", "-0800", "Z"]),
    st.booleans(),
)
def test_what_python_writes_in_a_layout_reads_back_as_that_instant(
    when: dt.datetime, layout: str, zone: str, lower: bool
) -> None:
    """Python's strftime writes the text; the instant cdcnorm reads is the one Python's strptime
    reads from it (the field's zone for a layout without %z, the text's offset with one)."""
    # Python's datetime reads the offset (a mapping may write it +05:30, -0800 or Z)
    offset = dt.datetime.fromisoformat("2000-01-01T00:00:00" + zone).tzinfo
    text = when.replace(tzinfo=offset).strftime(layout)
    if lower:  # month names and AM/PM in any case
        text = text.lower()
    spec = {"type": "timestamp", "layout": layout} | ({} if "%z" in layout else {"zone": zone})
    value, reason = typed_text(spec, text)
    expected = dt.datetime.strptime(text, layout)  # Python's strptime
    if expected.tzinfo is None:
        expected = expected.replace(tzinfo=offset)
    assert reason is None, (text, reason)
    assert value is not None and _instant(value) == expected, (text, value)


def test_what_python_refuses_is_quarantined_with_a_reason() -> None:
    """Texts Python's strptime refuses for the layout (checked here) are quarantined: a two-digit
    year, a missing part, text around the value, no such day, a 12-hour clock's 00 or 13."""
    layout = "%d-%b-%Y %I:%M %p"
    example = "01-Mar-2026 08:05 PM"
    texts = {
        "1-Mar-26 8:05 PM": "not a timestamp written as",
        "01-Mar-2026 20:05": "not a timestamp written as",
        " 01-Mar-2026 08:05 PM": "not a timestamp written as",
        "01-Mar-2026 08:05 PM UTC": "not a timestamp written as",
        "01-Mrz-2026 08:05 PM": "not a timestamp written as",
        "30-Feb-2026 08:05 PM": "no such calendar date or time of day",
        "01-Mar-2026 00:05 AM": "no such calendar date or time of day",
        "01-Mar-2026 13:05 PM": "no such calendar date or time of day",
        "01-Mar-2026 08:60 PM": "no such calendar date or time of day",
    }
    for text, why in texts.items():
        with pytest.raises(ValueError):
            dt.datetime.strptime(text, layout)  # Python refuses it too
        value, reason = typed_text({"type": "timestamp", "layout": layout}, text)
        assert value is None and reason is not None and reason.startswith(why), (text, reason)
    value, reason = typed_text({"type": "timestamp", "layout": layout}, "1-Mar-2026 08:05 PM")
    assert reason is None and value == "2026-03-01T20:05:00Z"
    assert typed_text({"type": "timestamp", "layout": layout}, "x")[1] == (
        f'not a timestamp written as "{layout}" (such as "{example}")'
    )


def test_an_instant_outside_years_0001_to_9999_is_named() -> None:
    layout = "%Y-%m-%d %H:%M:%S %z"
    assert typed_text({"type": "timestamp", "layout": layout}, "9999-12-31 23:59:59 -0100") == (
        None,
        "outside the years 0001 to 9999 in UTC",
    )
    assert typed_text({"type": "timestamp", "layout": layout}, "0001-01-01 00:30:00 +0100")[0] is None
    assert typed_text({"type": "timestamp", "layout": layout}, "9999-12-31 23:59:59 +0100") == (
        "9999-12-31T22:59:59Z",
        None,
    )


def test_a_layout_s_local_times_in_a_named_zone(convert: ConvertFn) -> None:
    """zoneinfo is the oracle: a local time in Europe/Oslo is that instant; one the clocks jumped
    over, or that happened twice, is quarantined with that reason."""
    texts = ["01.03.2026 08:00", "01.07.2026 08:00", "29.03.2026 02:30", "25.10.2026 02:30"]
    got = type_values(convert, "{type: timestamp, layout: '%d.%m.%Y %H:%M', zone: Europe/Oslo}", texts)
    oslo = ZoneInfo("Europe/Oslo")
    for text, (value, _) in zip(texts[:2], got[:2], strict=True):
        assert _instant(value) == dt.datetime.strptime(text, "%d.%m.%Y %H:%M").replace(tzinfo=oslo)
    assert got[2][1] == "no such local time in Europe/Oslo: the clocks jumped over it (a DST gap)"
    assert got[3][1] is not None and got[3][1].startswith("this local time happened twice in Europe/Oslo")


def test_a_date_in_a_layout(convert: ConvertFn) -> None:
    texts = ["March 1, 2026", "DECEMBER 31, 1999", "February 29, 2024", "February 29, 2026", "2026-03-01"]
    got = type_values(convert, "{type: date, layout: '%B %d, %Y'}", texts)
    for text, (value, _) in zip(texts[:3], got[:3], strict=True):
        assert value == dt.datetime.strptime(text, "%B %d, %Y").date().isoformat()  # Python's strptime
    assert got[3] == (None, "no such calendar date or time of day")
    assert got[4][1] == 'not a date written as "%B %d, %Y" (such as "March 01, 2026")'


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ({"type": "timestamp", "layout": "%d/%m/%y %H:%M"}, "%y is a year without its century"),
        ({"type": "timestamp", "layout": "%d/%m %H:%M"}, "names no year (%Y)"),
        ({"type": "timestamp", "layout": "%d/%Y"}, "names no month (%m, %b or %B), no hour"),
        (
            {"type": "timestamp", "layout": "%d/%m/%Y %I:%M"},
            "%I (a 12-hour clock) and %p (AM or PM) go together",
        ),
        ({"type": "timestamp", "layout": "%d/%m/%Y %H:%M:%Q"}, "'%Q' is not a code a layout reads"),
        ({"type": "timestamp", "layout": "%d/%m/%Y %H:%M:%s"}, 'did you mean "%S"'),
        ({"type": "timestamp", "layout": "%d/%m/%Y %H:%M %d"}, "names %d twice"),
        ({"type": "timestamp", "layout": "%d/%m/%Y %H:%M.%f"}, "a fraction (%f) needs the second"),
        ({"type": "date", "layout": "%d/%m/%Y %H"}, "a date has no time of day or offset (%H)"),
        ({"type": "text", "layout": "%d/%m/%Y"}, "layout applies to date and timestamp fields only"),
        (
            {"type": "timestamp", "layout": "%d/%m/%Y %H:%M %z", "zone": "+01:00"},
            "reads each value's own offset",
        ),
        ({"type": "timestamp", "layout": "%d/%m/%Y %H:%M", "epoch": "s"}, "keep one of them"),
    ],
)
def test_a_layout_that_cannot_read_a_value_is_refused_by_name(spec: dict[str, str], message: str) -> None:
    with pytest.raises(ValidationError) as caught:
        FieldSpec(**spec)  # type: ignore[arg-type]
    assert message in str(caught.value)
