"""Readers: RFC 4180 CSV, JSON Lines, Parquet, and bad input that must lose nothing."""

from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers.count import Counting, count_blocks
from cdcnorm.readers.csv import csv_syntax, line_end
from tests.conftest import ConvertFn, cli, insert_only_mapping, last_run
from tests.test_bad_input import NESTED, NESTED_FIELDS

MAPPING = """
table: t.notes
files: ["n*"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: integer}
fields:
  id: integer
  a: text
  b: text
"""


def _convert_one(tmp_path: Path, mapping: str, csv_text: str) -> int:
    """``cdcnorm convert`` of one CSV file with one mapping, through the CLI: its exit code."""
    (tmp_path / "m").mkdir(exist_ok=True)
    (tmp_path / "m" / "t.yaml").write_text(mapping)
    (tmp_path / "n.csv").write_text(csv_text)
    return cli(
        "convert", str(tmp_path / "n.csv"), "--mappings", str(tmp_path / "m"), "--out", str(tmp_path / "o")
    )


def test_rfc4180_section_2_examples(convert: ConvertFn) -> None:
    # RFC 4180 section 2: quoted fields may hold CRLF, commas and doubled quotes; spaces are part of
    # a field; the last record's line break is optional.
    data = 'op,pos,id,a,b\r\nI,1,1,"b\r\nbb","c,cc"\r\nI,2,2,"b""bb", bbb \r\nI,3,3,aaa,'
    done = convert(MAPPING, {"n.csv": data})
    values = {e["key"]["id"]: e["values"] for e in done.events("t.notes")}
    assert values[1]["a"] == "b\r\nbb" and values[1]["b"] == "c,cc"
    assert values[2]["a"] == 'b"bb' and values[2]["b"] == " bbb "
    assert values[3]["a"] == "aaa" and values[3]["b"] is None  # "a,b," has three fields, the last empty
    assert [e["origin"]["row"] for e in done.events("t.notes")] == [1, 2, 3]


def test_null_versus_quoted_empty_string(convert: ConvertFn) -> None:
    # PostgreSQL manual, COPY CSV format: an unquoted empty field is NULL, a quoted "" is an empty string
    done = convert(MAPPING, {"n.csv": 'op,pos,id,a,b\nI,1,1,,""\n'})
    (e,) = done.events("t.notes")
    assert e["values"]["a"] is None and e["values"]["b"] == ""


def test_null_tokens_apply_unquoted_only(convert: ConvertFn) -> None:
    mapping = MAPPING + 'nulls: ["", "\\\\N"]\n'
    done = convert(mapping, {"n.csv": 'op,pos,id,a,b\nI,1,1,\\N,"\\N"\n'})
    (e,) = done.events("t.notes")
    assert e["values"]["a"] is None and e["values"]["b"] == "\\N"


def test_unbalanced_quote_is_quarantined_with_its_text(convert: ConvertFn) -> None:
    # The quote never closes: its record's first line is malformed and reading resumes at the next
    # line, so the records after it are read, not swallowed into one field.
    data = 'op,pos,id,a,b\nI,1,1,x,y\nI,2,2,"open,y\nI,3,3,x,y\n'
    done = convert(MAPPING, {"n.csv": data})
    assert [(e["key"]["id"], e["origin"]["row"]) for e in done.events("t.notes")] == [(1, 1), (3, 3)]
    (q,) = done.quarantine("t.notes")
    meta = q["_cdcnorm"]
    assert meta["row"] == 2 and meta["text"] == 'I,2,2,"open,y'
    assert meta["reasons"][0]["reason"].startswith("unterminated quote")
    assert done.ledger()["total"]["read"] == 3 and done.ledger()["balanced"]


@pytest.mark.parametrize(
    ("data", "good", "bad"),
    [
        # an unterminated quote in the last field (it used to swallow the rest of the file)
        ('op,pos,id,a,b\nI,1,1,x,ok\nI,2,2,x,"b\nI,3,3,x,a\nI,4,4,x,c\n', [1, 3, 4], {2: 'I,2,2,x,"b'}),
        # read as one field, the stray quote would pair with the next quote and be followed by
        # text (`"multi`): broken; resuming at the next line reads the two-line record that follows
        (
            'op,pos,id,a,b\nI,1,1,x,ok\nI,2,2,x,"b\nI,3,3,x,a\nI,5,5,x,"multi\nline"\nI,6,6,x,z\n',
            [1, 3, 5, 6],
            {2: 'I,2,2,x,"b'},
        ),
        # CR-only line ends, and CRLF inside a quoted field with LF record ends
        ('op,pos,id,a,b\rI,1,1,x,y\rI,2,2,"two\r\nlines",y\r', [1, 2], {}),
        ('op,pos,id,a,b\nI,1,1,x,y\r\nI,2,2,"two\r\nlines",y\n\nI,3,3,x,y', [1, 2, 3], {}),
    ],
)
def test_broken_quotes_and_line_ends_resume_at_the_next_line(
    convert: ConvertFn, data: str, good: list[int], bad: dict[int, str]
) -> None:
    done = convert(MAPPING, {"n.csv": data})
    assert [e["key"]["id"] for e in done.events("t.notes")] == good
    assert {q["_cdcnorm"]["row"]: q["_cdcnorm"]["text"] for q in done.quarantine("t.notes")} == bad
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == len(good) + len(bad)


