"""Plain delimited text (``csv.escapes: none``): nothing is quoted or escaped, a record is one line,
every delimiter separates two fields. Tab-separated values are the plain text the IANA registration
of ``text/tab-separated-values`` defines (fields separated by tabs, records by line ends, and a field
cannot hold a tab; from memory); bulk-copy exports write the same with a delimiter of a few
characters no value holds.

The oracles: Python's ``csv`` module, whose reader with ``QUOTE_NONE`` does no special processing of
quote characters (Python's documentation, ``csv.QUOTE_NONE``), and a real MariaDB server, whose
``SELECT ... INTO OUTFILE ... FIELDS ESCAPED BY ''`` writes every value as it is and NULL as the
word NULL (MariaDB 10.11; MySQL's documentation, SELECT ... INTO, says the same)."""

from __future__ import annotations

import csv
import io
import random
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from cdcnorm.readers.count import Counting, count_blocks
from tests.conftest import ConvertFn, MySQL, cli, last_run
from tests.test_bad_input import NOTES


def _mapping(csv_options: str, nulls: str = "") -> str:
    """The notes table with a text field, its dumps in plain text (``csv_options`` inside ``csv:``)."""
    options = f"csv: {{escapes: none{csv_options}}}\n{nulls}"
    return NOTES.replace("a: TYPE", "a: text").replace("key: [id]\n", f"key: [id]\n{options}")


HEADERLESS = ", header: false, columns: [op, pos, id, a]"


