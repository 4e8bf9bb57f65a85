"""Landing areas written by an earlier index format continue exactly as new ones.

``tests/fixtures/index-format-1.parquet`` is the identity file that index format 1
(positions, sequences and digests as hex text) wrote for run 1 below. An area whose
run 1 left that file must give run 2 the same fates, events and quarantine as an area
whose run 1 wrote the current format (128-bit keys and the project's content digest as
two 64-bit halves). So must an area whose run 1 wrote format 2: that layout with the
older digest (the MD5 of the engine's text of the row as a struct). Format 3, which
differs only for an empty bytes value, is tested in ``test_identity_digest.py``.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tests.conftest import cli, last_run, run_files

FIXTURE = Path(__file__).parent / "fixtures" / "index-format-1.parquet"

MAPPING = """\
table: t.idx
files: ["d*"]
key: [id]
change:
  action: {column: op, codes: {"1": delete, "2": insert, "3": before, "4": after}}
  position: {column: pos, kind: hex, width: 20}
  sequence: {column: seq, kind: hex}
  committed_at: {column: at}
fields:
  id: integer
  name: text
  fee: decimal(12,2)
  weight: float
"""

HEAD = "op,pos,seq,at,id,name,fee,weight\n"
WIDE = "0xFFFFFFFFFFFFFFFFFFF0,0xFFFFFFFFFFFFFFFFFFFF"  # both 64-bit halves in use
RUN1 = HEAD + (
    "2,0x0A,0x01,2026-03-01T10:00:00Z,1,a,1.50,0.1\n"
    "2,0x0B,0x01,2026-03-01T10:00:01Z,2,b,2.00,\n"
    "4,0x0C,0x01,2026-03-01T10:00:02Z,3,c,3.25,1e300\n"  # an after-image without its before
    "3,0x0D,0x01,2026-03-01T10:00:03Z,4,d-old,4.00,-0.0\n"  # a before-image that waits
    "1,0x0E,0x01,2026-03-01T10:00:04Z,5,,,\n"
    f"2,{WIDE},2026-03-01T10:00:05Z,7,wide,,\n"
)
RUN2 = HEAD + (
    "2,0x0A,0x01,2026-03-01T10:00:00Z,1,a,1.50,0.1\n"  # a duplicate of run 1
    "2,0x0B,0x01,2026-03-01T10:00:01Z,2,B!,2.00,\n"  # a conflicting version of run 1's row
    "3,0x0C,0x01,2026-03-01T10:00:02Z,3,c-old,3.00,1e300\n"  # the late before of run 1's after
    "4,0x0D,0x01,2026-03-01T10:00:03Z,4,d-new,4.50,-0.0\n"  # the after of the waiting before
    "1,0x0E,0x01,2026-03-01T10:00:04Z,5,,,\n"  # a duplicate
    f"2,{WIDE},2026-03-01T10:00:05Z,7,wide,,\n"  # a duplicate at a wide position
    "2,0x0F,0x01,2026-03-01T10:00:06Z,6,new,,\n"
)


def _convert(base: Path, dump: str, name: str) -> None:
    (base / "m").mkdir(parents=True, exist_ok=True)
    (base / "m" / "t.yaml").write_text(MAPPING)
    path = base / name
    path.write_text(dump)
    assert (
        cli("convert", str(path), "--mappings", str(base / "m"), "--out", str(base / "out"), "--quiet") == 0
    )


def _run2(out: Path) -> dict[str, Any]:
    """Run 2's ledger, events and quarantine; run 1's id (a time to the second, which differs between
    the two areas when their runs straddle a second) as a placeholder."""
    events, quarantine = (run_files(out, folder, "t.idx")[-1] for folder in ("events", "quarantine"))
    ledger = last_run(out)["ledger"]
    first = run_files(out, "index/emitted", "t.idx")[0].stem
    return {
        "ledger": json.loads(json.dumps(ledger).replace(first, "<run 1>")),
        "events": events.read_text().replace(first, "<run 1>"),
        "quarantine": quarantine.read_text().replace(first, "<run 1>"),
    }


def _columns(path: Path) -> set[str]:
    return set(pq.read_schema(path).names)


def _format_1(written: Path, run_id: str) -> pa.Table:
    """The format 1 file an earlier version wrote for run 1 (the fixture), under this area's run id."""
    table = pq.read_table(FIXTURE)
    assert {"__pos", "__seq", "__hash"} <= set(table.column_names) and "__digest_hi" not in table.column_names
    assert table.num_rows == pq.read_metadata(written).num_rows == 5
    return table.set_column(table.column_names.index("__run"), "__run", pa.array([run_id] * table.num_rows))


