"""Mapping files: validation errors name the file, line and key and suggest the closest valid name."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from cdcnorm.errors import MappingError
from cdcnorm.mapping import load_mapping, load_mappings
from tests.conftest import ROOT, cli

GOOD = """\
table: ferry.bookings
files: ["bookings*.csv"]
key: [booking_id]
change:
  action: {column: op, codes: {"1": delete, "2": insert}}
  position: {column: log_pos, kind: hex}
fields:
  booking_id: integer
  fare: decimal(12,2)
"""


def _load(tmp_path: Path, text: str) -> MappingError:
    p = tmp_path / "m.yaml"
    p.write_text(text)
    with pytest.raises(MappingError) as e:
        load_mapping(p)
    return e.value


def test_the_example_mappings_load() -> None:
    tables = [m.table for m in load_mappings(ROOT / "mappings")]
    assert tables == ["ferry.bookings", "ferry.passengers", "ferry.sailings"]


def test_misspelt_key_is_named_with_line_and_suggestion(tmp_path: Path) -> None:
    err = _load(tmp_path, GOOD.replace("  position:", "  postion:"))
    assert err.line == 6 and "change.postion" in err.message
    assert err.hint and 'did you mean "position"' in err.hint


def test_unknown_type_suggests_the_closest(tmp_path: Path) -> None:
    err = _load(tmp_path, GOOD.replace("fare: decimal(12,2)", "fare: decimel(12,2)"))
    assert err.line == 9 and err.field == "fields.fare"
    assert 'did you mean "decimal"' in err.message


def test_a_misspelt_word_of_a_few_suggests_the_closest(tmp_path: Path) -> None:
    """A position's kind is one of a few words: the error lists them and names the nearest."""
    err = _load(tmp_path, GOOD.replace("kind: hex}", "kind: hexx}"))
    assert err.line == 6 and err.field == "change.position.kind"
    assert err.hint == 'did you mean "hex"?'
    err = _load(tmp_path, GOOD.replace("kind: hex}", "kind: zzzz}"))
    assert err.hint is None  # nothing near: the message's list of the valid words is all


def test_bad_type_parameters(tmp_path: Path) -> None:
    assert "scale" in _load(tmp_path, GOOD.replace("decimal(12,2)", "decimal(2,5)")).message
    assert "precision" in _load(tmp_path, GOOD.replace("decimal(12,2)", "decimal(40,2)")).message


def test_unknown_action_and_position_kind(tmp_path: Path) -> None:
    err = _load(tmp_path, GOOD.replace('"2": insert', '"2": upsert'))
    assert err.line == 5 and "codes" in (err.field or "")
    err = _load(tmp_path, GOOD.replace("kind: hex}", "kind: lsn}"))
    assert err.line == 6 and "hex-pair" in err.message


def test_key_must_name_a_field(tmp_path: Path) -> None:
    err = _load(tmp_path, GOOD.replace("key: [booking_id]", "key: [booking]"))
    assert "booking" in err.message
    # the key's own line and name (before: line 1, "(top level)")
    assert err.line == 3 and err.field == "key" and err.message.startswith("invalid key key:")


def test_unused_may_not_list_a_column_the_mapping_reads(tmp_path: Path) -> None:
    err = _load(tmp_path, GOOD + "unused: [export_batch, fare]\n")
    assert "unused lists raw column 'fare', which field fare reads" in err.message
    assert err.line == 10 and err.field == "unused"
    err = _load(tmp_path, GOOD + "unused: [log_pos]\n")
    assert "which change.position reads" in err.message
    # a nested object's name covers its members: it may not hold a column a field reads
    nested = GOOD.replace("fare: decimal(12,2)", 'fare: {type: "decimal(12,2)", from: after.fare}')
    assert "'after.fare'" in _load(tmp_path, nested + "unused: [after]\n").message


@pytest.mark.parametrize(
    ("text", "key", "lines"),
    [
        (GOOD + "  fare: integer\n", "fields.fare", (9, 10)),  # the loader kept the last: fare an integer
        (GOOD.replace("key: [booking_id]\n", "key: [booking_id]\nkey: [fare]\n"), "key", (3, 4)),
        (GOOD.replace('"2": insert}', '"2": insert, "2": delete}'), "change.action.codes.2", (5, 5)),
    ],
    ids=["field", "top", "flow"],
)
def test_a_key_stated_twice_is_refused_with_both_lines(
    tmp_path: Path, text: str, key: str, lines: tuple[int, int]
) -> None:
    # YAML requires a mapping's keys to be unique (YAML 1.2, section 3.2.1.1, from memory); before,
    # the loader kept the last value without a word
    err = _load(tmp_path, text)
    assert (
        err.message
        == f"the key {key} is stated twice (lines {lines[0]} and {lines[1]}): which one is meant is unclear"
    )
    assert err.line == lines[1] and err.field == key


