"""CSV files as MySQL and MariaDB write them with ``SELECT ... INTO OUTFILE ... ENCLOSED BY``
(``csv.escapes: backslash`` with a ``csv.quote``): fields may be quoted, a backslash escapes inside
and outside quotes, ``\\N`` is NULL.

The oracle is a real MariaDB server: it writes the dumps with ``SELECT ... INTO OUTFILE`` and reads
hand-made files with ``LOAD DATA INFILE``, and cdcnorm must read the values the server holds. The
offline tests hold the values the server gave (MariaDB 10.11, checked again by the server tests)."""

from __future__ import annotations

import json
import random
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from cdcnorm.readers.count import Counting, count_blocks
from cdcnorm.readers.forms import decode_enclosed, split_enclosed
from tests.conftest import ConvertFn, MySQL, cli, last_run
from tests.test_bad_input import NOTES


def _mapping(csv: str) -> str:
    """The notes table, its dumps headerless (as OUTFILE writes them) in the enclosed form ``csv``."""
    options = f"csv: {{escapes: backslash, {csv}header: false, columns: [op, pos, id, a]}}"
    return NOTES.replace("a: TYPE", "a: text").replace("key: [id]\n", f"key: [id]\n{options}\n")


MAPPING = _mapping('quote: "\\"", delimiter: ",", ')
#: How the record count reads that form: quoted by ", a backslash escaping in and out of quotes.
ENCLOSED_COUNT = Counting('"', ",")

#: Cells of a hand-made file and what MariaDB's ``LOAD DATA INFILE ... FIELDS TERMINATED BY ','
#: OPTIONALLY ENCLOSED BY '"' ESCAPED BY '\\'`` reads them as (MariaDB 10.11; the server test
#: ``test_load_data_reads_hand_made_cells_as_cdcnorm_does`` checks each again). None is NULL.
LOAD_DATA = [
    ("plain", "plain"),
    ('"quoted"', "quoted"),
    ('""', ""),  # an empty text
    ("", ""),  # an unquoted empty field is an empty text too
    ("\\N", None),
    ('"\\N"', None),  # quoted or not
    ("NULL", None),  # the unquoted word, with ENCLOSED BY
    ('"NULL"', "NULL"),
    ('"\\\\N"', "\\N"),  # an escaped backslash and N
    ('"a\\Nb"', "aNb"),
    ('"\\0\\b\\n\\r\\t\\Z"', "\x00\b\n\r\t\x1a"),
    ('"\\x\\f\\v\\%\\_"', "xfv%_"),  # any other character after a backslash is itself
    ('"a""b"', 'a"b'),  # a doubled quote in quotes is one
    ('"O\\"Brien"', 'O"Brien'),
    ('"p,q"', "p,q"),
    ("a\\,b", "a,b"),  # outside quotes a backslash escapes too
    ("ab\\ncd", "ab\ncd"),
    ('"line1\\\nline2"', "line1\nline2"),  # an escaped line break, as OUTFILE writes one
    ('"raw\nbreak"', "raw\nbreak"),  # a line break in quotes
    ('"naïve 😀"', "naïve 😀"),
]


def _load_data_file(cells: list[str]) -> str:
    return "".join(f"I,{i + 1},{i + 1},{c}\n" for i, c in enumerate(cells))


def _values(done: Any, table: str = "t.notes") -> dict[int, object]:
    return {e["key"]["id"]: e["values"]["a"] for e in done.events(table)}


def _careful_files(done: Any) -> set[str]:
    return {n["file"] for n in last_run(done.out)["notes"] if n["note"].startswith("read record by record")}


def test_enclosed_cells_read_as_load_data_reads_them(convert: ConvertFn) -> None:
    done = convert(MAPPING, {"n.csv": _load_data_file([c for c, _ in LOAD_DATA])})
    assert _values(done) == {i + 1: v for i, (_, v) in enumerate(LOAD_DATA)}
    assert done.ledger()["balanced"] and not done.quarantine("t.notes")
    assert _careful_files(done) == {"n.csv"}  # \0, \n, quoted \N: the engine's reader cannot decode them


