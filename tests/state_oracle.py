"""Real databases as sources for the state tests: triggers write a change table while a seeded
random workload runs; the change table is dumped in overlapping, shuffled daily parts with late
rows; the source table's contents (final, and at checkpoints) are the oracle.

Values are compared as Python values, whatever the database or file held them: decimals as
``decimal.Decimal``, timestamps as aware ``datetime`` in UTC, UUIDs as ``uuid.UUID``, bytes,
JSON as parsed values (RFC 8259), dates as ``datetime.date``.
"""

from __future__ import annotations

import csv
import io
import json
import random
import sqlite3
import uuid
from datetime import UTC, date, datetime
from decimal import Decimal
from pathlib import Path
from typing import Any

import pyarrow.parquet as pq

# --- PostgreSQL as the source -------------------------------------------------------------

PG_SCHEMA = """
CREATE TABLE parcels (
  parcel_id bigint PRIMARY KEY, label text, weight numeric(10,3), volume double precision,
  fragile boolean, due date, scanned_at timestamptz, tracking uuid, photo bytea, meta jsonb);
CREATE TABLE changes (
  lsn text, op text, committed text, parcel_id text, label text, weight text, volume text,
  fragile text, due text, scanned_at text, tracking text, photo text, meta text);
CREATE FUNCTION log_change() RETURNS trigger LANGUAGE plpgsql AS $$
DECLARE
  pos text := pg_current_wal_insert_lsn()::text;  -- advances with every WAL record
  at text := to_char(now() AT TIME ZONE 'UTC', 'YYYY-MM-DD"T"HH24:MI:SS.US"Z"');
BEGIN
  IF TG_OP IN ('UPDATE', 'DELETE') THEN
    INSERT INTO changes VALUES (pos, CASE TG_OP WHEN 'UPDATE' THEN 'B' ELSE 'D' END, at,
      OLD.parcel_id::text, OLD.label, OLD.weight::text, OLD.volume::text, OLD.fragile::text,
      OLD.due::text, to_char(OLD.scanned_at AT TIME ZONE 'UTC', 'YYYY-MM-DD"T"HH24:MI:SS.US"Z"'),
      OLD.tracking::text, OLD.photo::text, OLD.meta::text);
  END IF;
  IF TG_OP IN ('UPDATE', 'INSERT') THEN
    INSERT INTO changes VALUES (pos, CASE TG_OP WHEN 'UPDATE' THEN 'A' ELSE 'I' END, at,
      NEW.parcel_id::text, NEW.label, NEW.weight::text, NEW.volume::text, NEW.fragile::text,
      NEW.due::text, to_char(NEW.scanned_at AT TIME ZONE 'UTC', 'YYYY-MM-DD"T"HH24:MI:SS.US"Z"'),
      NEW.tracking::text, NEW.photo::text, NEW.meta::text);
  END IF;
  RETURN NULL;
END $$;
CREATE TRIGGER log_parcels AFTER INSERT OR UPDATE OR DELETE ON parcels
  FOR EACH ROW EXECUTE FUNCTION log_change();
"""

PG_MAPPING = """
table: depot.parcels
files: ["parcels-*.csv"]
key: [parcel_id]
nulls: ['\\N']  # YAML single quotes: a backslash and N
change:
  action: {column: op, codes: {I: insert, B: before, A: after, D: delete}}
  position: {column: lsn, kind: hex-pair}
  committed_at: {column: committed}
  updates: paired
fields:
  parcel_id: integer
  label: text
  weight: decimal(10,3)
  volume: float
  fragile: boolean
  due: date
  scanned_at: timestamp
  tracking: uuid
  photo: {type: bytes, encoding: hex}
  meta: json
"""

PG_TYPES = {
    "parcel_id": "integer",
    "label": "text",
    "weight": "decimal",
    "volume": "float",
    "fragile": "boolean",
    "due": "date",
    "scanned_at": "timestamp",
    "tracking": "uuid",
    "photo": "bytes",
    "meta": "json",
}

LABELS = ["crate", 'box "B", fragile', "line\nbreak", "semi;colon -- not a comment", "Ærø ✓", "", None]


