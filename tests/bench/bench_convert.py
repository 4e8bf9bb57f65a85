"""Benchmark: convert against the floor of reading the same CSV with pyarrow and writing Parquet.

The dump is the realistic one of ``dumpgen.py`` (13 columns, 10-byte hex log positions
and sequences, ``__$`` column names, quoted fields with commas, quotes, LF and CRLF,
Unicode, overlap duplicates, late rows, a few dirty values). Each command runs in a
fresh process; wall time and peak resident memory (max RSS of the child, from the
operating system's accounting) are reported, best of ``--repeat`` runs:

- floor: pyarrow reads every column as text with ``newlines_in_values=True`` (as the
  data needs) and writes one Parquet file;
- convert: ``cdcnorm convert --format parquet`` (every guard, dedupe, pairing, ledger
  and its cross-check on);
- convert-jsonl: ``cdcnorm convert --format jsonl``;
- bound: ``bound.py``, the engine's own bound: one statement that reads the dump, types every value
  behind the plan's guards, sorts and writes the envelopes (no dedupe, pairing, quarantine, ledger
  or identity index), what the speed target is weighed against; bound-jsonl: the same, written as
  JSON Lines;
- at ``--limited`` sizes: ``convert --format parquet --memory-limit 1GB``, once;
- ``--small-files N``: N files of two rows each, converted in one run, as CSV, JSON Lines and
  Parquet files.

    python tests/bench/bench_convert.py --rows 1000000 5000000 --limited 20000000 --small-files 3000
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))
import dumpgen

BOUND = Path(__file__).resolve().parent / "bound.py"

FLOOR = """
import sys, pyarrow as pa, pyarrow.csv as c, pyarrow.parquet as pq
tables = []
for p in sys.argv[2:]:
    with open(p, encoding="utf-8") as f:
        names = next(__import__("csv").reader([f.readline()]))
    tables.append(c.read_csv(p, parse_options=c.ParseOptions(newlines_in_values=True),
        convert_options=c.ConvertOptions(column_types={n: pa.string() for n in names})))
pq.write_table(pa.concat_tables(tables), sys.argv[1])
"""


def convert_command(work: Path, inputs: list[Path], out: str, *extra: str) -> list[str]:
    head = [
        sys.executable,
        "-m",
        "cdcnorm",
        "convert",
        "--quiet",
        "--replace",
        "--mappings",
        str(work / "mappings"),
    ]
    return [*head, "--out", str(work / out), *extra, *map(str, inputs)]


def ledger_of(landing: Path) -> dict[str, object]:
    """The ledger of the landing area's (only) run."""
    (record,) = [json.loads(p.read_text()) for p in (landing / "runs").glob("*.json")]
    ledger: dict[str, object] = record["ledger"]
    return ledger


def run_isolated(cmd: list[str]) -> tuple[float, float]:
    """Wall seconds and the child's peak RSS in MiB."""
    helper = (
        "import resource, subprocess, sys, time, json\n"
        "t = time.perf_counter(); subprocess.run(sys.argv[1:], check=True, stdout=subprocess.DEVNULL)\n"
        "print(json.dumps([time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024]))\n"
    )
    res = subprocess.run([sys.executable, "-c", helper, *cmd], check=True, capture_output=True, text=True)
    wall, mib = json.loads(res.stdout.strip().splitlines()[-1])
    return float(wall), float(mib)


def prepare(rows: int, base: Path | None) -> tuple[Path, list[Path], float]:
    work = Path(tempfile.mkdtemp(prefix="cdcnorm-bench-")) if base is None else base / str(rows)
    work.mkdir(parents=True, exist_ok=True)
    dumpgen.write_mapping(work / "mappings")
    t0 = time.perf_counter()
    files = dumpgen.generate(rows, work)
    return work, files, time.perf_counter() - t0


def bench_size(rows: int, repeat: int, keep: Path | None) -> dict[str, object]:
    work, files, gen = prepare(rows, keep)
    best: dict[str, tuple[float, float]] = {}
    bound = [sys.executable, str(BOUND)]
    after = [str(work / "mappings"), *map(str, files)]  # the bound's mappings and dumps
    for _ in range(repeat):
        runs = {
            "floor": [sys.executable, "-c", FLOOR, str(work / "floor.parquet"), *map(str, files)],
            "convert": convert_command(work, files, "out-parquet", "--format", "parquet"),
            "convert-jsonl": convert_command(work, files, "out-jsonl"),
            "bound": [*bound, str(work / "bound.parquet"), *after],
            "bound-jsonl": [*bound, "--jsonl", str(work / "bound.jsonl"), *after],
        }
        for name, cmd in runs.items():
            wall, mib = run_isolated(cmd)
            if name not in best or wall < best[name][0]:
                best[name] = (wall, mib)
    ledger: dict[str, Any] = ledger_of(work / "out-parquet")
    floor_t, floor_m = best["floor"]
    entry: dict[str, object] = {
        "rows": ledger["total"]["read"],
        "csv_mib": round(sum(f.stat().st_size for f in files) / 2**20, 1),
        "generate_s": round(gen, 1),
        "floor_s": round(floor_t, 2),
        "floor_peak_mib": round(floor_m),
        "ledger_balanced": ledger["balanced"],
        "quarantined": ledger["total"]["quarantined"],
    }
    for name in ("convert", "convert-jsonl", "bound", "bound-jsonl"):
        t, m = best[name]
        entry[f"{name}_s"] = round(t, 2)
        entry[f"{name}_peak_mib"] = round(m)
        entry[f"{name}_time_ratio"] = round(t / floor_t, 2)
        entry[f"{name}_memory_ratio"] = round(m / floor_m, 2)
    if keep is None:
        shutil.rmtree(work)
    return entry