def test_a_carriage_return_alone_is_no_line_end_in_a_file_of_lf_line_ends(convert: ConvertFn) -> None:
    # before, a CR alone ended a line wherever it stood: "I,1,1,ab<CR>cd" became the record
    # I,1,1,ab, emitted with the value cut short, and a malformed record "cd". RFC 4180 allows a
    # line break in a quoted field only (section 2, rules 6 and 7; its TEXTDATA holds no CR), so the
    # record is quarantined whole, with its text; in quotes the CR is data
    data = 'op,pos,id,a,b\nI,1,1,ab\rcd,y\nI,2,2,"in\rquotes",y\r\nI,3,3,x,y\n'
    done = convert(MAPPING, {"n.csv": data})
    assert {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")} == {2: "in\rquotes", 3: "x"}
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["row"] == 1 and q["_cdcnorm"]["text"] == "I,1,1,ab\rcd,y"
    assert q["_cdcnorm"]["reasons"][0]["reason"].startswith(
        "a carriage return (CR) alone in an unquoted field"
    )
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 3


def test_a_headerless_file_of_cr_line_ends_keeps_a_line_feed_in_quotes(convert: ConvertFn) -> None:
    headerless = MAPPING.replace(
        "key: [id]\n", "key: [id]\ncsv: {header: false, columns: [op, pos, id, a, b]}\n"
    )
    data = 'I,1,1,"two\nlines",y\rI,2,2,x,y\rI,3,3,"a\rb",y\r'
    done = convert(headerless, {"n.csv": data})
    values = {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")}
    assert values == {1: "two\nlines", 2: "x", 3: "a\rb"}
    assert done.ledger()["balanced"] and not done.quarantine("t.notes")


@pytest.mark.parametrize(
    ("head", "header", "end"),
    [
        ("op,pos\nI,1", True, "\n"),
        ("op,pos\r\nI,1", True, "\r\n"),
        ("op,pos\rI,1\rI,2", True, "\r"),
        ('op,pos\rI,"a\r\nb"\r', True, "\r"),  # CR ends; a CRLF in quotes is data
        ("I,a\rb\nI,c\n", False, "\n"),  # no header: a CR before the first LF is data
        ("I,1\rI,2\r", False, "\r"),  # no LF at all: CR ends the lines
        ('I,"a\nb"\rI,2\rI,3\r', False, "\r"),  # CRs alone outnumber the LF in quotes
        ("I,a\rb\nI,c\rd\nI,e\n", False, "\n"),  # LFs outnumber the CRs in values
        ("I,1", False, "\n"),
    ],
)
def test_a_files_line_end_is_told_by_its_first_line(head: str, header: bool, end: str) -> None:
    assert line_end(head, header) == end


def test_files_read_record_by_record_together_read_as_each_alone(convert: ConvertFn) -> None:
    """The files the strict reader rejects share one relation: each still gets its own record
    numbers, malformed records, undecodable bytes and notes, as when it is converted alone."""
    files: dict[str, str | bytes] = {
        "na.csv": 'op,pos,id,a,b\nI,1,1,x,ok\nI,2,2,x,"b\nI,3,3,x,a\n',  # an unterminated quote
        "nb.csv": 'op,pos,id,a,b\rI,4,4,x,y\rI,5,5,"two\r\nlines",y\r',  # CR-only line ends
        "nc.csv": b"op,pos,id,a,b\nI,6,6,caf\xe9,y\nI,7,7,x,y,z\nI,8,8,x,y\n",  # bad bytes, a field too many
        "nd.csv": "op,pos,id,a,b\nI,9,9,x,y\n",  # read by the engine's reader
    }
    together = convert(MAPPING, files)
    alone = [convert(MAPPING, {name: data}) for name, data in files.items()]
    assert together.events("t.notes") == sorted(
        (e for done in alone for e in done.events("t.notes")), key=lambda e: e["position"]
    )
    assert sorted(
        together.quarantine("t.notes"), key=lambda q: (q["_cdcnorm"]["file"], q["_cdcnorm"]["row"])
    ) == [q for done in alone for q in done.quarantine("t.notes")]
    assert len(together.quarantine("t.notes")) == 3
    ledger = together.ledger()
    assert ledger["tables"]["t.notes"]["files"] == {
        name: done.ledger()["tables"]["t.notes"]["files"][name]
        for name, done in zip(files, alone, strict=True)
    }
    notes = {n["file"]: n["note"] for n in last_run(together.out)["notes"]}
    assert sorted(notes) == ["na.csv", "nb.csv", "nc.csv"]


def test_wrong_field_count_keeps_record_numbers(convert: ConvertFn) -> None:
    data = 'op,pos,id,a,b\nI,1,1,x,y\nI,2,2,x\nI,3,3,"multi\nline",y\nI,4,4,x,y,z\nI,5,5,x,y\n'
    done = convert(MAPPING, {"n.csv": data})
    rows = {e["key"]["id"]: e["origin"]["row"] for e in done.events("t.notes")}
    assert rows == {1: 1, 3: 3, 5: 5}
    bad = {q["_cdcnorm"]["row"]: q["_cdcnorm"] for q in done.quarantine("t.notes")}
    assert set(bad) == {2, 4}
    assert bad[2]["text"] == "I,2,2,x" and bad[2]["reasons"][0]["reason"] == "expected 5 fields, found 4"
    assert bad[4]["text"] == "I,4,4,x,y,z"


#: The notes table whose unquoted empty fields and NULL words are NULL.
NULLS_MAPPING = MAPPING + 'nulls: ["", "NULL"]\n'


def _fields_by_rfc_4180(data: str) -> list[list[str]]:
    """The data records of a CSV text as Python's csv module splits them (RFC 4180)."""
    return list(csv.reader(io.StringIO(data, newline="")))[1:]


@pytest.mark.parametrize("end", ["\n", "\r\n"])
@pytest.mark.parametrize("final", [True, False])
def test_trailing_null_fields_beyond_the_columns_are_malformed_not_dropped(
    convert: ConvertFn, end: str, final: bool
) -> None:
    # The engine's reader drops trailing fields beyond the columns where they are all unquoted null
    # tokens, without a reject: each such record must still be malformed, its text kept.
    lines = [
        "I,1,1,x,y,",
        "I,2,2,x,",  # five fields, the last empty: a NULL b
        "I,3,3,x,y,NULL",
        "I,4,4,x,y,,",
        'I,5,5,"x\n,",y,',
        "I,6,6,x,y",
        'I,7,7,"a,b",',
        "I,9,9,x,y,NULL,NULL",
    ]
    data = "op,pos,id,a,b" + end + end.join(lines) + (end if final else "")
    records = _fields_by_rfc_4180(data)
    done = convert(NULLS_MAPPING, {"n.csv": data})
    good = [int(r[2]) for r in records if len(r) == 5]
    assert [e["key"]["id"] for e in done.events("t.notes")] == good == [2, 6, 7]
    assert {e["key"]["id"]: e["values"]["b"] for e in done.events("t.notes")} == {2: None, 6: "y", 7: None}
    bad = {q["_cdcnorm"]["row"]: q["_cdcnorm"] for q in done.quarantine("t.notes")}
    assert {row: q["reasons"][0]["reason"] for row, q in bad.items()} == {
        i + 1: f"expected 5 fields, found {len(r)}" for i, r in enumerate(records) if len(r) != 5
    }
    assert bad[1]["text"] == "I,1,1,x,y," and bad[5]["text"] == 'I,5,5,"x\n,",y,'
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == len(lines)


def test_a_trailing_null_field_in_one_of_many_small_files_is_malformed(convert: ConvertFn) -> None:
    # many small files are read joined as one: the one record with a field too many is still found
    files: dict[str, str | bytes] = {
        f"n{i:02d}.csv": f"op,pos,id,a,b\nI,{i},{i},x,y\nI,{i + 100},{i + 100},x,\n" for i in range(30)
    }
    files["n07.csv"] = "op,pos,id,a,b\nI,7,7,x,y,\nI,107,107,x,\n"
    done = convert(NULLS_MAPPING, files)
    assert len(done.events("t.notes")) == 59
    ((q),) = done.quarantine("t.notes")
    assert (q["_cdcnorm"]["file"], q["_cdcnorm"]["row"], q["_cdcnorm"]["text"]) == (
        "n07.csv",
        1,
        "I,7,7,x,y,",
    )
    assert done.ledger()["balanced"]


@pytest.mark.parametrize("many", [False, True])
def test_spaces_outside_quotes_are_kept_or_the_record_is_malformed_never_dropped(
    convert: ConvertFn, many: bool
) -> None:
    # RFC 4180 section 2, rule 4: spaces are part of a field and are not to be ignored. A field that
    # does not start with a quote is unquoted, its quotes data (as Python's csv module reads it); text
    # after a closing quote is broken quoting. The engine's reader would read ` "s"` as `s` and
    # `"a" "b"` as `a b`.
    data = 'op,pos,id,a,b\nI,1,1, "s",x\nI,2,2,"s" ,x\nI,3,3,x,"a" "b"\nI,4,4,"two\nlines" ,x\nI,5,5,ok,"y"\n'
    files: dict[str, str | bytes] = {"n.csv": data}
    if many:  # read joined with other small files
        files |= {f"n{i:02d}.csv": f"op,pos,id,a,b\nI,{i + 10},{i + 10},x,y\n" for i in range(20)}
    done = convert(MAPPING, files)
    values = {e["key"]["id"]: e["values"] for e in done.events("t.notes") if e["key"]["id"] < 10}
    assert values == {1: {"id": 1, "a": ' "s"', "b": "x"}, 5: {"id": 5, "a": "ok", "b": "y"}}
    assert values[1]["a"] == next(csv.reader([' "s",x']))[0]  # Python's csv module
    bad = {q["_cdcnorm"]["row"]: q["_cdcnorm"]["text"] for q in done.quarantine("t.notes")}
    # broken quoting makes its record's first line malformed, and reading resumes at the next
    assert bad == {2: 'I,2,2,"s" ,x', 3: 'I,3,3,x,"a" "b"', 4: 'I,4,4,"two', 5: 'lines" ,x'}
    assert done.ledger()["balanced"]


_CELLS = st.one_of(
    st.sampled_from(["", "NULL", '""', '"NULL"', ' "s"', '"s" ', '"a" "b"', 'a "b"']),
    st.text("ab ", min_size=1, max_size=3),
    st.text('a,"\n\r', max_size=4).map(lambda t: '"' + t.replace('"', '""') + '"'),
)


@settings(max_examples=150, deadline=None)
@given(
    records=st.lists(st.lists(_CELLS, min_size=4, max_size=4), min_size=1, max_size=8),
    odd=st.one_of(st.none(), st.tuples(st.integers(0, 8), st.lists(_CELLS, min_size=3, max_size=6))),
    crlf=st.booleans(),
    final=st.booleans(),
    cuts=st.lists(st.integers(1, 120), max_size=4),
)
def test_a_file_the_record_count_gives_the_engine_is_read_as_rfc_4180_splits_it(
    tmp_path_factory: pytest.TempPathFactory,
    records: list[list[str]],
    odd: tuple[int, list[str]] | None,
    crlf: bool,
    final: bool,
    cuts: list[int],
) -> None:
    """Where the independent record count lets the engine's reader read a file and that reader
    rejects nothing, it read each record as Python's csv module splits it (RFC 4180), four fields,
    the unquoted null tokens NULL; a record of more fields that ends with a null token is never
    given to it. Counting in blocks cut anywhere finds what counting the whole file finds."""
    if odd is not None:  # a record of another number of fields, anywhere
        records = [*records[: odd[0]], odd[1], *records[odd[0] :]]
    end = "\r\n" if crlf else "\n"
    data = "c0,c1,c2,c3" + end + end.join(",".join(r) for r in records) + (end if final else "")
    raw = data.encode()
    how = Counting('"').with_nulls(4, b",", (b"", b"NULL")).with_lines_ending(not crlf)
    whole = count_blocks([raw], True, how)
    at = sorted({min(c, len(raw)) for c in cuts})
    blocks = [raw[i:j] for i, j in zip([0, *at], [*at, len(raw)], strict=True)]
    assert count_blocks(blocks, True, how) == whole
    split = _fields_by_rfc_4180(data)
    assert [len(r) for r in split] == [len(r) for r in records]  # as written
    dropped = any(len(r) > 4 and r[-1] in ("", "NULL") for r in records)
    if dropped:
        assert not whole.readable
    if not whole.readable or whole.records != len(records):
        return
    path = tmp_path_factory.mktemp("trailing") / "n.csv"
    path.write_bytes(raw)
    mapping = Mapping.model_validate(
        {
            "table": "t",
            "files": ["n.csv"],
            "key": ["c0"],
            "nulls": ["", "NULL"],
            "change": {
                "action": {"column": "c1", "codes": {"I": "insert"}},
                "position": {"column": "c2", "kind": "text"},
            },
            "fields": {"c0": "text"},
            "unused": ["c3"],
        }
    )
    engine = DuckDBEngine()
    scanned = engine.scan_csv("t", [str(path)], ["c0", "c1", "c2", "c3"], csv_syntax(mapping, ",", "utf-8"))
    assert scanned is not None
    rejected, _ = scanned
    if rejected:
        return  # the careful path reads the file
    rows = [list(r) for r in engine.rows("SELECT c0, c1, c2, c3 FROM t ORDER BY rowid")]
    assert all(len(r) == 4 for r in records)
    expected = [
        [None if c in ("", "NULL") else csv_cell for c, csv_cell in zip(r, s, strict=True)]
        for r, s in zip(records, split, strict=True)
    ]
    assert rows == expected


#: Pieces of cells that the two ways of reading a CSV file could read differently: quotes in and
#: out of place, spaces beside them, line breaks, NUL, null tokens, a byte order mark.
_QUIRKS = ["", "x", " ", '"', '""', '"q"', '" q "', 'a"b', ",", "\r", "\n", "\r\n", "\t", "\x00"]
_QUIRKS += ["NULL", "\\", "é", "\ufeff", ' "s"', '"s" ', '"a""b"', '"a\nb"', '"a\r\nb"', '"\r"']


def _read_both_ways(done: Any) -> tuple[dict[int, Any], dict[int, tuple[str, list[str]]]]:
    """A run's events by record number and its quarantine (text, reasons), a broken quote's reason
    told only as such: where the quoted field runs to depends on what follows the record."""
    events = {e["origin"]["row"]: e["values"] for e in done.events("t.notes")}
    kept = {}
    for q in done.quarantine("t.notes"):
        meta = q["_cdcnorm"]
        reasons = [r["reason"] for r in meta["reasons"]]
        quote = ("unterminated quote", "broken quoting")
        kept[meta["row"]] = (meta["text"], ["quote" if r.startswith(quote) else r for r in reasons])
    return events, kept


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    cells=st.lists(
        st.lists(st.lists(st.sampled_from(_QUIRKS), max_size=3), min_size=2, max_size=2), max_size=6
    ),
    crlf=st.booleans(),
    nulls=st.sampled_from(['[""]', '["", "NULL"]', "[]"]),
)
def test_the_engines_reader_and_the_careful_one_read_a_file_alike(
    convert: ConvertFn, cells: list[list[list[str]]], crlf: bool, nulls: str
) -> None:
    """The same file read by the engine's reader and, with a broken record after it, by the careful
    path (the record count sends it there) gives the same events and the same quarantine."""
    end = "\r\n" if crlf else "\n"
    lines = [
        ",".join(["I", str(i + 1), str(i + 1), *("".join(c) for c in row)]) for i, row in enumerate(cells)
    ]
    data = "op,pos,id,a,b" + end + "".join(line + end for line in lines)
    poison = 'I,99,99,"x"y,z'
    mapping = MAPPING + f"nulls: {nulls}\n"
    fast = _read_both_ways(convert(mapping, {"n.csv": data}))
    careful_run = convert(mapping, {"n.csv": data + poison + end})
    careful = _read_both_ways(careful_run)
    assert "n.csv" in {n["file"] for n in last_run(careful_run.out)["notes"]}  # read record by record
    events, kept = careful
    assert (events, {row: q for row, q in kept.items() if q[0] != poison}) == fast


def test_invalid_utf8_is_quarantined_with_its_bytes(convert: ConvertFn) -> None:
    data = b"op,pos,id,a,b\nI,1,1,ok,fine\nI,2,2,caf\xe9,fine\n"
    done = convert(MAPPING, {"n.csv": data})
    assert [e["key"]["id"] for e in done.events("t.notes")] == [1]
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["raw_base64"] == {"a": "Y2Fm6Q=="}  # RFC 4648 base64 of b"caf\xe9"
    assert q["_cdcnorm"]["reasons"][0]["column"] == "a"
    assert q["id"] == "2" and q["a"] is None


def test_empty_and_header_only_files(convert: ConvertFn) -> None:
    done = convert(
        MAPPING, {"n1.csv": "", "n2.csv": "op,pos,id,a,b\n", "n3.csv": "op,pos,id,a,b\nI,1,1,x,y\n"}
    )
    led = done.ledger()["tables"]["t.notes"]["files"]
    assert led["n1.csv"]["read"] == 0 and led["n2.csv"]["read"] == 0 and led["n3.csv"]["emitted"] == 1


def test_jsonl_file_of_malformed_lines_only_is_quarantined_not_drift(convert: ConvertFn) -> None:
    # JSON Lines states its columns only through lines that parse: with none, there is no schema
    # to hold against the mapping, and every line is quarantined with its text (RFC 8259)
    done = convert(MAPPING, {"n.jsonl": '{"op": "I", "pos": 1, broken\n{"op": \n'})
    led = done.ledger()
    assert led["balanced"] and led["tables"]["t.notes"]["files"]["n.jsonl"]["read"] == 2
    quarantined = done.quarantine("t.notes")
    assert [q["_cdcnorm"]["text"] for q in quarantined] == ['{"op": "I", "pos": 1, broken', '{"op": ']
    assert done.events("t.notes") == []
    # and a note asks whether it is JSON Lines at all (before: nothing but the ledger said so)
    (note,) = [n["note"] for n in last_run(done.out)["notes"]]
    assert (
        note
        == "no line of it is a JSON object (2 quarantined): is it JSON Lines? (--input-format reads every input as one format)"
    )


def test_a_jsonl_line_escaping_a_lone_surrogate_is_quarantined_saying_so(convert: ConvertFn) -> None:
    # RFC 8259 section 8.2 leaves "\udc00" alone unpredictable, RFC 7493 section 2.1 forbids it (from
    # memory); the engine's parser refuses the line. Before, the reason said the line was not JSON
    # at all; a pair (one character, as Python's json module reads it) is read.
    pair = '"\\ud83d\\ude00"'
    assert json.loads(pair) == "\U0001f600"
    lines = [
        '{"op": "I", "pos": 1, "id": 1, "a": "x\\udc00", "b": "y"}',
        '{"op": "I", "pos": 2, "id": 2, "a": ' + pair + ', "b": "y"}',
        '{"op": "I", "pos": 3, "id": 3, "a": "x", "b": "y"',
    ]
    done = convert(MAPPING, {"n.jsonl": "\n".join(lines) + "\n"})
    reasons = {
        q["_cdcnorm"]["row"]: q["_cdcnorm"]["reasons"][0]["reason"] for q in done.quarantine("t.notes")
    }
    assert set(reasons) == {1, 3} and "surrogate" in reasons[1] and "RFC 7493" in reasons[1]
    assert reasons[3] == "not valid JSON (RFC 8259)"
    assert [e["values"]["a"] for e in done.events("t.notes")] == ["\U0001f600"]
    assert done.quarantine("t.notes")[0]["_cdcnorm"]["text"] == lines[0]


def test_jsonl_nested_flat_and_malformed_lines(convert: ConvertFn) -> None:
    mapping = NESTED.replace(
        NESTED_FIELDS + "  extra: {from: extra, type: json}\n",
        '  id: {from: after.id, type: integer}\n  price: {from: after.price, type: "decimal(12,2)"}\n'
        "  tags: {from: after.tags, type: json}\n",
    )
    assert mapping != NESTED
    data = (
        '{"op": "I", "pos": 1, "after": {"id": 1, "price": 12.34, "tags": ["a"]}}\n'
        "\n"
        '{"op": "I", "pos": 2, "after": {"id": 2, "price": 12.345}}\n'
        "[1, 2]\n"
        '{"op": "I", "pos": 3, "after": {"id": 3, "price": "7"}\n'
        '{"op": "I", "pos": 4, "after": {"id": 4, "price": null}}\r\n'
    )
    done = convert(mapping, {"n.jsonl": data})
    ev = {e["key"]["id"]: e for e in done.events("t.nested")}
    assert ev[1]["values"] == {"id": 1, "price": "12.34", "tags": ["a"]}
    assert ev[4]["values"]["price"] is None and ev[4]["origin"]["row"] == 6
    qs = {q["_cdcnorm"]["row"]: q["_cdcnorm"]["reasons"][0]["reason"] for q in done.quarantine("t.nested")}
    # JSON numbers keep their digits: 12.345 must not be rounded into decimal(12,2)
    assert qs == {
        3: "more than 2 fractional digits (would round)",
        4: "not a JSON object",
        5: "not valid JSON (RFC 8259)",
    }
    assert done.ledger()["total"]["read"] == 5


@pytest.mark.parametrize(
    ("codec", "mark", "said"),
    [
        ("utf-16-le", b"\xff\xfe", "UTF-16LE"),
        ("utf-16-be", b"", "UTF-16BE"),
        ("utf-32-le", b"", "UTF-32LE"),
        ("utf-32-be", b"\x00\x00\xfe\xff", "UTF-32BE"),
    ],
)
def test_a_json_lines_file_in_utf16_or_utf32_is_refused_naming_its_encoding(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], codec: str, mark: bytes, said: str
) -> None:
    # RFC 8259, section 8.1: JSON exchanged between systems is UTF-8. A UTF-16 file was read as
    # UTF-8 lines: cut at each 0A byte, every piece quarantined as bytes, exit 0 (Python's codecs
    # write the files: the reference)
    text = '{"op": "I", "pos": 1, "id": 1, "a": "x", "b": "y"}\n{"op": "I", "pos": 2, "id": 2, "a": "ĊĊ", "b": "y"}\n'
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(MAPPING)
    (tmp_path / "n.jsonl").write_bytes(mark + text.encode(codec))
    args = (
        "convert",
        str(tmp_path / "n.jsonl"),
        "--mappings",
        str(tmp_path / "m"),
        "--out",
        str(tmp_path / "o"),
    )
    assert cli(*args) == 4
    err = capsys.readouterr().err
    assert f"n.jsonl: the file is {said} text, and JSON Lines are UTF-8 (RFC 8259, section 8.1)" in err
    assert f"iconv -f {said} -t UTF-8" in err and "Traceback" not in err