def _parcel(rng: random.Random, pid: int) -> tuple[Any, ...]:
    return (
        pid,
        rng.choice(LABELS),
        rng.choice([None, Decimal(f"{rng.randint(0, 9999999)}.{rng.randint(0, 999):03d}"), Decimal("0.000")]),
        rng.choice([None, 0.1, 1e-7, 12.5, -3.25, 1.7976931348623157e308]),
        rng.choice([None, True, False]),
        rng.choice([None, date(2026, 3, rng.randint(1, 31)), date(1, 1, 1), date(9999, 12, 31)]),
        rng.choice(
            [
                None,
                datetime(2026, 3, 1, 8, rng.randint(0, 59), rng.randint(0, 59), rng.randint(0, 999999), UTC),
            ]
        ),
        rng.choice([None, uuid.UUID(int=rng.getrandbits(128))]),
        rng.choice([None, b"", bytes(rng.getrandbits(8) for _ in range(rng.randint(1, 6)))]),
        rng.choice([None, {"k": [1, 2.5, None, "x\ny"]}, [], "text", 7, {"ø": {"deep": True}}]),
    )


def pg_workload(
    conn: Any, rng: random.Random, transactions: int, checkpoints: int
) -> list[tuple[str, dict[Any, Any]]]:
    """Run the workload on a psycopg connection (autocommit off); returns the checkpoints:
    (the WAL position after a commit, the table's contents then)."""
    from psycopg.types.json import Jsonb

    def row(values: tuple[Any, ...]) -> tuple[Any, ...]:
        return (*values[:9], None if values[9] is None else Jsonb(values[9]))

    next_id = 1
    marks = set(rng.sample(range(1, transactions), checkpoints))
    out = []
    for t in range(transactions):
        cur = conn.cursor()
        for _ in range(rng.randint(1, 4)):
            live = [r[0] for r in cur.execute("SELECT parcel_id FROM parcels")]
            dead = [
                r[0] for r in cur.execute("SELECT DISTINCT parcel_id::bigint FROM changes WHERE op = 'D'")
            ]
            dead = [d for d in dead if d not in live]
            roll = rng.random()
            if roll < 0.3 or not live:
                cur.execute(
                    "INSERT INTO parcels VALUES (%s,%s,%s,%s,%s,%s,%s,%s,%s,%s)", row(_parcel(rng, next_id))
                )
                next_id += 1
            elif roll < 0.4 and dead:  # a deleted key comes back
                cur.execute(
                    "INSERT INTO parcels VALUES (%s,%s,%s,%s,%s,%s,%s,%s,%s,%s)",
                    row(_parcel(rng, rng.choice(dead))),
                )
            elif roll < 0.65:
                pid = rng.choice(live)
                new = _parcel(rng, pid)
                cur.execute(
                    "UPDATE parcels SET label=%s, weight=%s, volume=%s, fragile=%s, due=%s, scanned_at=%s, "
                    "tracking=%s, photo=%s, meta=%s WHERE parcel_id=%s",
                    (*row(new)[1:], pid),
                )
                if rng.random() < 0.5:  # updated again in the same transaction
                    cur.execute(
                        "UPDATE parcels SET weight = coalesce(weight, 0) + 1 WHERE parcel_id=%s", (pid,)
                    )
            elif roll < 0.75:
                cur.execute("UPDATE parcels SET parcel_id=%s WHERE parcel_id=%s", (next_id, rng.choice(live)))
                next_id += 1
            else:
                cur.execute("DELETE FROM parcels WHERE parcel_id=%s", (rng.choice(live),))
        if rng.random() < 0.1:
            conn.rollback()  # the triggers' rows go with it
        else:
            conn.commit()
        if t in marks:
            lsn = conn.execute("SELECT pg_current_wal_insert_lsn()::text").fetchone()[0]
            out.append((lsn, pg_table(conn)))
            conn.commit()
    return out


def pg_table(conn: Any) -> dict[Any, dict[str, Any]]:
    cur = conn.execute("SELECT * FROM parcels")
    names = [d.name for d in cur.description]
    return {
        r[0]: normalise(as_json_text(dict(zip(names, r, strict=True)), PG_TYPES), PG_TYPES)
        for r in cur.fetchall()
    }


def as_json_text(row: dict[str, Any], types: dict[str, str]) -> dict[str, Any]:
    """psycopg hands jsonb over parsed: back to its text, as the other readers see it."""
    return {k: json.dumps(v) if types.get(k) == "json" and v is not None else v for k, v in row.items()}


def pg_dump_changes(conn: Any) -> tuple[list[str], list[list[str]]]:
    """The change table as PostgreSQL's COPY writes it (CSV): header and records."""
    buf = io.StringIO()
    # NULL written as \N (as PostgreSQL's text format does), so an empty text stays one
    with (
        conn.cursor() as cur,
        cur.copy("COPY changes TO STDOUT (FORMAT csv, HEADER true, NULL '\\N')") as copy,
    ):
        for block in copy:
            buf.write(bytes(block).decode("utf-8"))
    conn.commit()
    records = list(csv.reader(io.StringIO(buf.getvalue(), newline="")))
    return records[0], records[1:]