def _values(done: Any) -> dict[int, object]:
    return {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")}


def _careful_files(done: Any) -> set[str]:
    return {n["file"] for n in last_run(done.out)["notes"] if n["note"].startswith("read record by record")}


def _quarantined(done: Any) -> dict[int, dict[str, Any]]:
    return {q["_cdcnorm"]["row"]: q["_cdcnorm"] for q in done.quarantine("t.notes")}


def _dump(values: list[str | None], delimiter: str = "\t", end: str = "\n", null: str = "") -> str:
    return "".join(
        delimiter.join(["I", str(i + 1), str(i + 1), null if v is None else v]) + end
        for i, v in enumerate(values)
    )


#: Cells no other form reads as written: quotes anywhere, backslashes, COPY's and MySQL's NULL marks.
CELLS = [
    '"quoted"',
    '"open',
    'mid"dle',
    'end"',
    '""',
    "back\\slash",
    "\\N",
    "\\t",
    "NULL",
    " spaced ",
    "naïve 😀",
]


def test_plain_cells_read_as_pythons_csv_module_reads_them_without_quoting(convert: ConvertFn) -> None:
    text = "op\tpos\tid\ta\n" + _dump(CELLS)
    done = convert(_mapping(""), {"n.tsv": text})
    # Python's csv module with QUOTE_NONE: fields split at every delimiter, quotes are data
    rows = list(csv.reader(io.StringIO(text), delimiter="\t", quoting=csv.QUOTE_NONE))[1:]
    assert _values(done) == {int(r[2]): r[3] for r in rows}
    assert _values(done) == {i + 1: c for i, c in enumerate(CELLS)}
    assert done.ledger()["balanced"] and not done.quarantine("t.notes")
    assert _careful_files(done) == set()  # the engine's reader read it


def test_an_empty_field_is_null_by_the_mappings_nulls_and_an_empty_text_without_them(
    convert: ConvertFn,
) -> None:
    text = "op\tpos\tid\ta\n" + _dump(["", "NULL", "x"])
    assert _values(convert(_mapping(""), {"n.tsv": text})) == {1: None, 2: "NULL", 3: "x"}
    assert _values(convert(_mapping("", 'nulls: ["NULL"]\n'), {"n.tsv": text})) == {1: "", 2: None, 3: "x"}
    assert _values(convert(_mapping("", "nulls: []\n"), {"n.tsv": text})) == {1: "", 2: "NULL", 3: "x"}


def test_a_record_with_the_delimiter_in_a_value_is_quarantined_and_reading_goes_on(
    convert: ConvertFn,
) -> None:
    text = "op\tpos\tid\ta\n" + _dump(["ok", "tab\there", '"quoted\tstill split"', "after"])
    done = convert(_mapping(""), {"n.tsv": text})
    assert _values(done) == {1: "ok", 4: "after"}
    quarantined = _quarantined(done)
    assert sorted(quarantined) == [2, 3]
    assert quarantined[2]["text"] == "I\t2\t2\ttab\there"
    assert quarantined[2]["reasons"][0]["reason"] == "expected 4 fields, found 5"
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 4 and ledger["total"]["quarantined"] == 2
    assert _careful_files(done) == {"n.tsv"}


def test_a_line_break_in_a_last_value_quarantines_the_record_it_cut_short_too(convert: ConvertFn) -> None:
    # nothing escapes a line break in plain text: "first\nsecond" in the last field reads as a whole
    # record ("first") and a line of one field; the record is not kept as if "first" were its value
    text = "op\tpos\tid\ta\n" + _dump(["ok", "first\nsecond\nthird", "after", "also\tsplit\nrest"])
    done = convert(_mapping(""), {"n.tsv": text})
    assert _values(done) == {1: "ok", 3: "after"}
    quarantined = _quarantined(done)
    assert {row: q["text"] for row, q in quarantined.items()} == {
        2: "I\t2\t2\tfirst",
        3: "second",
        4: "third",
        6: "I\t4\t4\talso\tsplit",  # five fields: malformed itself
        7: "rest",  # after a malformed record: one field too few is all it says
    }
    reasons = {row: q["reasons"][0]["reason"] for row, q in quarantined.items()}
    assert "this record may be cut short" in reasons[2]
    assert reasons[3].startswith("expected 4 fields, found 1, after a record") and reasons[4] == reasons[3]
    assert reasons[6] == "expected 4 fields, found 5" and reasons[7] == "expected 4 fields, found 1"
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 7


@pytest.mark.parametrize(
    ("delimiter", "careful"),
    [("|~|", False), ("§", False), ("<#>~~", True), ("\x1f", False)],
    ids=["three-bytes", "two-byte-character", "five-bytes", "unit-separator"],
)
def test_a_delimiter_of_several_characters_separates_fields(
    convert: ConvertFn, delimiter: str, careful: bool
) -> None:
    # bulk-copy exports separate fields by a few characters no value holds (common practice); the
    # engine's reader takes a delimiter of at most 4 bytes, a longer one is read record by record
    cells = ["a", "b|c", "~", "tab\there", "", "x"]
    header = delimiter.join(["op", "pos", "id", "a"]) + "\r\n"
    done = convert(
        _mapping(f", delimiter: {delimiter!r}".replace("'", '"').replace("\x1f", "\\x1f")),
        {"n.csv": header + _dump(cells, delimiter, "\r\n")},
    )
    assert _values(done) == {i + 1: c or None for i, c in enumerate(cells)}
    assert done.ledger()["balanced"]
    assert _careful_files(done) == ({"n.csv"} if careful else set())
    if careful:
        note = next(n["note"] for n in last_run(done.out)["notes"])
        assert note == "read record by record (the fast reader takes no delimiter longer than 4 bytes)"


@pytest.mark.parametrize("careful", [False, True], ids=["engine", "record-by-record"])
def test_a_bulk_copy_dumps_empty_text_as_one_nul_character_and_null_as_nothing(
    convert: ConvertFn, careful: bool
) -> None:
    # SQL Server's bcp utility, writing a file, "represents an empty string as a null and a null
    # string as an empty string" (SQL Server's documentation, bcp Utility, argument out, as quoted by
    # third-party pages): an empty text is one NUL character, NULL an empty field. csv.empty says so
    cells = ["\0", "", "x\0y", "\0\0", "plain"]
    text = _dump(cells, "|~|", "\r\n") + ("I|~|99\r\n" if careful else "")
    done = convert(_mapping(', delimiter: "|~|", empty: "\\0"' + HEADERLESS), {"n.csv": text})
    expected: dict[int, object] = {1: "", 2: None, 3: "x\0y", 4: "\0\0", 5: "plain"}
    if careful:  # the last record is cut short: the malformed line after it says so
        expected.pop(5)
    assert _values(done) == expected
    assert _careful_files(done) == ({"n.csv"} if careful else set())
    assert done.ledger()["balanced"]


def test_an_empty_text_token_that_is_also_a_null_token_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "notes.yaml").write_text(_mapping(', empty: "-"', 'nulls: ["", "-"]\n'))
    (tmp_path / "n.tsv").write_text("op\tpos\tid\ta\nI\t1\t1\t-\n")
    code = cli("check", "--mappings", str(tmp_path / "m"), str(tmp_path / "n.tsv"))
    err = capsys.readouterr().err
    assert code == 3 and "csv.empty is '-', which nulls lists too" in err and "notes.yaml:" in err


