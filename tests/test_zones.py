"""Named time zones against Python's zoneinfo (IANA tz database, via the tzdata package): a
local time without an offset is turned into UTC by the engine's plan, which joins the zone's
periods; a time in a DST gap or a DST overlap is quarantined with its reason, never shifted or
guessed."""

from __future__ import annotations

import random
from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest

from tests.conftest import ConvertFn

MAPPING = """
table: t.ferries
files: ["z*"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: integer}
fields:
  id: integer
  at: {type: timestamp, zone: ZONE}
"""


def _zoneinfo(local: datetime, zone: str) -> datetime | str:
    """zoneinfo's answer: the UTC instant, or 'gap' / 'overlap' (PEP 495: fold)."""
    tz = ZoneInfo(zone)
    early, late = local.replace(tzinfo=tz, fold=0), local.replace(tzinfo=tz, fold=1)
    if early.utcoffset() != late.utcoffset():
        # a gap when the local time does not survive the round trip through UTC
        back = early.astimezone(UTC).astimezone(tz).replace(tzinfo=None)
        return "gap" if back != local else "overlap"
    return early.astimezone(UTC)


@pytest.mark.parametrize("zone", ["Europe/Oslo", "America/Sao_Paulo", "Australia/Lord_Howe", "Asia/Kolkata"])
def test_local_times_in_a_named_zone_match_zoneinfo(convert: ConvertFn, zone: str) -> None:
    rng = random.Random(zone)
    tz = ZoneInfo(zone)
    locals_: list[datetime] = []
    # around every transition of a few years (both sides, inside gaps and overlaps) ...
    for year in (1916, 1980, 2000, 2026, 2099):
        t = datetime(year, 1, 1, tzinfo=UTC)
        while t.year == year:
            nxt = t + timedelta(hours=1)
            if t.astimezone(tz).utcoffset() != nxt.astimezone(tz).utcoffset():
                edge = nxt.astimezone(tz).replace(tzinfo=None)
                locals_ += [edge + timedelta(minutes=m) for m in range(-150, 151, 15)]
            t = nxt
    # ... and random instants
    locals_ += [
        datetime(1850, 1, 1) + timedelta(seconds=rng.randrange(350 * 365 * 86400)) for _ in range(200)
    ]
    rows = "".join(f"I,{i},{i},{v.isoformat()}\n" for i, v in enumerate(locals_, start=1))
    done = convert(MAPPING.replace("ZONE", zone), {"z.csv": "op,pos,id,at\n" + rows})
    assert done.ledger()["balanced"]
    got = {e["key"]["id"]: e["values"]["at"] for e in done.events("t.ferries")}
    why = {int(q["id"]): q["_cdcnorm"]["reasons"][0]["reason"] for q in done.quarantine("t.ferries")}
    kinds = set()
    for i, local in enumerate(locals_, start=1):
        expected = _zoneinfo(local, zone)
        if expected == "gap":
            assert "a DST gap" in why[i], local
        elif expected == "overlap":
            assert "a DST overlap" in why[i], local
        else:
            assert isinstance(expected, datetime)
            assert datetime.fromisoformat(got[i].replace("Z", "+00:00")) == expected, local
        kinds.add(expected if isinstance(expected, str) else "exact")
    assert kinds == {"gap", "overlap", "exact"} or zone == "Asia/Kolkata"


def test_an_offset_in_the_value_wins_over_the_zone_and_a_bad_name_is_suggested(convert: ConvertFn) -> None:
    done = convert(
        MAPPING.replace("ZONE", "Europe/Oslo"),
        {"z.csv": "op,pos,id,at\nI,1,1,2026-03-29T02:30:00+02:00\nI,2,2,2026-03-29T02:30:00\n"},
    )
    (e,) = done.events("t.ferries")
    assert e["values"]["at"] == "2026-03-29T00:30:00Z"  # RFC 3339 section 4.2: the offset says it all
    (q,) = done.quarantine("t.ferries")
    assert (
        q["at"] == "2026-03-29T02:30:00"
        and "no such local time in Europe/Oslo" in q["_cdcnorm"]["reasons"][0]["reason"]
    )


def test_an_unknown_zone_name_suggests_the_closest(tmp_path, capsys: pytest.CaptureFixture[str]) -> None:  # type: ignore[no-untyped-def]
    from tests.conftest import cli

    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(MAPPING.replace("ZONE", "Europe/Olso"))
    assert cli("check", "--mappings", str(tmp_path / "m"), str(tmp_path)) == 3
    err = capsys.readouterr().err
    assert 'did you mean "Europe/Oslo"' in err and "t.yaml" in err


def test_a_time_position_in_a_dst_gap_or_overlap_says_so(convert: ConvertFn) -> None:
    """A local-time position in a DST gap or overlap is well formed: its reason says which, as a
    timestamp field's does (it said "malformed position"). zoneinfo is the oracle for both times."""
    mapping = MAPPING.replace("kind: integer", "kind: timestamp, zone: Europe/Oslo").replace("ZONE", "+00:00")
    gap, overlap = datetime(2026, 3, 29, 2, 30), datetime(2026, 10, 25, 2, 30)
    assert _zoneinfo(gap, "Europe/Oslo") == "gap" and _zoneinfo(overlap, "Europe/Oslo") == "overlap"
    done = convert(
        mapping,
        {
            "z.csv": f"op,pos,id,at\nI,{gap.isoformat()},1,\nI,{overlap.isoformat()},2,\nI,2026-02-30T01:00:00,3,\n"
        },
    )
    why = {int(q["id"]): q["_cdcnorm"]["reasons"][0] for q in done.quarantine("t.ferries")}
    assert {r["field"] for r in why.values()} == {"position"}
    assert "a DST gap" in why[1]["reason"] and "a DST overlap" in why[2]["reason"]
    assert why[3]["reason"] == "no such calendar date"