def test_a_byte_order_mark_before_the_first_json_line_is_not_part_of_it(convert: ConvertFn) -> None:
    # RFC 8259, section 8.1: a parser may ignore a byte order mark rather than treat it as an error;
    # as in a CSV file, it is not part of the first record. Anywhere else it is the line's content.
    import gzip

    bom = b"\xef\xbb\xbf"

    def line(i: int) -> bytes:
        return b'{"op": "I", "pos": %d, "id": %d, "a": "x", "b": "y"}' % (i, i)

    files = {
        "n-1.jsonl": bom + b"".join(line(i) + b"\n" for i in range(1, 4)),
        "n-2.jsonl.gz": gzip.compress(bom + b"".join(line(i) + b"\n" for i in range(11, 14))),
        "n-3.jsonl": line(21) + b"\n" + bom + line(22) + b"\n",
        "n-4.jsonl": bom,  # a file of a BOM alone is empty
    }
    # the path of many small files read as one scan too
    files.update({f"n-s{i:02}.jsonl": bom + line(100 + i) for i in range(20)})
    done = convert(MAPPING, files)
    ledger = done.ledger()
    assert ledger["balanced"]
    read = ledger["tables"]["t.notes"]["files"]
    assert read["n-1.jsonl"]["read"] == read["n-2.jsonl.gz"]["read"] == 3
    assert read["n-1.jsonl"]["quarantined"] == read["n-2.jsonl.gz"]["quarantined"] == 0
    assert all(read[f"n-s{i:02}.jsonl"]["quarantined"] == 0 for i in range(20))
    origins = {(e["origin"]["file"], e["origin"]["row"]) for e in done.events("t.notes")}
    assert ("n-1.jsonl", 1) in origins and ("n-2.jsonl.gz", 1) in origins and ("n-s00.jsonl", 1) in origins
    [q] = done.quarantine("t.notes")  # the mark at the start of a second line stays its content
    assert (q["_cdcnorm"]["file"], q["_cdcnorm"]["row"]) == ("n-3.jsonl", 2)
    assert q["_cdcnorm"]["text"] == "\ufeff" + line(22).decode()
    assert read["n-4.jsonl"]["read"] == 0


