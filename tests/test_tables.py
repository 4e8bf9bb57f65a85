"""Tables are printed whole: a name or a number is never cut to fit the screen (rich's own fitting
cut the demo's ledger to ``ferr…`` and ``book…`` on a 100-column terminal)."""

from __future__ import annotations

import io
from pathlib import Path
from typing import Any

import pytest
from rich.console import Console
from rich.table import Table

from cdcnorm.tables import print_table
from tests.conftest import cli

NAMES = ["lockers.deliveries", "deliveries-archive-2026-11-30.csv", "deliveries-live-2026-11-30.csv"]


def _ledger() -> Table:
    t = Table(title="row ledger")
    t.add_column("table")
    t.add_column("file")
    for col in ("read", "carried in", "emitted", "merged", "duplicate", "quarantined", "pending"):
        t.add_column(col, justify="right")
    t.add_row(NAMES[0], NAMES[1], "483316", "0", "333134", "149940", "0", "28", "0")
    t.add_row(NAMES[0], NAMES[2], "502648", "0", "332000", "150000", "19300", "37", "0")
    t.add_row("all", "", "985964", "0", "665134", "299940", "19300", "65", "0")
    return t


def _printed(width: int, terminal: bool, table: Table) -> str:
    buf = io.StringIO()
    console = Console(file=buf, width=width, force_terminal=terminal, color_system=None, markup=False)
    print_table(console, table)
    return buf.getvalue()


@pytest.mark.parametrize("width", [40, 80, 120])
def test_on_a_narrow_terminal_every_cell_is_printed_whole(width: int) -> None:
    text = _printed(width, True, _ledger())
    assert "…" not in text
    for cell in [*NAMES, "483316", "502648", "985964", "333134", "149940", "19300", "quarantined 65"]:
        assert cell in text, (cell, text)
    assert max(len(line) for line in text.splitlines()) <= width
    if width >= 80:  # each row is a block headed by its table and file (narrower, the heading wraps)
        assert f"table {NAMES[0]}   file {NAMES[1]}" in text


def test_to_a_file_or_pipe_the_grid_is_printed_at_its_natural_width() -> None:
    text = _printed(60, False, _ledger())
    assert "…" not in text
    lines = text.splitlines()
    assert max(len(line) for line in lines) > 60
    # one line a row: the file's name and its figures side by side
    row = next(line for line in lines if NAMES[1] in line)
    assert "483316" in row and "149940" in row


def test_a_table_that_fits_is_printed_as_rich_prints_it() -> None:
    small = Table(title="t")
    small.add_column("a")
    small.add_column("n", justify="right")
    small.add_row("x", "1")
    buf = io.StringIO()
    Console(file=buf, width=80, force_terminal=True, color_system=None).print(small)
    assert _printed(80, True, small) == buf.getvalue()


def _terminal_out(monkeypatch: pytest.MonkeyPatch, width: int) -> io.StringIO:
    """The command's output console as ``cli.out`` makes it (soft wraps, no markup), on a terminal of
    ``width`` columns; what it prints lands in the returned buffer."""
    from cdcnorm import cli as cli_mod

    buf = io.StringIO()
    settings: dict[str, Any] = {"highlight": False, "markup": False, "soft_wrap": True}
    console = Console(file=buf, width=width, force_terminal=True, color_system=None, **settings)
    monkeypatch.setattr(cli_mod, "out", console)
    return buf


def test_the_demos_ledger_on_a_100_column_terminal_names_every_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    buf = _terminal_out(monkeypatch, 100)
    assert cli("demo", "--out", str(tmp_path / "demo")) == 0
    text = buf.getvalue()
    assert "…" not in text
    ledger = text[: text.index("ledger balanced")]  # the messages after it wrap in the terminal
    assert max(len(line) for line in ledger.splitlines()) <= 100
    for name in (
        "ferry.bookings",
        "ferry.passengers",
        "ferry.sailings",
        "bookings-archive.csv",
        "sailings.jsonl",
    ):
        assert name in text, text


def test_a_trace_on_an_80_column_terminal_names_every_file_and_line(monkeypatch: pytest.MonkeyPatch) -> None:
    """A lineage tree's deep lines were cut at the screen's edge (``marts/daily_reven``): they wrap."""
    from tests.conftest import ROOT

    buf = _terminal_out(monkeypatch, 80)
    models, mappings = str(ROOT / "examples" / "models"), str(ROOT / "mappings")
    assert cli("trace", "--models", models, "--mappings", mappings, "route_rankings.share_of_day") == 0
    text = buf.getvalue()
    assert max(len(line) for line in text.splitlines()) <= 80
    for where in ("marts/daily_revenue.sql:4", "marts/route_rankings.sql:8", "staging/stg_bookings.sql:8"):
        assert where in text, text