def test_a_file_the_engine_reads_gives_the_same_values_as_one_read_record_by_record(
    convert: ConvertFn,
) -> None:
    # only what the engine's reader decodes itself: escaped quotes and backslashes, escaped and raw
    # line breaks in quotes, \N and NULL unquoted
    tame = [
        (c, v)
        for c, v in LOAD_DATA
        if c
        in ("plain", '""', "", "\\N", "NULL", '"NULL"', '"O\\"Brien"', '"p,q"', '"raw\nbreak"', '"naïve 😀"')
        or c == '"line1\\\nline2"'
    ]
    cells = [c for c, _ in tame] + ['"back\\\\slash"', "\\N"]
    fast = convert(MAPPING, {"n.csv": _load_data_file(cells)})
    careful = convert(MAPPING, {"n.csv": _load_data_file(cells) + "I,99,99,\\Z\n"})  # \Z: record by record
    assert _careful_files(fast) == set() and _careful_files(careful) == {"n.csv"}
    expected = {i + 1: v for i, (_, v) in enumerate(tame)} | {
        len(tame) + 1: "back\\slash",
        len(tame) + 2: None,
    }
    assert _values(fast) == expected
    assert _values(careful) == expected | {99: "\x1a"}


def test_broken_quoting_is_quarantined_and_reading_resumes_at_the_next_line(convert: ConvertFn) -> None:
    text = 'I,1,1,"ok"\nI,2,2,"unterminated\nI,3,3,"x"y"\nI,4,4,"fine \\" quote"\nI,5,5,a,b\n'
    done = convert(MAPPING, {"n.csv": text})
    assert _values(done) == {1: "ok", 4: 'fine " quote'}
    quarantined = {q["_cdcnorm"]["row"]: q["_cdcnorm"] for q in done.quarantine("t.notes")}
    assert sorted(quarantined) == [2, 3, 4 + 1]
    assert quarantined[2]["text"] == 'I,2,2,"unterminated'
    assert quarantined[5]["reasons"][0]["reason"] == "expected 4 fields, found 5"
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 5 and ledger["total"]["quarantined"] == 3


def test_a_header_row_is_decoded_too(convert: ConvertFn) -> None:
    mapping = MAPPING.replace("header: false, columns: [op, pos, id, a]", "header: true")
    done = convert(
        mapping.replace("  a: text", '  "a\\"b": text'), {"n.csv": '"op","pos","id","a\\"b"\nI,1,1,x\n'}
    )
    assert [e["values"]['a"b'] for e in done.events("t.notes")] == ["x"]


def test_many_small_enclosed_files_read_together_with_their_nulls(convert: ConvertFn) -> None:
    files: dict[str, str | bytes] = {f"n{i:03d}.csv": f'I,{i + 1},{i + 1},"v{i}\\""\n' for i in range(30)}
    files |= {f"n{i:03d}.csv": f"I,{i + 1},{i + 1},\\N\n" for i in range(30, 40)}
    files["n999.csv"] = 'I,500,500,"tab\\t"\n'  # read record by record
    done = convert(MAPPING, files)
    expected: dict[int, object] = {i + 1: f'v{i}"' for i in range(30)} | {i + 1: None for i in range(30, 40)}
    assert _values(done) == expected | {500: "tab\t"}
    assert done.ledger()["balanced"] and _careful_files(done) == {"n999.csv"}


# --- the record count's check, which decides whether the engine's reader may read a file ----------


@pytest.mark.parametrize(
    ("text", "plain"),
    [
        (
            'I,1,1,"a\\"b\\\\c"\n',
            True,
        ),  # escaped quote and backslash in quotes: the reader drops the backslash
        ("I,1,1,\\N\n\\N,2,2,x\n", True),  # whole \N cells, at a line's end and start
        ('I,1,1,"a\\0b"\n', False),  # \0 is a NUL: the reader would read 0
        ('I,1,1,"\\N"\n', False),  # NULL in quotes: the reader would read N
        ('I,1,1,"\\\\N"\n', False),  # the text \N: the reader would read \N, which stands for NULL
        ("I,1,1,ab\\\\cd\n", False),  # a backslash outside quotes: the reader keeps it
        ("I,1,1,\\Nx\n", False),  # \N and more is N and more
        ('I,1,1,"a\\\nb"\n', True),  # an escaped line break in quotes
        ("I,1,1,a\\\nb\n", False),  # an escaped line break outside quotes
    ],
)
def test_the_record_count_says_which_files_the_engine_reads_exactly(text: str, plain: bool) -> None:
    data = text.encode()
    whole = count_blocks([data], False, ENCLOSED_COUNT)
    assert whole[1] is plain
    for cut in range(1, len(data)):  # however the file's blocks fall
        assert count_blocks([data[:cut], data[cut:]], False, ENCLOSED_COUNT) == whole