def _format_2(written: Path, digests: list[int]) -> pa.Table:
    """Run 1's file as format 2 would hold it: the digest columns renamed, older digests, no metadata."""
    table = pq.read_table(written)
    halves = {
        "__digest_hi": pa.array([d >> 64 for d in digests], pa.uint64()),
        "__digest_lo": pa.array([d & ((1 << 64) - 1) for d in digests], pa.uint64()),
    }
    for new, old in (("__content_hi", "__digest_hi"), ("__content_lo", "__digest_lo")):
        table = table.set_column(table.column_names.index(new), old, halves[old])
    return table.replace_schema_metadata(None)


def _positions(table: pa.Table) -> list[int]:
    return [
        hi << 64 | lo
        for hi, lo in zip(table["__pos_hi"].to_pylist(), table["__pos_lo"].to_pylist(), strict=True)
    ]


#: Run 1's rows in the identity file (commit time, id, name, fee, weight), by position.
ROWS = {
    0x0A: ("2026-03-01 10:00:00+00", 1, "a", "1.50", 0.1),
    0x0B: ("2026-03-01 10:00:01+00", 2, "b", "2.00", None),
    0x0C: ("2026-03-01 10:00:02+00", 3, "c", "3.25", 1e300),
    0x0E: ("2026-03-01 10:00:04+00", 5, None, None, None),
    0xFFFFFFFFFFFFFFFFFFF0: ("2026-03-01 10:00:05+00", 7, "wide", None, None),
}


def _engine_digests(written: Path) -> list[int]:
    """The running engine's own text of each row as a struct, as format 2 was written with it."""
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    sql = (
        "SELECT md5_number(CAST({'c': CAST(? AS TIMESTAMPTZ), 'v0': CAST(? AS BIGINT), 'v1': CAST(? AS VARCHAR), "
        "'v2': CAST(? AS DECIMAL(12,2)), 'v3': CAST(? AS DOUBLE)} AS VARCHAR))"
    )
    return [int(con.execute(sql, list(ROWS[p])).fetchone()[0]) for p in _positions(pq.read_table(written))]  # type: ignore[index]


@pytest.mark.parametrize("older", ["format 1", "format 2"])
def test_an_area_of_an_older_index_format_continues_as_a_new_one(tmp_path: Path, older: str) -> None:
    new, old = tmp_path / "new", tmp_path / "old"
    for base in (new, old):
        _convert(base, RUN1, "d1.csv")
    (written,) = run_files(new / "out", "index/emitted", "t.idx")
    assert {"__pos_hi", "__pos_lo", "__content_hi", "__content_lo"} <= _columns(written)
    assert not {"__hash", "__digest_hi"} & _columns(written)
    # the old area's run 1 left the older file (under this area's run id)
    (replaced,) = run_files(old / "out", "index/emitted", "t.idx")
    if older == "format 1":
        table = _format_1(written, replaced.stem)
    else:
        table = _format_2(replaced, _engine_digests(replaced))
    pq.write_table(table, replaced)

    for base in (new, old):
        _convert(base, RUN2, "d2.csv")
    got_new, got_old = _run2(new / "out"), _run2(old / "out")
    assert got_old == got_new
    # and run 2 did meet run 1's identities: duplicates, a conflict naming run 1, a late merge
    total = got_new["ledger"]["total"]
    assert (total["read"], total["duplicate"], total["quarantined"]) == (7, 3, 1)
    assert total["merged"] == 2 and total["pending_in"] == 1  # the late before, and the waiting one
    (bad,) = [json.loads(x) for x in got_new["quarantine"].splitlines()]
    assert "conflict" in json.dumps(bad) and "<run 1>" in json.dumps(bad)
    emitted = [json.loads(x) for x in got_new["events"].splitlines()]
    assert [(e["action"], e["key"]["id"]) for e in emitted] == [("upsert", 4), ("upsert", 6)]