def bench_limited(rows: int, limit: str, keep: Path | None) -> dict[str, object]:
    work, files, gen = prepare(rows, keep)
    wall, mib = run_isolated(
        convert_command(work, files, "out-limited", "--format", "parquet", "--memory-limit", limit)
    )
    ledger: dict[str, Any] = ledger_of(work / "out-limited")
    entry: dict[str, object] = {
        "rows": ledger["total"]["read"],
        "csv_mib": round(sum(f.stat().st_size for f in files) / 2**20, 1),
        "generate_s": round(gen, 1),
        "memory_limit": limit,
        "convert_s": round(wall, 2),
        "convert_peak_mib": round(mib),
        "ledger_balanced": ledger["balanced"],
    }
    if keep is None:
        shutil.rmtree(work)
    return entry


#: The column names of the small files, as dumpgen's mapping reads them.
SMALL_NAMES = ["__$operation", "__$start_lsn", "__$seqval", "__$commit_time", "delivery_id", "recipient"]
SMALL_NAMES += ["locker", "fee", "parcels", "weight_kg", "dropped_at", "state", "express", "note"]


def _small_row(i: int, j: int) -> list[str]:
    """Row ``j`` of small file ``i``: an insert with its own position and key."""
    head = ["2", f"0x{2 * i + j:020X}", f"0x{j:020X}", "2026-01-01T00:00:00Z", str(2 * i + j), "Åsa", "L-1"]
    return [*head, "1.00", "1", "1.5", "2026-01-01T00:00:00Z", "booked", "true", "a, b"]


def bench_small_files(count: int) -> list[dict[str, object]]:
    """``count`` files of two rows each, converted in one run: the same rows as CSV, as JSON Lines
    and as Parquet files."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    names = SMALL_NAMES
    results = []
    for fmt in ("csv", "jsonl", "parquet"):
        work = Path(tempfile.mkdtemp(prefix="cdcnorm-bench-small-"))
        dumpgen.write_mapping(work / "mappings")
        mapping = work / "mappings" / "deliveries.yaml"
        mapping.write_text(mapping.read_text().replace("deliveries-*.csv*", f"deliveries-*.{fmt}"))
        dumps = work / "dumps"
        dumps.mkdir()
        for i in range(count):
            rows = [_small_row(i, j) for j in range(2)]
            path = dumps / f"deliveries-{i:05d}.{fmt}"
            if fmt == "csv":
                lines = [",".join(f'"{n}"' for n in names)] + [",".join(f'"{v}"' for v in r) for r in rows]
                path.write_text("\n".join(lines) + "\n", encoding="utf-8")
            elif fmt == "jsonl":
                path.write_text("".join(json.dumps(dict(zip(names, r, strict=True))) + "\n" for r in rows))
            else:
                pq.write_table(pa.table({n: [r[k] for r in rows] for k, n in enumerate(names)}), path)
        wall, mib = run_isolated(convert_command(work, [dumps], "out", "--format", "parquet"))
        ledger: dict[str, Any] = ledger_of(work / "out")
        shutil.rmtree(work)
        results.append(
            {
                "files": count,
                "format": fmt,
                "rows": ledger["total"]["read"],
                "convert_s": round(wall, 2),
                "peak_mib": round(mib),
            }
        )
    return results


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, nargs="*", default=[1_000_000, 5_000_000])
    ap.add_argument("--limited", type=int, nargs="*", default=[], help="sizes run once under --memory-limit")
    ap.add_argument("--limit", default="1GB")
    ap.add_argument("--small-files", type=int, default=0)
    ap.add_argument("--keep", type=Path, help="keep generated dumps and outputs here")
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()
    print(json.dumps({"cores": os.cpu_count(), "python": sys.version.split()[0]}), flush=True)
    for rows in args.rows:
        print(json.dumps(bench_size(rows, args.repeat, args.keep)), flush=True)
    for rows in args.limited:
        print(json.dumps(bench_limited(rows, args.limit, args.keep)), flush=True)
    if args.small_files:
        for result in bench_small_files(args.small_files):
            print(json.dumps(result), flush=True)


if __name__ == "__main__":
    main()