def _outfile(value: str | None) -> str:
    """A value as SELECT ... INTO OUTFILE ... ENCLOSED BY '"' writes it (MySQL's documentation,
    SELECT ... INTO, from memory; the server test below checks what MariaDB writes): NULL as \\N; a
    backslash, the quote and a NUL escaped (NUL as \\0), and a line break, the first character of the
    line terminator, escaped as a backslash and itself."""
    if value is None:
        return "\\N"
    body = value.replace("\\", "\\\\").replace('"', '\\"').replace("\x00", "\\0").replace("\n", "\\\n")
    return f'"{body}"'


ALPHABET = st.sampled_from(['"', "\\", ",", "\n", "\r", "\t", "\x00", "N", "0", "a", "é", "😀", " "])


@settings(max_examples=300, deadline=None)
@given(st.lists(st.one_of(st.none(), st.text(ALPHABET, max_size=6)), min_size=1, max_size=8), st.data())
def test_outfile_text_splits_and_decodes_back_to_its_values_however_its_blocks_fall(
    values: list[str | None], data: st.DataObject
) -> None:
    text = _load_data_file([_outfile(v) for v in values])
    lines = text.encode()
    cuts = sorted(data.draw(st.lists(st.integers(0, len(lines)), max_size=4)))
    blocks = [lines[a:b] for a, b in zip([0, *cuts], [*cuts, len(lines)], strict=True)]
    count = count_blocks(blocks, False, ENCLOSED_COUNT).records
    assert count == len(values)
    assert count_blocks(blocks, False, ENCLOSED_COUNT) == count_blocks([lines], False, ENCLOSED_COUNT)
    records = [f"I,{i + 1},{i + 1},{_outfile(v)}" for i, v in enumerate(values)]
    decoded = [decode_enclosed(split_enclosed(r, ",", '"')[3], '"', {"NULL"}) for r in records]  # type: ignore[index]
    assert decoded == values


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.one_of(st.none(), st.text(ALPHABET, max_size=6)), min_size=1, max_size=8))
def test_convert_reads_outfile_values_back(convert: ConvertFn, values: list[str | None]) -> None:
    done = convert(MAPPING, {"n.csv": _load_data_file([_outfile(v) for v in values])})
    assert _values(done) == {i + 1: v for i, v in enumerate(values)}
    assert done.ledger()["balanced"]


# --- the server as the oracle -------------------------------------------------------------------

#: Characters the server's dumps are drawn from: every one OUTFILE escapes or quotes, control
#: characters, and text outside ASCII.
SERVER_ALPHABET = [
    '"',
    "'",
    "\\",
    ",",
    "|",
    "\t",
    "\n",
    "\r",
    "\x00",
    "\x1a",
    "\b",
    "N",
    "0",
    "a",
    "é",
    "😀",
    " ",
]

#: (FIELDS and LINES options of SELECT ... INTO OUTFILE, the mapping's csv options for them)
FORMS = [
    ("FIELDS TERMINATED BY ',' OPTIONALLY ENCLOSED BY '\"'", 'quote: "\\"", delimiter: ",", '),
    ("FIELDS TERMINATED BY ',' ENCLOSED BY '\"'", 'quote: "\\"", delimiter: ",", '),
    (
        "FIELDS TERMINATED BY ',' OPTIONALLY ENCLOSED BY '\"' LINES TERMINATED BY '\\r\\n'",
        'quote: "\\"", delimiter: ",", ',
    ),
    ("FIELDS OPTIONALLY ENCLOSED BY '\"'", 'quote: "\\"", '),  # a tab between fields, the server's default
    ("FIELDS TERMINATED BY '|' ENCLOSED BY ''''", 'quote: "\'", delimiter: "|", '),
]