def test_many_small_plain_files_read_together(convert: ConvertFn) -> None:
    files: dict[str, str | bytes] = {
        f"n{i:03d}.tsv": _dump([f'"v{i}'], "|~|").replace("I|~|1|~|1", f"I|~|{i + 1}|~|{i + 1}")
        for i in range(30)
    }
    files["n999.tsv"] = "I|~|500|~|500|~|a|~|b\n"  # malformed: read record by record
    done = convert(_mapping(', delimiter: "|~|"' + HEADERLESS), files)
    assert _values(done) == {i + 1: f'"v{i}' for i in range(30)}
    assert sorted(_quarantined(done)) == [1] and done.ledger()["balanced"]
    assert _careful_files(done) == {"n999.tsv"}


def test_a_tab_separated_dump_read_as_rfc_4180_is_told_it_may_be_plain_text(convert: ConvertFn) -> None:
    text = 'op\tpos\tid\ta\nI\t1\t1\t"open\nI\t2\t2\tok\n'
    done = convert(NOTES.replace("a: TYPE", "a: text"), {"n.tsv": text})
    (q,) = done.quarantine("t.notes")
    assert "set csv.escapes: none" in q["_cdcnorm"]["reasons"][0]["reason"]
    assert _values(convert(_mapping(""), {"n.tsv": text})) == {1: '"open', 2: "ok"}


@pytest.mark.parametrize("escapes", ["none", "backslash"])
@pytest.mark.parametrize("last", ["\r", "y\r"])
def test_a_cr_before_an_lf_is_data_where_the_lines_end_with_lf(
    convert: ConvertFn, escapes: str, last: str
) -> None:
    # MySQL's and MariaDB's OUTFILE write a CR as it is (tests/test_mysql_dumps.py): in a file of LF
    # line ends it is data. The engine's reader dropped it where it was a last field's whole text
    # (the value became NULL); such a file is now read record by record
    mapping = _mapping(HEADERLESS).replace("escapes: none", f"escapes: {escapes}")
    text = f"I\t1\t1\t\nI\t2\t2\t{last}\n"
    done = convert(mapping, {"n.tsv": text})
    assert _values(done) == {1: "" if escapes == "backslash" else None, 2: last}
    assert _careful_files(done) == {"n.tsv"}
    assert (
        count_blocks([text.encode()], False, Counting(None, None, escapes == "backslash", True))[1] is False
    )
    assert count_blocks([text.encode()], False, Counting(None, None, escapes == "backslash"))[1] is True


def test_the_record_count_of_plain_text_counts_lines_whatever_backslashes_and_quotes_they_hold() -> None:
    data = b'a\\\nb"\n"c\\\r\n\n'
    assert count_blocks([data], False, Counting(None, None, False))[:2] == (3, True)
    assert (
        count_blocks([data], False, Counting(None))[1] is False
    )  # COPY's text format: a backslash escapes a break


# --- both paths read the same values ------------------------------------------------------------------

