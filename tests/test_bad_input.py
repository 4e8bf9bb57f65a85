"""Bad input, one class per test: nothing silent, nothing lost, nothing outside the output folder,
no traceback. Each names what it checks; where a value is involved, its raw text is kept."""

from __future__ import annotations

import json
from datetime import UTC
from decimal import Decimal
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.sql import lit
from tests.conftest import Converted, ConvertFn, cli, last_run

NOTES = """
table: t.notes
files: ["n*"]
key: [id]
change:
  action: {column: op, codes: {I: insert, D: delete}}
  position: {column: pos, kind: integer}
fields:
  id: integer
  a: TYPE
"""


def _one_value(
    convert: ConvertFn, type_: str, raw: str
) -> tuple[list[dict[str, object]], list[dict[str, object]]]:
    done = convert(NOTES.replace("TYPE", type_), {"n.csv": f'op,pos,id,a\nI,1,1,"{raw}"\n'})
    assert done.ledger()["balanced"]
    return done.events("t.notes"), done.quarantine("t.notes")


@pytest.mark.parametrize("raw", ["1e-36", "1e-1000", "1.55e-1", "-0.0001e1"])
def test_decimal_digits_beyond_the_scale_in_exponent_notation_are_quarantined(
    convert: ConvertFn, raw: str
) -> None:
    # Python's decimal as the reference: the value needs more than 2 fractional digits
    assert Decimal(raw) != Decimal(raw).quantize(Decimal("0.01"))
    events, (q,) = _one_value(convert, '"decimal(5,2)"', raw)
    assert events == [] and q["a"] == raw
    assert q["_cdcnorm"]["reasons"][0]["reason"] == "non-zero digits beyond 2 fractional places (would round)"


@pytest.mark.parametrize(("raw", "value"), [("1250e-3", "1.25"), ("12345e-2", "123.45"), ("0e-1000", "0.00")])
def test_decimal_exponent_notation_that_is_exact_is_kept(convert: ConvertFn, raw: str, value: str) -> None:
    assert str(Decimal(raw).quantize(Decimal("0.01"))) == value  # Python's decimal
    (e,), _ = _one_value(convert, '"decimal(5,2)"', raw)
    assert e["values"]["a"] == value  # type: ignore[index]


@pytest.mark.parametrize("raw", ["1e-400", "4e-320"])
def test_float_underflow_is_quarantined(convert: ConvertFn, raw: str) -> None:
    # IEEE 754 binary64: 1e-400 rounds to 0.0, 4e-320 is subnormal (fewer significant bits)
    assert float(raw) < 2.2250738585072014e-308
    events, (q,) = _one_value(convert, "float", raw)
    assert events == [] and q["a"] == raw
    assert q["_cdcnorm"]["reasons"][0]["reason"] == "underflows: below the smallest normal double"


@pytest.mark.parametrize(
    "raw", ["9999-12-31T23:00:00-02:00", "9999-12-31T23:59:60Z", "0001-01-01T00:30:00+01:00"]
)
def test_timestamps_outside_years_0001_to_9999_in_utc_are_quarantined(convert: ConvertFn, raw: str) -> None:
    from datetime import datetime, timedelta

    # Python's datetime as the reference: the UTC instant is outside years 1..9999 (a leap
    # second is the first instant of the next minute)
    leap = raw.endswith(":60Z")
    instant = datetime.fromisoformat(raw.replace(":60Z", ":59+00:00") if leap else raw)
    with pytest.raises(OverflowError):
        instant.astimezone(UTC) + (timedelta(seconds=1) if leap else timedelta(0))
    events, (q,) = _one_value(convert, "timestamp", raw)
    assert events == [] and q["a"] == raw
    assert q["_cdcnorm"]["reasons"][0]["reason"] == "outside the years 0001 to 9999 in UTC"


def test_bytes_message_names_the_characters_and_postgresql_hex_is_accepted(convert: ConvertFn) -> None:
    data = "op,pos,id,a\nI,1,1,zz\nI,2,2,\\x0a0B\nI,3,3,0a0\n"
    done = convert(NOTES.replace("TYPE", "bytes"), {"n.csv": data})
    (e,) = done.events("t.notes")
    assert e["values"]["a"] == "Cgs="  # RFC 4648 base64 of 0x0a0b; PostgreSQL's \\x form of bytea
    reasons = {q["id"]: q["_cdcnorm"]["reasons"][0]["reason"] for q in done.quarantine("t.notes")}
    assert reasons == {
        "1": 'not hex: the characters "zz" are not hex digits',
        "3": "an odd number of hex digits",
    }


def test_text_positions_sort_in_byte_order_of_the_text(convert: ConvertFn) -> None:
    mapping = NOTES.replace("TYPE", "text").replace("kind: integer", "kind: text")
    rows = "".join(f"I,{p},{i},x\n" for i, p in enumerate(["a-", "a", "b", "a\u00e9", "ab"], 1))
    done = convert(mapping, {"n.csv": "op,pos,id,a\n" + rows})
    ids = [e["key"]["id"] for e in done.events("t.notes")]
    # code point order of the texts (Python's str order): a, a-, ab, aé, b
    assert ids == [2, 1, 5, 4, 3]
    positions = [e["position"] for e in done.events("t.notes")]
    assert positions == sorted(positions) and positions[0] == "61.0"


