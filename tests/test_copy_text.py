"""CSV files in PostgreSQL's COPY text format (``csv.escapes: backslash``): nothing quoted, a
backslash escapes the character after it, ``\\N`` alone is NULL.

The escapes are those of PostgreSQL's documentation (COPY, "File Formats", "Text Format"); the
oracle is a real PostgreSQL server that writes the dump with COPY ... TO STDOUT and reads the
values back through psycopg; the same test reads its CSV format (RFC 4180) too."""

from __future__ import annotations

import json
import random
from datetime import datetime
from decimal import Decimal
from pathlib import Path
from typing import Any

import pytest

from cdcnorm.readers.count import Counting, count_blocks
from cdcnorm.readers.forms import split_escaped, unescape
from tests.conftest import ConvertFn, cli, last_run
from tests.test_bad_input import NOTES

MAPPING = NOTES.replace("a: TYPE", "a: text").replace("key: [id]\n", "key: [id]\ncsv: {escapes: backslash}\n")

#: Each cell as COPY's text format writes it, and the value it stands for (PostgreSQL's
#: documentation, COPY, "Text Format": \b \f \n \r \t \v, a backslash before any other character
#: is that character, \N alone is NULL and only alone).
CELLS = [
    ("plain", "plain"),
    ("", ""),  # an empty text, not NULL
    ("\\N", None),
    ("\\\\N", "\\N"),  # the two characters backslash and N
    ("a\\Nb", "aNb"),  # \N inside a cell is N
    ("x\\\\y", "x\\y"),
    ("tab\\there", "tab\there"),
    ("line1\\nline2\\r\\nend", "line1\nline2\r\nend"),
    ("\\b\\f\\v", "\b\f\v"),
    ('"quoted", not special', '"quoted", not special'),
    ("ends in a backslash\\\\", "ends in a backslash\\"),
    ("\\q\\,\\é", "q,é"),  # any other character after a backslash is itself
    ("naïve 😀 café", "naïve 😀 café"),
    ("\x01raw control", "\x01raw control"),  # COPY writes other control characters as they are
]


def _dump(cells: list[str], delimiter: str = "\t", header: bool = True) -> str:
    lines = [delimiter.join(["op", "pos", "id", "a"])] if header else []
    lines += [delimiter.join(["I", str(i + 1), str(i + 1), c]) for i, c in enumerate(cells)]
    return "\n".join(lines) + "\n"