PLAIN_ALPHABET = st.sampled_from([*'ab"\\ ,;|~N', "é", "😀", "\r"])


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    st.lists(st.one_of(st.none(), st.text(PLAIN_ALPHABET, max_size=6)), min_size=1, max_size=8),
    st.sampled_from(["\t", "|~|", ";"]),
    st.sampled_from(["\n", "\r\n"]),
)
@example(values=[None, "\r"], delimiter="\t", end="\n")  # the engine's reader dropped that CR
def test_whichever_path_reads_a_plain_file_the_values_are_those_written(
    convert: ConvertFn, values: list[str | None], delimiter: str, end: str
) -> None:
    # a CR is data where lines end with LF, as MySQL's OUTFILE writes one; where they end with
    # CRLF a value holding a CR cannot be told apart, so none is written then, nor at the end of the
    # first line, whose line end is the file's (``line_end``)
    values = [v if v is None or end == "\n" else v.replace("\r", "") for v in values]
    values[0] = values[0] if values[0] is None else values[0].rstrip("\r")
    values = [None if v == "" else v for v in values]  # an empty field is NULL (nulls: [""])
    values = [v if v is None or delimiter not in v else v.replace(delimiter, "") or None for v in values]
    text = _dump(values, delimiter, end)
    mapping = _mapping(f", delimiter: {delimiter!r}".replace("'", '"') + HEADERLESS)
    expected = {i + 1: v for i, v in enumerate(values)}
    fast = convert(mapping, {"n.txt": text}, "--input-format", "csv")
    careful = convert(mapping, {"n.txt": text + "I\n"}, "--input-format", "csv")  # one field: malformed
    assert _values(fast) == expected
    assert _values(careful) == {k: v for k, v in expected.items() if k != len(values)}
    assert _careful_files(careful) == {"n.txt"}
    if delimiter != "|~|" and "\r" not in text.replace(end, ""):
        # Python's csv module takes a delimiter of one character, a CR alone as a line end, and
        # drops a CR before an LF even where the lines end with LF
        rows = list(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, quoting=csv.QUOTE_NONE))
        assert {int(r[2]): r[3] or None for r in rows} == expected


# --- MariaDB's plain dumps ----------------------------------------------------------------------------

FORMS = [
    ("FIELDS ESCAPED BY ''", ""),  # a tab between fields, the server's default
    ("FIELDS TERMINATED BY '|~|' ESCAPED BY ''", ', delimiter: "|~|"'),
    ("FIELDS TERMINATED BY ',' ESCAPED BY '' LINES TERMINATED BY '\\r\\n'", ', delimiter: ","'),
]
SERVER_ALPHABET = [*"abcXYZ019 \"'\\|~,;%_\x00", "é", "ß", "中", "😀"]


@pytest.mark.parametrize(("options", "csv_options"), FORMS)
def test_escaped_by_nothing_outfile_dumps_read_as_the_server_holds_them(
    convert: ConvertFn, mysql: MySQL, options: str, csv_options: str
) -> None:
    rng = random.Random(options)
    delimiter = {"": "\t"}.get(csv_options, csv_options.split('"')[1] if csv_options else "\t")
    values: list[str | None] = []
    for i in range(300):
        if i % 10 == 0:
            values.append(None)
        elif i % 10 == 1:
            values.append(rng.choice(["", "\\N", '""', "N", "\\"]))
        else:
            cell = "".join(rng.choice(SERVER_ALPHABET) for _ in range(rng.randint(1, 12)))
            values.append(cell.replace(delimiter, "") or "x")
    values += ["broken\nline", "NULL"]  # what plain text cannot hold: a line break, the null word
    cur = mysql.cursor
    cur.execute("CREATE TABLE notes (op CHAR(1), pos BIGINT, id INT, a TEXT CHARACTER SET utf8mb4)")
    cur.executemany(
        "INSERT INTO notes VALUES (%s, %s, %s, %s)", [("I", i + 1, i + 1, v) for i, v in enumerate(values)]
    )
    path = mysql.files / "n.txt"
    cur.execute(
        f"SELECT op, pos, id, a FROM notes ORDER BY id INTO OUTFILE '{path}' CHARACTER SET utf8mb4 {options}"
    )
    cur.execute("SELECT id, a FROM notes")
    held = dict(cur.fetchall())
    mapping = _mapping(csv_options + HEADERLESS, 'nulls: ["NULL"]\nformat: csv\n')
    done = convert(mapping, {"n.txt": path.read_bytes()})
    broken, word = len(values) - 1, len(values)
    assert held[broken] == "broken\nline" and held[word] == "NULL"
    assert _values(done) == {k: v for k, v in held.items() if k not in (broken, word)} | {word: None}
    quarantined = _quarantined(done)
    assert [q["text"] for q in quarantined.values()] == [
        delimiter.join(["I", str(broken), str(broken), "broken"]),
        "line",
    ]
    assert done.ledger()["balanced"]


