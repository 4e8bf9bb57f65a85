"""JSON Lines events: the engine's JSON writer and the line-splicing path give the same bytes.

A table without JSON-typed fields is written by the engine's JSON writer; one with them
has each line built as text (to splice JSON values in as written). Both must give the
same bytes for the same envelopes, and every line must be one RFC 8259 JSON text whose
values are the typed values (Python's ``json``, ``decimal`` and ``datetime`` as oracles).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from decimal import Decimal
from pathlib import Path

import sqlglot
from hypothesis import given, settings
from hypothesis import strategies as st

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, run
from cdcnorm.sql import PLAN_DIALECT
from cdcnorm.types.timestamp import timestamp_render
from cdcnorm.writers.base import project, sorted_events, write_events

MAPPING = """\
table: t.lines
files: ["d*"]
key: [id]
change:
  action: {column: op, codes: {I: insert, D: delete}}
  position: {column: pos, kind: integer}
  committed_at: {column: at}
fields:
  id: integer
  name: text
  fee: decimal(12,2)
  weight: float
  seen: timestamp
"""

# text with control characters, quotes, a backslash, U+2028, non-ASCII and an emoji
NASTY = 'a\x01b\x1f "q" \\ /\u2028é😀'
DUMP = (
    "op,pos,at,id,name,fee,weight,seen\n"
    f'I,1,2026-03-01T10:00:00Z,1,"{NASTY.replace(chr(34), chr(34) * 2)}",12.30,0.1,2026-03-01T09:59:59.120000Z\n'
    'I,2,2026-03-01T10:00:01+02:00,2,"tab\tnl\ncr\r",-0.01,1e300,0001-01-01T00:00:00Z\n'
    "I,3,2026-03-01T10:00:02Z,3,,,,\n"
    "D,4,2026-03-01T10:00:03Z,2,,,,\n"
)


def test_both_json_lines_paths_give_the_same_bytes(tmp_path: Path) -> None:
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(MAPPING)
    dump = tmp_path / "d1.csv"
    dump.write_bytes(DUMP.encode())
    result = run(load_mappings(tmp_path / "m"), [dump], Options(write=False))
    plan = next(iter(result.tables.values())).plan
    engine = result.engine
    ordered = f"({sorted_events(plan, '__files')}) AS ordered_events"
    written = tmp_path / "engine.jsonl"
    assert write_events(plan, engine, "__files", written, ordered, fmt="json") == 4
    # the text-line path that a table with a JSON field takes (with none to splice in here)
    spliced = tmp_path / "spliced.jsonl"
    sql = project(plan, "__files", render=True, as_line=True, relation=ordered)
    assert engine.copy(sqlglot.parse_one(sql, read=PLAN_DIALECT), spliced, "lines") == 4
    assert written.read_bytes() == spliced.read_bytes()

    # one JSON text per LF-ended line (U+2028 stays raw inside strings, as RFC 8259 allows)
    texts = written.read_bytes().split(b"\n")
    assert texts[-1] == b""
    lines = [json.loads(x, parse_float=Decimal) for x in texts[:-1]]
    first = lines[0]["values"]
    assert first["name"] == NASTY and first["fee"] == "12.30" and first["weight"] == Decimal("0.1")
    # RFC 3339 in UTC with Z (Python's datetime as the oracle)
    assert datetime.fromisoformat(first["seen"]) == datetime(2026, 3, 1, 9, 59, 59, 120000, tzinfo=UTC)
    assert (
        lines[1]["values"]["name"] == "tab\tnl\ncr\r" and lines[1]["values"]["seen"] == "0001-01-01T00:00:00Z"
    )
    assert lines[1]["committed_at"] == "2026-03-01T08:00:01Z"
    assert lines[2]["values"]["name"] is None and lines[3]["action"] == "delete"


def _rfc3339(d: datetime) -> str:
    """RFC 3339 section 5.6 in UTC with Z; a fraction only when there is one, without trailing zeros."""
    fraction = f".{d.microsecond:06d}".rstrip("0") if d.microsecond else ""
    return f"{d.year:04d}-{d.month:02d}-{d.day:02d}T{d.hour:02d}:{d.minute:02d}:{d.second:02d}{fraction}Z"


@settings(max_examples=300, deadline=None)
@given(
    st.lists(
        st.datetimes(min_value=datetime(1, 1, 1), max_value=datetime(9999, 12, 31, 23, 59, 59, 999999)),
        min_size=1,
        max_size=20,
    )
)
def test_timestamp_render_is_rfc3339_utc(values: list[datetime]) -> None:
    # Python's datetime as the oracle (RFC 3339 section 5.6); the engine in UTC, as a run sets it
    engine = DuckDBEngine()
    rows = ", ".join(f"(CAST('{d.isoformat()}+00:00' AS TIMESTAMPTZ))" for d in values)
    got = [r[0] for r in engine.rows(f"SELECT {timestamp_render('v')} FROM (VALUES {rows}) t(v)")]
    assert got == [_rfc3339(d) for d in values]


def test_timestamp_render_before_year_1() -> None:
    # RFC 3339 allows year 0000; the engine's own text would say "0001 (BC)"
    engine = DuckDBEngine()
    got = engine.rows(
        f"SELECT {timestamp_render('v')} FROM (VALUES (TIMESTAMPTZ '0000-06-01 12:00:00.5+00'), "
        "(TIMESTAMPTZ '0001-01-01 00:30:00+01')) t(v)"
    )
    assert [r[0] for r in got] == ["0000-06-01T12:00:00.5Z", "0000-12-31T23:30:00Z"]


_SPACE = st.sampled_from(["", " ", "\t", "  "])
_NUMBERS = st.builds(
    lambda sign, whole, frac, exp: f"{sign}{whole}{frac}{exp}",
    st.sampled_from(["", "-"]),
    st.sampled_from(["0", "1", "7", "123", "12345678901234567890123"]),
    st.sampled_from(["", ".0", ".50", ".1000000000000000055511151231257827"]),
    st.sampled_from(["", "e2", "E+400", "e-7"]),
)
_STRINGS = st.builds(
    lambda s, ascii_only: json.dumps(s, ensure_ascii=ascii_only),
    st.text(alphabet=st.sampled_from(list('ab1.5e-"\\/é😀 \n\t\x01\x02{}[]:,')), max_size=12),
    st.booleans(),
)


def _json_texts() -> st.SearchStrategy[str]:
    leaf = st.one_of(_NUMBERS, _STRINGS, st.sampled_from(["true", "false", "null"]))

    def wrap(inner: st.SearchStrategy[str]) -> st.SearchStrategy[str]:
        spaced = st.builds(lambda a, v, b: a + v + b, _SPACE, inner, _SPACE)
        arrays = st.lists(spaced, max_size=4).map(lambda items: "[" + ",".join(items) + "]")
        members = st.lists(st.builds(lambda k, s, v: k + s + ":" + v, _STRINGS, _SPACE, spaced), max_size=4)
        return st.one_of(arrays, members.map(lambda items: "{" + ",".join(items) + "}"))

    return st.recursive(leaf, wrap, max_leaves=12)


@settings(max_examples=400, deadline=None)
@given(text=_json_texts())
def test_tagging_numbers_without_a_whole_text_expression_tags_as_the_expression_does(text: str) -> None:
    """The fast tagging (the text cut at its quotes) and the regular expression over the whole
    text give the same text for every valid JSON text: numbers of every spelling, strings holding
    quotes, backslashes, digits and what looks like numbers (Python's json writes them)."""
    import duckdb

    from cdcnorm.types.json import tag_numbers, tag_numbers_of_valid

    con = duckdb.connect()
    assert con.execute("SELECT json_valid($1)", [text]).fetchone() == (True,)
    fast, slow = con.execute(
        f"SELECT {tag_numbers_of_valid('$1', '~n~')}, {tag_numbers('$1', '~n~')}", [text]
    ).fetchone()
    assert fast == slow
    # and tagged, the engine's parser keeps every number as written (json.loads is the oracle)
    untagged = json.loads(fast, object_pairs_hook=list)
    assert json.dumps(untagged).count("~n~") == sum(1 for _ in _number_tokens(text))


def _number_tokens(text: str) -> list[str]:
    """The number tokens of a JSON text outside strings (Python's own scanner decides)."""
    found: list[str] = []
    json.loads(
        text,
        parse_float=lambda t: found.append(t) or 0,
        parse_int=lambda t: found.append(t) or 0,
        parse_constant=lambda t: 0,
    )
    return found


def test_a_json_field_from_a_json_lines_member_of_each_kind(tmp_path: Path) -> None:
    """A member read into a json field: an object, array, number or true is the JSON value as written;
    a string is the JSON text it holds (a text column of JSON exported as a string), as a CSV cell
    is; a string that is no JSON text is quarantined with its reason; null is NULL. Python's json
    (RFC 8259) is the oracle for the values."""
    from tests.conftest import Converted, main

    members = {
        1: '{"a":1.50}',
        2: "[1,2e10]",
        3: "1.50",
        4: "true",
        5: json.dumps('{"b": [null]}'),  # JSON text held in a string
        6: json.dumps("x"),  # a string that is no JSON text
        7: json.dumps(json.dumps("x")),  # a JSON string value, written as the text that holds it
        8: "null",
    }
    mapping = MAPPING.replace('files: ["d*"]', 'files: ["d*"]\nformat: jsonl').split("fields:")[0]
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(mapping + "fields:\n  id: integer\n  doc: json\n")
    lines = "".join(
        f'{{"op":"I","pos":{k},"at":"2026-03-01T10:00:00Z","id":{k},"doc":{v}}}\n' for k, v in members.items()
    )
    (tmp_path / "d.jsonl").write_text(lines)
    out = tmp_path / "out"
    assert (
        main(["convert", str(tmp_path / "d.jsonl"), "--mappings", str(tmp_path / "m"), "--out", str(out)])
        == 0
    )
    done = Converted(out, 0)
    got = {e["key"]["id"]: e["values"]["doc"] for e in done.events("t.lines")}
    for k in (1, 2, 3, 4):
        assert got[k] == json.loads(members[k])
    assert got[5] == json.loads(json.loads(members[5])) and got[7] == "x" and got[8] is None
    (q,) = done.quarantine("t.lines")
    assert q["doc"] == "x" and q["_cdcnorm"]["reasons"][0]["reason"] == "not valid JSON (RFC 8259)"
