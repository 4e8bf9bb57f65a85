"""Benchmark: the dump of ``dumpgen.py`` written in the forms databases dump in, each converted
against its CSV twin (the same values as RFC 4180 CSV), both with ``--format parquet``.

The forms, each written from the CSV's values by the form's own rules (one line of SQL per record,
made by the engine and written as it is):

- ``copy-text``: PostgreSQL's COPY text format (PostgreSQL's documentation, COPY, "Text Format"): a
  tab between fields, a backslash, tab, LF and CR escaped as ``\\\\ \\t \\n \\r``, ``\\N`` for NULL,
  a header row; mapping ``csv: {escapes: backslash}``.
- ``enclosed``: MySQL's and MariaDB's ``SELECT ... INTO OUTFILE ... FIELDS TERMINATED BY ','
  ENCLOSED BY '"'`` (their documentation, SELECT ... INTO): every field quoted, a backslash and a
  quote escaped with a backslash, an LF with a backslash before it, a CR as it is, ``\\N`` for NULL,
  no header; mapping ``csv: {escapes: backslash, quote: '"', delimiter: ","}``.
- ``bulk-copy``: plain text as a bulk-copy export writes it: ``|~|`` between fields, nothing
  quoted or escaped, an empty text as one NUL character, NULL as nothing, CRLF line ends, no header;
  mapping ``csv: {escapes: none, delimiter: "|~|", empty: "\\0"}``. Plain text cannot hold a line
  break, so the values' line breaks are made spaces, and its CSV twin is written from those values.

Each form must convert to the same events as its twin (every field but ``origin``, whose file names
differ: ``EXCEPT ALL`` both ways) and quarantine as many rows; then the two run in turn ``--pairs``
times, each in a fresh process, and the medians and each pair's ratio are reported.

    python tests/bench/bench_forms.py --rows 1000000 --pairs 3
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import sys
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import duckdb

sys.path.insert(0, str(Path(__file__).resolve().parent))
import dumpgen
from bench_convert import convert_command, ledger_of, run_isolated

FORMS = ("copy-text", "enclosed", "bulk-copy")


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _s(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def _copy_text(col: str) -> str:
    escaped = f"replace(replace(replace(replace({col}, '\\', '\\\\'), chr(9), '\\t'), chr(10), '\\n'), chr(13), '\\r')"
    return f"coalesce({escaped}, '\\N')"


def _enclosed(col: str) -> str:
    escaped = f"replace(replace(replace({col}, '\\', '\\\\'), '\"', '\\\"'), chr(10), '\\' || chr(10))"
    return f"CASE WHEN {col} IS NULL THEN '\\N' ELSE '\"' || {escaped} || '\"' END"


def _bulk_copy(col: str) -> str:
    return f"CASE WHEN {col} IS NULL THEN '' WHEN {col} = '' THEN chr(0) ELSE {col} END"


#: form -> (the cell's SQL, delimiter, line end, header row, the mapping's csv options)
WRITERS: dict[str, tuple[Callable[[str], str], str, str, bool, str]] = {
    "copy-text": (_copy_text, "\t", "\n", True, "csv: {escapes: backslash}"),
    "enclosed": (_enclosed, ",", "\n", False, "csv: {escapes: backslash, quote: '\"', delimiter: ','"),
    "bulk-copy": (_bulk_copy, "|~|", "\r\n", False, 'csv: {escapes: none, delimiter: "|~|", empty: "\\0"'),
}


def _lines(con: duckdb.DuckDBPyConnection, sql: str, path: Path, header: str | None) -> None:
    """Write the one text column of ``sql``'s rows (each a record with its line end) to ``path``."""
    with open(path, "w", encoding="utf-8", newline="") as out:
        if header is not None:
            out.write(header)
        reader = con.sql(sql).to_arrow_reader(100_000)
        for batch in reader:
            out.write("".join(batch.column(0).to_pylist()))


def _mapping(csv: str, columns: list[str], header: bool) -> str:
    """The benchmark's mapping with ``csv`` options (and the columns, for files without a header)."""
    if not header:
        csv += ", header: false, columns: [" + ", ".join(json.dumps(c) for c in columns) + "]}"
    elif not csv.endswith("}"):
        csv += "}"
    return dumpgen.MAPPING.replace("key: [delivery_id]\n", f"key: [delivery_id]\n{csv}\n")