def _server_rows(rng: random.Random, n: int, tame: bool) -> list[str | None]:
    alphabet = [c for c in SERVER_ALPHABET if c not in "\\\x00\x1a\b"] if tame else SERVER_ALPHABET
    special = ["\\N", "NULL", "", "N", "\\", '"', "'"] if not tame else ["NULL", "", "N", '"']
    out: list[str | None] = []
    for i in range(n):
        if i % 9 == 0:
            out.append(None)
        elif i % 9 == 1:
            out.append(rng.choice(special))
        else:
            out.append("".join(rng.choice(alphabet) for _ in range(rng.randint(1, 12))))
    return out


@pytest.mark.parametrize(("options", "csv"), FORMS)
def test_outfile_dumps_read_as_the_server_holds_them(
    convert: ConvertFn, mysql: MySQL, options: str, csv: str
) -> None:
    rng = random.Random(options)
    cur = mysql.cursor
    cur.execute("CREATE TABLE notes (op CHAR(1), pos BIGINT, id INT, a TEXT CHARACTER SET utf8mb4)")
    wild = _server_rows(rng, 400, tame=False)
    tame = _server_rows(rng, 200, tame=True)
    rows = [("I", i + 1, i + 1, v) for i, v in enumerate(wild + tame)]
    cur.executemany("INSERT INTO notes VALUES (%s, %s, %s, %s)", rows)
    files: dict[str, str | bytes] = {}
    for name, where in (("n-wild.csv", f"id <= {len(wild)}"), ("n-tame.csv", f"id > {len(wild)}")):
        path = mysql.files / name
        cur.execute(
            f"SELECT op, pos, id, a FROM notes WHERE {where} ORDER BY id "
            f"INTO OUTFILE '{path}' CHARACTER SET utf8mb4 {options}"
        )
        files[name] = path.read_bytes()
    cur.execute("SELECT id, a FROM notes")
    held = dict(cur.fetchall())
    done = convert(_mapping(csv), files)
    assert _values(done) == held
    assert done.ledger()["balanced"] and not done.quarantine("t.notes")
    # the tame dump holds no escape the engine's reader cannot decode: it reads it itself
    assert _careful_files(done) == {"n-wild.csv"}


def test_load_data_reads_hand_made_cells_as_cdcnorm_does(convert: ConvertFn, mysql: MySQL) -> None:
    cur = mysql.cursor
    cur.execute("CREATE TABLE notes (op CHAR(1), pos BIGINT, id INT, a TEXT CHARACTER SET utf8mb4)")
    text = _load_data_file([c for c, _ in LOAD_DATA])
    path = mysql.files / "hand-made.csv"
    path.write_text(text, encoding="utf-8")
    path.chmod(0o644)
    cur.execute("SET sql_mode = ''")
    cur.execute(
        f"LOAD DATA INFILE '{path}' INTO TABLE notes CHARACTER SET utf8mb4 "
        "FIELDS TERMINATED BY ',' OPTIONALLY ENCLOSED BY '\"' ESCAPED BY '\\\\'"
    )
    cur.execute("SHOW WARNINGS")
    assert cur.fetchall() == ()
    cur.execute("SELECT id, a FROM notes")
    held = dict(cur.fetchall())
    assert held == {i + 1: v for i, (_, v) in enumerate(LOAD_DATA)}  # the table above is the server's
    done = convert(MAPPING, {"n.csv": text})
    assert _values(done) == held
    assert json.dumps(done.ledger()["total"]) and done.ledger()["balanced"]


