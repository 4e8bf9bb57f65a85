"""Time zones: fixed UTC offsets, or IANA zone names (``Europe/Oslo``) through Python's zoneinfo
and the ``tzdata`` package.

A local time without an offset in a named zone is turned into UTC inside the
engine's plan, not by a Python loop over rows: each zone becomes a small table
of its periods in local time (``local_start``, ``local_end``, ``offset_us``),
computed once with zoneinfo, and a value joins the period that holds it.

- No period holds it: the local time does not exist (the clocks jumped over it,
  a DST gap): quarantined, never shifted.
- Two periods hold it: it happened twice (the clocks went back, a DST overlap),
  and which one is meant is unknown: quarantined, never guessed.
- The table covers the years 1850 to 2200 (beyond, the zone's rules are a
  forecast anyway); a local time outside them is quarantined with that reason.

A value that carries its own offset (``2026-03-29T02:30:00+02:00``) is exact
whatever the zone and needs no table.
"""

from __future__ import annotations

import re
import zoneinfo
from datetime import UTC, datetime, timedelta
from functools import cache
from typing import TYPE_CHECKING

import pyarrow as pa

from cdcnorm.sql import ident

if TYPE_CHECKING:
    from collections.abc import Iterable

    from cdcnorm.engines.duckdb import DuckDBEngine
    from cdcnorm.mapping.load import LoadedMapping

FIXED = re.compile(r"^(Z|UTC|[+-](0\d|1\d|2[0-3]):?[0-5]\d)$")
FIRST_YEAR, LAST_YEAR = 1850, 2200


def is_fixed(zone: str) -> bool:
    return bool(FIXED.match(zone))


@cache
def names() -> frozenset[str]:
    return frozenset(zoneinfo.available_timezones())


def relation(zone: str) -> str:
    """The engine relation of a named zone's periods, quoted."""
    return ident(f"__zone {zone}")


def _offset(tz: zoneinfo.ZoneInfo, t: int) -> int:
    """The zone's UTC offset in seconds at UTC instant ``t`` (seconds since 1970)."""
    off = datetime.fromtimestamp(t, tz).utcoffset()
    return int(off.total_seconds()) if off is not None else 0


@cache
def periods(zone: str) -> pa.Table:
    """The zone's periods of one offset between 1850 and 2200, in local time (microseconds)."""
    tz = zoneinfo.ZoneInfo(zone)
    start = int(datetime(FIRST_YEAR, 1, 1, tzinfo=UTC).timestamp())
    end = int(datetime(LAST_YEAR, 12, 31, tzinfo=UTC).timestamp())
    day = 86_400
    changes = [(start, _offset(tz, start))]
    t = start
    while t < end:  # a day at a time; where the offset changed, find the second it did
        nxt = min(t + day, end)
        if _offset(tz, nxt) != changes[-1][1]:
            lo, hi = t, nxt  # offset(lo) == current, offset(hi) differs
            while hi - lo > 1:
                mid = (lo + hi) // 2
                if _offset(tz, mid) == changes[-1][1]:
                    lo = mid
                else:
                    hi = mid
            changes.append((hi, _offset(tz, hi)))
        t = nxt
    bounds = [c[0] for c in changes[1:]] + [end]
    us = 1_000_000
    starts = [(t0 + off) * us for (t0, off) in changes]
    ends = [(t1 + off) * us for (t1, (_, off)) in zip(bounds, changes, strict=True)]
    offsets = [off * us for _, off in changes]
    epoch = datetime(1970, 1, 1)
    return pa.table(
        {
            "local_start": pa.array([epoch + timedelta(microseconds=s) for s in starts], pa.timestamp("us")),
            "local_end": pa.array([epoch + timedelta(microseconds=e) for e in ends], pa.timestamp("us")),
            "offset_us": pa.array(offsets, pa.int64()),
        }
    )


def local_to_utc(local: str, zone: str) -> str:
    """SQL: TIMESTAMP ``local`` in the named zone -> TIMESTAMPTZ, NULL in a gap, an overlap or
    outside the table's years."""
    return (
        "(SELECT CASE WHEN count(*) = 1 THEN "
        f"CAST(any_value({local} - to_microseconds(z.offset_us)) AS TIMESTAMPTZ) END "
        f"FROM {relation(zone)} z WHERE {local} >= z.local_start AND {local} < z.local_end)"
    )


def matches(local: str, zone: str) -> str:
    """SQL: how many of the zone's periods hold ``local`` (0: a gap or outside, 2: an overlap)."""
    return (
        f"(SELECT count(*) FROM {relation(zone)} z WHERE {local} >= z.local_start AND {local} < z.local_end)"
    )


def used(mappings: Iterable[LoadedMapping]) -> set[str]:
    """The named zones the mappings use (fields, committed_at, a timestamp position)."""
    out = set()
    for m in mappings:
        spec = m.mapping
        found = [f.zone for f in spec.fields.values()] + [spec.change.position.zone]
        if spec.change.committed_at:
            found.append(spec.change.committed_at.zone)
        out |= {z for z in found if z and not is_fixed(z)}
    return out


def register(engine: DuckDBEngine, mappings: Iterable[LoadedMapping]) -> None:
    """Give the engine the period table of every named zone the mappings use."""
    for zone in sorted(used(mappings)):
        engine.register(f"__zone {zone}", periods(zone))