def write_forms(
    dumps: list[Path], work: Path, forms: tuple[str, ...] = FORMS
) -> dict[str, tuple[Path, Path]]:
    """Each form's folder and its CSV twin's (each with ``mappings/`` and the dump files)."""
    con = duckdb.connect()
    made: dict[str, tuple[Path, Path]] = {}
    twin_of_plain = work / "csv-flat"
    for form in forms:
        cell, delimiter, end, header, csv = WRITERS[form]
        folder = work / form
        (folder / "mappings").mkdir(parents=True, exist_ok=True)
        if form == "bulk-copy":
            (twin_of_plain / "mappings").mkdir(parents=True, exist_ok=True)
            dumpgen.write_mapping(twin_of_plain / "mappings")
        columns: list[str] = []
        for dump in dumps:
            con.execute(
                f"CREATE OR REPLACE TABLE t AS SELECT * FROM read_csv({_s(str(dump))}, all_varchar = true, "
                "header = true, quote = '\"', escape = '\"', allow_quoted_nulls = false, strict_mode = true)"
            )
            columns = [r[0] for r in con.execute("DESCRIBE t").fetchall()]
            if form == "bulk-copy":  # plain text holds no line break: the values of both made so
                flat = ", ".join(
                    f"regexp_replace({_q(c)}, '[\\r\\n]+', ' ', 'g') AS {_q(c)}" for c in columns
                )
                con.execute(f"CREATE OR REPLACE TABLE t AS SELECT {flat} FROM t")
                con.execute(f"COPY t TO {_s(str(twin_of_plain / dump.name))} (FORMAT csv, HEADER true)")
            cells = f" || {_s(delimiter)} || ".join(cell(_q(c)) for c in columns)
            head = delimiter.join(columns) + end if header else None
            _lines(con, f"SELECT {cells} || {_s(end)} FROM t", folder / dump.name, head)
        (folder / "mappings" / "deliveries.yaml").write_text(_mapping(csv, columns, header))
        made[form] = (folder, twin_of_plain if form == "bulk-copy" else work)
    return made


def same_events(a: Path, b: Path) -> bool:
    """Two landing areas hold the same events, every field but ``origin``, as many times each."""
    con = duckdb.connect()
    ea, eb = (f"read_parquet({_s(str(p / 'events' / '*' / '*.parquet'))})" for p in (a, b))
    differ = 0
    for x, y in ((ea, eb), (eb, ea)):
        row = con.execute(
            f"SELECT count(*) FROM (SELECT * EXCLUDE (origin) FROM {x} EXCEPT ALL SELECT * EXCLUDE (origin) FROM {y})"
        ).fetchone()
        differ += int(row[0]) if row else 1
    return differ == 0


def bench_form(form: str, folder: Path, twin: Path, pairs: int) -> dict[str, Any]:
    files = sorted(p for p in folder.iterdir() if p.is_file())
    twin_files = sorted(p for p in twin.iterdir() if p.is_file() and p.suffix == ".csv")
    a = convert_command(folder, files, "out", "--format", "parquet")
    b = convert_command(twin, twin_files, "out-twin", "--format", "parquet")
    walls: dict[str, list[float]] = {"form": [], "csv": []}
    peaks: dict[str, list[float]] = {"form": [], "csv": []}
    for _ in range(pairs):
        for name, cmd in (("form", a), ("csv", b)):
            wall, mib = run_isolated(cmd)
            walls[name].append(wall)
            peaks[name].append(mib)
    la: dict[str, Any] = ledger_of(folder / "out")
    lb: dict[str, Any] = ledger_of(twin / "out-twin")
    ratios = [x / y for x, y in zip(walls["form"], walls["csv"], strict=True)]
    return {
        "form": form,
        "rows": la["total"]["read"],
        "same_events": same_events(folder / "out", twin / "out-twin"),
        "quarantined": [la["total"]["quarantined"], lb["total"]["quarantined"]],
        "ledgers_balanced": bool(la["balanced"] and lb["balanced"]),
        "form_s": round(statistics.median(walls["form"]), 2),
        "csv_s": round(statistics.median(walls["csv"]), 2),
        "form_peak_mib": round(statistics.median(peaks["form"])),
        "csv_peak_mib": round(statistics.median(peaks["csv"])),
        "ratio_median": round(statistics.median(ratios), 2),
        "ratio_range": [round(min(ratios), 2), round(max(ratios), 2)],
        "pairs": pairs,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--pairs", type=int, default=3)
    ap.add_argument("--forms", nargs="*", default=list(FORMS), choices=FORMS)
    ap.add_argument("--keep", type=Path, help="keep generated dumps and outputs here")
    args = ap.parse_args()
    work = Path(tempfile.mkdtemp(prefix="cdcnorm-forms-")) if args.keep is None else args.keep
    work.mkdir(parents=True, exist_ok=True)
    dumpgen.write_mapping(work / "mappings")
    dumps = dumpgen.generate(args.rows, work)
    made = write_forms(dumps, work, tuple(args.forms))
    for form, (folder, twin) in made.items():
        print(json.dumps(bench_form(form, folder, twin, args.pairs)), flush=True)
    if args.keep is None:
        shutil.rmtree(work)


if __name__ == "__main__":
    main()
