"""The identity index's content digest (``Plan.content``) is stored in landing areas and compared by
every later run, so it is defined by the project, not by an engine's text of a row: the MD5 (RFC
1321, here Python's ``hashlib``) of the row's canonical text: for the commit time and each field in
order, the value's JSON form (a timestamp: its microseconds since the epoch; an empty bytes value
``=``) as ``<n>:<text>`` for text and json (``n`` its length in characters), ``<text>;`` for any
other type, and ``;`` for NULL.

These tests compute that text from Python's own values (``decimal``, ``datetime``, ``base64`` per
RFC 4648, ``uuid`` per RFC 9562, ``repr`` of a float) and compare its MD5 with the digests a run
stores. If one fails after an upgrade, stored landing areas would see their own repeats as
conflicting versions."""

from __future__ import annotations

import base64
import hashlib
import json
import uuid
from datetime import UTC, date, datetime, time, timedelta
from decimal import Decimal
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.conftest import ConvertFn, cli, last_run, run_files

EPOCH = datetime(1970, 1, 1, tzinfo=UTC)


def canonical(value: Any, *, format_3: bool = False) -> str:
    """A value's canonical text, from Python's values (not the engine's): ``<n>:<text>`` for a text
    (text and json fields), ``<text>;`` for any other value, ``;`` for NULL. ``format_3``: as index
    format 3 wrote it (an empty bytes value as nothing, the same as NULL)."""
    if value is None:
        return ";"
    if isinstance(value, str):
        return f"{len(value)}:{value}"
    if isinstance(value, bool):
        text = "true" if value else "false"
    elif isinstance(value, datetime):  # microseconds since 1970-01-01T00:00:00Z
        text = str((value - EPOCH) // timedelta(microseconds=1))
    elif isinstance(value, Decimal):  # exactly its scale's digits, never an exponent
        text = format(value, "f")
    elif isinstance(value, float):  # the shortest text that reads back as the same double
        text = repr(value)
    elif isinstance(value, date):
        text = value.isoformat()
    elif isinstance(value, time):  # HH:MM:SS and a fraction without trailing zeros
        text = value.isoformat()
        text = text.rstrip("0").rstrip(".") if "." in text else text
    elif isinstance(value, bytes):  # RFC 4648 section 4; '=' alone is no base64 text
        text = base64.b64encode(value).decode() or ("" if format_3 else "=")
    elif isinstance(value, uuid.UUID):
        text = str(value)
    else:
        text = str(value)
    assert ";" not in text and (text or format_3)
    return f"{text};"


def digest(values: list[Any], *, format_3: bool = False) -> str:
    """The content digest as 32 hex digits: MD5 (RFC 1321) of the canonical texts joined."""
    text = "".join(canonical(v, format_3=format_3) for v in values)
    return hashlib.md5(text.encode()).hexdigest().upper()


def _stored(out: Path, table: str, key: str = "__pos") -> dict[Any, str]:
    """{position or key: digest as 32 hex digits} of the first run's identity file."""
    index = run_files(out, "index/emitted", table)[0]
    rows = pq.read_table(index).to_pylist()
    return {r[key]: f"{r['__content_hi'] << 64 | r['__content_lo']:032X}" for r in rows}


MAPPING = """
table: t.digest
files: ["d*"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: integer}
  committed_at: {column: at}
fields:
  id: integer
  name: text
  fee: decimal(12,2)
  weight: float
  seen: timestamp
  ok: boolean
"""

DUMP = (
    "op,pos,at,id,name,fee,weight,seen,ok\n"
    'I,1,2026-03-01T10:00:00Z,1,Åsa "quoted",12.50,0.1,2026-03-01T09:59:59.123456Z,true\n'
    "I,2,2026-03-01T10:00:01+02:00,2,,-0.01,1e300,2026-02-28 23:00:00,false\n"
    "I,3,2026-03-01T10:00:02Z,3,a\\nb,,-0.0,,\n"
)

#: (commit time, id, name, fee, weight, seen, ok) of each row, as Python values
VALUES = {
    1: [
        datetime(2026, 3, 1, 10, tzinfo=UTC),
        1,
        'Åsa "quoted"',
        Decimal("12.50"),
        0.1,
        datetime(2026, 3, 1, 9, 59, 59, 123456, tzinfo=UTC),
        True,
    ],
    2: [
        datetime(2026, 3, 1, 8, 0, 1, tzinfo=UTC),
        2,
        None,
        Decimal("-0.01"),
        1e300,
        datetime(2026, 2, 28, 23, tzinfo=UTC),
        False,
    ],
    3: [datetime(2026, 3, 1, 10, 0, 2, tzinfo=UTC), 3, "a\\nb", None, -0.0, None, None],
}


def test_the_canonical_text_reads_as_documented() -> None:
    row1 = "".join(canonical(v) for v in VALUES[1])
    assert row1 == '1772359200000000;1;12:Åsa "quoted"12.50;0.1;1772359199123456;true;'
    assert "".join(canonical(v) for v in VALUES[3]) == "1772359202000000;3;4:a\\nb;-0.0;;;"


def test_stored_digests_are_the_md5_of_the_canonical_text(convert: ConvertFn) -> None:
    done = convert(MAPPING, {"d.csv": DUMP})
    assert done.ledger()["total"]["emitted"] == 3 and done.quarantine("t.digest") == []
    stored = _stored(done.out, "t.digest")
    assert stored == {f"{p:020d}": digest(v) for p, v in VALUES.items()}


OTHER_TYPES = """
table: t.digest2
files: ["e*"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: integer}
fields:
  id: integer
  day: date
  at: time
  ref: uuid
  blob: bytes
  doc: json
"""

OTHER_DUMP = (
    "op,pos,id,day,at,ref,blob,doc\n"
    'I,1,1,2026-03-01,10:00:00.5,0190F4B2-7C1D-7A3E-9F00-1234567890AB,00ff10,"{""a"": [1.50, 1e2, null], ""b"": ""x""}"\n'
    "I,2,2,0001-01-01,23:59:59-04:00,,,\n"
)


def test_stored_digests_of_the_other_types(convert: ConvertFn) -> None:
    done = convert(OTHER_TYPES, {"e.csv": OTHER_DUMP})
    assert done.ledger()["total"]["emitted"] == 2 and done.quarantine("t.digest2") == []
    # without a committed_at column, the commit time is NULL
    expected = {
        1: [
            None,
            1,
            date(2026, 3, 1),
            time(10, 0, 0, 500000),
            uuid.UUID("0190f4b2-7c1d-7a3e-9f00-1234567890ab"),
            bytes.fromhex("00ff10"),
            '{"a":[1.50,1e2,null],"b":"x"}',  # the JSON form: minified, every token as written
        ],
        2: [None, 2, date(1, 1, 1), time(3, 59, 59), None, None, None],  # the time in UTC
    }
    assert _stored(done.out, "t.digest2") == {f"{p:020d}": digest(v) for p, v in expected.items()}


#: the same table as MAPPING, with a date and a bytes field too
PROPERTY_MAPPING = (
    MAPPING.replace("t.digest", "t.prop").replace('["d*"]', '["p*"]') + "  day: date\n  blob: bytes\n"
)

_timestamps = st.datetimes(
    min_value=datetime(1, 1, 1), max_value=datetime(9999, 12, 31), timezones=st.just(UTC)
).map(lambda d: d.astimezone(UTC))
_row = st.tuples(
    _timestamps,
    st.none() | st.text(st.characters(codec="utf-8", exclude_characters="\x00\r"), max_size=12),
    st.none() | st.decimals(min_value=-(10**10) + 1, max_value=10**10 - 1, places=2, allow_nan=False),
    st.none() | st.floats(allow_nan=False, allow_infinity=False, allow_subnormal=False),
    st.none() | _timestamps,
    st.none() | st.booleans(),
    st.none() | st.dates(),
    st.none() | st.binary(max_size=8),
)


def _cell(value: Any) -> str:
    """A CSV field (RFC 4180): NULL unquoted and empty, every value quoted (an empty text too)."""
    if value is None:
        return ""
    if isinstance(value, datetime):
        text = value.isoformat().replace("+00:00", "Z")
    elif isinstance(value, bool):
        text = str(value).lower()
    elif isinstance(value, bytes):
        text = value.hex()
    elif isinstance(value, float):
        text = repr(value)
    else:
        text = str(value)
    return '"' + text.replace('"', '""') + '"'


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.lists(_row, min_size=1, max_size=6))
def test_digests_of_generated_rows_follow_the_definition(
    convert: ConvertFn, rows: list[tuple[Any, ...]]
) -> None:
    lines = ["op,pos,at,id,name,fee,weight,seen,ok,day,blob"]
    expected = {}
    for i, (at, *fields) in enumerate(rows, start=1):
        lines.append(",".join(["I", str(i), _cell(at), str(i), *map(_cell, fields)]))
        expected[i] = digest([at, i, *fields])
    done = convert(PROPERTY_MAPPING, {"p.csv": "\n".join(lines) + "\n"})
    assert done.quarantine("t.prop") == []
    assert _stored(done.out, "t.prop", key="v0") == expected