def test_parquet_dump(convert: ConvertFn, tmp_path: object) -> None:
    table = pa.table(
        {"op": ["I", "I"], "pos": [1, 2], "id": [1, 2], "a": ["x", None], "b": [b"\x00\x01", b""]}
    )
    import io

    buf = io.BytesIO()
    pq.write_table(table, buf)
    mapping = MAPPING.replace("b: text", "b: {type: bytes, encoding: hex}")
    done = convert(mapping, {"n.parquet": buf.getvalue()})
    ev = {e["key"]["id"]: e["values"] for e in done.events("t.notes")}
    assert ev[1] == {"id": 1, "a": "x", "b": "AAE="} and ev[2]["a"] is None and ev[2]["b"] == ""


#: bytes and uuid fields over binary columns (MAPPING's table, other fields)
BINARY = (
    MAPPING.replace("t.notes", "t.tokens")
    .replace('["n*"]', '["tok*"]')
    .replace(
        "  a: text\n  b: text\n", "  card: {type: bytes, encoding: base64}\n  blob: bytes\n  account: uuid\n"
    )
)


def _parquet(table: pa.Table) -> bytes:
    import io

    buf = io.BytesIO()
    pq.write_table(table, buf)
    return buf.getvalue()


def test_parquet_binary_columns_read_as_each_field_takes_them(convert: ConvertFn) -> None:
    """A BLOB column was read as hex text whatever the field: a base64 field then decoded the hex
    digits as base64 (``0102`` is base64 too: 3 other bytes, without a word), and a UUID stored as
    16 bytes with no logical type was quarantined. Oracles: Python's base64 (RFC 4648) and uuid
    (RFC 9562: the 16 octets in order as 8-4-4-4-12 hex) modules."""
    import base64
    import uuid

    ids = [uuid.UUID("12345678-1234-5678-1234-567812345678"), uuid.UUID(int=0), uuid.uuid4()]
    cards = [b"\x01\x02", b"", b"\xff" * 40]
    table = pa.table(
        {
            "op": ["I", "I", "I", "I"],
            "pos": [1, 2, 3, 4],
            "id": [1, 2, 3, 4],
            "card": pa.array([*cards, None], pa.binary()),
            "blob": pa.array([b"\x00\x01", b"", b"\xab", None], pa.binary()),
            "account": pa.array([u.bytes for u in ids] + [b"\x01" * 15], pa.binary()),
        }
    )
    done = convert(BINARY, {"tok.parquet": _parquet(table)})
    got = {e["key"]["id"]: e["values"] for e in done.events("t.tokens")}
    for i in range(3):
        assert got[i + 1]["card"] == base64.b64encode(cards[i]).decode()
        assert got[i + 1]["account"] == str(ids[i])
    assert [got[i]["blob"] for i in (1, 2, 3)] == ["AAE=", "", "qw=="]
    # 15 bytes are no UUID: quarantined with their hex, as a text would be
    (q,) = done.quarantine("t.tokens")
    assert q["account"] == "01" * 15 and q["_cdcnorm"]["reasons"][0]["field"] == "account"
    # a fixed-width binary(16) column (how UUIDs are often written) and the same values as text in a
    # CSV dump give the same events
    fixed = table.slice(0, 3).set_column(5, "account", pa.array([u.bytes for u in ids], pa.binary(16)))
    texts = [
        (base64.b64encode(c).decode(), b.hex())
        for c, b in zip(cards, [b"\x00\x01", b"", b"\xab"], strict=True)
    ]
    csv = "op,pos,id,card,blob,account\n" + "".join(  # a quoted empty field is an empty value, not NULL
        f'I,{i + 1},{i + 1},"{card}","{blob}",{ids[i]}\n' for i, (card, blob) in enumerate(texts)
    )
    as_parquet = convert(BINARY, {"tok.parquet": _parquet(fixed)}).events("t.tokens")
    as_csv = convert(BINARY, {"tok.csv": csv}).events("t.tokens")
    assert [e["values"] for e in as_parquet] == [e["values"] for e in as_csv]
    assert len(as_csv) == 3


