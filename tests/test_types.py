"""Field types against published standards and reference libraries."""

from __future__ import annotations

import base64
import datetime as dt
import json
import uuid
from decimal import ROUND_HALF_UP, Decimal, InvalidOperation, localcontext
from typing import Any

import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from cdcnorm.mapping.model import FieldSpec
from cdcnorm.types import resolve
from cdcnorm.types.timestamp import TOO_FINE, TOO_FINE_NS
from tests.conftest import ConvertFn
from tests.typing_helper import type_values


def test_rfc3339_section_5_8_examples(convert: ConvertFn) -> None:
    # RFC 3339 section 5.8 examples; UTC instants as stated in the RFC / computed with Python datetime.
    raw = [
        "1985-04-12T23:20:50.52Z",
        "1996-12-19T16:39:57-08:00",
        "1990-12-31T23:59:60Z",
        "1990-12-31T15:59:60-08:00",
        "1937-01-01T12:00:27.87+00:20",
    ]
    got = type_values(convert, "timestamp", raw)
    assert [v for v, _ in got] == [
        "1985-04-12T23:20:50.52Z",
        "1996-12-20T00:39:57Z",  # stated in RFC 3339 section 5.8
        # leap second policy (documented): the first instant of the next minute, as PostgreSQL does
        "1991-01-01T00:00:00Z",
        "1991-01-01T00:00:00Z",  # RFC 3339: the same leap second as the one above
        "1937-01-01T11:40:27.87Z",
    ]
    # Unix time 482196050.52 for the first example (RFC 3339 section 5.8), checked with Python datetime
    first = dt.datetime.fromisoformat(got[0][0].replace("Z", "+00:00"))
    assert first.timestamp() == pytest.approx(482196050.52)
    assert dt.datetime.fromisoformat("1996-12-20T00:39:57+00:00").timestamp() == 851042397


def test_timestamp_forms_and_rejections(convert: ConvertFn) -> None:
    raw = [
        "2026-03-01t08:00:00z",  # RFC 3339 section 5.6 note: t and z may be lower case
        "2026-03-01 08:00:00",  # no offset: the field's zone (+00:00)
        "2026-03-01T08:00:00-00:00",  # RFC 3339 section 4.3: -00:00 is UTC, unknown local offset
        "2026-03-01T08:00:00.1234560000Z",  # fraction of any length (section 5.6), zeros past microseconds
        "2026-03-01T08:00:00.1234567Z",  # would truncate: rejected
        "2026-02-30T08:00:00Z",  # no such day
        "2026-03-01T24:00:00Z",  # hours are 00-23 (section 5.6)
        "01/03/2026 08:00",
        "2026-13-01T08:00:00Z",  # date-month 01-12 (section 5.6)
        "2026-03-01T08:60:00Z",  # time-minute 00-59
        "2026-03-01T08:00:61Z",  # time-second up to 60, a leap second
        "2026-03-01T08:00:00+24:00",  # an offset's hour is a time-hour
    ]
    got = type_values(convert, "timestamp", raw)
    assert got[0] == ("2026-03-01T08:00:00Z", None)
    assert got[1] == ("2026-03-01T08:00:00Z", None)
    assert got[2] == ("2026-03-01T08:00:00Z", None)
    assert got[3] == ("2026-03-01T08:00:00.123456Z", None)
    assert got[4][1] == TOO_FINE
    assert got[5][1] == "no such calendar date"
    assert got[6][1] == "hour 24 out of range (00-23)"  # it said "not an RFC 3339 timestamp"
    assert got[7][1] == "not an RFC 3339 timestamp"
    assert [why for _, why in got[8:]] == [
        "month 13 out of range (01-12)",
        "minute 60 out of range (00-59)",
        "second 61 out of range (00-60, 60 only for a leap second)",
        "offset out of range (-23:59 to +23:59)",
    ]
    for parts in ((2026, 3, 1, 24), (2026, 13, 1, 8), (2026, 3, 1, 8, 60)):  # Python's datetime agrees
        with pytest.raises(ValueError):
            dt.datetime(*parts)


def test_timestamp_zone_for_values_without_offset(convert: ConvertFn) -> None:
    got = type_values(
        convert, '{type: timestamp, zone: "+02:00"}', ["2026-03-01T08:00:00", "2026-03-01T08:00:00Z"]
    )
    assert [v for v, _ in got] == ["2026-03-01T06:00:00Z", "2026-03-01T08:00:00Z"]


