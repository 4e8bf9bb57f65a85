"""apply into a table made beforehand: a column that would change values without an error is
refused before anything is written; the database itself shows that each refused type changes a
value. Before, a SQLite table with ``fare REAL`` took the decimal 47.50 as the float 47.5."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest

from tests.conftest import ROOT, cli

BOOKINGS = {
    "booking_id": "BIGINT PRIMARY KEY",
    "sailing_ref": "BIGINT",
    "passenger_ref": "BIGINT",
    "passenger": "TEXT",
    "pax_phone": "TEXT",
    "fare": "TEXT",
    "booked_at": "TEXT",
    "seats": "BIGINT",
    "refunded": "BOOLEAN",
    "cdcnorm_position": "TEXT NOT NULL",
}


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "o"
    args = ("--mappings", str(ROOT / "mappings"), "--out", str(out), "--quiet")
    assert cli("convert", str(ROOT / "examples" / "dumps"), *args) == 0
    return out


def _ddl(name: str, types: dict[str, str]) -> str:
    return f"CREATE TABLE {name} ({', '.join(f'{c} {t}' for c, t in types.items())})"


def _apply(demo: Path, target: str, *more: str) -> int:
    return cli("apply", str(demo), "--mappings", str(ROOT / "mappings"), "--target", target, *more)


def _sqlite_stores(columns: str, values: str, select: str) -> tuple[object, ...] | None:
    """What SQLite itself keeps of ``values`` in a table of ``columns`` (the oracle for affinity)."""
    with sqlite3.connect(":memory:") as con:
        con.execute(f"CREATE TABLE t ({columns})")
        con.execute(f"INSERT INTO t VALUES ({values})")
        row: tuple[object, ...] | None = con.execute(f"SELECT {select} FROM t").fetchone()
    return row


def _sqlite_bookings(db: Path, types: dict[str, str]) -> str:
    """A SQLite file whose ferry.bookings table (made anew) has these columns: its target URL."""
    with sqlite3.connect(db) as con:
        con.execute('DROP TABLE IF EXISTS "ferry.bookings"')
        con.execute(_ddl('"ferry.bookings"', types))
    return f"sqlite:///{db}"


def test_sqlite_affinity_that_would_turn_a_decimal_into_a_float_is_refused(
    demo: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the oracle: SQLite itself turns the text 47.50 into the float 47.5 in a REAL column
    # (https://www.sqlite.org/datatype3.html, section 3.1 and 3.4)
    assert _sqlite_stores("fare REAL", "'47.50'", "typeof(fare), fare") == ("real", 47.5)
    db = tmp_path / "w.db"
    target = _sqlite_bookings(db, BOOKINGS | {"fare": "REAL"})
    capsys.readouterr()
    assert _apply(demo, target, "--table", "ferry.bookings") == 10
    err = capsys.readouterr().err
    assert 'column fare of "ferry.bookings" would not hold decimal(12,2) values exactly' in err
    assert "REAL affinity turns text that looks like a number into one" in err
    assert "expected: TEXT (the type apply gives it)" in err and "found: REAL" in err
    with sqlite3.connect(db) as con:
        assert con.execute('SELECT count(*) FROM "ferry.bookings"').fetchone() == (0,)  # nothing written


def test_sqlite_table_made_beforehand_with_the_types_apply_gives_is_used(demo: Path, tmp_path: Path) -> None:
    db = tmp_path / "w.db"
    with sqlite3.connect(db) as con:
        con.execute(_ddl('"ferry.bookings"', BOOKINGS))
    assert _apply(demo, f"sqlite:///{db}", "--table", "ferry.bookings") == 0
    with sqlite3.connect(db) as con:
        fares = dict(con.execute('SELECT booking_id, fare FROM "ferry.bookings"').fetchall())
    assert fares[1001] == "47.50"


def test_a_column_the_table_lacks_is_named_with_the_statement_that_adds_it(
    demo: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = tmp_path / "w.db"
    with sqlite3.connect(db) as con:
        con.execute(_ddl('"ferry.bookings"', {k: v for k, v in BOOKINGS.items() if k != "pax_phone"}))
    capsys.readouterr()
    assert _apply(demo, f"sqlite:///{db}", "--table", "ferry.bookings") == 10
    err = capsys.readouterr().err
    assert 'table "ferry.bookings" has no column pax_phone' in err
    assert 'ALTER TABLE "ferry.bookings" ADD COLUMN "pax_phone" TEXT' in err


@pytest.mark.parametrize(
    ("column", "declared", "why"),
    [
        ("fare", "DECIMAL(12,1)", "a scale of 1 rounds values of scale 2"),
        ("fare", "DOUBLE", "a float column rounds decimals"),
        ("booked_at", "TIMESTAMP", "a timestamp without time zone moves each value"),
        ("seats", "FLOAT", "a float column rounds integers"),
    ],
)
def test_duckdb_columns_that_would_round_or_move_values_are_refused(
    demo: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], column: str, declared: str, why: str
) -> None:
    import duckdb

    # the oracle: DuckDB itself rounds or moves such values without an error
    con = duckdb.connect()
    con.execute("SET TimeZone = 'Asia/Tokyo'")
    changed = {
        "DECIMAL(12,1)": "SELECT CAST(47.55::DECIMAL(12,2) AS DECIMAL(12,1)) <> 47.55",
        "DOUBLE": "SELECT CAST(CAST(0.10::DECIMAL(12,2) AS DOUBLE) AS DECIMAL(38,30)) <> 0.10",
        "TIMESTAMP": "SELECT CAST(TIMESTAMPTZ '2026-02-20 10:15:00+00' AS TIMESTAMP) <> TIMESTAMP '2026-02-20 10:15:00'",
        "FLOAT": "SELECT CAST(CAST(16777217 AS FLOAT) AS BIGINT) <> 16777217",
    }[declared]
    assert con.execute(changed).fetchone() == (True,)
    con.close()
    path = tmp_path / "w.duckdb"
    types = {
        "booking_id": "BIGINT PRIMARY KEY",
        "sailing_ref": "BIGINT",
        "passenger_ref": "BIGINT",
        "passenger": "VARCHAR",
        "pax_phone": "VARCHAR",
        "fare": "DECIMAL(14,2)",  # wider than the mapping's decimal(12,2): holds every value
        "booked_at": "TIMESTAMPTZ",
        "seats": "BIGINT",
        "refunded": "BOOLEAN",
        "cdcnorm_position": "VARCHAR NOT NULL",
    }
    with duckdb.connect(str(path)) as con:
        con.execute("CREATE SCHEMA ferry")
        con.execute(_ddl("ferry.bookings", types | {column: declared}))
    capsys.readouterr()
    assert _apply(demo, f"duckdb:///{path}", "--table", "ferry.bookings") == 10
    err = capsys.readouterr().err
    assert f"column {column} of " in err and why in err and f"found: {declared}" in err
    with duckdb.connect(str(path)) as con:
        con.execute("DROP TABLE ferry.bookings")
        con.execute(_ddl("ferry.bookings", types))
    assert _apply(demo, f"duckdb:///{path}", "--table", "ferry.bookings", "--json") == 0
    assert json.loads(capsys.readouterr().out)["tables"][0]["inserted"] == 3
    with duckdb.connect(str(path)) as con:
        fare = con.execute(
            "SELECT CAST(fare AS VARCHAR) FROM ferry.bookings WHERE booking_id = 1001"
        ).fetchone()
    assert fare == ("47.50",)


def test_postgresql_timestamp_without_time_zone_is_refused(
    demo: Path, pg_url: str, capsys: pytest.CaptureFixture[str]
) -> None:
    import psycopg

    with psycopg.connect(pg_url, autocommit=True) as c:
        # the oracle: PostgreSQL moves a timestamptz into the session's zone in such a column
        c.execute("SET TIME ZONE 'Asia/Tokyo'")
        moved = c.execute("SELECT '2026-02-20T10:15:00Z'::timestamptz::timestamp::text").fetchone()
        assert moved == ("2026-02-20 19:15:00",)
        c.execute("CREATE SCHEMA ferry")
        types = BOOKINGS | {
            "fare": "numeric(12,2)",
            "booked_at": "timestamp",
            "cdcnorm_position": 'text COLLATE "C" NOT NULL',
        }
        c.execute(_ddl("ferry.bookings", types))
    capsys.readouterr()
    assert _apply(demo, pg_url, "--table", "ferry.bookings") == 10
    err = capsys.readouterr().err
    assert "column booked_at of " in err and "found: timestamp without time zone" in err
    assert "password" not in err.lower()


def test_postgresql_position_column_that_compares_by_a_locale_is_refused(
    demo: Path, pg_url: str, capsys: pytest.CaptureFixture[str]
) -> None:
    import psycopg

    with psycopg.connect(pg_url, autocommit=True) as c:
        # the oracle: a locale's collation orders text otherwise than its bytes where "C" does not
        # (PostgreSQL's ucs_basic and "C" compare code points; "und-x-icu" follows Unicode's rules)
        icu = c.execute("SELECT count(*) FROM pg_collation WHERE collname = 'und-x-icu'").fetchone()
        if icu == (1,):
            assert c.execute(
                """SELECT 'a' < 'B' COLLATE "und-x-icu", 'a' < 'B' COLLATE "C" """
            ).fetchone() == (
                True,
                False,
            )
        collation = '"und-x-icu"' if icu == (1,) else '"en_US"'
        exists = c.execute(
            "SELECT count(*) FROM pg_collation WHERE collname = %s", (collation.strip('"'),)
        ).fetchone()
        if exists != (1,):
            pytest.skip("the server has no locale collation to test with")
        c.execute("CREATE SCHEMA ferry")
        types = BOOKINGS | {
            "fare": "numeric(12,2)",
            "booked_at": "timestamptz",
            "cdcnorm_position": f"text COLLATE {collation} NOT NULL",
        }
        c.execute(_ddl("ferry.bookings", types))
    capsys.readouterr()
    assert _apply(demo, pg_url, "--table", "ferry.bookings") == 10
    err = capsys.readouterr().err
    assert "column cdcnorm_position of " in err and "not as bytes" in err
    assert 'ALTER COLUMN cdcnorm_position TYPE text COLLATE "C"' in err
    with psycopg.connect(pg_url, autocommit=True) as c:
        c.execute('ALTER TABLE ferry.bookings ALTER COLUMN cdcnorm_position TYPE text COLLATE "C"')
    assert _apply(demo, pg_url, "--table", "ferry.bookings") == 0


def test_sqlite_numeric_affinity_is_refused_only_for_text_that_can_look_like_a_number(
    demo: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the oracle: SQLite keeps an RFC 3339 text in a DATETIME (NUMERIC affinity) column as text, and
    # turns the text 007 into the integer 7 (https://www.sqlite.org/datatype3.html, section 3.4)
    stored = _sqlite_stores(
        "at DATETIME, s NUMERIC", "'2026-02-20T10:15:00.000000Z', '007'", "typeof(at), typeof(s), s"
    )
    assert stored == ("text", "integer", 7)
    db = tmp_path / "w.db"
    assert (
        _apply(demo, _sqlite_bookings(db, BOOKINGS | {"booked_at": "DATETIME"}), "--table", "ferry.bookings")
        == 0
    )
    target = _sqlite_bookings(db, BOOKINGS | {"pax_phone": "NUMERIC"})
    capsys.readouterr()
    assert _apply(demo, target, "--table", "ferry.bookings") == 10
    assert "column pax_phone of " in capsys.readouterr().err
