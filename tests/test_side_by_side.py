"""Small tables run two at a time, on two connections to the engine's database
(``DuckDBEngine.spread``): the landing area must hold the same bytes as when every table runs
alone, one after another on one connection."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import threading
import time
from pathlib import Path

import duckdb
import pytest

from cdcnorm import pipeline
from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import CdcnormError, InputError
from tests.conftest import ROOT, cli, landing_outputs

DUMPS = ROOT / "examples" / "dumps"
#: two runs, so that the second meets the first's identities and its waiting before-image
RUNS = [
    [DUMPS / "bookings-archive.csv", DUMPS / "passengers.csv"],
    [DUMPS / "bookings-live.csv", DUMPS / "sailings.jsonl", ROOT / "examples" / "next-day"],
]


def _area(
    tmp_path: Path, name: str, threads: str, capsys: pytest.CaptureFixture[str]
) -> tuple[Path, list[object]]:
    area = tmp_path / name
    ledgers: list[object] = []
    for paths in RUNS:
        code = cli(
            "convert", *map(str, paths), "--mappings", str(ROOT / "mappings"), "--out", str(area),
            "--threads", threads, "--json",
        )  # fmt: skip
        assert code == 0
        ledger = re.sub(r"\d{6}-\d{8}T\d{6}Z", "RUN", capsys.readouterr().out)
        ledgers.append(json.loads(ledger)["ledger"])
    return area, ledgers


def _outputs(area: Path) -> dict[str, bytes]:
    """Events and quarantine lines, with run ids (which name the hour of each run) as ``RUN``."""
    return {k: re.sub(rb"\d{6}-\d{8}T\d{6}Z", b"RUN", v) for k, v in landing_outputs(area).items()}


def _identities(area: Path) -> dict[str, list[tuple[object, ...]]]:
    """Every identity and waiting image the area keeps, per file kind and table, without the run
    ids (which name the hour of each run)."""
    out: dict[str, list[tuple[object, ...]]] = {}
    for f in sorted((area / "index").glob("*/*/*.parquet")):
        key = f"{f.parent.parent.name}/{f.parent.name}"
        rows = duckdb.sql(f"SELECT * EXCLUDE (__run) FROM read_parquet('{f}')").fetchall()
        out.setdefault(key, []).extend(rows)
    return out


@pytest.mark.parametrize("shared", [pipeline.SHARED_ROWS, 0])
def test_tables_side_by_side_write_what_one_connection_writes(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, shared: int
) -> None:
    """With two threads the example's tables (three, of a few rows each) run side by side; with
    ``shared`` 0 every table counts as large and runs alone; with one thread nothing runs side by
    side. Events, quarantine lines, identities and ledgers must be the same in each."""
    monkeypatch.setattr(pipeline, "SHARED_ROWS", shared)
    alone, alone_ledgers = _area(tmp_path, "alone", "1", capsys)
    together, together_ledgers = _area(tmp_path, "together", "2", capsys)
    outputs = _outputs(alone)
    assert {"events/ferry.bookings.jsonl", "quarantine/ferry.bookings.jsonl"} <= set(outputs)
    assert b"conflict with run RUN" in outputs["quarantine/ferry.bookings.jsonl"]
    assert _outputs(together) == outputs
    assert _identities(together) == _identities(alone)
    assert together_ledgers == alone_ledgers


def test_spread_takes_no_new_item_after_an_error_and_raises_it() -> None:
    """The first error stops both connections from taking new items; it is raised as it was. The
    connection holding item 1 finishes it (after the error) and takes nothing more."""
    engine = DuckDBEngine(threads=2)
    done: list[int] = []
    raised, second = threading.Event(), threading.Event()

    def work(e: DuckDBEngine, item: int) -> None:
        e.rows("SELECT count(*) FROM range(1000)")
        if item == 0:
            assert second.wait(10)  # both connections hold an item
            raised.set()
            raise InputError("item 0 is bad", file="zero.csv")
        second.set()
        assert raised.wait(10)
        time.sleep(0.2)  # the error is recorded by now
        done.append(item)

    with pytest.raises(CdcnormError, match="item 0 is bad"):
        engine.spread(list(range(20)), work)
    assert done == [1]


def test_spread_gives_each_connection_the_catalog_and_the_session() -> None:
    """A sibling connection sees tables the engine made, the plan's functions and the registered
    Arrow tables, and reads timestamps in UTC as the engine does."""
    import pyarrow as pa

    engine = DuckDBEngine(threads=2)
    engine.execute("CREATE TABLE made_here AS SELECT 41 AS n")
    engine.register("__zone here", pa.table({"k": [1]}))
    seen: dict[int, tuple[object, ...]] = {}
    lock = threading.Lock()

    def work(e: DuckDBEngine, item: int) -> None:
        (row,) = e.rows(
            "SELECT (SELECT n FROM made_here) + 1, plan_hex_key('ff'), (SELECT k FROM \"__zone here\"), "
            "CAST(TIMESTAMPTZ '2026-03-01 10:00:00+02:00' AS VARCHAR)"
        )
        with lock:
            seen[item] = row

    engine.spread(list(range(6)), work)
    # RFC 3339 instant 10:00+02:00 is 08:00 UTC (the engine's session time zone is UTC)
    assert set(seen.values()) == {(42, 255, 1, "2026-03-01 08:00:00+00")}


SIGINT_SCRIPT = """
import os, signal, threading, time
from cdcnorm.engines.duckdb import DuckDBEngine
engine = DuckDBEngine(threads=2)
long = "SELECT count(*) FROM range(20000000000) t(i) WHERE i % 7 = 3"  # minutes, if not stopped
threading.Timer(1.0, lambda: os.kill(os.getpid(), signal.SIGINT)).start()
began = time.monotonic()
try:
    engine.spread([1, 2, 3, 4], lambda e, item: e.rows(long))
except BaseException as e:
    print(type(e).__name__, round(time.monotonic() - began))
"""


def test_ctrl_c_stops_both_connections_and_is_an_interrupt() -> None:
    """Ctrl-C while two connections each run a query: both stop at once and the caller gets
    KeyboardInterrupt (which the CLI reports as exit 130), not the client's RuntimeError("Query
    interrupted") that DuckDB raises on the main thread while another thread runs a query."""
    out = subprocess.run(
        [sys.executable, "-c", SIGINT_SCRIPT], capture_output=True, text=True, timeout=120, check=True
    ).stdout.split()
    assert out[0] == "KeyboardInterrupt", out
    assert int(out[1]) < 10, out  # seconds: stopped, not run to the end