@pytest.mark.parametrize(
    ("csv", "said"),
    [
        ('{delimiter: ",", quote: ","}', "csv.delimiter and csv.quote are both ','"),
        ('{delimiter: "\\n"}', "csv.delimiter cannot hold a line end"),
        ('{quote: "\\r"}', "csv.quote cannot hold a line end"),
        ('{escapes: none, delimiter: "|\\r\\n"}', "csv.delimiter cannot hold a line end"),
        ('{escapes: none, quote: "\'"}', "with escapes: none nothing is quoted: drop quote"),
        ('{delimiter: "|~|"}', "set csv.escapes: none"),
        ('{escapes: none, delimiter: "12345678901234567"}', "at most 16 characters"),
        (
            "{columns: [op, log_pos, booking_id, fare]}",
            "csv.columns names the columns of files without a header row",
        ),
        ("{header: false, columns: [op, log_pos, fare, fare]}", "csv.columns repeats ['fare']"),
    ],
    ids=[
        "delimiter-is-quote",
        "delimiter-line-end",
        "quote-line-end",
        "plain-delimiter-line-end",
        "plain-quote",
        "long-delimiter-quoted",
        "plain-delimiter-too-long",
        "columns-with-header",
        "columns-repeat",
    ],
)
def test_csv_options_that_cannot_read_a_file_are_refused(tmp_path: Path, csv: str, said: str) -> None:
    # before: a delimiter equal to the quote converted without a word, a line end as the delimiter
    # ended in drift errors, and columns beside a header were ignored
    err = _load(tmp_path, GOOD + f"csv: {csv}\n")
    assert said in err.message and err.line == 10


@pytest.mark.parametrize(
    ("text", "said"),
    [
        # before: the engine's "Parser Error: syntax error at or near END" (exit 1)
        (
            GOOD.replace('codes: {"1": delete, "2": insert}', "codes: {}"),
            "change.action.codes: Dictionary should have at least 1 item",
        ),
        # before: the engine's "Duplicate named argument" in the middle of writing (exit 1)
        (
            GOOD.replace("key: [booking_id]", "key: [booking_id, booking_id]"),
            "key names 'booking_id' twice",
        ),
        # before: converted, the envelope naming the field by its internal column ("v2")
        (GOOD + "  '': {from: seats, type: integer}\n", "a field needs a name: fields has ''"),
        (
            GOOD.replace("key: [booking_id]", "key: [doc]") + "  doc: {from: body, type: json}\n",
            "key field doc is json",
        ),
        # before: loaded, and every file of the table then "matches no mapping" (patterns match names)
        (
            GOOD.replace('files: ["bookings*.csv"]', 'files: ["bookings*.csv", "2026-*/bookings*.csv"]'),
            "files pattern '2026-*/bookings*.csv' has a folder in it",
        ),
    ],
    ids=["no-codes", "key-twice", "field-without-name", "json-key", "folder-in-pattern"],
)
def test_mappings_the_plan_cannot_run_are_refused_on_load(tmp_path: Path, text: str, said: str) -> None:
    err = _load(tmp_path, text)
    assert said in err.message
    # the line of the key at fault, not line 1
    assert err.line == {"change.action.codes": 5, "key": 3, "fields.": 10, "files": 2}[err.field or ""]


def test_a_key_that_is_not_a_field_is_named_with_the_closest_field(tmp_path: Path) -> None:
    # before: pydantic's "Value error, key names ['bookin_id'] but ..." and, as what was found,
    # the whole mapping cut at 200 characters
    err = _load(tmp_path, GOOD.replace("key: [booking_id]", "key: [bookin_id]"))
    assert err.message.startswith("invalid key key: key names 'bookin_id', which is not one of the fields (")
    assert err.line == 3 and err.found == "'bookin_id'" and err.hint == 'did you mean "booking_id"?'


def test_yaml_syntax_error_has_a_line(tmp_path: Path) -> None:
    err = _load(tmp_path, GOOD.replace("fields:\n", "fields:\n  - [\n"))
    assert err.line is not None and "YAML" in err.message


def test_flow_mapping_comma_hint(tmp_path: Path) -> None:
    err = _load(tmp_path, GOOD.replace("fare: decimal(12,2)", "fare: {type: decimal(12,2)}"))
    assert err.hint and "quote" in err.hint


def test_mapping_schema_command(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli("mapping-schema") == 0
    schema = json.loads(capsys.readouterr().out)
    assert schema["title"] == "Mapping" and "change" in schema["properties"]
    assert set(schema["required"]) >= {"table", "files", "key", "change", "fields"}


def test_two_mappings_of_one_table_or_of_tables_that_differ_only_in_case_are_refused(tmp_path: Path) -> None:
    # the same table twice was refused; ferry.Bookings beside ferry.bookings ended in the engine's
    # error called a bug (its relations took the two names as one)
    text = (ROOT / "mappings" / "bookings.yaml").read_text()
    for other, says in (
        ("ferry.bookings", "table ferry.bookings is declared twice"),
        ("ferry.Bookings", "differ only in case"),
    ):
        folder = tmp_path / other
        folder.mkdir()
        (folder / "a.yaml").write_text(text)
        (folder / "b.yaml").write_text(text.replace("table: ferry.bookings", f"table: {other}"))
        with pytest.raises(MappingError, match=says):
            load_mappings(folder)
