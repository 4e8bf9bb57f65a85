"""Work spread over two connections to the engine's database (``DuckDBEngine.spread``)."""

from __future__ import annotations

import threading

import pytest

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import CdcnormError, InputError


def test_spread_takes_no_new_item_after_an_error_and_raises_it() -> None:
    """The first error stops both connections from taking new items; it is raised as it was."""
    engine = DuckDBEngine(threads=2)
    done: list[int] = []
    lock = threading.Lock()

    def work(e: DuckDBEngine, item: int) -> None:
        e.rows("SELECT count(*) FROM range(1000)")
        if item == 3:
            raise InputError("item 3 is bad", file="three.csv")
        with lock:
            done.append(item)

    with pytest.raises(CdcnormError, match="item 3 is bad"):
        engine.spread(list(range(20)), work)
    # the other connection may finish the item it holds when the error comes, and no more
    assert len(done) <= 4, done
    assert 3 not in done


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