#: Pieces of a quoted field's text, and of an unquoted field, as a hand-made file may hold them; those
#: the engine's reader decodes itself come more often, so that many files are read by it.
QUOTED_PIECES = st.sampled_from(
    ["\\\\", '\\"', "N", "a", ",", '""', "é"] * 3 + ["\\N", "\\0", "\\n", "\\t", "\\x"]
)
UNQUOTED = st.sampled_from(["\\N", "NULL", "", "a", "N", "0"] * 2 + ["\\\\", "\\,", "a\\Nb", "\\Nx"])


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    st.lists(
        st.one_of(UNQUOTED, st.lists(QUOTED_PIECES, max_size=4).map(lambda p: '"' + "".join(p) + '"')),
        min_size=1,
        max_size=10,
    )
)
@example(cells=["\\N", "\\\\"])  # a NULL beside an escaped backslash outside quotes
@example(cells=['"\\\\N"', "\\N"])  # the text \N beside a NULL
def test_the_engine_reads_a_file_only_where_it_reads_what_load_data_reads(
    convert: ConvertFn, cells: list[str]
) -> None:
    # whichever path reads the file (the engine's reader only where the record count finds it
    # plain), every field reads as decode_enclosed reads it, the table of LOAD DATA's reading above
    text = _load_data_file(cells)
    done = convert(MAPPING, {"n.csv": text})
    expected = {i + 1: decode_enclosed(c, '"', {"NULL"}) for i, c in enumerate(cells)}
    assert _values(done) == expected
    if not count_blocks([text.encode()], False, ENCLOSED_COUNT)[1]:
        assert _careful_files(done) == {"n.csv"}  # the engine's reader may reject a plain file too


def test_the_servers_default_outfile_reads_as_copy_text(convert: ConvertFn, mysql: MySQL) -> None:
    # SELECT ... INTO OUTFILE with no FIELDS options writes a tab between fields, quotes nothing and
    # escapes with a backslash: csv.escapes: backslash without a quote reads it, except a NUL, which
    # it writes as \0 and COPY's text format reads as an octal byte: such a record is quarantined
    rng = random.Random(7)
    cur = mysql.cursor
    cur.execute("CREATE TABLE notes (op CHAR(1), pos BIGINT, id INT, a TEXT CHARACTER SET utf8mb4)")
    values = _server_rows(rng, 300, tame=False)
    cur.executemany(
        "INSERT INTO notes VALUES (%s, %s, %s, %s)", [("I", i + 1, i + 1, v) for i, v in enumerate(values)]
    )
    path = mysql.files / "n.txt"
    cur.execute(f"SELECT op, pos, id, a FROM notes ORDER BY id INTO OUTFILE '{path}' CHARACTER SET utf8mb4")
    cur.execute("SELECT id, a FROM notes")
    held = dict(cur.fetchall())
    mapping = _mapping("").replace('files: ["n*"]', 'files: ["n*"]\nformat: csv')  # a .txt file
    done = convert(mapping, {"n.txt": path.read_bytes()})
    with_nul = {k for k, v in held.items() if v is not None and "\x00" in v}
    assert with_nul and len(with_nul) < len(held)
    assert _values(done) == {k: v for k, v in held.items() if k not in with_nul}
    assert {q["_cdcnorm"]["row"] for q in done.quarantine("t.notes")} == with_nul  # rows in id order
    assert done.ledger()["balanced"]