def test_fields_reading_a_binary_column_in_two_forms_are_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    mapping = BINARY.replace("  blob: bytes\n", "  blob: bytes\n  card_hex: {from: card, type: bytes}\n")
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(mapping)
    table = pa.table(
        {
            "op": ["I"],
            "pos": [1],
            "id": [1],
            "card": pa.array([b"\x01"], pa.binary()),
            "blob": pa.array([b"\x01"], pa.binary()),
            "account": pa.array([b"\x01" * 16], pa.binary()),
        }
    )
    (tmp_path / "tok.parquet").write_bytes(_parquet(table))
    code = cli(
        "convert", str(tmp_path / "tok.parquet"), "--mappings", str(mdir), "--out", str(tmp_path / "o")
    )
    err = capsys.readouterr().err
    assert code == 4, err
    assert "fields read this binary column in different forms" in err
    assert "card (base64), card_hex (hex)" in err and "Traceback" not in err


def test_parquet_struct_members_read_as_json_lines_nested_keys(convert: ConvertFn) -> None:
    # Change dumps written as Parquet often nest the row image in a struct column ("after"). A
    # dotted mapped column reads the struct's member, as the same nested key of JSON Lines does:
    # the same rows as Parquet (pyarrow) and as JSON Lines (Python's json) give the same events.
    mapping = NESTED
    rows = [
        {"op": "I", "pos": 1, "after": {"id": 1, "place": {"city": "Quay", "zone": 3}}, "extra": [1, 2]},
        {"op": "I", "pos": 2, "after": {"id": 2, "place": None}, "extra": []},
        {"op": "I", "pos": 3, "after": {"id": 3, "place": {"city": None, "zone": None}}, "extra": None},
        {"op": "D", "pos": 4, "after": None, "extra": None},
    ]
    import io
    import json

    buf = io.BytesIO()
    pq.write_table(pa.Table.from_pylist(rows), buf)
    as_parquet = convert(mapping, {"n.parquet": buf.getvalue()})
    as_jsonl = convert(mapping, {"n.jsonl": "".join(json.dumps(r) + "\n" for r in rows)})
    events = as_parquet.events("t.nested")
    for e in events:
        e["origin"].pop("file")
    expected = as_jsonl.events("t.nested")
    for e in expected:
        e["origin"].pop("file")
    assert events == expected
    assert [e["values"] and e["values"]["city"] for e in events] == ["Quay", None, None]
    (q,) = as_parquet.quarantine("t.nested")  # the delete has no key: quarantined by both readers
    assert q["after.id"] is None and q["after"] is None
    assert as_parquet.ledger()["balanced"] and len(as_jsonl.quarantine("t.nested")) == 1
    # what no field reads is noted alike: the member after.place.zone of a struct (an object) that
    # is read through (before: a Parquet struct's unread members went unnoted)
    notes = [[n["note"] for n in last_run(c.out)["notes"]] for c in (as_parquet, as_jsonl)]
    assert notes[0] == notes[1] and len(notes[0]) == 1
    assert notes[0][0].startswith("raw column after.place.zone read by no field of t.nested")


