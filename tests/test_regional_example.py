"""The README's example of values written their own way (``examples/regional``), through the CLI:
the events and reasons the README shows. Oracles: Python's ``decimal`` for the amounts, ``zoneinfo``
for Oslo's local times, and rounding half to even (PostgreSQL's timestamp input) for the commit
times."""

from __future__ import annotations

import datetime as dt
import json
from decimal import Decimal
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

from cdcnorm.cli import main
from tests.conftest import ROOT

EXAMPLE = ROOT / "examples" / "regional"


def test_the_regional_example_gives_the_events_the_readme_shows(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "out"
    code = main(
        [
            "convert",
            "--json",
            "--mappings",
            str(EXAMPLE / "mappings"),
            "--out",
            str(out),
            str(EXAMPLE / "dumps"),
        ]
    )
    assert code == 0
    result = json.loads(capsys.readouterr().out)
    assert result["ledger"]["balanced"] is True
    assert [n["note"] for n in result["notes"]] == [
        "4 values of committed_at had digits below the microsecond: rounded to the nearest microsecond, "
        "ties to the even one (sub_microsecond: round)"
    ]
    events = [
        json.loads(line)
        for f in sorted((out / "events").rglob("*.jsonl"))
        for line in f.read_text().splitlines()
    ]
    shown = [{k: e[k] for k in ("key", "committed_at", "values")} for e in events]
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    for event in shown:  # each event line as the README prints it
        assert json.dumps(event, ensure_ascii=False) in readme
    oslo = ZoneInfo("Europe/Oslo")
    sold = dt.datetime(2026, 3, 1, 8, 5, 9, tzinfo=oslo).astimezone(dt.UTC)  # zoneinfo
    assert shown[0]["values"]["sold_at"] == sold.strftime("%Y-%m-%dT%H:%M:%SZ")
    assert Decimal(shown[0]["values"]["amount"]) == Decimal("1234.50")  # 1.234,50
    assert shown[2]["committed_at"] == "2026-03-01T09:00:01Z"  # .9999995: a tie, the sixth digit odd
    rejected = [
        json.loads(line)["_cdcnorm"]
        for f in sorted((out / "quarantine").rglob("*.jsonl"))
        for line in f.read_text().splitlines()
    ]
    assert [(q["row"], q["reasons"][0]["reason"]) for q in rejected] == [
        (5, "no such local time in Europe/Oslo: the clocks jumped over it (a DST gap)"),
        (
            6,
            'not a decimal number written with "," as its decimal mark and "." between groups of three digits',
        ),
    ]