def test_a_table_name_that_would_escape_the_output_folder_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    for name in ["../../escaped", "/tmp/x", "CON", ".hidden"]:
        (m := tmp_path / "m").mkdir(exist_ok=True)
        (m / "t.yaml").write_text(NOTES.replace("TYPE", "text").replace("t.notes", json.dumps(name)))
        (tmp_path / "n.csv").write_text("op,pos,id,a\nI,1,1,x\n")
        assert (
            cli("convert", "--mappings", str(m), str(tmp_path / "n.csv"), "--out", str(tmp_path / "o")) == 3
        )
        err = capsys.readouterr().err
        assert "t.yaml" in err and "cannot name the output's folders" in err and "Traceback" not in err
    assert not (tmp_path / "o" / "events").exists() and not (tmp_path.parent / "escaped").exists()


@pytest.mark.parametrize(
    ("yaml_snippet", "message"),
    [
        ("codes: {010: insert}", "action code 8 was read as a int"),
        ("position: {column: pos, kind: integer, width: 8}", "width applies to hex positions only"),
        ("a: {type: integer, max_length: 3}", "max_length applies to text fields only"),
        ("a: {type: integer, epoch: ms}", "epoch applies to timestamp fields only"),
        ("a: {type: timestamp, epoch: ms, zone: '+01:00'}", "zone does not apply to a count since the epoch"),
        ("a: {type: timestamp, epoch: minutes}", "epoch"),
        (
            "position: {column: pos, kind: integer}\n  committed_at: {column: a, epoch: s, zone: Z}",
            "zone does not apply to a count since the epoch",
        ),
    ],
)
def test_mapping_options_that_do_not_apply_are_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], yaml_snippet: str, message: str
) -> None:
    text = NOTES.replace("TYPE", "text")
    if yaml_snippet.startswith("codes"):
        text = text.replace("codes: {I: insert, D: delete}", yaml_snippet)
    elif yaml_snippet.startswith("position"):
        text = text.replace("position: {column: pos, kind: integer}", yaml_snippet)
    else:
        text = text.replace("a: text", yaml_snippet)
    (m := tmp_path / "m").mkdir()
    (m / "t.yaml").write_text(text)
    (tmp_path / "n.csv").write_text("op,pos,id,a\nI,1,1,x\n")
    assert cli("check", "--mappings", str(m), str(tmp_path / "n.csv")) == 3
    err = capsys.readouterr().err
    assert message in err and "t.yaml" in err and "Traceback" not in err