def test_unread_columns_whose_names_would_blur_in_a_list_are_quoted(
    convert: ConvertFn, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # an empty name (a header's trailing comma), spaces at an end, a comma or a quote: before, the
    # note read "raw column  read by no field" or "raw columns x, y, z" for two names
    done = convert(MAPPING, {"n.csv": 'op,pos,id,a,b,zone, pad ,"x, y","say ""hi""",\nI,1,1,p,q,,,,,\n'})
    (note,) = [n["note"] for n in last_run(done.out)["notes"]]
    assert note.startswith(
        'raw columns zone, " pad ", "x, y", "say \\"hi\\"", "" read by no field of t.notes'
    )
    # and the columns a drift error lists: the header's "a " is not the mapping's a
    assert _convert_one(tmp_path, MAPPING, "op,pos,id,a ,b,\nI,1,1,p,q,\n") == 4
    assert 'found: columns op, pos, id, "a ", b, ""' in capsys.readouterr().err


def test_names_with_quotes_braces_and_commas(convert: ConvertFn) -> None:
    mapping = """
    table: odd.names
    files: ["*.csv"]
    key: ["id's"]
    change:
      action: {column: "op code", codes: {I: insert}}
      position: {column: "pos,x", kind: integer}
    fields:
      "id's": {from: "ID (raw)", type: integer}
      'say "hi"': {from: 'say "hi"', type: text}
      "{braces}": text
    """
    data = '"op code","pos,x","ID (raw)","say ""hi""",{braces}\nI,1,1,a,b\nI,2,x,c,d\n'
    done = convert(mapping, {"a.csv": data})
    (e,) = done.events("odd.names")
    assert e["key"] == {"id's": 1} and e["values"] == {"id's": 1, 'say "hi"': "a", "{braces}": "b"}
    (q,) = done.quarantine("odd.names")
    assert q["ID (raw)"] == "x" and q["pos,x"] == "2"


def test_jsonl_dotted_path_under_a_key_that_is_not_always_an_object(convert: ConvertFn) -> None:
    mapping = """
    table: j.t
    files: ["*.jsonl"]
    key: [id]
    change:
      action: {column: op, codes: {I: insert}}
      position: {column: pos, kind: integer}
    fields:
      id: integer
      v: {from: a.b, type: text}
      w: {from: c.d.e, type: text}
    """
    rows = [
        '"a": {"b": "x"}, "c": {"d": {"e": "y"}}',
        '"a": null',  # null or absent on the way: the mapped members are absent (NULL)
        '"c": {"d": null}',
        '"a": "plain"',  # there, but not an object: nothing the mapping could read (before: NULL)
        '"a": "{\\"b\\": \\"x\\"}"',  # JSON encoded twice
        '"a": ["b"]',
        '"a": {"b": 1}, "c": {"d": 2.5}',
        '"c": true',
    ]
    data = "".join(f'{{"op": "I", "pos": {i}, "id": {i}, {r}}}\n' for i, r in enumerate(rows, start=1))
    done = convert(mapping, {"x.jsonl": data})
    got = {e["key"]["id"]: (e["values"]["v"], e["values"]["w"]) for e in done.events("j.t")}
    assert got == {1: ("x", "y"), 2: (None, None), 3: (None, None)}
    reasons = {q["_cdcnorm"]["row"]: q["_cdcnorm"]["reasons"][0]["reason"] for q in done.quarantine("j.t")}
    tail = ", not an object: the mapping reads members of it"
    assert reasons == {
        4: "the member a is a string" + tail,
        5: "the member a is a string" + tail,
        6: "the member a is an array" + tail,
        7: "the member c.d is a number" + tail,
        8: "the member c is true or false" + tail,
    }
    assert all(q["_cdcnorm"]["text"].startswith('{"op": "I"') for q in done.quarantine("j.t"))
    assert done.ledger()["balanced"]


_json_scalars = st.none() | st.booleans() | st.integers(-(10**6), 10**6) | st.text(max_size=3)
_json_values = st.recursive(
    _json_scalars,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.sampled_from("abc"), inner, max_size=3),
    max_leaves=8,
)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.dictionaries(st.sampled_from("xyz"), _json_values, max_size=3), min_size=1, max_size=12))
def test_json_lines_structure_is_the_merge_of_every_object(objects: list[dict[str, object]]) -> None:
    """The columns of a JSON Lines file come from the merged structure of one object per distinct
    structure (bounded memory); DuckDB's own json_group_structure over every object is the oracle:
    nested keys, empty objects, nulls, arrays and mixed kinds must merge the same."""
    import json

    from cdcnorm.engines.duckdb import DuckDBEngine
    from cdcnorm.readers.jsonl import LINES

    engine = DuckDBEngine()
    lines = [json.dumps(o).encode() for o in objects]
    files = [i % 2 for i in range(len(lines))]  # two files read in one scan: merged each by itself
    batch = pa.RecordBatch.from_arrays(
        [
            pa.array(lines, pa.large_binary()),
            pa.array(range(1, len(lines) + 1), pa.int64()),
            pa.array(files, pa.int32()),
        ],
        schema=LINES,
    )
    engine.load_batches("lines", pa.RecordBatchReader.from_batches(LINES, iter([batch])))
    engine.create_malformed("bad")
    merged = engine.split_json_lines("lines", "ok", "bad")
    every = dict(engine.rows("SELECT __file, json_group_structure(j) FROM ok GROUP BY __file"))
    for file_id in (0, 1):
        mine, oracle = merged.get(file_id), every.get(file_id)
        assert (None if mine is None else json.loads(mine)) == (
            None if oracle is None else json.loads(str(oracle))
        )


