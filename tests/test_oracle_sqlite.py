"""A real database as the oracle: SQLite triggers log every change; convert must reproduce the log.

A seeded random workload (inserts, updates, key changes, deletes, no-op
updates) runs against a SQLite table whose AFTER INSERT/UPDATE/DELETE triggers
write a change table (an update writes a before and an after row at one log
position). The change table is dumped as CSV (Python's csv module, RFC 4180)
in overlapping, shuffled parts. ``convert`` must emit exactly the events the
log implies, in log order, and replaying them must give SQLite's final table.
"""

from __future__ import annotations

import csv
import random
import sqlite3
from decimal import Decimal
from pathlib import Path

import pytest

from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, run
from tests.conftest import Converted

MAPPING = """
table: harbour.berths
files: ["berths-*.csv"]
key: [berth_id]
change:
  action: {column: op, codes: {I: insert, B: before, A: after, D: delete}}
  position: {column: pos, kind: integer}
  committed_at: {column: logged_at}
fields:
  berth_id: integer
  harbour: text
  fee: decimal(10,2)
  length_m: float
  note: text
"""

SCHEMA = """
CREATE TABLE berths (berth_id INTEGER PRIMARY KEY, harbour TEXT NOT NULL, fee TEXT, length_m REAL, note TEXT);
CREATE TABLE changes (pos INTEGER, op TEXT, logged_at TEXT, berth_id INTEGER, harbour TEXT, fee TEXT,
                      length_m REAL, note TEXT);
CREATE TRIGGER log_insert AFTER INSERT ON berths BEGIN
  INSERT INTO changes VALUES ((SELECT coalesce(max(pos), 0) + 1 FROM changes), 'I', strftime('%Y-%m-%dT%H:%M:%fZ', 'now'),
                              NEW.berth_id, NEW.harbour, NEW.fee, NEW.length_m, NEW.note);
END;
CREATE TRIGGER log_update AFTER UPDATE ON berths BEGIN
  INSERT INTO changes VALUES ((SELECT coalesce(max(pos), 0) + 1 FROM changes), 'B', strftime('%Y-%m-%dT%H:%M:%fZ', 'now'),
                              OLD.berth_id, OLD.harbour, OLD.fee, OLD.length_m, OLD.note);
  INSERT INTO changes SELECT max(pos), 'A', strftime('%Y-%m-%dT%H:%M:%fZ', 'now'),
                              NEW.berth_id, NEW.harbour, NEW.fee, NEW.length_m, NEW.note FROM changes;
END;
CREATE TRIGGER log_delete AFTER DELETE ON berths BEGIN
  INSERT INTO changes VALUES ((SELECT coalesce(max(pos), 0) + 1 FROM changes), 'D', strftime('%Y-%m-%dT%H:%M:%fZ', 'now'),
                              OLD.berth_id, OLD.harbour, OLD.fee, OLD.length_m, OLD.note);
END;
"""

HARBOURS = ["Harbour Town", "Puffin Rock", "Little Skerry", 'Gull "Point", East', "Kelp\nBay"]


def workload(db: sqlite3.Connection, rng: random.Random, steps: int) -> None:
    # a workload may continue an earlier one: new keys start above every key so far
    next_id = db.execute("SELECT coalesce(max(berth_id), 0) + 1 FROM changes").fetchone()[0]
    for _ in range(steps):
        live = [r[0] for r in db.execute("SELECT berth_id FROM berths")]
        roll = rng.random()
        if roll < 0.35 or not live:
            fee = f"{rng.randint(0, 99999)}.{rng.randint(0, 99):02d}"
            note = rng.choice([None, "", "winter only", "crane, 5t"])
            db.execute(
                "INSERT INTO berths VALUES (?, ?, ?, ?, ?)",
                (next_id, rng.choice(HARBOURS), fee, rng.choice([None, 12.5, 30.25, 7.0]), note),
            )
            next_id += 1
        elif roll < 0.65:
            db.execute(
                "UPDATE berths SET fee = ?, note = ? WHERE berth_id = ?",
                (
                    f"{rng.randint(0, 99999)}.{rng.randint(0, 99):02d}",
                    rng.choice([None, "resurfaced"]),
                    rng.choice(live),
                ),
            )
        elif roll < 0.75:
            db.execute("UPDATE berths SET berth_id = ? WHERE berth_id = ?", (next_id, rng.choice(live)))
            next_id += 1
        elif roll < 0.80:
            db.execute("UPDATE berths SET harbour = harbour WHERE berth_id = ?", (rng.choice(live),))
        else:
            db.execute("DELETE FROM berths WHERE berth_id = ?", (rng.choice(live),))
    db.commit()


