"""Printing tables whole: a name or a number is never cut to fit the screen.

rich fits a table wider than the console by cutting its cells: on a 100-column terminal the
demo's ledger showed its tables as ``ferr…`` and its files as ``book…``, and on 80 columns the
1M-row ledger showed 483,316 rows read as ``48…``. ``print_table`` prints the grid where it fits;
on a terminal too narrow for it, one block per row, each cell as ``column value``, the blocks laid
out in columns as wide as the screen allows; to a file or a pipe, the grid at its natural width,
however wide (a log keeps every row on one line).
"""

from __future__ import annotations

from rich.columns import Columns
from rich.console import Console
from rich.table import Table
from rich.text import Text

#: wider than any table: the measure of a table's natural width is not capped by the console
UNBOUNDED = 1_000_000


def natural_width(console: Console, table: Table) -> int:
    """The columns the table takes with no cell cut or wrapped."""
    return console.measure(table, options=console.options.update_width(UNBOUNDED)).maximum


def _plain(cell: object) -> str:
    return cell.plain if isinstance(cell, Text) else str(cell)


def print_table(console: Console, table: Table) -> None:
    width = natural_width(console, table)
    if width <= console.width:
        console.print(table)
        return
    if not console.is_terminal:
        before = console.width
        console.width = width
        try:
            console.print(table, crop=False)
        finally:
            console.width = before
        return
    if table.title:
        console.print(Text(_plain(table.title), style="italic"))
    columns = [(_plain(c.header), [_plain(cell) for cell in c.cells]) for c in table.columns]
    # a row's heading: its leading text columns (a ledger's table and file), ahead of its figures
    # (right-aligned); a table of text alone is headed by its first column
    lead = next((i for i, c in enumerate(table.columns) if c.justify == "right"), 1) or 1
    for row in range(table.row_count):
        heading = [(h, cells[row]) for h, cells in columns[:lead] if cells[row]]
        pairs = [_pair(h, cells[row]) for h, cells in columns[lead:] if cells[row]]
        console.print()
        if heading:
            console.print(Text("   ").join(_pair(h, v, "bold") for h, v in heading))
        console.print(Columns(pairs, padding=(0, 3)))


def _pair(header: str, value: str, style: str = "") -> Text:
    """``header value``: the column's name dim, its value as it is."""
    return Text.assemble((header + " ", "dim"), (value, style))