# --- a change table as a bulk-copy export writes it ---------------------------------------------------

#: The change table of an invented parcel-locker operator, named the way some databases name their
#: change tables' columns, as a bulk-copy export writes it: no header, fields separated by ``|~|``,
#: CRLF line ends, binary log positions as hex digits without ``0x``, times as ``YYYY-MM-DD
#: hh:mm:ss.fff`` (from memory), an empty text as one NUL character and NULL as nothing.
BCP_MAPPING = """\
table: lockers.deliveries
files: ["deliveries-*.dat"]
format: csv
key: [delivery_id]
csv:
  escapes: none
  delimiter: "|~|"
  empty: "\\0"
  header: false
  columns: ["__$start_lsn", "__$seqval", "__$operation", "__$update_mask", "__$commit_time", delivery_id, note, fee]
unused: ["__$update_mask"]
change:
  action: {column: "__$operation", codes: {"1": delete, "2": insert, "3": before, "4": after}}
  position: {column: "__$start_lsn", kind: hex, width: 20}
  sequence: {column: "__$seqval", kind: hex}
  committed_at: {column: "__$commit_time"}
  updates: paired
fields:
  delivery_id: integer
  note: text
  fee: decimal(12,2)
"""

BCP_ROWS = [
    # lsn, seqval, operation, update mask, commit time, delivery_id, note, fee
    (
        "0000002A000001F00003",
        "0000002A000001F00002",
        "2",
        "07",
        "2026-03-01 07:59:00.000",
        "1",
        '"Leave at door"',
        "4.50",
    ),
    (
        "0000002A000001F00003",
        "0000002A000001F00004",
        "2",
        "07",
        "2026-03-01 07:59:00.000",
        "2",
        "C:\\lockers\\",
        "3.00",
    ),
    (
        "0000002B000000100002",
        "0000002B000000100002",
        "3",
        "02",
        "2026-03-01 08:10:00.000",
        "1",
        '"Leave at door"',
        "4.50",
    ),
    ("0000002B000000100002", "0000002B000000100002", "4", "02", "2026-03-01 08:10:00.000", "1", "\0", "4.50"),
    ("0000002C000000080001", "0000002C000000080001", "1", "07", "2026-03-01 09:00:00.000", "2", "", "3.00"),
]


def test_a_change_table_written_by_a_bulk_copy_export_converts_to_its_events(convert: ConvertFn) -> None:
    text = "".join("|~|".join(row) + "\r\n" for row in BCP_ROWS)
    done = convert(BCP_MAPPING, {"deliveries-0001.dat": text})
    events = done.events("lockers.deliveries")
    assert [(e["action"], e["key"]["delivery_id"]) for e in events] == [
        ("upsert", 1),
        ("upsert", 2),
        ("upsert", 1),
        ("delete", 2),
    ]
    assert [e["values"]["note"] for e in events[:3]] == ['"Leave at door"', "C:\\lockers\\", ""]
    assert events[2]["changed"] == ["note"]  # the before-image's quotes against the empty text
    assert events[3]["prior"]["note"] is None  # NULL: an empty field
    assert events[0]["committed_at"] == "2026-03-01T07:59:00Z"
    assert done.ledger()["balanced"] and not done.quarantine("lockers.deliveries")