def dump_parts(db: sqlite3.Connection, folder: Path, rng: random.Random) -> list[Path]:
    cols = [d[1] for d in db.execute("PRAGMA table_info(changes)")]
    rows = db.execute("SELECT * FROM changes").fetchall()
    n = len(rows)
    cuts = [(0, int(n * 0.5)), (int(n * 0.4), int(n * 0.8)), (int(n * 0.7), n)]  # overlapping exports
    paths = []
    for i, (a, b) in enumerate(cuts):
        part = rows[a:b]
        rng.shuffle(part)
        path = folder / f"berths-{i}.csv"
        with open(path, "w", newline="", encoding="utf-8") as f:
            w = csv.writer(f)  # RFC 4180 quoting; NULL written as an empty unquoted field
            w.writerow(cols)
            for r in part:
                w.writerow(["" if v is None else v for v in r])
        paths.append(path)
    return paths


def final_table(db: sqlite3.Connection) -> dict[int, dict[str, object]]:
    """SQLite's table as envelope values (decimals as their exact text: Python's decimal)."""
    return {
        r[0]: {
            "berth_id": r[0],
            "harbour": r[1],
            "fee": None if r[2] is None else str(Decimal(r[2])),
            "length_m": r[3],
            "note": r[4],
        }
        for r in db.execute("SELECT * FROM berths")
    }


def expected_events(db: sqlite3.Connection) -> list[tuple[str, int, int]]:
    out: list[tuple[str, int, int]] = []
    by_pos: dict[int, dict[str, tuple[object, ...]]] = {}
    for pos, op, *rest in db.execute("SELECT pos, op, berth_id FROM changes ORDER BY pos, op DESC"):
        by_pos.setdefault(pos, {})[op] = tuple(rest)
    for pos in sorted(by_pos):
        ops = by_pos[pos]
        if "I" in ops:
            out.append(("upsert", ops["I"][0], pos))  # type: ignore[arg-type]
        elif "D" in ops:
            out.append(("delete", ops["D"][0], pos))  # type: ignore[arg-type]
        else:
            before, after = ops["B"][0], ops["A"][0]
            if before != after:
                out.append(("delete", before, pos))  # type: ignore[arg-type]
            out.append(("upsert", after, pos))  # type: ignore[arg-type]
    return out


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_convert_reproduces_the_sqlite_change_log(tmp_path: Path, seed: int) -> None:
    rng = random.Random(seed)
    db = sqlite3.connect(":memory:")
    db.executescript(SCHEMA)
    workload(db, rng, 400)
    # Python's csv module writes NULL and '' alike (an empty field), so the workload keeps no ''
    db.execute("UPDATE changes SET note = NULL WHERE note = ''")
    db.execute("UPDATE berths SET note = NULL WHERE note = ''")
    paths = dump_parts(db, tmp_path, rng)
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "berths.yaml").write_text(MAPPING)
    out = tmp_path / "out"
    result = run(load_mappings(tmp_path / "m"), paths, Options(out=out))
    assert result.ledger.balanced
    done = Converted(out)
    events = done.events("harbour.berths")
    got = [(e["action"], e["key"]["berth_id"], int(e["position"].split(".")[0])) for e in events]
    want = expected_events(db)
    assert got == want  # one event per logged change (two for a key change), in log order

    # replay equals snapshot: folding the events gives SQLite's final table (sqlite3 as oracle)
    state: dict[int, dict[str, object]] = {}
    for e in events:
        if e["action"] == "upsert":
            state[e["key"]["berth_id"]] = e["values"]
        else:
            state.pop(e["key"]["berth_id"])
    assert state == final_table(db)

    led = done.ledger()
    n_changes = db.execute("SELECT count(*) FROM changes").fetchone()[0]
    total = led["total"]
    assert led["balanced"] and total["quarantined"] == 0
    assert total["read"] - total["duplicate"] == n_changes  # the overlap is exactly the duplicates
    assert total["emitted"] + total["merged"] == n_changes