@pytest.mark.parametrize("name", ["Åsa", "a:b", ";", "3:x;", ""])
def test_texts_that_look_like_the_framing_do_not_collide(convert: ConvertFn, name: str) -> None:
    """A text ``;`` or an empty text (quoted) and NULL (row 2): the lengths keep them apart."""
    dump = f'op,pos,at,id,name,fee,weight,seen,ok\nI,1,,1,"{name}",,,,\nI,2,,1,,,,,\n'
    done = convert(MAPPING, {"d.csv": dump})
    stored = _stored(done.out, "t.digest")
    assert len(set(stored.values())) == 2
    assert stored[f"{1:020d}"] == digest([None, 1, name, None, None, None, None])


#: OTHER_TYPES' table with its key and bytes field only
BLOB_MAPPING = (
    OTHER_TYPES.split("fields:")[0].replace("t.digest2", "t.blob").replace('["e*"]', '["b*"]')
    + "fields:\n  id: integer\n  blob: bytes\n"
)


def _run(base: Path, name: str, dump: str) -> dict[str, Any]:
    """Convert one delivery into the landing area ``base / "out"``; the run's ledger total."""
    (base / "m").mkdir(parents=True, exist_ok=True)
    (base / "m" / "t.yaml").write_text(BLOB_MAPPING)
    (base / name).write_text(dump)
    assert (
        cli("convert", str(base / name), "--mappings", str(base / "m"), "--out", str(base / "out"), "--quiet")
        == 0
    )
    total: dict[str, Any] = last_run(base / "out")["ledger"]["total"]
    return total


