"""The engine's own bound for a conversion: one statement that reads the CSV, types every value
behind the plan's own guards, sorts by position and writes the envelopes to Parquet.

It is not a conversion (no record numbers, no dedupe, pairing, quarantine, ledger or identity
index: a bad row is only left out), and it is not a floor a conversion could reach. It measures what
the engine needs for the work no conversion can skip, so the speed target can be weighed against
it: if this one statement is already slower than the target, no arrangement of the plan meets it.

    python tests/bench/bound.py [--unsorted] [--jsonl] OUT MAPPINGS_FOLDER DUMP.csv [DUMP.csv ...]

``--unsorted`` leaves the sort out, to tell what putting the changes in order costs; ``--jsonl``
writes JSON Lines as the conversion writes them (each row's ``to_json`` made first, the lines then
sorted and streamed: ``DuckDBEngine.copy``), with the engine's own text of a timestamp, not RFC 3339.

The folder holds one mapping (``dumpgen.write_mapping``'s), and every dump has its header.
"""

from __future__ import annotations

import csv
import sys
from pathlib import Path

from cdcnorm import positions
from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.mapping.load import load_mappings
from cdcnorm.pipeline import compile_table
from cdcnorm.readers.base import RawFile, RawTable
from cdcnorm.readers.csv import csv_syntax
from cdcnorm.sql import ident, lit


def statement(
    engine: DuckDBEngine,
    mappings: Path,
    dumps: list[Path],
    *,
    sort: bool = True,
    lines: bool = False,
) -> tuple[list[str], str]:
    """The statements that define the plan's source on ``engine`` (the conversion's engine, with its
    plan functions and settings), and the one query whose rows are written."""
    (mapping,) = load_mappings(mappings)
    with open(dumps[0], encoding="utf-8", newline="") as f:
        header = next(csv.reader(f))
    raw = RawTable(mapping.mapping.slug)
    internal = [raw.internal(c) for c in header]
    raw.files = [RawFile(i, p, p.name, "csv", list(header), rows=1) for i, p in enumerate(dumps)]
    source = f"{mapping.mapping.slug}__bound"
    raw.add_relation(source, internal)
    plan = compile_table(mapping, raw)
    # the conversion's own reader, without keeping rejects (a record it cannot split fails the bound)
    syntax = csv_syntax(
        mapping.mapping, mapping.mapping.csv.delimiter, mapping.mapping.csv.encoding, header=True
    )
    scan = engine.csv_scan([str(p) for p in dumps], internal, syntax, rejects=None)
    setup = [
        f"CREATE VIEW {ident(source)} AS SELECT 0 AS __file, 0 AS __row, CAST(NULL AS VARCHAR) AS __enc, * "
        f"EXCLUDE (__fname) FROM {scan}",
        f"CREATE VIEW {plan.rel('source')} AS {plan.step('source').sql}",
    ]
    fields = list(mapping.mapping.fields)
    key = list(mapping.mapping.key)
    values = ", ".join(f"{lit(n)}: v{i}" for i, n in enumerate(fields))
    keys = ", ".join(f"{lit(n)}: v{fields.index(n)}" for n in key)
    change = mapping.mapping.change
    position = positions.position_text(change.position, "__pos")
    if change.sequence:
        position += " || '.' || " + positions.sequence_text(change.sequence, change.position, "__seq")
    members = [
        ("action", "__act"),
        ("key", f"{{{keys}}}"),
        ("position", position),
        ("committed_at", "__cat"),
        ("values", f"{{{values}}}"),
        ("origin", "{'file': __file, 'row': __row}"),
    ]
    typed = f"SELECT * FROM ({plan.step('typed').sql}) WHERE __ok"
    order = " ORDER BY __pos, __seq" if sort else ""
    if lines:  # each row's line made first, then the lines sorted, as the conversion writes them
        line = "to_json({" + ", ".join(f"{lit(n)}: {e}" for n, e in members) + "})"
        return setup, f"SELECT line FROM (SELECT {line} AS line, __pos, __seq FROM ({typed})){order}"
    columns = ", ".join(f"{e} AS {ident(n)}" for n, e in members)
    return setup, f"SELECT {columns} FROM ({typed}{order})"


def main() -> None:
    args = sys.argv[1:]
    flags = {"--unsorted", "--jsonl"}
    out, mappings, *dumps = [a for a in args if a not in flags]
    engine = DuckDBEngine()
    setup, query = statement(
        engine,
        Path(mappings),
        [Path(d) for d in dumps],
        sort="--unsorted" not in args,
        lines="--jsonl" in args,
    )
    for sql in setup:
        engine.con.execute(sql)
    if "--jsonl" in args:
        engine.copy(query, Path(out), "lines")
    else:
        engine.con.execute(f"COPY ({query}) TO {lit(out)} (FORMAT PARQUET)")


if __name__ == "__main__":
    main()
