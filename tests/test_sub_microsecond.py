"""Times and timestamps with digits below the microsecond (``sub_microsecond``): quarantined by
default, rounded or cut when the mapping says so, and counted in a note on each file.

Oracles: PostgreSQL's timestamp and time input (which rounds to the microsecond, ties to the even
one), Python's ``datetime.fromisoformat`` (which cuts past the sixth digit: "anything beyond 6
will be truncated", from memory of its documentation, checked below on examples), and Python's
``decimal`` for rounding half to even."""

from __future__ import annotations

import datetime as dt
import json
from decimal import ROUND_FLOOR, ROUND_HALF_EVEN, Decimal
from pathlib import Path

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from cdcnorm.cli import main
from cdcnorm.mapping.model import CommittedAtSpec, FieldSpec
from cdcnorm.types.timestamp import TOO_FINE
from tests.conftest import ConvertFn
from tests.typing_helper import type_values, typed_text

_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)
_LAST_US = (dt.datetime(9999, 12, 31, 23, 59, 59, 999999, tzinfo=dt.UTC) - _EPOCH) // dt.timedelta(
    microseconds=1
)
_FIRST_US = (dt.datetime(1, 1, 1, tzinfo=dt.UTC) - _EPOCH) // dt.timedelta(microseconds=1)


def _instant(value: str) -> dt.datetime:
    return dt.datetime.fromisoformat(value.replace("Z", "+00:00"))


#: SQL Server's datetime2(7) and datetimeoffset(7) texts (seven fractional digits, from memory of
#: its documentation), ties among them, longer fractions, zeros past the sixth digit
FINE = [
    "2026-03-01 08:00:00.1234567",
    "2026-03-01 08:00:00.1234565",  # a tie, the sixth digit even: down
    "2026-03-01 08:00:00.1234575",  # a tie, the sixth digit odd: up
    "2026-03-01 08:00:00.0000005",
    "2026-03-01 08:00:00.9999995 +01:00",  # up into the next second, with an offset
    "2026-12-31T23:59:59.9999999Z",  # up into the next year
    "2026-03-01T08:00:00.123456789-05:30",
    "2026-03-01T08:00:00.12345650000001Z",  # just above the tie
    "2026-03-01T08:00:00.1234560000Z",  # zeros past the sixth digit: nothing to round
    "2026-03-01T08:00:00.5Z",
    "0001-01-01T00:00:00.0000004Z",
]


def test_round_reads_as_postgresql_reads_it(convert: ConvertFn, pg_url: str) -> None:
    """A real PostgreSQL server as the oracle: ``text::timestamptz`` rounds to the microsecond,
    ties to the even one; ``sub_microsecond: round`` gives the same instant for each text."""
    import psycopg

    got = type_values(convert, "{type: timestamp, sub_microsecond: round}", FINE)
    assert all(reason is None for _, reason in got), got
    assert got[1][0] == "2026-03-01T08:00:00.123456Z" and got[2][0] == "2026-03-01T08:00:00.123458Z"
    with psycopg.connect(pg_url, autocommit=True) as c:
        c.execute("SET TimeZone = 'UTC'")
        for text, (value, _) in zip(FINE, got, strict=True):
            row = c.execute("SELECT %s::timestamptz", (text,)).fetchone()
            assert row is not None and row[0] == _instant(value), text


def test_round_of_a_time_of_day_as_postgresql_reads_it(convert: ConvertFn, pg_url: str) -> None:
    """PostgreSQL's ``time`` input is the oracle for a time of day without an offset; its one
    difference is documented: 23:59:59.9999995 rounds to 24:00:00 there, to 00:00:00 here (a time
    of day is kept modulo a day, as an offset's shift is)."""
    import psycopg

    texts = [
        "08:00:00.1234567",
        "08:00:00.0000015",
        "08:00:00.0000025",
        "12:34:56.99999949",
        "23:59:59.9999995",
    ]
    got = type_values(convert, "{type: time, sub_microsecond: round}", texts)
    assert [v for v, _ in got] == [
        "08:00:00.123457",
        "08:00:00.000002",
        "08:00:00.000002",
        "12:34:56.999999",
        "00:00:00",
    ]
    with psycopg.connect(pg_url, autocommit=True) as c:
        for text, (value, _) in zip(texts[:4], got[:4], strict=True):
            row = c.execute("SELECT %s::time", (text,)).fetchone()
            assert row is not None and row[0] == dt.time.fromisoformat(value), text
        assert c.execute("SELECT %s::time::text", (texts[4],)).fetchone() == ("24:00:00",)