@pytest.mark.parametrize(
    ("header", "said"),
    [
        ("op|~|pos|~|id|~|a", 'set csv.escapes: none and csv.delimiter: "|~|" in the mapping'),
        ("op;pos;id;a", "the file seems to use ';' between fields: set csv.delimiter"),
        ("op\tpos\tid\ta", "tab-separated text that quotes and escapes nothing: csv.escapes: none"),
    ],
    ids=["bulk-copy", "semicolon", "tab"],
)
def test_a_header_read_as_one_column_names_the_separator_it_seems_to_use(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], header: str, said: str
) -> None:
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "notes.yaml").write_text(NOTES.replace("a: TYPE", "a: text"))
    sep = header[2 : header.index("pos")]
    (tmp_path / "n.csv").write_text(header + "\n" + sep.join(["I", "1", "1", "x"]) + "\n")
    out = str(tmp_path / "o")
    assert cli("convert", "--mappings", str(tmp_path / "m"), str(tmp_path / "n.csv"), "--out", out) == 4
    assert said in capsys.readouterr().err


def test_a_null_mark_in_plain_text_is_kept_as_text_with_a_note_naming_nulls(convert: ConvertFn) -> None:
    # Hive's text tables write \N for NULL in plain text, \x01 between fields (common practice)
    text = "I\x011\x011\x01\\N\nI\x012\x012\x01x\n"
    done = convert(_mapping(', delimiter: "\\x01"' + HEADERLESS), {"n.csv": text})
    assert _values(done) == {1: "\\N", 2: "x"}
    (note,) = [n["note"] for n in last_run(done.out)["notes"]]
    assert (
        note.startswith("1 row holds \\N in text field a, kept as that text") and 'add "\\N" to nulls' in note
    )
    again = convert(_mapping(', delimiter: "\\x01"' + HEADERLESS, 'nulls: ["", "\\\\N"]\n'), {"n.csv": text})
    assert _values(again) == {1: None, 2: "x"} and not last_run(again.out)["notes"]


@pytest.mark.parametrize("delimiter", ["\t", "|~|"])
def test_trailing_null_cells_beyond_the_columns_are_malformed_not_dropped(
    convert: ConvertFn, delimiter: str
) -> None:
    # the engine's reader drops trailing cells beyond the columns where they are null tokens
    text = "op\tpos\tid\ta\nI\t1\t1\tx\t\nI\t2\t2\tx\tNULL\nI\t3\t3\t\nI\t4\t4\tx\t\tNULL\nI\t5\t5\ty\n"
    text = text.replace("\t", delimiter)
    options = "" if delimiter == "\t" else ', delimiter: "|~|"'
    done = convert(_mapping(options, 'nulls: ["", "NULL"]\n'), {"n.tsv": text})
    # Python's csv module with QUOTE_NONE as the reference of the cells of each line
    rows = [line.split(delimiter) for line in text.splitlines()[1:]]
    if delimiter == "\t":
        assert rows == list(csv.reader(io.StringIO(text), delimiter="\t", quoting=csv.QUOTE_NONE))[1:]
    assert _values(done) == {int(r[2]): r[3] or None for r in rows if len(r) == 4} == {3: None, 5: "y"}
    assert {row: q["reasons"][0]["reason"] for row, q in _quarantined(done).items()} == {
        i + 1: f"expected 4 fields, found {len(r)}" for i, r in enumerate(rows) if len(r) != 4
    }
    assert done.ledger()["balanced"]


@pytest.mark.parametrize("delimiter", ["\t", "|~|", "||"])
def test_the_cells_of_records_ending_in_a_null_token_are_counted_wherever_the_blocks_cut(
    delimiter: str,
) -> None:
    # a record that ends with the delimiter (an empty last cell) has as many cells as delimiters
    # plus one, as str.split finds them (left to right, no overlaps); too many of them, and the file
    # is not the engine reader's to read
    lines = ["I", "1", "1", "a"], ["I", "2", "2", ""], ["I", "3", "3", "b"]
    good = "".join(delimiter.join(r) + "\n" for r in lines).encode()
    bad = good + delimiter.join(["I", "4", "4", "c", ""]).encode() + b"\n" + good
    how = Counting(None, None, False, True).with_nulls(4, delimiter.encode(), (b"",))
    for data, readable in ((good, True), (bad, False)):
        whole = count_blocks([data], False, how)
        assert whole.readable is readable
        for cut in range(1, len(data)):
            assert count_blocks([data[:cut], data[cut:]], False, how) == whole
    assert [len(line.split(delimiter)) for line in bad.decode().splitlines()].count(5) == 1