#: an empty bytes value (quoted empty hex) at position 1, NULL (unquoted empty) at position 2
BLOBS = 'op,pos,id,blob\nI,1,1,""\nI,2,2,\n'
#: the same rows in other bytes (a file already read is skipped whole)
BLOBS_AGAIN = BLOBS.replace("\n", "\r\n")


def test_an_empty_bytes_value_and_null_are_different_content(tmp_path: Path) -> None:
    """The same identity delivered again with NULL where it had an empty bytes value (and the other
    way round) is a conflicting version, not a duplicate; the same values again are duplicates."""
    assert _run(tmp_path, "b1.csv", BLOBS)["emitted"] == 2
    again = _run(tmp_path, "b2.csv", BLOBS_AGAIN)
    assert (again["duplicate"], again["quarantined"]) == (2, 0)
    swapped = _run(tmp_path, "b3.csv", 'op,pos,id,blob\nI,1,1,\nI,2,2,""\n')
    assert (swapped["duplicate"], swapped["quarantined"]) == (0, 2)
    stored = _stored(tmp_path / "out", "t.blob")
    assert stored[f"{1:020d}"] == digest([None, 1, b""]) != digest([None, 1, None])


def test_an_area_of_index_format_3_keeps_its_empty_bytes_values_apart(tmp_path: Path) -> None:
    """Format 3 stored an empty bytes value's digest as NULL's: an area whose run 1 wrote format 3
    sees the same delivery again as duplicates (compared with format 3's digest), not conflicts."""
    assert _run(tmp_path, "b1.csv", BLOBS)["emitted"] == 2
    (written,) = run_files(tmp_path / "out", "index/emitted", "t.blob")
    table = pq.read_table(written)
    assert table.schema.metadata is not None
    assert table.schema.metadata[b"cdcnorm_index_format"] == b"4"
    assert json.loads(table.schema.metadata[b"cdcnorm_fields"]) == [["id", "BIGINT"], ["blob", "BLOB"]]
    old = [
        int(digest([None, i, b"" if i == 1 else None], format_3=True), 16) for i in table["v0"].to_pylist()
    ]
    assert digest([None, 1, b""], format_3=True) == digest([None, 1, None], format_3=True)  # as format 3 did
    for name, values in (
        ("__content_hi", [d >> 64 for d in old]),
        ("__content_lo", [d & (2**64 - 1) for d in old]),
    ):
        table = table.set_column(table.column_names.index(name), name, pa.array(values, pa.uint64()))
    pq.write_table(table.replace_schema_metadata(None), written)  # format 3 files state no format
    again = _run(tmp_path, "b2.csv", BLOBS_AGAIN)
    assert (again["duplicate"], again["quarantined"]) == (2, 0)


def test_an_identity_file_of_a_later_format_is_refused_by_name(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    base = tmp_path / ("a-long-folder-name-" * 8)  # the message is then wider than any console
    _run(base, "b1.csv", BLOBS)
    (written,) = run_files(base / "out", "index/emitted", "t.blob")
    table = pq.read_table(written)
    pq.write_table(table.replace_schema_metadata({"cdcnorm_index_format": "5"}), written)
    (base / "b2.csv").write_text(BLOBS_AGAIN)
    code = cli("convert", str(base / "b2.csv"), "--mappings", str(base / "m"), "--out", str(base / "out"))
    err = capsys.readouterr().err
    assert code == 4 and "Traceback" not in err  # EXIT_INPUT
    said = f"{written}: identity file of index format 5, which this version of cdcnorm does not read"
    # one line however wide (a log keeps it whole), the file named once
    assert f"error: {said}\n  expected: index format 4 or older\n  found: index format 5\n" in err
    assert err.count(str(written)) == 1