def test_truncate_reads_as_python_datetime_reads_it(convert: ConvertFn) -> None:
    got = type_values(convert, "{type: timestamp, sub_microsecond: truncate}", FINE)
    assert all(reason is None for _, reason in got), got
    for text, (value, _) in zip(FINE, got, strict=True):
        # Python's datetime.fromisoformat: the fraction cut after six digits
        py = dt.datetime.fromisoformat(text.replace(" +", "+"))
        assert _instant(value) == (py if py.tzinfo else py.replace(tzinfo=dt.UTC)), text


def test_reject_is_the_default_and_says_how_to_keep_the_value(convert: ConvertFn) -> None:
    got = type_values(convert, "timestamp", FINE)
    assert [reason for _, reason in got] == [TOO_FINE] * 8 + [None, None, TOO_FINE]
    assert "sub_microsecond: round or truncate" in TOO_FINE


def test_what_else_is_wrong_is_told_of_the_text_to_microseconds(convert: ConvertFn) -> None:
    texts = [
        "2026-13-01T08:00:00.1234567Z",
        "2026-02-30T08:00:00.1234567Z",
        "9999-12-31T23:59:59.9999995Z",  # rounds past the last microsecond of year 9999
        "9999-12-31T23:59:59.9999994Z",
        "2026-03-01T08:00:00.1234567+24:00",
        "2026-03-01T08:00:00.12345x7Z",
    ]
    got = type_values(convert, "{type: timestamp, sub_microsecond: round}", texts)
    assert got == [
        (None, "month 13 out of range (01-12)"),
        (None, "no such calendar date"),
        (None, "outside the years 0001 to 9999 in UTC"),
        ("9999-12-31T23:59:59.999999Z", None),
        (None, "offset out of range (-23:59 to +23:59)"),
        (None, "not an RFC 3339 timestamp"),
    ]
    cut = type_values(convert, "{type: timestamp, sub_microsecond: truncate}", texts[2:3])
    assert cut == [("9999-12-31T23:59:59.999999Z", None)]