EXACT = ["12.34", "123.4", "12.340000", "+7", ".5", "1E+3", "9999999999.99", "-9999999999.99", "0", "-0.10"]
ROUNDING = ["12.345", "12.365", "0.005", "0.125", "1.005"]
OVERFLOW = ["9999999999.995", "10000000000", "1E+10"]
INVALID = ["NaN", "Infinity", "1,234.56", "1_000", "", " 12.34", "12.34.5", "e5"]


def test_decimal_12_2_against_python_decimal(convert: ConvertFn) -> None:
    # Values from shared reference-values.md (Python decimal and PostgreSQL numeric, run); the
    # TPC-H specification clause 1.3.1 domain is DECIMAL(12,2). Every accepted value must equal
    # Python's exact Decimal quantized to 2 places with no rounding; nothing else may pass.
    raw = EXACT + ROUNDING + OVERFLOW + INVALID
    got = dict(zip(raw, type_values(convert, "decimal(12,2)", raw), strict=True))
    for text in EXACT:
        value, reason = got[text]
        assert reason is None, text
        exact = Decimal(text)
        assert exact.quantize(Decimal("0.01")) == exact  # no rounding needed (Python decimal)
        assert value == str(exact.quantize(Decimal("0.01")))  # string with exactly the declared scale
    for text in ROUNDING:
        assert got[text] == (None, "more than 2 fractional digits (would round)"), text
    for text in OVERFLOW:
        assert got[text][0] is None and got[text][1] is not None, text
        # Python decimal: even rounded, the value needs more than 10 integer digits
        assert abs(Decimal(text).quantize(Decimal("0.01"), rounding=ROUND_HALF_UP)) >= Decimal("1E+10")
    for text in INVALID:
        assert got[text][0] is None, text
    # Python's decimal parses NaN and Infinity but they are not finite; 1,234.56 is no number at all
    assert not Decimal("NaN").is_finite() and not Decimal("Infinity").is_finite()
    with pytest.raises(InvalidOperation):
        Decimal("1,234.56")


def test_decimal_scale_is_exact_in_output(convert: ConvertFn) -> None:
    got = type_values(convert, "decimal(5,3)", ["1", "1.5", "-12.125", "99.9999"])
    assert [v for v, _ in got[:3]] == ["1.000", "1.500", "-12.125"]
    assert got[3][1] == "more than 3 fractional digits (would round)"


def test_rfc4648_section_10_base64_and_base16(convert: ConvertFn) -> None:
    # RFC 4648 section 10 test vectors; emitted as base64 (checked with Python base64)
    plain = [b"", b"f", b"fo", b"foo", b"foob", b"fooba", b"foobar"]
    b64 = ["", "Zg==", "Zm8=", "Zm9v", "Zm9vYg==", "Zm9vYmE=", "Zm9vYmFy"]
    b16 = ["", "66", "666F", "666F6F", "666F6F62", "666F6F6261", "666F6F626172"]
    got64 = type_values(convert, "{type: bytes, encoding: base64}", b64)
    got16 = type_values(convert, "{type: bytes, encoding: hex}", [*b16, "666f6f"])
    for p, (value, reason) in zip(plain, got64, strict=True):
        assert reason is None and base64.b64decode(value) == p == base64.b64decode(base64.b64encode(p))
    for p, (value, reason) in zip([*plain, b"foo"], got16, strict=True):
        assert reason is None and base64.b64decode(value) == p
    # RFC 4648 section 3.3: characters outside the alphabet are rejected; section 4: padding
    bad = type_values(convert, "{type: bytes, encoding: base64}", ["Zm9v!", "Zg=", "Zm9vY", "Zm 9v"])
    assert all(v is None for v, _ in bad)
    bad16 = type_values(convert, "{type: bytes, encoding: hex}", ["6", "6G", "0x0x66", "x66", "0x6"])
    assert all(v is None for v, _ in bad16)
    assert [r for _, r in bad16] == ["an odd number of hex digits"] + [
        f'not hex: the characters "{c}" are not hex digits' for c in ("G", "x", "x")
    ] + ["an odd number of hex digits"]