def test_typed_columns_of_an_outfile_dump_read_as_the_server_holds_them(
    convert: ConvertFn, mysql: MySQL
) -> None:
    # numbers and times as the server writes them (unquoted with OPTIONALLY ENCLOSED BY), typed by
    # the mapping: each value equal to what the server holds (psycopg's sibling, pymysql, reads it)
    from datetime import UTC, datetime
    from decimal import Decimal

    rng = random.Random(4180)
    cur = mysql.cursor
    cur.execute(
        "CREATE TABLE notes (op CHAR(1), pos BIGINT, id INT, amount DECIMAL(12,2), ratio DOUBLE, "
        "at DATETIME(6), flag TINYINT(1), note TEXT CHARACTER SET utf8mb4)"
    )
    rows = []
    for i in range(200):
        rows.append(
            (
                "I",
                i + 1,
                i + 1,
                None if i % 11 == 0 else Decimal(rng.randint(-(10**9), 10**9)) / 100,
                None if i % 13 == 0 else rng.choice([0.1, -2.5e-7, 1e300, 123456.789, 0.0, rng.random()]),
                None
                if i % 17 == 0
                else datetime(2026, 1, 1, tzinfo=None).replace(
                    microsecond=rng.randint(0, 999999), second=i % 60
                ),
                None if i % 19 == 0 else rng.randint(0, 1),
                rng.choice(["plain", 'say "hi"', "a,b", "line\nbreak", ""]),
            )
        )
    cur.executemany("INSERT INTO notes VALUES (%s, %s, %s, %s, %s, %s, %s, %s)", rows)
    path = mysql.files / "n.csv"
    cur.execute(
        f"SELECT * FROM notes ORDER BY id INTO OUTFILE '{path}' CHARACTER SET utf8mb4 "
        "FIELDS TERMINATED BY ',' OPTIONALLY ENCLOSED BY '\"'"
    )
    cur.execute("SELECT id, amount, ratio, at, flag, note FROM notes")
    held = {r[0]: r[1:] for r in cur.fetchall()}
    mapping = NOTES.replace(
        "key: [id]\n",
        "key: [id]\n" + 'csv: {escapes: backslash, quote: "\\"", delimiter: ",", '
        "header: false, columns: [op, pos, id, amount, ratio, at, flag, note]}\n",
    ).replace(
        "  a: TYPE",
        "  amount: decimal(12,2)\n  ratio: float\n  at: timestamp\n  flag: boolean\n  note: text",
    )
    done = convert(mapping, {"n.csv": path.read_bytes()})
    assert done.ledger()["balanced"] and not done.quarantine("t.notes")
    events = {e["key"]["id"]: e["values"] for e in done.events("t.notes")}
    assert len(events) == len(held) == 200
    for key, (amount, ratio, at, flag, note) in held.items():
        v = events[key]
        assert v["amount"] == (None if amount is None else f"{amount:.2f}")
        assert v["ratio"] == ratio  # the same double (RFC 8259 numbers, Python's float)
        got = None if v["at"] is None else datetime.fromisoformat(v["at"].replace("Z", "+00:00"))
        assert got == (None if at is None else at.replace(tzinfo=UTC))  # a DATETIME read as UTC
        assert v["flag"] == (None if flag is None else bool(flag))
        assert v["note"] == note


def test_a_database_dump_read_as_rfc_4180_is_told_what_it_may_be(
    convert: ConvertFn, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: the \N of a NULL became the text \N without a word, and an escaped quote was
    # "broken quoting" with no hint of why
    plain = NOTES.replace("a: TYPE", "a: text")
    text = 'op,pos,id,a\n"I",1,1,"O\\"Brien, Pat"\n"I",2,2,\\N\n"I",3,3,"plain"\n'
    done = convert(plain, {"n.csv": text})
    assert _values(done) == {2: "\\N", 3: "plain"}  # read as RFC 4180 reads it: nothing changed
    (q,) = done.quarantine("t.notes")
    assert (
        "a backslash before a quote, as MySQL's INTO OUTFILE escapes one"
        in q["_cdcnorm"]["reasons"][0]["reason"]
    )
    notes = [n["note"] for n in last_run(done.out)["notes"]]
    assert any(n.startswith("1 row holds \\N in text field a, kept as that text") for n in notes), notes
    # a tab-separated dump read with the default delimiter: the hint names the text format
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(plain)
    (tmp_path / "n.csv").write_text("op\tpos\tid\ta\nI\t1\t1\tx\n")
    assert (
        cli(
            "convert",
            str(tmp_path / "n.csv"),
            "--mappings",
            str(tmp_path / "m"),
            "--out",
            str(tmp_path / "o"),
        )
        == 4
    )
    assert "csv.escapes: backslash, whose delimiter is a tab" in capsys.readouterr().err


def test_a_trailing_null_word_beyond_the_columns_is_malformed_not_dropped(convert: ConvertFn) -> None:
    # the engine's reader drops trailing cells beyond the columns where they are its null token
    # (the word NULL here); LOAD DATA warns that such a row held more data than there were input
    # columns (MariaDB's warning 1262, from memory)
    done = convert(MAPPING, {"n.csv": 'I,1,1,"x",NULL\nI,2,2,NULL\nI,3,3,x,NULL,NULL\nI,4,4,"y"\n'})
    assert _values(done) == {2: None, 4: "y"}
    quarantined = {q["_cdcnorm"]["row"]: q["_cdcnorm"] for q in done.quarantine("t.notes")}
    assert {row: q["reasons"][0]["reason"] for row, q in quarantined.items()} == {
        1: "expected 4 fields, found 5",
        3: "expected 4 fields, found 6",
    }
    assert quarantined[1]["text"] == 'I,1,1,"x",NULL' and done.ledger()["balanced"]