_SECONDS = st.integers(_FIRST_US // 1_000_000 + 86_400, _LAST_US // 1_000_000 - 86_400)


@settings(max_examples=300, deadline=None)
@given(
    _SECONDS,
    st.text("0123456789", min_size=7, max_size=12),
    st.sampled_from(["Z", "+01:00", "-05:30", "+14:00", ""]),
    st.sampled_from(["round", "truncate"]),
)
@example(1772352000, "1234565", "Z", "round").via("a tie, the sixth digit even")
@example(1772352000, "9999995", "Z", "round").via("a tie carried into the next second")
def test_fine_fractions_against_python(seconds: int, digits: str, offset: str, sub: str) -> None:
    """Python's decimal (ROUND_HALF_EVEN, ROUND_FLOOR) on the fraction and datetime on the rest are
    the oracle: the instant of ``<date>T<time>.<digits><offset>`` read with round or truncate."""
    local = (_EPOCH + dt.timedelta(seconds=seconds)).replace(tzinfo=None)
    text = f"{local.isoformat(timespec='seconds')}.{digits}{offset}"
    value, reason = typed_text({"type": "timestamp", "sub_microsecond": sub}, text)
    fraction = Decimal("0." + digits)
    micros = int(
        (fraction * 1_000_000).quantize(Decimal(1), ROUND_HALF_EVEN if sub == "round" else ROUND_FLOOR)
    )
    zone = dt.UTC if offset in ("Z", "") else dt.datetime.fromisoformat("2000-01-01T00:00:00" + offset).tzinfo
    expected = local.replace(tzinfo=zone) + dt.timedelta(microseconds=micros)
    assert reason is None, (text, reason)
    assert value is not None and _instant(value) == expected, (text, value)


@settings(max_examples=300, deadline=None)
@given(
    st.integers(_FIRST_US * 1000 - 2000, _LAST_US * 1000 + 2000)
    | st.sampled_from(
        [_FIRST_US * 1000 - 500, _FIRST_US * 1000 - 501, _LAST_US * 1000 + 499, _LAST_US * 1000 + 500]
    ),
    st.sampled_from(["round", "truncate"]),
)
def test_nanoseconds_since_the_epoch_against_python_decimal(count: int, sub: str) -> None:
    """A count of nanoseconds read with round (ties to even) or truncate (towards the earlier
    instant) is the instant Python's decimal and datetime make of it, when that lies in years
    0001-9999 (UTC); else it is quarantined with that reason."""
    value, reason = typed_text({"type": "timestamp", "epoch": "ns", "sub_microsecond": sub}, str(count))
    rounding = ROUND_HALF_EVEN if sub == "round" else ROUND_FLOOR
    micros = int((Decimal(count) / 1000).quantize(Decimal(1), rounding))
    if not _FIRST_US <= micros <= _LAST_US:
        assert (value, reason) == (None, "outside the years 0001 to 9999 in UTC"), count
    else:
        assert value is not None and _instant(value) == _EPOCH + dt.timedelta(microseconds=micros), count


def test_the_option_is_refused_where_it_cannot_apply() -> None:
    for spec in ({"type": "date", "sub_microsecond": "round"}, {"type": "text", "sub_microsecond": "round"}):
        with pytest.raises(
            ValidationError, match="sub_microsecond applies to time and timestamp fields only"
        ):
            FieldSpec(**spec)
    with pytest.raises(ValidationError, match="whole milliseconds, which has no digits below"):
        FieldSpec(type="timestamp", epoch="ms", sub_microsecond="round")
    with pytest.raises(ValidationError, match="whole seconds"):
        CommittedAtSpec(column="ts", epoch="s", sub_microsecond="truncate")
    with pytest.raises(ValidationError, match="'reject', 'round' or 'truncate'"):
        FieldSpec(type="timestamp", sub_microsecond="nearest")


MAPPING = """\
table: kiosk.visits
files: ["visits*.csv"]
key: [visit_id]
change:
  action: {column: op, codes: {I: insert, U: after, D: delete}}
  position: {column: lsn, kind: integer}
  committed_at: {column: committed, sub_microsecond: truncate}
  updates: after-only
fields:
  visit_id: integer
  entered: {type: timestamp, sub_microsecond: round}
  left_at: {type: time, sub_microsecond: truncate}
  logged: timestamp
"""


def test_convert_notes_each_file_s_rounded_values(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Through the CLI: the events hold the rounded and cut values, the run's output notes per file
    and field how many values had digits below the microsecond (quarantined rows not counted),
    and the ledger balances."""
    (tmp_path / "mappings").mkdir()
    (tmp_path / "mappings" / "visits.yaml").write_text(MAPPING, encoding="utf-8")
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    header = "op,lsn,committed,visit_id,entered,left_at,logged\n"
    (dumps / "visits-a.csv").write_text(
        header
        + "I,1,2026-03-01 08:00:00.1234567,1,2026-03-01 07:00:00.1234565,09:00:00.9999999,2026-03-01 07:00:00\n"
        + "I,2,2026-03-01 08:00:01.0000000,2,2026-03-01 07:00:00.1234575,09:00:00,2026-03-01 07:00:00\n"
        # quarantined for logged: its fine values are in the quarantine as written, not counted
        + "I,3,2026-03-01 08:00:02.1000001,3,2026-03-01 07:00:00.5000001,09:00:00.0000001,2026-03-01 07:00:00.1234567\n",
        encoding="utf-8",
    )
    (dumps / "visits-b.csv").write_text(
        header + "U,4,2026-03-01 08:00:03,1,2026-03-01 07:00:01.0000000,10:00:00,2026-03-01 07:00:01\n",
        encoding="utf-8",
    )
    out = tmp_path / "out"
    code = main(
        ["convert", "--json", "--mappings", str(tmp_path / "mappings"), "--out", str(out), str(dumps)]
    )
    assert code == 0
    result = json.loads(capsys.readouterr().out)
    notes = sorted((n["file"], n["note"]) for n in result["notes"])
    assert notes == [
        (
            "visits-a.csv",
            "1 value of committed_at had digits below the microsecond: cut to the microsecond (sub_microsecond: truncate)",
        ),
        (
            "visits-a.csv",
            "1 value of left_at had digits below the microsecond: cut to the microsecond (sub_microsecond: truncate)",
        ),
        (
            "visits-a.csv",
            "2 values of entered had digits below the microsecond: rounded to the nearest microsecond, ties to the even one (sub_microsecond: round)",
        ),
    ]
    events = [
        json.loads(line)
        for f in sorted((out / "events").rglob("*.jsonl"))
        for line in f.read_text().splitlines()
    ]
    first = {e["origin"]["row"]: e for e in events if e["origin"]["file"] == "visits-a.csv"}
    assert first[1]["committed_at"] == "2026-03-01T08:00:00.123456Z"
    assert first[1]["values"]["entered"] == "2026-03-01T07:00:00.123456Z"
    assert first[1]["values"]["left_at"] == "09:00:00.999999"
    assert first[2]["values"]["entered"] == "2026-03-01T07:00:00.123458Z"
    assert result["ledger"]["total"]["quarantined"] == 1
    assert result["ledger"]["balanced"] is True