def test_copy_text_cells_decode_as_postgresql_documents(convert: ConvertFn) -> None:
    done = convert(MAPPING, {"n.csv": _dump([c for c, _ in CELLS])})
    values = {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")}
    assert values == {i + 1: v for i, (_, v) in enumerate(CELLS)}
    assert done.ledger()["balanced"] and not done.quarantine("t.notes")
    # the reader's own decoding of a header agrees with the engine's decoding of the cells
    assert [unescape(c) for c, _ in CELLS if c != "\\N"] == [v for c, v in CELLS if c != "\\N"]


def test_cells_copy_does_not_write_are_quarantined_with_their_record(convert: ConvertFn) -> None:
    # octal and hex sequences name bytes (COPY FROM reads them, COPY TO never writes them; \0, a NUL,
    # is no text PostgreSQL holds); a lone backslash ends the last cell of a file with no line end
    cells = ["ok", "bad\\101", "bad\\x41", "\\\\101 fine", "nul\\0", "tail\\"]
    done = convert(MAPPING, {"n.csv": _dump(cells).removesuffix("\n")})
    values = {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")}
    assert values == {1: "ok", 4: "\\101 fine"}
    quarantined = {q["_cdcnorm"]["row"]: q["_cdcnorm"] for q in done.quarantine("t.notes")}
    assert sorted(quarantined) == [2, 3, 5, 6]
    assert quarantined[2]["text"] == "I\t2\t2\tbad\\101"
    assert quarantined[6]["text"] == "I\t6\t6\ttail\\"
    assert all(
        q["reasons"][0]["reason"].startswith("column a: a backslash sequence that names a byte")
        for q in quarantined.values()
    )
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 6 and ledger["total"]["quarantined"] == 4


def test_an_escaped_delimiter_is_read_record_by_record_with_the_same_values(convert: ConvertFn) -> None:
    # COPY writes the delimiter inside a cell as a backslash and the delimiter (a tab as \t): the
    # engine's reader would split there, so the file is read record by record, to the same values
    pipe = MAPPING.replace("csv: {escapes: backslash}", 'csv: {escapes: backslash, delimiter: "|"}')
    cells = [c.replace("\\,", "\\|") for c, _ in CELLS] + ["a\\|b\\\\|c"]  # the last: 5 fields
    done = convert(pipe, {"n.csv": _dump(cells, "|")})
    values = {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")}
    expected = {i + 1: "q|é" if c == "\\q\\,\\é" else v for i, (c, v) in enumerate(CELLS)}
    assert values == expected
    (q,) = done.quarantine("t.notes")
    assert (
        q["_cdcnorm"]["row"] == len(cells)
        and q["_cdcnorm"]["reasons"][0]["reason"] == "expected 4 fields, found 5"
    )
    assert split_escaped("a\\|b\\\\|c", "|") == ["a\\|b\\\\", "c"]


def test_the_end_of_data_marker_is_no_record(convert: ConvertFn) -> None:
    n2 = "op\tpos\tid\ta\nI\t7\t7\tx\n\\.\nI\t9\t9\tz\n"  # a marker with a record after it
    done = convert(MAPPING, {"n1.csv": _dump(["x", "y"]) + "\\.\n", "n2.csv": n2})
    assert sorted(e["key"]["id"] for e in done.events("t.notes")) == [1, 2, 7, 9]
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["text"] == "\\." and "end-of-data marker" in q["_cdcnorm"]["reasons"][0]["reason"]
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 5  # the last line's marker is not read
    notes = [n["note"] for n in last_run(done.out)["notes"] if n["file"] == "n1.csv"]
    assert "its last line, \\., is COPY's end-of-data marker: not a record" in notes, notes


def test_many_small_copy_text_files_read_together(convert: ConvertFn) -> None:
    files: dict[str, str | bytes] = {
        f"n{i:03d}.csv": f"op\tpos\tid\ta\nI\t{i + 1}\t{i + 1}\tv{i}\\tx\\\\\n" for i in range(40)
    }
    files["n999.csv"] = "op\tpos\tid\ta\nI\t500\t500\tbad\\0\n"
    done = convert(MAPPING, files)
    values = {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")}
    assert values == {i + 1: f"v{i}\tx\\" for i in range(40)}
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["file"] == "n999.csv" and q["_cdcnorm"]["row"] == 1
    assert done.ledger()["balanced"]


def test_a_backslash_before_a_line_break_or_a_tab_makes_it_data(convert: ConvertFn) -> None:
    # a dump that escapes its delimiter and line breaks with a backslash and the character itself
    # (as MySQL's SELECT ... INTO OUTFILE writes them: from memory); PostgreSQL's COPY FROM reads a
    # backslash and a line break as that line break (its documentation, COPY, "Text Format"; the
    # PostgreSQL test below checks it against the server)
    B = "\\"
    text = (
        "op\tpos\tid\ta\n"
        f"I\t1\t1\tline1{B}\nline2{B}\nline3\n"  # one record over three lines
        f"I\t2\t2\tx{B}\ty\n"  # an escaped tab
        f"I\t3\t3\tplain\n"
        f"I\t4\t4\tcr{B}\r\n"  # escapes the CR of a CRLF: the LF ends the record
        f"I\t5\t5\tends in{B}{B}\n"  # an escaped backslash, then the record's end
        f"I\t6\t6\tlast{B}\n"  # the file ends inside the record: its line break is data
    )
    done = convert(MAPPING, {"n.csv": text})
    events = {e["key"]["id"]: e for e in done.events("t.notes")}
    values = {k: e["values"]["a"] for k, e in events.items()}
    assert values == {
        1: "line1\nline2\nline3",
        2: "x\ty",
        3: "plain",
        4: "cr\r",
        5: "ends in\\",
        6: "last\n",
    }
    assert {k: e["origin"]["row"] for k, e in events.items()} == {
        k: k for k in range(1, 7)
    }  # records, not lines
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 6


def test_an_escaped_line_break_joins_what_looks_like_two_records(convert: ConvertFn) -> None:
    # each line alone has the right field count, so only the independent count of records (a line
    # break after an odd run of backslashes ends none) sends the file to the record-by-record path:
    # the one record has 7 fields, as PostgreSQL's COPY FROM would say too ("extra data")
    done = convert(MAPPING, {"n.csv": "op\tpos\tid\ta\nI\t1\t1\tx\\\nI\t2\t2\ty\nI\t3\t3\tz\n"})
    assert [e["key"]["id"] for e in done.events("t.notes")] == [3]
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["text"] == "I\t1\t1\tx\\\nI\t2\t2\ty"
    assert q["_cdcnorm"]["reasons"][0]["reason"] == "expected 4 fields, found 7"
    assert q["_cdcnorm"]["row"] == 1 and done.ledger()["total"]["read"] == 2


@pytest.mark.parametrize(
    ("blocks", "escaped"),
    [
        ([b"I\t1\\\\\n"], False),  # an escaped backslash, then the record's end
        ([b"I\t1\\\n2\n"], True),
        ([b"I\t1\\", b"\nx\n"], True),  # across blocks
        ([b"I\t1\\", b"\\\nx\n"], False),
        ([b"\\" * 3, b"\\\n"], False),  # four backslashes, two blocks
        ([b"\\" * 3, b"\n"], True),
        ([b"x\\\r\n"], True),  # escapes the CR
    ],
)
def test_the_record_count_sees_escaped_line_breaks(blocks: list[bytes], escaped: bool) -> None:
    assert count_blocks(blocks, False, Counting(None))[1] is not escaped


@pytest.mark.parametrize(
    ("csv_options", "said"),
    [
        ('{escapes: backslash, quote: "\\\\"}', "csv.quote cannot be a backslash"),
        ('{escapes: backslash, quote: "|", delimiter: "|"}', "csv.delimiter and csv.quote are both '|'"),
        ('{escapes: backslash, delimiter: "\\\\"}', "csv.delimiter cannot be a backslash"),
        ("{escapes: backslashes}", "escapes"),
    ],
)
def test_copy_text_options_are_checked(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], csv_options: str, said: str
) -> None:
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(MAPPING.replace("{escapes: backslash}", csv_options))
    (tmp_path / "n.csv").write_text(_dump(["x"]))
    code = cli("convert", str(tmp_path / "n.csv"), "--mappings", str(mdir), "--out", str(tmp_path / "o"))
    err = capsys.readouterr().err
    assert code != 0 and said in err and "Traceback" not in err, err


# --- PostgreSQL as the oracle ----------------------------------------------------------------

PG_MAPPING = """
table: shop.notes
files: ["notes*"]
key: [id]
csv: {escapes: backslash%s}
change:
  action: {column: op, codes: {I: insert, U: after, D: delete}}
  position: {column: lsn, kind: hex-pair}
  sequence: {column: seq, kind: integer}
  updates: after-only
fields:
  id: integer
  note: text
  amount: decimal(12,2)
  at: timestamp
"""

#: Characters a cell is drawn from: every one COPY escapes, the delimiters tried, quotes, other
#: control characters (written as they are), letters that follow a backslash in an escape, and
#: text beyond ASCII. PostgreSQL's text cannot hold NUL.
ALPHABET = [
    "\t",
    "\n",
    "\r",
    "\\",
    "|",
    ",",
    '"',
    "'",
    "\x01",
    "\b",
    "\f",
    "\v",
    "N",
    "x",
    "0",
    "7",
    "é",
    "😀",
    " ",
    "a",
]


def _pg_rows(rng: random.Random, n: int) -> list[tuple[Any, ...]]:
    rows: list[tuple[Any, ...]] = []
    specials = ["\\N", "", None, "\\", "\\.", "\\\\N", "a\tb", "end\\"]
    for i in range(n):
        note = specials[i] if i < len(specials) else "".join(rng.choices(ALPHABET, k=rng.randint(0, 12)))
        amount = None if i % 7 == 3 else Decimal(rng.randint(-(10**8), 10**8)) / 100
        rows.append((f"{i // 50:X}/{(i * 977) % 2**32:X}", i % 3, i + 1, note, amount))
    return rows


@pytest.mark.parametrize(
    ("fmt", "delimiter", "header"),
    [
        ("text", "\t", False),
        ("text", "|", False),
        ("text", ",", True),
        # COPY's CSV format, read as RFC 4180: NULL an unquoted empty field, an empty text ""
        ("csv", ",", True),
        ("csv", "|", False),
        ("csv, FORCE_QUOTE *", ",", True),  # every value quoted but NULL
    ],
    ids=["tab", "pipe", "comma-header", "csv-header", "csv-pipe", "csv-force-quote"],
)
def test_postgresql_copy_dump_reads_to_the_values_postgresql_holds(
    pg_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str], fmt: str, delimiter: str, header: bool
) -> None:
    import psycopg

    rng = random.Random(9562)
    with psycopg.connect(pg_url) as conn:
        if header and conn.info.server_version < 150000:
            pytest.skip("COPY's text format writes a header from PostgreSQL 15 on")
        conn.execute(
            "CREATE TABLE changes (lsn pg_lsn, seq integer, op text, id integer, note text, "
            "amount numeric(12,2), at timestamptz)"
        )
        with conn.cursor() as cur:
            cur.executemany(
                "INSERT INTO changes VALUES (%s, %s, 'I', %s, %s, %s, "
                "timestamptz '2026-03-01 08:00:00+00' + make_interval(secs => %s))",
                [
                    (lsn, seq, id_, note, amount, id_ * 0.25)
                    for lsn, seq, id_, note, amount in _pg_rows(rng, 400)
                ],
            )
            options = f"FORMAT {fmt}, DELIMITER {_pg_literal(delimiter)}" + (
                ", HEADER true" if header else ""
            )
            dump = bytearray()
            with cur.copy(f"COPY (SELECT * FROM changes ORDER BY id) TO STDOUT ({options})") as copy:
                for block in copy:
                    dump += bytes(block)
            cur.execute("SELECT id, note, amount, at FROM changes")
            held = {r[0]: r[1:] for r in cur.fetchall()}
    (tmp_path / "notes.csv").write_bytes(bytes(dump))
    (mdir := tmp_path / "m").mkdir()
    extra = f", delimiter: {json.dumps(delimiter)}"
    if not header:
        extra += ", header: false, columns: [lsn, seq, op, id, note, amount, at]"
    mapping = PG_MAPPING % extra
    if fmt != "text":
        mapping = mapping.replace("escapes: backslash", "escapes: quotes")
    (mdir / "t.yaml").write_text(mapping)
    out = tmp_path / "out"
    code = cli("convert", str(tmp_path / "notes.csv"), "--mappings", str(mdir), "--out", str(out))
    assert code == 0, capsys.readouterr().err
    files = sorted((out / "events" / "shop.notes").glob("*.jsonl"))
    events = [json.loads(line) for p in files for line in p.read_text(encoding="utf-8").splitlines()]
    assert len(events) == len(held) == 400
    for e in events:
        note, amount, at = held[e["key"]["id"]]
        assert e["values"]["note"] == note, e
        assert e["values"]["amount"] == (None if amount is None else f"{amount:.2f}")
        assert datetime.fromisoformat(e["values"]["at"].replace("Z", "+00:00")) == at  # the same instant
    assert last_run(out)["ledger"]["balanced"]


def test_what_postgresql_copy_from_reads_is_what_cdcnorm_reads(
    pg_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the server as the oracle of the format's reading: the same bytes through COPY ... FROM STDIN
    import psycopg

    B = b"\\"
    cells = [
        b"line1" + B + b"\nline2",  # a backslash and a line break: that line break
        b"x" + B + b"\ty",  # a backslash and a tab: a tab
        b"cr" + B + b"\rz",
        b"p" + B + b"qz" + B + B,  # any other character stands for itself
        B + b"N",
        b"",
        B + b"b" + B + b"f" + B + b"v" + B + b"n" + B + b"t" + B + b"r",
        "naïve 😀".encode(),
        b"end" + B + b"\n",  # escapes the file's last line break
    ]
    dump = b"".join(b"I\t%d\t%d\t%s\n" % (i + 1, i + 1, c) for i, c in enumerate(cells))
    with psycopg.connect(pg_url) as conn:
        conn.execute("CREATE TABLE t (op text, pos integer, id integer, a text)")
        with conn.cursor() as cur:
            with cur.copy("COPY t FROM STDIN") as copy:
                copy.write(dump)
            held = dict(cur.execute("SELECT id, a FROM t").fetchall())
    (tmp_path / "n.csv").write_bytes(dump)
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(
        MAPPING.replace(
            "{escapes: backslash}", "{escapes: backslash, header: false, columns: [op, pos, id, a]}"
        )
    )
    out = tmp_path / "out"
    code = cli("convert", str(tmp_path / "n.csv"), "--mappings", str(mdir), "--out", str(out))
    assert code == 0, capsys.readouterr().err
    files = sorted((out / "events" / "t.notes").glob("*.jsonl"))
    events = [json.loads(line) for p in files for line in p.read_text(encoding="utf-8").splitlines()]
    assert {e["key"]["id"]: e["values"]["a"] for e in events} == held
    assert len(held) == len(cells)


def _pg_literal(text: str) -> str:
    return "E'\\t'" if text == "\t" else f"'{text}'"


def test_an_escaped_delimiter_where_the_split_would_give_the_right_count_is_read_as_copy_reads_it(
    convert: ConvertFn,
) -> None:
    # a backslash before the delimiter makes it data (PostgreSQL's documentation, COPY, "Text
    # Format"): `I 2 x\<TAB>` is three fields, the last a tab, even where splitting at every tab
    # would give the four the file's header names
    files: dict[str, str | bytes] = {
        "n1.csv": "op\tpos\tid\ta\nI\t1\t1\tok\nI\t2\tx\\\t\n",
        "n2.csv": "op\tpos\tid\ta\nI\t3\t3\ty\\\tz\n",
    }
    done = convert(MAPPING, files)
    assert {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")} == {1: "ok", 3: "y\tz"}
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["text"] == "I\t2\tx\\\t"
    assert q["_cdcnorm"]["reasons"][0]["reason"] == "expected 4 fields, found 3"
    assert done.ledger()["balanced"]