def test_a_struct_member_the_file_lacks_is_drift_with_its_members_suggested(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(NESTED.replace("after.place.city", "after.place.town"))
    rows = [{"op": "I", "pos": 1, "after": {"id": 1, "place": {"city": "Quay"}}, "extra": None}]
    pq.write_table(pa.Table.from_pylist(rows), tmp_path / "n.parquet")
    code = cli(
        "convert",
        str(tmp_path / "n.parquet"),
        "--mappings",
        str(tmp_path / "m"),
        "--out",
        str(tmp_path / "o"),
    )
    err = capsys.readouterr().err
    assert code == 4 and "reads raw column 'after.place.town'" in err
    assert 'did you mean "after.place.city"?' in err  # a member of the struct, not the struct


@pytest.mark.parametrize("fmt", ["csv", "jsonl", "parquet"])
@pytest.mark.parametrize("mapped", ["a", "A"])
def test_columns_whose_names_differ_only_in_case_are_two_columns(
    convert: ConvertFn, fmt: str, mapped: str
) -> None:
    # before: a CSV header "a,A" ended in a traceback (the raw row's struct took them as one name),
    # and DuckDB read a Parquet file's "A" as "A_1", so a mapping of A found no such column; the
    # reference is the file itself (Python's csv and json modules, pyarrow for Parquet)
    import io
    import json

    rows = [{"op": "I", "pos": 1, "id": 1, "a": "lower", "A": "upper", "b": "x"}]
    rows.append({"op": "I", "pos": 2, "id": "bad", "a": "l2", "A": "u2", "b": "y"})
    if fmt == "csv":
        data: str | bytes = "op,pos,id,a,A,b\n" + "".join(",".join(map(str, r.values())) + "\n" for r in rows)
    elif fmt == "jsonl":
        data = "".join(json.dumps(r) + "\n" for r in rows)
    else:
        buf = io.BytesIO()
        pq.write_table(pa.Table.from_pylist([{**r, "id": str(r["id"])} for r in rows]), buf)
        data = buf.getvalue()
    mapping = MAPPING.replace("  a: text\n", f"  a: {{from: {mapped}, type: text}}\n")
    done = convert(mapping, {f"n.{fmt}": data})
    (e,) = done.events("t.notes")
    assert e["values"]["a"] == rows[0][mapped]
    (q,) = done.quarantine("t.notes")  # the raw row keeps both names as the file has them
    assert (q["a"], q["A"]) == ("l2", "u2")


def test_a_parquet_schema_that_repeats_a_name_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # as a CSV header that repeats a name: which column the mapping means cannot be known
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(MAPPING)
    t = pa.Table.from_arrays(
        [pa.array(x) for x in (["I"], [1], [1], ["x"], ["y"])], names=["op", "pos", "id", "a", "a"]
    )
    pq.write_table(t, tmp_path / "n.parquet")
    capsys.readouterr()
    args = ("--mappings", str(tmp_path / "m"), "--out", str(tmp_path / "o"))
    assert cli("convert", str(tmp_path / "n.parquet"), *args) == 4
    assert "the file's schema repeats column names ['a']" in capsys.readouterr().err


def test_mapping_fields_that_differ_only_in_case_are_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: a traceback when the envelope's struct was built
    capsys.readouterr()
    assert _convert_one(tmp_path, MAPPING + "  A: text\n", "op,pos,id,a,A,b\nI,1,1,x,y,z\n") == 3
    err = capsys.readouterr().err
    assert "t.yaml:12: fields a and A differ only in case" in err and "Traceback" not in err


def test_a_mapped_struct_member_beside_one_differing_only_in_case_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: "after.Name" read the member "name" without a word (the engine binds members without
    # regard to case); a member without such a twin (after.id) is still read
    st = pa.StructArray.from_arrays(
        [pa.array([1]), pa.array(["low"]), pa.array(["UP"])], names=["id", "name", "Name"]
    )
    pq.write_table(pa.table({"op": ["I"], "pos": [1], "after": st}), tmp_path / "n.parquet")
    (tmp_path / "m").mkdir()
    mapping = MAPPING.replace("  id: integer\n", "  id: {from: after.id, type: integer}\n")
    mapping = mapping.replace("  a: text\n  b: text\n", "  a: {from: after.Name, type: text}\n")
    (tmp_path / "m" / "t.yaml").write_text(mapping)
    args = ("--mappings", str(tmp_path / "m"), "--out", str(tmp_path / "o"))
    capsys.readouterr()
    assert cli("convert", str(tmp_path / "n.parquet"), *args) == 4
    err = capsys.readouterr().err
    assert (
        "struct after has members that differ only in case: Name, name" in err and "field: after.Name" in err
    )
    (tmp_path / "m" / "t.yaml").write_text(mapping.replace("after.Name", "after.id"))
    assert cli("convert", str(tmp_path / "n.parquet"), *args) == 0


def _read_engine(tmp_path: Path) -> tuple[Any, Any]:
    """The engine and raw table of one table read from 20 small CSV files (read joined as one),
    a larger one and a Parquet file: every kind of numbered view."""
    from cdcnorm.engines.duckdb import DuckDBEngine
    from cdcnorm.inputs import expand_inputs, route
    from cdcnorm.mapping.load import load_mappings
    from cdcnorm.pipeline import Options, read_all

    insert_only_mapping(tmp_path / "m")
    dumps = tmp_path / "d"
    dumps.mkdir()
    for i in range(20):
        (dumps / f"t-{i:02}.csv").write_text(f'op,pos,id,name\nI,{i},{i},"small\n{i}"\nI,{i},{i + 100},x\n')
    # over the size of a small file (1 MiB): read alone
    (dumps / "t-big.csv").write_text(
        "op,pos,id,name\n" + "".join(f"I,{i},{i},{'n' * 400}{i}\n" for i in range(3000))
    )
    pq.write_table(
        pa.table(
            {
                "op": ["I"] * 50,
                "pos": [str(i) for i in range(50)],
                "id": ["1"] * 50,
                "name": [f"p{i}" for i in range(50)],
            }
        ),
        dumps / "t-p.parquet",
    )
    mappings = load_mappings(tmp_path / "m")
    engine = DuckDBEngine()
    read = read_all(
        mappings, route(expand_inputs([dumps]), mappings), engine, Options(), lambda *a: None, tmp_path / "s"
    )
    return engine, read["t"]


@pytest.fixture(scope="module")
def read_views(tmp_path_factory: pytest.TempPathFactory) -> tuple[Any, Any]:
    return _read_engine(tmp_path_factory.mktemp("lookup"))


@settings(max_examples=40, deadline=None)
@given(picks=st.lists(st.tuples(st.integers(0, 22), st.integers(-1, 3002)), max_size=40))
def test_looking_rows_up_by_rowid_gives_what_a_join_on_file_and_row_gives(
    read_views: tuple[Any, Any], picks: list[tuple[int, int]]
) -> None:
    """``DuckDBEngine.lookup`` (the writers' way to the raw rows of a few quarantined or pending
    rows) against the join on ``__file`` and ``__row`` it replaces: the same rows, each once,
    whatever the wanted relation holds (repeats, rows no file has, files of another view)."""
    engine, raw = read_views
    from cdcnorm.plan import Plan, RawRelation, Source

    kinds = {re.sub(r"[0-9]+_rows$", "", rel.split("__")[-1]) for rel, _ in raw.relations}
    assert kinds == {"joined", "csv", "parquet"}, raw.relations  # every kind of numbered view is here
    values = ", ".join(f"({f}, {r})" for f, r in picks) or "(0, 0)"
    where = "" if picks else " WHERE FALSE"
    engine.execute(
        f"CREATE OR REPLACE TABLE wanted AS SELECT CAST(f AS INTEGER) AS __file, CAST(r AS BIGINT) AS __row "
        f"FROM (VALUES {values}) v(f, r){where}"
    )
    plan = Plan(
        mapping=None,  # type: ignore[arg-type]  # raw_union reads only the relations
        sources=tuple(Source(f.file_id, f.name, tuple(f.columns)) for f in raw.files),
        relations=tuple(RawRelation(n, tuple(c)) for n, c in raw.relations),
    )
    cols = [raw.internal(c) for c in ("op", "pos", "id", "name")]
    joined = engine.rows(f"SELECT * FROM ({plan.raw_union(cols, 'wanted')}) ORDER BY ALL")
    looked = engine.rows(f"SELECT * FROM ({plan.raw_union(cols, 'wanted', engine.lookup)}) ORDER BY ALL")
    assert looked == joined
    if len(picks) <= 10:  # at most a quarter of the smallest view's 40 rows: looked up by rowid
        assert all(engine.lookup(rel, "wanted") is not None for rel, _ in raw.relations)


def test_lookup_leaves_a_large_share_of_the_rows_to_the_join(tmp_path: Path) -> None:
    engine, raw = _read_engine(tmp_path)
    big = next(rel for rel, _ in raw.relations if "__csv" in rel)
    file_id = next(f.file_id for f in raw.files if f.name.endswith("t-big.csv"))
    engine.execute(
        f"CREATE TABLE few AS SELECT {file_id} AS __file, CAST(range AS BIGINT) AS __row FROM range(1, 751)"
    )
    engine.execute(
        f"CREATE TABLE many AS SELECT {file_id} AS __file, CAST(range AS BIGINT) AS __row FROM range(1, 752)"
    )
    assert engine.lookup(big, "few") is not None  # at most a quarter of its 3,000 rows: by rowid
    assert engine.lookup(big, "many") is None
    assert engine.lookup("no_such_view", "few") is None


def test_a_mapping_names_the_format_its_files_names_do_not_tell(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], convert: ConvertFn
) -> None:
    # some lake writers name JSON Lines part-0000.json (common practice); before, no mapping could say
    # so, and the file stopped the run (exit 4) with no hint of --input-format
    import gzip

    line = '{"op": "I", "pos": %d, "id": %d, "a": "x", "b": "y"}\n'
    files: dict[str, str | bytes] = {
        "n-0.json": line % (1, 1),
        "n-1.json.gz": gzip.compress((line % (2, 2)).encode()),
    }
    done = convert(MAPPING + "format: jsonl\n", files)
    assert [e["origin"]["file"] for e in done.events("t.notes")] == ["n-0.json", "n-1.json.gz"]
    # without it: exit 4, the file named, the way out given
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(MAPPING)
    (tmp_path / "d").mkdir()
    (tmp_path / "d" / "n-0.json").write_text(line % (1, 1))
    capsys.readouterr()
    assert (
        cli("convert", str(tmp_path / "d"), "--mappings", str(tmp_path / "m"), "--out", str(tmp_path / "o"))
        == 4
    )
    err = " ".join(capsys.readouterr().err.split())
    assert (
        "n-0.json: cannot tell this file's format from its name" in err
        and "format: csv | jsonl | parquet" in err
    )
    # --input-format reads every input so, over a mapping's format
    assert (
        cli(
            "convert",
            str(tmp_path / "d"),
            "--mappings",
            str(tmp_path / "m"),
            "--out",
            str(tmp_path / "o"),
            "--input-format",
            "jsonl",
        )
        == 0
    )
    (tmp_path / "m" / "t.yaml").write_text(MAPPING + "format: csv\n")
    assert (
        cli(
            "check",
            str(tmp_path / "d"),
            "--mappings",
            str(tmp_path / "m"),
            "--input-format",
            "jsonl",
            "--json",
        )
        == 0
    )
    # a Parquet file named .dat, by its mapping's format
    (tmp_path / "m" / "t.yaml").write_text(MAPPING + "format: parquet\n")
    (tmp_path / "p").mkdir()
    pq.write_table(
        pa.table({"op": ["I"], "pos": [3], "id": [3], "a": ["p"], "b": ["q"]}), tmp_path / "p" / "n-2.dat"
    )
    capsys.readouterr()
    assert cli("check", str(tmp_path / "p"), "--mappings", str(tmp_path / "m"), "--json") == 0
    (f,) = json.loads(capsys.readouterr().out)["files"]
    assert f["format"] == "parquet" and f["rows"] == 1


def test_parquet_decimals_of_more_than_38_digits_keep_every_digit(convert: ConvertFn) -> None:
    # The engine reads a Parquet DECIMAL of more than 38 digits (pyarrow's decimal256) as a DOUBLE:
    # 12345678901234567890123456789012345678.12 became "1.2345678901234568e+37", and a text field
    # read it so without a word. Python's decimal is the reference for each value's digits.
    from decimal import Decimal

    values = [
        Decimal("12345678901234567890123456789012345678.12"),
        Decimal("-0.10"),
        Decimal("123456789012345678.25"),
    ]
    assert float(values[0]) != values[0]  # what a floating-point number makes of it
    wide = pa.decimal256(40, 2)
    table = pa.table(
        {
            "op": ["I", "I", "I"],
            "pos": pa.array([1, 2, 3], pa.int64()),
            "id": pa.array([1, 2, 3], pa.int64()),
            "a": pa.array(values, wide),
            "b": pa.array(values, wide),
            "n": pa.array([{"x": v} for v in values], pa.struct([("x", wide)])),
        }
    )
    mapping = MAPPING.replace("  b: text", "  b: decimal(20,2)\n  n: json") + "unused: []\n"
    done = convert(mapping, {"n.parquet": _parquet(table)})
    events = {e["key"]["id"]: e["values"] for e in done.events("t.notes")}
    # a text field: the exact digits, the scale's zeros kept (the decimal's own text)
    assert {i: v["a"] for i, v in events.items()} == {2: "-0.10", 3: "123456789012345678.25"}
    assert {i: v["b"] for i, v in events.items()} == {2: "-0.10", 3: "123456789012345678.25"}
    assert events[3]["n"] == {"x": "123456789012345678.25"}  # nested: a JSON string, told in the note
    (q,) = done.quarantine("t.notes")  # 38 integer digits do not fit decimal(20,2)
    assert q["_cdcnorm"]["row"] == 1 and q["a"] == q["b"] == str(values[0])
    assert Decimal(q["b"]) == values[0]
    (note,) = [n["note"] for n in last_run(done.out)["notes"]]
    assert note == (
        "decimals of more than 38 digits read as their exact text (a, b, n): the engine reads them as "
        "floating-point numbers; in n they are JSON strings"
    )
    assert done.ledger()["balanced"]


def test_the_header_again_in_a_file_is_one_reason_not_one_per_field(convert: ConvertFn) -> None:
    """Exports joined with their headers (``cat a.csv b.csv``, or gzip members appended: RFC 1952,
    section 2.2, a gzip file is a series of members, read as one stream) hold the header again as
    a record. It was quarantined with one reason per mapped column ("unknown action code", "not an
    integer", ...); it is one reason naming it. A record that merely holds a column's name in one
    field still gets the field's own reason."""
    import gzip

    head = "op,pos,id,a,b\n"
    joined = head + "I,1,1,x,y\n" + head + "I,2,2,x,y\n"
    members = gzip.compress((head + "I,3,3,x,y\n").encode()) + gzip.compress((head + "I,4,4,x,y\n").encode())
    assert gzip.decompress(members).decode().count(head) == 2  # Python's gzip reads both members
    done = convert(
        MAPPING, {"n-joined.csv": joined, "n-members.csv.gz": members, "n-one.csv": head + "I,5,id,a,b\n"}
    )
    why = {
        (q["_cdcnorm"]["file"], q["_cdcnorm"]["row"]): q["_cdcnorm"]["reasons"]
        for q in done.quarantine("t.notes")
    }
    again = [
        {
            "field": None,
            "column": None,
            "expected": "a data record",
            "found": "the names of the columns",
            "reason": "the header row again: files joined with their headers, or a header in a file read as headerless",
        }
    ]
    assert why[("n-joined.csv", 2)] == again and why[("n-members.csv.gz", 2)] == again
    assert [r["reason"] for r in why[("n-one.csv", 1)]] == ["not an integer"]
    assert sorted(e["key"]["id"] for e in done.events("t.notes")) == [1, 2, 3, 4]
    assert done.ledger()["balanced"]