def _notes(tmp_path: Path) -> tuple[Path, Path]:
    (m := tmp_path / "m").mkdir(exist_ok=True)
    (m / "t.yaml").write_text(NOTES.replace("TYPE", "integer"))
    (d := tmp_path / "n.csv").write_text("op,pos,id,a\nI,1,1,x\nI,2,2,3\n")
    return m, d


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--memory-limit", "banana"], "'banana' is not a memory size"),
        (["--threads", "-3"], "'-3' is not a whole number of at least 1"),
        (["--limit", "-1"], "'-1' is not a whole number of 0 or more"),
        (["--max-rejects", "-1"], "'-1' is not a whole number of 0 or more"),
        (["--wait", "soon"], "'soon' is not a number of seconds"),
        (["--table", "t.note", "--show-plan"], 'did you mean "t.notes"'),
        (["--table", "t.notes"], "--table goes with --show-plan or --stop-after"),
        # before: accepted and passed over, the whole conversion run as though it were not given
        (["--limit", "5"], "--limit goes with --stop-after"),
    ],
)
def test_options_are_checked_before_anything_runs(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    m, d = _notes(tmp_path)
    assert cli("convert", "--mappings", str(m), str(d), "--out", str(tmp_path / "o"), *args) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err
    assert not (tmp_path / "o" / "runs").exists()


def test_max_rejects_zero_allows_none_and_json_keeps_the_ledger(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    m, d = _notes(tmp_path)
    out = tmp_path / "o"
    assert (
        cli("convert", "--mappings", str(m), str(d), "--out", str(out), "--max-rejects", "0", "--json") == 5
    )
    report = json.loads(capsys.readouterr().out)
    assert report["exit_code"] == 5 and report["ledger"]["total"]["quarantined"] == 1
    assert report["run"] == last_run(out)["run"]  # the run was committed all the same
    assert (
        cli("convert", "--mappings", str(m), str(d), "--out", str(tmp_path / "o2"), "--quiet") == 0
    )  # no limit


def test_an_output_folder_that_is_a_file_is_refused_before_reading(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    m, d = _notes(tmp_path)
    (tmp_path / "o").write_text("not a folder")
    assert cli("convert", "--mappings", str(m), str(d), "--out", str(tmp_path / "o")) == 4
    err = capsys.readouterr().err
    assert "the output folder is a file" in err and str(tmp_path / "o") in err


def test_a_header_only_file_without_a_final_newline_has_no_rows(convert: ConvertFn) -> None:
    done = convert(NOTES.replace("TYPE", "text"), {"n1.csv": "op,pos,id,a", "n2.csv": "op,pos,id,a\r\n"})
    files = done.ledger()["tables"]["t.notes"]["files"]
    assert files["n1.csv"]["read"] == 0 and files["n2.csv"]["read"] == 0


def test_a_before_image_whose_after_image_was_quarantined_says_so(convert: ConvertFn) -> None:
    mapping = NOTES.replace("TYPE", "integer").replace(
        "{I: insert, D: delete}", "{I: insert, B: before, A: after}"
    )
    done = convert(mapping, {"n.csv": "op,pos,id,a\nB,1,1,5\nA,1,1,x\nB,2,2,7\n"})
    reasons = {q["op"]: q["_cdcnorm"]["reasons"][0]["reason"] for q in done.quarantine("t.notes")}
    assert reasons == {
        "A": "not an integer",
        "B": "before-image whose after-image at this position was quarantined",
    }
    total = done.ledger()["total"]
    assert total["quarantined"] == 2 and total["pending"] == 1 and done.ledger()["balanced"]  # row 3 waits


@pytest.mark.parametrize("stage", ["source", "order", "dedupe", "pair", "envelope"])
def test_stop_after_shows_field_and_file_names(capsys: pytest.CaptureFixture[str], stage: str) -> None:
    import re

    from tests.conftest import ROOT

    dumps, mappings = ROOT / "examples" / "dumps", ROOT / "mappings"
    assert (
        cli(
            "convert",
            "--mappings",
            str(mappings),
            str(dumps),
            "--stop-after",
            stage,
            "--table",
            "ferry.bookings",
            "--json",
        )
        == 0
    )
    rows = json.loads(capsys.readouterr().out)["rows"]
    assert rows and all(not re.fullmatch(r"[cvpa][0-9]+|__file", k) for k in rows[0])
    assert {r["file"] for r in rows} <= {"bookings-archive.csv", "bookings-live.csv"}
    if stage == "order":
        assert "booking_id" in rows[0] and "position" in rows[0]


def test_changes_of_one_key_at_one_position_that_cannot_be_ordered_are_quarantined(
    convert: ConvertFn,
) -> None:
    # an insert and a delete of key 1 at position 5, no sequence: which came last is not known; a
    # before and after pair at one position is an update, and key 3's changes have positions
    mapping = NOTES.replace("TYPE", "integer").replace(
        "{I: insert, D: delete}", "{I: insert, D: delete, B: before, A: after}"
    )
    data = "op,pos,id,a\nI,5,1,1\nD,5,1,1\nB,6,2,1\nA,6,2,2\nI,7,3,1\nD,8,3,1\n"
    done = convert(mapping, {"n.csv": data})
    events = [(e["action"], e["key"]["id"], e["position"]) for e in done.events("t.notes")]
    assert events == [
        ("upsert", 2, "00000000000000000006.2"),
        ("upsert", 3, "00000000000000000007.0"),
        ("delete", 3, "00000000000000000008.0"),
    ]
    quarantined = {
        (q["op"], q["id"]): q["_cdcnorm"]["reasons"][0]["reason"] for q in done.quarantine("t.notes")
    }
    assert set(quarantined) == {("I", "1"), ("D", "1")}
    assert all(r.startswith("ambiguous order") for r in quarantined.values())
    total = done.ledger()["total"]
    assert total["quarantined"] == 2 and total["merged"] == 1 and done.ledger()["balanced"]


def _csv_rows(header: list[str], rows: list[list[str]]) -> str:
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")  # RFC 4180 quoting
    w.writerow(header)
    w.writerows(rows)
    return buf.getvalue()


@pytest.mark.parametrize(
    ("raw", "reason"),
    [
        ("NaN", "bare words"),
        ("[1, Infinity]", "bare words"),
        ("[1,]", "a comma before ] or }"),
        ('{"a": 1,}', "a comma before ] or }"),
        ('{"a": 1, "a": 2}', "repeats a member name"),
        ('{"x": [{"b": 1, "b": 2}]}', "repeats a member name"),
    ],
)
def test_json_that_is_not_rfc_8259_or_repeats_a_name_is_quarantined(
    convert: ConvertFn, raw: str, reason: str
) -> None:
    # RFC 8259 section 6: NaN and Infinity are not permitted; section 4/5: no trailing commas;
    # RFC 7493 section 2.3: member names MUST NOT repeat. (Python's json module accepts NaN, so it
    # is not the reference here.)
    done = convert(
        NOTES.replace("TYPE", "json"), {"n.csv": _csv_rows(["op", "pos", "id", "a"], [["I", "1", "1", raw]])}
    )
    assert done.ledger()["balanced"] and done.events("t.notes") == []
    (q,) = done.quarantine("t.notes")
    assert q["a"] == raw and reason in q["_cdcnorm"]["reasons"][0]["reason"]


def test_json_values_keep_their_numbers_as_written(convert: ConvertFn, tmp_path: Path) -> None:
    """1.50, -0, 1e2 and a 34-digit fraction stay as written in JSON Lines and Parquet events
    (the engine's own rendering would give 1.5, 0, 100.0 and 0.1)."""
    raw = '{ "n" : [1.50, -0, 1e2, 0.1000000000000000055511151231257827], "s": "a, ] NaN" }'
    done = convert(
        NOTES.replace("TYPE", "json"),
        {"n.csv": _csv_rows(["op", "pos", "id", "a"], [["I", "1", "1", raw], ["I", "2", "2", ""]])},
    )
    written = (done.out / "events" / "t.notes").glob("*.jsonl")
    line = next(iter(written)).read_text(encoding="utf-8").splitlines()[0]
    assert '"a":{"n":[1.50,-0,1e2,0.1000000000000000055511151231257827],"s":"a, ] NaN"}' in line
    # Python's json with decimal.Decimal for numbers: the digits survive the round trip
    value = json.loads(line, parse_float=Decimal)["values"]["a"]
    assert value["n"] == [Decimal("1.50"), 0, Decimal("1e2"), Decimal("0.1000000000000000055511151231257827")]
    assert done.events("t.notes")[1]["values"]["a"] is None  # NULL stays null


@pytest.mark.parametrize(
    "line", ['{"op":"I","pos":"2","id":18,}', "NaN", '{"op":"I","pos":"3","id":1,"id":2}']
)
def test_json_lines_records_that_are_not_rfc_8259_objects_are_quarantined(
    convert: ConvertFn, line: str
) -> None:
    mapping = NOTES.replace("TYPE", "text").replace('files: ["n*"]', 'files: ["n*"]')
    done = convert(mapping, {"n.jsonl": '{"op":"I","pos":"1","id":1,"a":"ok"}\n' + line + "\n"})
    assert done.ledger()["balanced"] and len(done.events("t.notes")) == 1
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["text"] == line  # the record's raw text, exactly
    assert q["_cdcnorm"]["row"] == 2


#: Values read from nested objects (JSON Lines) or struct members (Parquet) by dotted names.
NESTED_FIELDS = "  id: {from: after.id, type: integer}\n  city: {from: after.place.city, type: text}\n"
NESTED = NOTES.replace("t.notes", "t.nested").replace(
    "  id: integer\n  a: TYPE\n", NESTED_FIELDS + "  extra: {from: extra, type: json}\n"
)


def _repeats_on_the_way(line: str, ways: list[tuple[str, ...]]) -> bool:
    """Python's json as the reference: does the top object, or an object the mapping's paths pass
    through, repeat a member name? (``object_pairs_hook`` sees every pair, repeats included)"""

    def pairs_tree(pairs: list[tuple[str, object]]) -> object:
        return ("obj", pairs)

    tree = json.loads(line, object_pairs_hook=pairs_tree)
    for way in ways:
        node: object = tree
        for step in (None, *way):
            if not (isinstance(node, tuple) and node[0] == "obj"):
                break
            members = node[1]
            names = [k for k, _ in members]
            if step is None and len(names) != len(set(names)):
                return True
            if step is not None:
                found = [v for k, v in members if k == step]
                node = found[0] if found else None
                if isinstance(node, tuple) and node[0] == "obj":
                    inner = [k for k, _ in node[1]]
                    if len(inner) != len(set(inner)):
                        return True
    return False


@pytest.mark.parametrize(
    "line",
    [
        '{"op":"I","pos":1,"after":{"id":1,"id":2,"place":{"city":"Quay"}}}',
        '{"op":"I","pos":1,"after":{"id":1,"place":{"city":"Quay","city":"Dune"}}}',
        '{"op":"I","pos":1,"after":{"id":1,"place":{"city":"Quay"}},"after":{"id":1}}',
        '{"op":"I","pos":1,"after":{"id":1,"place":{"city":"Quay","zip":"1","zip":"2"}}}',
        '{"op":"I","pos":1,"after":{"id":1,"place":{"city":"Quay"}},"other":{"n":1,"n":2}}',
        '{"op":"I","pos":1,"after":{"id":1,"place":{"city":"Quay"}},"extra":{"n":1,"n":2}}',
    ],
)
def test_json_lines_a_name_repeated_on_the_way_to_a_mapped_column_is_quarantined(
    convert: ConvertFn, line: str
) -> None:
    # RFC 7493 section 2.3: member names MUST NOT repeat. A repeat in an object a mapped column
    # is read through (after, after.place) makes the column's value ambiguous, as at the top:
    # the record is quarantined whole. A repeat elsewhere ("other") is kept as written; one in a
    # json field ("extra") is that field's own quarantine reason.
    ways = [("after", "id"), ("after", "place", "city")]
    extra = '"extra"' in line
    if not extra:
        line = line[:-1] + ',"extra":null}'  # every mapped column present (an absent one is drift)
    done = convert(NESTED, {"n.jsonl": line + "\n"})
    assert done.ledger()["balanced"]
    quarantined = done.quarantine("t.nested")
    whole = [q for q in quarantined if q["_cdcnorm"]["reasons"][0]["field"] is None]
    assert bool(whole) == _repeats_on_the_way(line, ways)
    if whole:
        assert (
            whole[0]["_cdcnorm"]["text"] == line
            and "repeats a member name" in whole[0]["_cdcnorm"]["reasons"][0]["reason"]
        )
    elif extra:
        (q,) = quarantined
        assert q["_cdcnorm"]["reasons"][0]["field"] == "extra"
    else:
        assert [e["values"]["city"] for e in done.events("t.nested")] == ["Quay"]


#: JSON Lines records whose strings hold what the lexical checks look for outside strings, next to
#: escaped quotes and backslashes; and the same constructs outside strings. (valid?, line)
ESCAPED = [
    (True, r'{"op":"I","pos":"1","id":1,"a":"x\",}NaN"}'),
    (True, r'{"op":"I","pos":"1","id":1,"a":"ends in a backslash \\"}'),
    (True, r'{"op":"I","pos":"1","id":1,"a":"\\\" 1e5, Infinity ]"}'),
    (True, r'{"op":"I","pos":"1","id":1,"a":"\u0022,}\\\\"}'),
    (False, r'{"op":"I","pos":"1","id":1,"a":"\\",}'),
    (False, r'{"op":"I","pos":"1","id":1,"a":"x\"","b":NaN}'),
    (False, r'{"op":"I","pos":"1","id":1,"a":"\\\"",}'),
]


def _no_constant(name: str) -> object:
    """Python's json accepts NaN and Infinity; RFC 8259 section 6 does not."""
    raise ValueError(name)


@pytest.mark.parametrize(("valid", "line"), ESCAPED)
def test_json_lines_checks_read_outside_strings_whatever_they_escape(
    convert: ConvertFn, valid: bool, line: str
) -> None:
    """Python's json module (RFC 8259, NaN aside) says which of these are JSON texts; the reader must
    agree, and keep a valid one's string exactly."""
    try:
        expected = json.loads(line, parse_constant=_no_constant)
    except ValueError:
        expected = None
    assert (expected is not None) == valid
    mapping = NOTES.replace("TYPE", "text")
    done = convert(mapping, {"n.jsonl": '{"op":"I","pos":"0","id":0,"a":"ok"}\n' + line + "\n"})
    assert done.ledger()["balanced"]
    if valid:
        assert [e["values"]["a"] for e in done.events("t.notes")] == ["ok", expected["a"]]
    else:
        (q,) = done.quarantine("t.notes")
        assert q["_cdcnorm"]["text"] == line


def test_json_lines_blank_lines_are_not_records(convert: ConvertFn) -> None:
    """A line of only tabs, spaces, form feeds and CRs is no record (and not counted); a vertical tab
    or a no-break space is no JSON whitespace (RFC 8259 section 2), so that line is a malformed record."""
    good = '{"op":"I","pos":"P","id":P,"a":"ok"}'
    lines = [good.replace("P", "1"), "", " \t\f ", "\r", good.replace("P", "2"), "\v", "\u00a0"]
    done = convert(NOTES.replace("TYPE", "text"), {"n.jsonl": "\n".join(lines) + "\n"})
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 4 and len(done.events("t.notes")) == 2
    assert sorted(q["_cdcnorm"]["row"] for q in done.quarantine("t.notes")) == [6, 7]


def _blank_notes(done: Converted) -> dict[str, list[str]]:
    return {n["file"]: [n["note"]] for n in last_run(done.out)["notes"] if "blank line" in n["note"]}


BLANK_CSV = "op,pos,id,a\nI,1,1,x\n\nI,2,2,y\r\n\r\n\nI,3,3,z\n\n"


@pytest.mark.parametrize(
    ("form", "body", "extra"),
    [
        ("RFC 4180, the engine's reader", BLANK_CSV, ""),
        ("RFC 4180, record by record (a broken quote)", BLANK_CSV.replace("I,3,3,z", 'I,3,3,"z'), ""),
        # a CR is data in these forms, whose lines end as the first line's does
        ("COPY's text format", BLANK_CSV.replace(",", "\t").replace("\r", ""), "csv: {escapes: backslash}"),
        (
            "plain text, record by record",
            BLANK_CSV.replace(",", "|~|").replace("\r", ""),
            'csv: {escapes: none, delimiter: "|~|"}',
        ),
    ],
)
def test_blank_lines_are_not_records_and_a_note_counts_them(
    convert: ConvertFn, form: str, body: str, extra: str
) -> None:
    """Blank lines were left out of every count without a word: a dump's lines and its ledger's
    rows then differed with nothing to say why. They are still no records (a CSV record number
    counts records), and the run notes how many each file had."""
    done = convert(NOTES.replace("TYPE", "text") + extra, {"n.csv": body})
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 3, form
    assert [e["origin"]["row"] for e in done.events("t.notes")] == [1, 2, 3][: len(done.events("t.notes"))]
    assert _blank_notes(done) == {"n.csv": ["4 blank lines: not records, not counted as read"]}, form


def test_blank_lines_of_many_small_files_and_of_json_lines_are_noted(convert: ConvertFn) -> None:
    """Small files read as one (twenty here), and JSON Lines, whose record numbers are line numbers."""
    files: dict[str, str | bytes] = {f"n{i:02d}.csv": f"op,pos,id,a\nI,{i},{i},x\n" for i in range(1, 21)}
    files["n05.csv"] = "op,pos,id,a\n\nI,5,5,x\n"
    done = convert(NOTES.replace("TYPE", "text"), files)
    assert done.ledger()["total"]["read"] == 20
    assert _blank_notes(done) == {"n05.csv": ["a blank line: not records, not counted as read"]}
    lines = '{"op":"I","pos":1,"id":1,"a":"x"}\n\n \n{"op":"I","pos":2,"id":2,"a":"y"}\n'
    done = convert(NOTES.replace("TYPE", "text"), {"n.jsonl": lines})
    assert [e["origin"]["row"] for e in done.events("t.notes")] == [1, 4]
    assert _blank_notes(done) == {"n.jsonl": ["2 blank lines: not records, not counted as read"]}


_json_strings = st.text(st.sampled_from('"\\,]}: aeN1u'), max_size=8)
_json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers()
    | st.floats(allow_nan=False, allow_infinity=False)
    | _json_strings,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(_json_strings, inner, max_size=3),
    max_leaves=8,
)


@settings(max_examples=200, deadline=None)
@given(value=_json_values)
def test_the_quick_outside_text_equals_the_regular_expression_on_json(value: object) -> None:
    """On a JSON text (Python's json module writes it, RFC 8259), the reader's text outside strings
    without a regular expression equals the regular expression's."""
    from cdcnorm.types.json import outside_strings, outside_strings_of_valid

    engine = DuckDBEngine()
    text = json.dumps(value)
    quick, regex, valid = engine.rows(
        f"SELECT {outside_strings_of_valid('t')}, {outside_strings('t')}, json_valid(t) FROM (SELECT {lit(text)} AS t)"
    )[0]
    assert valid and quick == regex


def test_nested_parquet_values_arrive_as_rfc_8259_json(convert: ConvertFn, tmp_path: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = tmp_path / "n.parquet"
    table = pa.table(
        {
            "op": ["I"],
            "pos": ["1"],
            "id": ["1"],
            "a": pa.array([{"deck": 2, "cabins": ["A1", "B2"], "note": 'say "hi"'}]),
        }
    )
    pq.write_table(table, path)
    done = convert(NOTES.replace("TYPE", "json"), {"n.parquet": path.read_bytes()})
    (e,) = done.events("t.notes")
    # Python's json as the reader: the struct is a JSON object, its list a JSON array
    assert e["values"]["a"] == {"deck": 2, "cabins": ["A1", "B2"], "note": 'say "hi"'}


def test_an_ambiguous_pairing_is_quarantined_and_a_lone_pair_is_a_key_change(convert: ConvertFn) -> None:
    """Position 5: befores of keys 1 and 2, afters of keys 11 and 12 (two key changes, which is
    which cannot be told): all four quarantined. Position 6: befores 3 and 4, afters 3 and 14: key 3
    was updated in place, and 4 -> 14 is the one key change left (common practice: a before and an
    after of different keys at one position are one update that changed the key)."""
    mapping = NOTES.replace("TYPE", "integer").replace("{I: insert, D: delete}", "{B: before, A: after}")
    data = "op,pos,id,a\nB,5,1,0\nB,5,2,0\nA,5,11,0\nA,5,12,0\nB,6,3,0\nB,6,4,0\nA,6,3,1\nA,6,14,1\n"
    done = convert(mapping, {"n.csv": data})
    assert done.ledger()["balanced"]
    events = [(e["action"], e["key"]["id"]) for e in done.events("t.notes")]
    assert sorted(events) == [("delete", 4), ("upsert", 3), ("upsert", 14)]
    reasons = {(q["op"], q["id"]): q["_cdcnorm"]["reasons"][0] for q in done.quarantine("t.notes")}
    assert set(reasons) == {("B", "1"), ("B", "2"), ("A", "11"), ("A", "12")}
    assert all(r["reason"].startswith("ambiguous pairing") for r in reasons.values())
    assert reasons[("B", "1")]["found"] == "2 before-images and 2 after-images whose keys differ"
    total = done.ledger()["total"]
    assert total["quarantined"] == 4 and total["pending"] == 0 and total["merged"] == 1


def test_a_quarantine_line_with_bytes_that_are_not_utf8_fed_back_unedited_is_quarantined_again(
    tmp_path: Path,
) -> None:
    import base64

    mapping = NOTES.replace("TYPE", "text").replace('files: ["n*"]', 'files: ["n*"]')
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(mapping)
    (tmp_path / "in").mkdir()
    (tmp_path / "in" / "n.csv").write_bytes(b"op,pos,id,a\nI,1,1,ok\nI,2,2,caf\xe9\n")
    landing = tmp_path / "landing"
    assert (
        cli(
            "convert",
            str(tmp_path / "in"),
            "--mappings",
            str(tmp_path / "m"),
            "--out",
            str(landing),
            "--quiet",
        )
        == 0
    )
    (first,) = [p for p in (landing / "quarantine" / "t.notes").glob("*.jsonl")]
    # fed back unedited: the cell is still null, its bytes still under _cdcnorm.raw_base64
    assert (
        cli("convert", str(first), "--mappings", str(tmp_path / "m"), "--out", str(landing), "--quiet") == 0
    )
    again = [
        json.loads(x)
        for p in sorted((landing / "quarantine" / "t.notes").glob("*.jsonl"))[1:]
        for x in p.read_text().splitlines()
    ]
    (q,) = again
    assert base64.b64decode(q["_cdcnorm"]["raw_base64"]["a"]) == b"caf\xe9"  # RFC 4648 section 4
    assert q["a"] is None and sorted(q) == ["_cdcnorm", "a", "id", "op", "pos"]
    assert last_run(landing)["ledger"]["total"]["quarantined"] == 1
    # fixed: the value set, the row loads
    fixed = first.read_text().replace('"a":null', '"a":"café"')
    (tmp_path / "fix").mkdir()
    (tmp_path / "fix" / "t.notes.jsonl").write_text(fixed, encoding="utf-8")
    assert (
        cli(
            "convert",
            str(tmp_path / "fix"),
            "--mappings",
            str(tmp_path / "m"),
            "--out",
            str(landing),
            "--quiet",
        )
        == 0
    )
    events = [
        json.loads(x)
        for p in (landing / "events" / "t.notes").glob("*.jsonl")
        for x in p.read_text().splitlines()
    ]
    assert {e["values"]["a"] for e in events} == {"ok", "café"}


def test_json_lines_numbers_are_read_as_written(convert: ConvertFn) -> None:
    """A JSON number reaches its field as its token: 0.1000000000000000055511151231257827 into a
    decimal(38,34) exactly (Python's decimal as the reference; through a double it would be 0.1),
    and 1e2, which is no integer token, is quarantined showing 1e2, not 100.0."""
    mapping = NOTES.replace("TYPE", '"decimal(38,34)"').replace(
        "  id: integer", "  id: integer\n  n: integer"
    )
    lines = (
        '{"op":"I","pos":1,"id":1,"a":0.1000000000000000055511151231257827,"n":7}\n'
        '{"op":"I","pos":2,"id":2,"a":-0,"n":1e2}\n'
    )
    done = convert(mapping, {"n.jsonl": lines})
    assert done.ledger()["balanced"]
    (e,) = done.events("t.notes")
    assert Decimal(e["values"]["a"]) == Decimal("0.1000000000000000055511151231257827")
    (q,) = done.quarantine("t.notes")
    assert q["n"] == "1e2" and q["a"] == "-0" and q["_cdcnorm"]["reasons"][0]["found"] == "1e2"


@pytest.mark.parametrize(
    ("fmt", "command", "damaged"),
    [
        ("jsonl", "snapshot", "events"),
        ("parquet", "snapshot", "events"),
        ("parquet", "apply", "events"),
        ("jsonl", "convert", "index/emitted"),
    ],
)
def test_a_damaged_file_of_a_landing_area_is_named_not_called_a_bug(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], fmt: str, command: str, damaged: str
) -> None:
    # a partial copy or a bad disk leaves a file cut short: before, the engine's error came out as
    # "this is a bug in cdcnorm" (exit 1); now it is the file's fault, named, exit 4
    from tests.conftest import ROOT

    out, mappings = tmp_path / "o", str(ROOT / "mappings")
    assert (
        cli(
            "convert",
            str(ROOT / "examples" / "dumps"),
            "--mappings",
            mappings,
            "--out",
            str(out),
            "--format",
            fmt,
            "--quiet",
        )
        == 0
    )
    (path,) = (out / damaged / "ferry.bookings").glob("*.*")
    path.write_bytes(path.read_bytes()[:300])
    capsys.readouterr()
    where = {
        "snapshot": ["--out", str(tmp_path / "state")],
        "apply": ["--target", f"sqlite:///{tmp_path / 'w.db'}"],
        "convert": ["--out", str(out), "--quiet"],
    }[command]
    first = [str(ROOT / "examples" / "next-day")] if command == "convert" else [str(out)]
    assert cli(command, *first, "--mappings", mappings, *where) == 4
    err = capsys.readouterr().err
    assert err.startswith(f"error: {path}") and ": the file cannot be read: " in err
    assert "damaged or cut short" in err and "bug" not in err


@pytest.mark.parametrize("command", ["runs", "snapshot", "apply", "convert", "settle"])
@pytest.mark.parametrize("cut", ["half", "empty", "hollow"])
def test_a_damaged_run_record_is_named_not_a_traceback(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], command: str, cut: str
) -> None:
    # before: every command on the landing area ended in a traceback (JSONDecodeError, KeyError)
    from tests.conftest import ROOT

    out, mappings = tmp_path / "o", str(ROOT / "mappings")
    assert cli("convert", str(ROOT / "examples" / "dumps"), "--mappings", mappings, "--out", str(out)) == 0
    (record,) = (out / "runs").glob("*.json")
    whole = record.read_text()
    record.write_text(
        {"half": whole[: len(whole) // 2], "empty": "", "hollow": json.dumps({"run": record.stem})}[cut]
    )
    capsys.readouterr()
    args = {
        "runs": ["runs", str(out)],
        "snapshot": ["snapshot", str(out), "--mappings", mappings, "--out", str(tmp_path / "state")],
        "apply": ["apply", str(out), "--mappings", mappings, "--target", f"sqlite:///{tmp_path / 'w.db'}"],
        "convert": [
            "convert",
            str(ROOT / "examples" / "next-day"),
            "--mappings",
            mappings,
            "--out",
            str(out),
        ],
        "settle": ["settle", str(out), "--mappings", mappings, "--all"],
    }[command]
    assert cli(*args) == 4
    err = capsys.readouterr().err
    assert err.startswith(f"error: {record}") and "damaged or cut short" in err, err
    assert "Traceback" not in err and "--replace" in err
    if command == "convert":  # the way out the hint names: a run that replaces the area reads none of it
        assert cli(*args, "--replace", "--quiet") == 0
        assert [p.name for p in (out / "runs").iterdir()] == [f"{last_run(out)['run']}.json"]


@pytest.mark.parametrize(
    "journal",
    [
        '{"moves": [',  # cut short
        '{"staging": 5, "moves": 3}',  # not a journal
        '{"staging": "{precious}", "moves": []}',  # a folder outside the area, which replay removed
        '{"staging": "staging-x", "moves": [["a", "../../escaped"]]}',  # a move out of the area
    ],
    ids=["cut-short", "not-a-journal", "outside-staging", "outside-move"],
)
def test_a_damaged_commit_journal_is_named_and_nothing_outside_the_area_is_touched(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], journal: str
) -> None:
    # before: a traceback (JSONDecodeError, TypeError), and a journal naming a folder outside the
    # area had that folder removed by the replay (the folder here is the test's own)
    from tests.conftest import ROOT

    precious = tmp_path / "precious"
    precious.mkdir()
    (precious / "keep.txt").write_text("kept")
    out, mappings = tmp_path / "o", str(ROOT / "mappings")
    assert cli("convert", str(ROOT / "examples" / "dumps"), "--mappings", mappings, "--out", str(out)) == 0
    (out / ".cdcnorm" / "journal.json").write_text(journal.replace("{precious}", str(precious)))
    capsys.readouterr()
    args = ["convert", str(ROOT / "examples" / "next-day"), "--mappings", mappings, "--out", str(out)]
    assert cli(*args) == 4
    err = capsys.readouterr().err
    assert "the commit journal of the landing area is damaged" in err and "Traceback" not in err
    assert (precious / "keep.txt").read_text() == "kept" and not (tmp_path / "escaped").exists()
    (out / ".cdcnorm" / "journal.json").unlink()  # as the hint says: then the next run goes on
    assert cli(*args) == 0


@pytest.mark.parametrize("fmt", ["csv", "parquet", "jsonl"])
def test_dump_columns_named_like_the_quarantine_member_are_kept_and_noted(
    tmp_path: Path, fmt: str, capsys: pytest.CaptureFixture[str]
) -> None:
    """A dump column named _cdcnorm, or starting so, is the dump's own: before, every such column
    was taken for the quarantine line's member, so its value was dropped from the quarantined row
    (the member took its name) and a column no field read got no note. Now only a JSON Lines
    file's member of that shape is the quarantine's; a row holding a column _cdcnorm gets its
    member as __cdcnorm, and that file fed back reads the same row again, bytes that were not UTF-8
    included (RFC 4648 base64 is the oracle for them)."""
    import base64

    import pyarrow as pa
    import pyarrow.parquet as pq

    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(NOTES.replace("TYPE", "integer") + "  _cdcnorm: text\n")
    (tmp_path / "in").mkdir()
    header = ["op", "pos", "id", "a", "_cdcnorm", "_cdcnorm_batch"]
    rows = [["I", "1", "1", "x", "hello", "b7"], ["I", "2", "2", "3", "ok", "b7"]]
    if fmt == "csv":
        text = "\n".join(",".join(r) for r in [header, *rows]).encode() + b"\nI,3,3,y,caf\xe9,b7\n"
        (tmp_path / "in" / "n.csv").write_bytes(text)
    elif fmt == "parquet":
        pq.write_table(
            pa.table({h: [r[i] for r in rows] for i, h in enumerate(header)}), tmp_path / "in" / "n.parquet"
        )
    else:
        lines = [json.dumps(dict(zip(header, r, strict=True))) for r in rows]
        (tmp_path / "in" / "n.jsonl").write_text("\n".join(lines) + "\n")
    landing = tmp_path / "landing"
    args = ["--mappings", str(tmp_path / "m"), "--out", str(landing)]
    assert cli("convert", str(tmp_path / "in"), *args) == 0
    said = capsys.readouterr()
    assert "raw column _cdcnorm_batch read by no field of t.notes" in said.out + said.err
    (first,) = (landing / "quarantine" / "t.notes").glob("*.jsonl")
    q = [json.loads(x) for x in first.read_text().splitlines()]
    assert q[0]["__cdcnorm"]["reasons"][0]["field"] == "a"
    assert {k: q[0][k] for k in header} == dict(zip(header, rows[0], strict=True))
    assert "_cdcnorm" not in q[0]["__cdcnorm"]
    if fmt == "csv":
        assert q[1]["_cdcnorm"] is None
        assert base64.b64decode(q[1]["__cdcnorm"]["raw_base64"]["_cdcnorm"]) == b"caf\xe9"
    # fed back unedited: the same rows quarantined again, every column kept
    assert cli("convert", str(first), *args, "--quiet") == 0
    (again,) = [p for p in (landing / "quarantine" / "t.notes").glob("*.jsonl") if p != first]
    q2 = [json.loads(x) for x in again.read_text().splitlines()]
    assert [{k: r[k] for k in header} for r in q2] == [{k: r[k] for k in header} for r in q]
    assert [r["__cdcnorm"]["raw_base64"] for r in q2] == [r["__cdcnorm"]["raw_base64"] for r in q]
    # fixed: the values set, the rows load with the column's values
    fixed = first.read_text().replace('"a":"x"', '"a":"5"').replace('"a":"y"', '"a":"6"')
    fixed = fixed.replace('"_cdcnorm":null', '"_cdcnorm":"café"')
    (tmp_path / "fix").mkdir()
    (tmp_path / "fix" / "t.notes.jsonl").write_text(fixed, encoding="utf-8")
    assert cli("convert", str(tmp_path / "fix"), *args, "--quiet") == 0
    values = sorted(
        (e["values"]["id"], e["values"]["_cdcnorm"])
        for p in (landing / "events" / "t.notes").glob("*.jsonl")
        for e in map(json.loads, p.read_text().splitlines())
    )
    assert values == [(1, "hello"), (2, "ok"), *([(3, "café")] if fmt == "csv" else [])]
