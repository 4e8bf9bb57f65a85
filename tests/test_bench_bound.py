"""The benchmark's bound (``tests/bench/bound.py``) does the typing the conversion does: on the
benchmark's dump it keeps exactly the rows the conversion's type stage lets through."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import duckdb

from tests.conftest import ROOT, bench_dump, cli, last_run


def test_the_bound_types_every_row_as_the_conversion_does(tmp_path: Path) -> None:
    mdir, dumps = bench_dump(tmp_path, 30_000)
    files = sorted(dumps.glob("*.csv"))
    bound = tmp_path / "bound.parquet"
    subprocess.run(
        [sys.executable, str(ROOT / "tests" / "bench" / "bound.py"), str(bound), str(mdir), *map(str, files)],
        check=True,
    )
    out = tmp_path / "out"
    assert cli("convert", *map(str, files), "--mappings", str(mdir), "--out", str(out), "--quiet") == 0
    read = last_run(out)["ledger"]["total"]["read"]
    quarantine = [
        json.loads(line)
        for p in (out / "quarantine").rglob("*.jsonl")
        for line in p.read_text(encoding="utf-8").splitlines()
    ]
    # a row the type stage refuses has a reason naming its column; the later stages' reasons name none
    refused = {
        (q["_cdcnorm"]["file"], q["_cdcnorm"]["row"])
        for q in quarantine
        if any(r["column"] is not None for r in q["_cdcnorm"]["reasons"])
    }
    assert refused, "the dump has dirty values"
    con = duckdb.connect()
    (kept,) = con.execute(f"SELECT count(*) FROM '{bound}'").fetchone() or (0,)
    assert kept == read - len(refused)
    # and every event's position (without its rank) and key is one of the bound's rows
    events = con.execute(
        f"SELECT DISTINCT regexp_replace(position, '[.][0-9]+$', ''), key.delivery_id "
        f"FROM '{out}/events/*/*.jsonl'"
    ).fetchall()
    rows = set(con.execute(f"SELECT position, key.delivery_id FROM '{bound}'").fetchall())
    assert events and set(events) <= rows