def test_hex_bytes_as_postgresql_and_sql_server_write_them(convert: ConvertFn) -> None:
    """PostgreSQL's text form of bytea (``\\x`` then hex, what its COPY writes) and SQL Server's
    binary constant (``0x`` then hex, as its tools write a varbinary; from memory of its
    documentation): the bytes Python's ``bytes.fromhex`` reads from the digits."""
    texts = ["\\x666f6f", "0x666F6F", "0X00ff10", "0x", "\\x"]
    got = type_values(convert, "bytes", texts)
    for text, (value, reason) in zip(texts, got, strict=True):
        assert reason is None and base64.b64decode(value) == bytes.fromhex(text[2:]), text


def test_rfc9562_uuid_forms(convert: ConvertFn) -> None:
    # RFC 9562 Appendix A vectors (v3 and v5 of www.example.com in the DNS namespace, run with
    # Python uuid), the Nil and Max UUIDs (section 5.9, 5.10); lower case on output.
    v3 = str(uuid.uuid3(uuid.NAMESPACE_DNS, "www.example.com"))
    v5 = str(uuid.uuid5(uuid.NAMESPACE_DNS, "www.example.com"))
    assert v3 == "5df41881-3aed-3515-88a7-2f4a814cf09e" and v5 == "2ed6657d-e927-568b-95e1-2665a8aea6a2"
    raw = [v3.upper(), v5, "00000000-0000-0000-0000-000000000000", "FFFFFFFF-FFFF-FFFF-FFFF-FFFFFFFFFFFF"]
    got = type_values(
        convert,
        "uuid",
        [*raw, "5df418813aed351588a72f4a814cf09e", "{5df41881-3aed-3515-88a7-2f4a814cf09e}", "not-a-uuid"],
    )
    assert [v for v, _ in got[:4]] == [
        v3,
        v5,
        "00000000-0000-0000-0000-000000000000",
        "ffffffff-ffff-ffff-ffff-ffffffffffff",
    ]
    assert all(v is None for v, _ in got[4:])


def test_integer_is_64_bit_and_never_wraps(convert: ConvertFn) -> None:
    # 2**63 - 1 and -2**63 are the 64-bit limits (common practice: SQL BIGINT)
    raw = [str(2**63 - 1), str(-(2**63)), str(2**63), "+42", "007", "4.0", "1e3", " 1", ""]
    got = type_values(convert, "integer", raw)
    assert [v for v, _ in got[:2]] == [2**63 - 1, -(2**63)]
    assert got[2] == (None, "outside the 64-bit integer range")
    assert got[3] == (42, None) and got[4] == (7, None)
    assert all(r == "not an integer" for _, r in got[5:])


_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)
#: microseconds per unit of ``epoch`` (Python's datetime as the reference: years 0001-9999 in UTC)
_PER = {"s": 1_000_000, "ms": 1_000, "us": 1}
_FIRST = dt.datetime(1, 1, 1, tzinfo=dt.UTC) - _EPOCH
_LAST = dt.datetime(9999, 12, 31, 23, 59, 59, 999999, tzinfo=dt.UTC) - _EPOCH