# --- splitting a change log into deliveries -----------------------------------------------


def deliveries(
    header: list[str], rows: list[Any], folder: Path, stem: str, rng: random.Random, days: int
) -> list[Path]:
    """Daily parts: cut at random points, each repeating the tail of the day before (overlap),
    5% of the rows held back a day (late), each file shuffled. Rows are lists of text, written
    as they are (the caller chooses how NULL is written)."""
    cuts = sorted(rng.sample(range(1, len(rows)), days - 1))
    parts = []
    for i, (a, b) in enumerate(zip([0, *cuts], [*cuts, len(rows)], strict=True)):
        parts.append(list(rows[max(0, a - (rng.randint(0, 8) if i else 0)) : b]))
    for i in range(days - 1):
        late = [r for r in parts[i] if rng.random() < 0.05]
        parts[i] = [r for r in parts[i] if r not in late]
        parts[i + 1] += late
    paths = []
    for i, part in enumerate(parts):
        rng.shuffle(part)
        path = folder / f"day-{i + 1:02d}" / f"{stem}-{i + 1:02d}.csv"
        path.parent.mkdir(parents=True, exist_ok=True)
        with open(path, "w", newline="", encoding="utf-8") as f:
            w = csv.writer(f)  # RFC 4180; a NULL is an empty unquoted field, an empty text ""
            w.writerow(header)
            for r in part:
                w.writerow(r)
        paths.append(path)
    return paths


# --- SQLite as the source: the berths of tests/test_oracle_sqlite.py, with checkpoints ---------


def sqlite_checkpointed(
    rng: random.Random, chunks: int, steps: int
) -> tuple[sqlite3.Connection, list[tuple[str, dict[Any, Any]]]]:
    from tests.test_oracle_sqlite import SCHEMA, final_table, workload

    db = sqlite3.connect(":memory:")
    db.executescript(SCHEMA)
    marks = []
    for _ in range(chunks):
        workload(db, rng, steps)
        db.execute("UPDATE changes SET note = NULL WHERE note = ''")
        db.execute("UPDATE berths SET note = NULL WHERE note = ''")
        db.commit()
        pos = db.execute("SELECT max(pos) FROM changes").fetchone()[0]
        marks.append((str(pos), {k: normalise(v, SQLITE_TYPES) for k, v in final_table(db).items()}))
    return db, marks


SQLITE_TYPES = {
    "berth_id": "integer",
    "harbour": "text",
    "fee": "decimal",
    "length_m": "float",
    "note": "text",
}


# --- reading state back -------------------------------------------------------------------


def normalise(row: dict[str, Any], types: dict[str, str]) -> dict[str, Any]:
    """One row as comparable Python values, whatever held it."""
    out = {}
    for name, kind in types.items():
        v = row.get(name)
        if v is None:
            out[name] = None
        elif kind == "decimal":
            out[name] = Decimal(str(v))
        elif kind == "float":
            out[name] = float(v)
        elif kind == "integer":
            out[name] = int(v)
        elif kind == "boolean":
            out[name] = bool(v) if not isinstance(v, str) else v == "true"
        elif kind == "date":
            out[name] = v if isinstance(v, date) else date.fromisoformat(v)
        elif kind == "timestamp":
            out[name] = (
                v if isinstance(v, datetime) else datetime.fromisoformat(v.replace("Z", "+00:00"))
            ).astimezone(UTC)
        elif kind == "uuid":
            out[name] = (
                v
                if isinstance(v, uuid.UUID)
                else uuid.UUID(bytes=v)
                if isinstance(v, bytes)
                else uuid.UUID(str(v))
            )
        elif kind == "bytes":
            out[name] = bytes(v)
        elif kind == "json":
            out[name] = json.loads(v) if isinstance(v, str | bytes) else v  # RFC 8259 text, parsed
        else:
            out[name] = v
    return out


def read_parquet_state(path: Path, key: str, types: dict[str, str]) -> dict[Any, dict[str, Any]]:
    rows = pq.read_table(path).to_pylist()
    return {r[key]: normalise(r, types) for r in rows}


def read_sql_state(rows: list[dict[str, Any]], key: str, types: dict[str, str]) -> dict[Any, dict[str, Any]]:
    return {normalise(r, types)[key]: normalise(r, types) for r in rows}