def _span(unit: str) -> tuple[int, int]:
    """The counts of ``unit`` that lie in years 0001-9999 (UTC), by Python's datetime."""
    first, last = _FIRST // dt.timedelta(microseconds=1), _LAST // dt.timedelta(microseconds=1)
    if unit == "ns":
        return first * 1000, last * 1000 + 999
    per = _PER[unit]
    return -(-first // per), last // per


def _epoch_counts(unit: str) -> st.SearchStrategy[int]:
    lo, hi = _span(unit)
    return st.integers(lo - 10**6, hi + 10**6) | st.sampled_from([lo, hi, lo - 1, hi + 1, 0, -1, 1])


@settings(max_examples=300, deadline=None)
@given(st.sampled_from(["s", "ms", "us", "ns"]).flatmap(lambda u: st.tuples(st.just(u), _epoch_counts(u))))
def test_epoch_counts_are_the_instants_python_datetime_makes_of_them(drawn: tuple[str, int]) -> None:
    """Python's datetime is the oracle: a count of ``unit`` since 1970-01-01T00:00:00Z is that
    instant when it lies in years 0001-9999 (UTC) and, in nanoseconds, is whole microseconds."""
    from cdcnorm.engines.duckdb import DuckDBEngine
    from cdcnorm.sql import lit

    unit, count = drawn
    ftype = resolve(FieldSpec(type="timestamp", epoch=unit))  # type: ignore[arg-type]
    engine = _ENGINE.setdefault("engine", DuckDBEngine())
    text = lit(str(count))
    ((value, reason),) = engine.rows(
        f"SELECT {ftype.render('v')}, CASE WHEN v IS NULL THEN {ftype.explain(text)} END "
        f"FROM (SELECT {ftype.cast(text)} AS v)"
    )
    lo, hi = _span(unit)
    if not lo <= count <= hi:
        assert (value, reason) == (None, "outside the years 0001 to 9999 in UTC"), count
    elif unit == "ns" and count % 1000:
        assert (value, reason) == (None, TOO_FINE_NS), count
    else:
        micros = count // 1000 if unit == "ns" else count * _PER[unit]
        expected = _EPOCH + dt.timedelta(microseconds=micros)  # Python's datetime
        assert dt.datetime.fromisoformat(value.replace("Z", "+00:00")) == expected, (unit, count, value)


def test_epoch_counts_through_a_conversion(convert: ConvertFn) -> None:
    lo, hi = _span("ms")
    counts = [lo, hi, lo - 1, hi + 1, 0, -1, 1_772_352_000_250]
    got = type_values(convert, "{type: timestamp, epoch: ms}", [str(c) for c in counts])
    assert [v for v, _ in got] == [
        "0001-01-01T00:00:00Z",
        "9999-12-31T23:59:59.999Z",
        None,
        None,
        "1970-01-01T00:00:00Z",
        "1969-12-31T23:59:59.999Z",
        "2026-03-01T08:00:00.25Z",  # Python's datetime: 1772352000 s after 1970
    ]
    assert _EPOCH + dt.timedelta(seconds=1_772_352_000) == dt.datetime(2026, 3, 1, 8, tzinfo=dt.UTC)
    assert [r for _, r in got[2:4]] == ["outside the years 0001 to 9999 in UTC"] * 2


def test_epoch_counts_that_are_no_whole_numbers_are_named(convert: ConvertFn) -> None:
    raw = ["+1700000000", "0001700000000", "1.5", "1e9", " 1", "", "1" * 40]
    got = type_values(convert, "{type: timestamp, epoch: s}", raw)
    assert [v for v, _ in got[:2]] == ["2023-11-14T22:13:20Z"] * 2  # 1.7e9 s after 1970, by Python's datetime
    assert dt.datetime(2023, 11, 14, 22, 13, 20, tzinfo=dt.UTC).timestamp() == 1_700_000_000
    # a quoted empty cell is an empty text, not NULL (RFC 4180 quoting; NULL is an unquoted one)
    assert [r for _, r in got[2:6]] == ["not a whole number of seconds since 1970-01-01T00:00:00Z"] * 4
    assert got[6][1] == "outside the years 0001 to 9999 in UTC"


def test_a_commit_time_in_epoch_milliseconds_from_a_json_number(convert: ConvertFn) -> None:
    mapping = """
    table: t.ticks
    files: ["t*.jsonl"]
    key: [id]
    change:
      action: {column: op, codes: {c: insert}}
      position: {column: pos, kind: integer}
      committed_at: {column: ts_ms, epoch: ms}
    fields:
      id: integer
    """
    lines = [
        '{"op": "c", "pos": 1, "ts_ms": 1772352000250, "id": 1}',
        '{"op": "c", "pos": 2, "ts_ms": 1772352000.5, "id": 2}',
    ]
    done = convert(mapping, {"t.jsonl": "\n".join(lines) + "\n"})
    (event,) = done.events("t.ticks")
    # 1772352000 s after 1970 is 2026-03-01T08:00:00Z (Python's datetime)
    assert _EPOCH + dt.timedelta(seconds=1772352000) == dt.datetime(2026, 3, 1, 8, tzinfo=dt.UTC)
    assert event["committed_at"] == "2026-03-01T08:00:00.25Z"
    (q,) = done.quarantine("t.ticks")
    (reason,) = q["_cdcnorm"]["reasons"]
    assert reason["expected"] == "a whole number of milliseconds since 1970-01-01T00:00:00Z"
    assert reason["found"] == "1772352000.5"


#: timestamps with a space before the offset, as SQL Server writes a datetimeoffset (seven
#: fractional digits, from memory of its documentation) and PostgreSQL reads one; and near misses
SPACED_OFFSETS = [
    "2026-03-01 08:00:00.1230000 +01:00",
    "2026-03-01 08:00:00.0000000 -05:30",
    "2026-03-01 23:30:00 +14:00",
    "2026-03-01T08:00:00 Z",
    "2026-03-01 08:00:00 z",
    "2026-03-01 08:00:00 +0100",
    "2026-03-01 08:00:00 -03",
    "1990-12-31 15:59:60 -08:00",
    "0001-01-01 00:30:00 +00:30",
    "2026-03-01 08:00:00  +01:00",  # two spaces: no
    "2026-03-01 08:00:00 ",  # a space and no offset: no
    "2026-03-01 08:00:00.1234567 +01:00",  # would truncate: no
]


def test_a_space_before_the_offset_reads_as_postgresql_reads_it(convert: ConvertFn, pg_url: str) -> None:
    """A real PostgreSQL server as the oracle: each spaced form cdcnorm takes is the instant
    ``text::timestamptz`` gives there (a leap second as the next minute's first instant, as there)."""
    import psycopg

    got = type_values(convert, "timestamp", SPACED_OFFSETS)
    assert [v is not None for v, _ in got] == [True] * 9 + [False] * 3, got
    assert [r for _, r in got[9:]] == ["not an RFC 3339 timestamp"] * 2 + [TOO_FINE]
    with psycopg.connect(pg_url, autocommit=True) as c:
        c.execute("SET TimeZone = 'UTC'")
        for text, (value, _) in zip(SPACED_OFFSETS[:9], got[:9], strict=True):
            row = c.execute("SELECT %s::timestamptz", (text,)).fetchone()
            assert row is not None and row[0] == dt.datetime.fromisoformat(value.replace("Z", "+00:00")), text


def test_boolean_spellings(convert: ConvertFn) -> None:
    raw = ["true", "FALSE", "t", "F", "1", "0", "Yes", "no", "y", "Off", " on\t", "maybe", "o", "yess", "01"]
    got = type_values(convert, "boolean", raw)
    assert [v for v, _ in got[:11]] == [True, False, True, False, True, False, True, False, True, False, True]
    assert all(v is None for v, _ in got[11:])
    assert got[11][1] == "not a boolean: true/false, yes/no, on/off, 1/0 (any case), or t, f, y, n"


#: every word PostgreSQL's boolean input names, each prefix, in three cases, with and without the
#: whitespace it ignores, and near misses
BOOLEAN_CANDIDATES = sorted(
    {
        variant
        for word in ("true", "false", "yes", "no", "on", "off", "1", "0")
        for n in range(1, len(word) + 1)
        for case in (word[:n], word[:n].upper(), word[:n].title())
        for variant in (case, f" {case}", f"{case} ", f"\t{case}\n", f"\r{case}\x0b\x0c")
    }
    | {
        "truee",
        "yess",
        "onn",
        "offf",
        "01",
        "10",
        "2",
        "-1",
        "t rue",
        "nope",
        "ja",
        "\u00a0true",
        "ｔｒｕｅ",
        "   ",
    }
)


def test_boolean_spellings_as_postgresql_reads_them(convert: ConvertFn, pg_url: str) -> None:
    """A real PostgreSQL server as the oracle: each text is a boolean exactly when ``text::boolean``
    takes it there, and the same one."""
    import psycopg

    expected: list[bool | None] = []
    with psycopg.connect(pg_url.replace("postgresql+psycopg", "postgresql"), autocommit=True) as c:
        for text in BOOLEAN_CANDIDATES:
            try:
                row = c.execute("SELECT %s::boolean", (text,)).fetchone()
                expected.append(None if row is None else row[0])
            except psycopg.errors.InvalidTextRepresentation:
                expected.append(None)
    got = type_values(convert, "boolean", BOOLEAN_CANDIDATES)
    assert [v for v, _ in got] == expected, [
        (t, v, e) for t, (v, _), e in zip(BOOLEAN_CANDIDATES, got, expected, strict=True) if v != e
    ]
    assert sum(e is not None for e in expected) > 100  # most candidates are booleans


def test_float_date_time_text_json(convert: ConvertFn) -> None:
    f = type_values(convert, "float", ["0.1", "-2.5e-3", "1e308", "1e309", "NaN", "inf"])
    assert [v for v, _ in f[:3]] == [0.1, -0.0025, 1e308]
    assert all(v is None for v, _ in f[3:])
    d = type_values(convert, "date", ["2024-02-29", "2023-02-29", "2024-2-1"])
    assert d[0] == ("2024-02-29", None)  # 2024 is a leap year (Python datetime agrees)
    assert dt.date(2024, 2, 29).isoformat() == "2024-02-29"
    assert d[1][1] == "no such calendar date" and d[2][1] == "not a YYYY-MM-DD date"
    t = type_values(convert, "time", ["08:00:00", "23:59:59.5", "24:00:00", "08:00:00.1234567", "8:00:00"])
    assert [v for v, _ in t[:2]] == ["08:00:00", "23:59:59.5"]
    assert t[2][0] is None and t[3][1] == TOO_FINE and t[4][0] is None
    # RFC 3339 section 5.6's grammar (from memory): time-hour 00-23, time-minute 00-59,
    # time-second up to 60 only for a leap second, which a time of day without its date cannot be;
    # a time-numoffset is a time-hour and a time-minute. Python's time agrees on the ranges.
    for hms in ((24, 0, 0), (12, 61, 0), (23, 59, 60)):
        with pytest.raises(ValueError):
            dt.time(*hms)
    r = type_values(
        convert, "time", ["24:00:00", "12:61:00", "23:59:60", "12:00:61", "12:00:00+24:00", "8:00"]
    )
    assert [why for _, why in r] == [
        "hour 24 out of range (00-23)",
        "minute 61 out of range (00-59)",
        "second 60, a leap second: taken in a timestamp, whose date tells it, not in a time of day",
        "second 61 out of range (00-59)",
        "offset out of range (-23:59 to +23:59)",
        "not an HH:MM:SS[.ffffff][offset] time",
    ]
    # RFC 3339 section 4.2: 18:50:00-04:00 is the same time as 22:50:00Z; offsets wrap around midnight
    z = type_values(convert, "time", ["18:50:00-04:00", "22:50:00Z", "00:30:00+01:00", "23:30:00.25-01:30"])
    assert [v for v, _ in z] == ["22:50:00", "22:50:00", "23:30:00", "01:00:00.25"]
    x = type_values(convert, "text(5)", ["abcde", "abcdef", "ÅÄÖåä"])
    assert x[0] == ("abcde", None) and x[1][1] == "longer than 5 characters" and x[2] == ("ÅÄÖåä", None)
    j = type_values(convert, "json", ['{"a": [1, 2.50, null]}', "[1,", "12345678901234567890"])
    # RFC 8259: parsed and embedded, numbers keep their digits
    assert j[0][0] == json.loads('{"a": [1, 2.50, null]}') and j[1][0] is None
    assert j[2][0] == 12345678901234567890


def test_a_json_escape_of_a_lone_surrogate_is_refused_with_its_own_reason(convert: ConvertFn) -> None:
    # RFC 8259 section 8.2: "\ud800" alone is grammatical but names no character (its meaning is
    # unpredictable); I-JSON, RFC 7493 section 2.1, forbids it (from memory). Python's codecs agree
    # that it is no text: its json module parses it, and UTF-8 cannot encode the result.
    with pytest.raises(UnicodeEncodeError):
        json.loads('"\\ud800"').encode("utf-8")
    pair = '"\\ud83d\\ude00"'
    assert json.loads(pair).encode("utf-8") == "\U0001f600".encode()  # a pair is one character
    raw = ['"\\ud800"', '"x\\udfff"', pair, '"\\\\ud800"', '"\\ud800\\ud800"', "[1,"]
    got = type_values(convert, "json", raw)
    lone = [r for _, r in got]
    assert lone[0] == lone[1] == lone[4] and lone[0] is not None and "surrogate" in lone[0]
    assert got[2] == (json.loads(pair), None)
    assert got[3] == ("\\ud800", None)  # an escaped backslash, then letters: valid
    assert lone[5] == "not valid JSON (RFC 8259)"


@pytest.mark.parametrize(
    ("spec", "value_type"),
    [
        *[({"type": t}, t) for t in ("integer", "decimal(12,2)", "float", "boolean", "date", "time")],
        *[({"type": t}, t) for t in ("timestamp", "text", "text(40)", "bytes", "uuid", "json")],
        ({"type": "text", "max_length": 60}, "text(60)"),
        ({"type": "bytes", "encoding": "base64"}, "bytes"),  # how raw text is read: not the values'
        ({"type": "timestamp", "zone": "+02:00"}, "timestamp"),
        ({"type": "Decimal( 14, 3 )"}, "decimal(14,3)"),
    ],
)
def test_a_value_type_reads_back_as_itself(spec: dict[str, object], value_type: str) -> None:
    # run records state each field's value type; events written under it are read back by it
    ftype = resolve(FieldSpec.model_validate(spec))
    assert ftype.value_type() == value_type
    again = resolve(FieldSpec(type=value_type))
    assert again.value_type() == value_type and again.sql_type == ftype.sql_type


def _decimal_texts() -> st.SearchStrategy[str]:
    """Decimal texts as dumps write them: a sign, integer digits, a fraction that may end in zeros,
    and now and then an exponent."""
    digits = st.text("0123456789", max_size=40)
    mantissa = st.builds(
        lambda sign, whole, frac, zeros, dot: sign + whole + (("." + frac + "0" * zeros) if dot else ""),
        st.sampled_from(["", "-", "+"]),
        digits,
        st.text("0123456789", max_size=8),
        st.integers(0, 40),
        st.booleans(),
    ).filter(lambda m: any(c.isdigit() for c in m))
    exponent = st.one_of(st.just(""), st.integers(-45, 45).map(lambda e: f"E{e:+d}"))
    # exponent notation is read up to 60 characters (DecimalType.cast)
    return st.builds(lambda m, e: m + e, mantissa, exponent).filter(lambda t: "E" not in t or len(t) <= 60)


@settings(max_examples=300, deadline=None)
@example((38, 2), "1.250")
@example((38, 0), "1.0")
@example((2, 2), "-.5")
@example((38, 34), "10000E-1")
@example((38, 34), "0.00001E6")
@given(st.integers(1, 38).flatmap(lambda p: st.tuples(st.just(p), st.integers(0, p))), _decimal_texts())
def test_decimal_of_any_precision_against_python_decimal(ps: tuple[int, int], text: str) -> None:
    """Python's decimal is the oracle (the SQL standard's exact DECIMAL(p,s): at most p-s integer
    digits, nothing rounded): a text passes exactly when its value needs no rounding at scale s and
    fits, and then as that value with s fractional digits. Zeros at the end of a fraction round
    nothing: decimal(38,2) refused 1.250, and decimal(38,0) 1.0. A decimal(p,p) is written with its
    0 before the point: it was .50 (the engine's text). Exponent notation is read whatever zeros
    its digits carry: decimal(38,34) refused 10000E-1 (1000.0) and 0.00001E6 (10)."""
    from cdcnorm.engines.duckdb import DuckDBEngine
    from cdcnorm.sql import lit

    p, s = ps
    ftype = resolve(FieldSpec(type=f"decimal({p},{s})"))
    engine = _ENGINE.setdefault("engine", DuckDBEngine())
    # the value as the envelope writes it (its render), 0.50 for decimal(2,2) too
    ((got,),) = engine.rows(f"SELECT {ftype.render('v')} FROM (SELECT {ftype.cast(lit(text))} AS v)")
    with localcontext(prec=200):  # wide enough for every text drawn: no rounding in the oracle
        exact = Decimal(text)
        quantum = Decimal(1).scaleb(-s)
        fits = exact.quantize(quantum) == exact and abs(exact) < Decimal(10) ** (p - s)
        if fits:
            # an exact DECIMAL has no negative zero: -0.0 is 0 (Python's keeps the sign)
            assert got == format(
                exact.quantize(quantum).copy_abs() if not exact else exact.quantize(quantum), "f"
            )
        else:
            assert got is None, (text, p, s)


_ENGINE: dict[str, Any] = {}
