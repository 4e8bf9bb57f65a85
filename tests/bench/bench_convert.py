"""Benchmark: convert against the floor of reading the same CSV with pyarrow and writing Parquet.

Generates synthetic dumps (a 12-column table with paired updates, deletes, 2%
overlap duplicates, rows out of order), then runs, each in a fresh process:

- floor: pyarrow.csv.read_csv + pyarrow.parquet.write_table
- convert: cdcnorm convert --format parquet (all validation on)
- convert-jsonl: cdcnorm convert --format jsonl

and reports wall time and peak memory (max RSS), with the ratios to the floor.

    python tests/bench/bench_convert.py --rows 1000000 5000000 [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

MAPPING = """\
table: bench.orders
files: ["orders*.csv"]
key: [order_id]
change:
  action: {column: op, codes: {D: delete, I: insert, B: before, A: after}}
  position: {column: lsn, kind: hex-pair}
  sequence: {column: seq, kind: integer}
  committed_at: {column: commit_ts}
fields:
  order_id: integer
  customer: text
  amount: decimal(12,2)
  quantity: integer
  created_at: timestamp
  status: text
  express: boolean
  note: text
"""


def generate(rows: int, folder: Path, seed: int = 7) -> list[Path]:
    """About ``rows`` rows over two overlapping files, shuffled."""
    rng = np.random.default_rng(seed)
    changes = int(rows / 1.5)
    kind = rng.choice(
        np.array([0, 1, 2], dtype=np.int8), size=changes, p=[0.45, 0.45, 0.10]
    )  # insert, update, delete
    pos = np.arange(changes, dtype=np.int64) * 40 + 0x16_0000_0000
    ids = rng.integers(1, max(changes // 2, 2), size=changes)
    reps = np.where(kind == 1, 2, 1)
    c_idx = np.repeat(np.arange(changes), reps)
    first = np.ones(len(c_idx), dtype=bool)
    first[1:] = c_idx[1:] != c_idx[:-1]
    k = kind[c_idx]
    op = np.where(k == 0, "I", np.where(k == 2, "D", np.where(first, "B", "A")))
    n = len(c_idx)
    p = pos[c_idx]
    lsn = np.char.add(np.char.add(np.char.mod("%X", p >> 32), "/"), np.char.mod("%X", p & 0xFFFFFFFF))
    cents = rng.integers(0, 10_000_000, size=n)
    amount = np.char.add(
        np.char.add((cents // 100).astype(str), "."), np.char.zfill((cents % 100).astype(str), 2)
    )
    secs = (1_767_225_600 + c_idx * 3).astype("datetime64[s]")
    commit = np.char.add(np.datetime_as_string(secs, unit="s").astype(str), "Z")
    created = np.char.add(np.datetime_as_string(secs - 86_400, unit="s").astype(str), "+01:00")
    table = pa.table(
        {
            "op": op,
            "lsn": lsn,
            "seq": np.zeros(n, dtype=np.int64),
            "commit_ts": commit,
            "order_id": ids[c_idx],
            "customer": np.char.add("customer-", (ids[c_idx] % 9973).astype(str)),
            "amount": amount,
            "quantity": rng.integers(1, 50, size=n),
            "created_at": created,
            "status": rng.choice(np.array(["new", "paid", "shipped", "returned, partly"]), size=n),
            "express": rng.choice(np.array(["true", "false"]), size=n),
            "note": rng.choice(np.array(["", 'said "leave at door"', "fragile", "call ahead"]), size=n),
        }
    )
    order = rng.permutation(n)
    table = table.take(pa.array(order))
    overlap = int(n * 0.02)
    cut = n // 2
    live = table.slice(0, cut + overlap)
    archive = table.slice(cut)
    paths = [folder / "orders-live.csv", folder / "orders-archive.csv"]
    pacsv.write_csv(live, paths[0])
    pacsv.write_csv(archive, paths[1])
    return paths


FLOOR = """
import sys, pyarrow.csv as c, pyarrow.parquet as pq, pyarrow as pa
tables = [c.read_csv(p) for p in sys.argv[2:]]
pq.write_table(pa.concat_tables(tables, promote_options="permissive"), sys.argv[1])
"""


def convert_command(work: Path, files: list[Path], out: str, *extra: str) -> list[str]:
    head = [sys.executable, "-m", "cdcnorm", "convert", "--quiet", "--mappings", str(work / "mappings")]
    return [*head, "--out", str(work / out), *extra, *map(str, files)]


def run_isolated(cmd: list[str]) -> tuple[float, float]:
    helper = (
        "import resource, subprocess, sys, time, json\n"
        "t = time.perf_counter(); subprocess.run(sys.argv[1:], check=True, stdout=subprocess.DEVNULL)\n"
        "print(json.dumps([time.perf_counter() - t, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024]))\n"
    )
    res = subprocess.run([sys.executable, "-c", helper, *cmd], check=True, capture_output=True, text=True)
    wall, mib = json.loads(res.stdout.strip().splitlines()[-1])
    return float(wall), float(mib)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 5_000_000])
    ap.add_argument("--keep", type=Path, help="keep generated dumps and outputs here")
    ap.add_argument("--repeat", type=int, default=1)
    args = ap.parse_args()
    report = []
    for rows in args.rows:
        work = Path(tempfile.mkdtemp(prefix="cdcnorm-bench-")) if not args.keep else args.keep / str(rows)
        work.mkdir(parents=True, exist_ok=True)
        (work / "mappings").mkdir(exist_ok=True)
        (work / "mappings" / "orders.yaml").write_text(MAPPING)
        t0 = time.perf_counter()
        files = generate(rows, work)
        gen = time.perf_counter() - t0
        size = sum(f.stat().st_size for f in files)
        best: dict[str, tuple[float, float]] = {}

        for _ in range(args.repeat):
            runs = {
                "floor": [sys.executable, "-c", FLOOR, str(work / "floor.parquet"), *map(str, files)],
                "convert": convert_command(work, files, "out-parquet", "--format", "parquet"),
                "convert-jsonl": convert_command(work, files, "out-jsonl"),
            }
            for name, cmd in runs.items():
                wall, mib = run_isolated(cmd)
                if name not in best or wall < best[name][0]:
                    best[name] = (wall, mib)
        ledger = json.loads((work / "out-parquet" / "ledger.json").read_text())
        floor_t, floor_m = best["floor"]
        entry = {
            "rows": ledger["total"]["read"],
            "csv_mib": round(size / 2**20, 1),
            "generate_s": round(gen, 1),
            "floor_s": round(floor_t, 2),
            "floor_peak_mib": round(floor_m),
            "ledger_balanced": ledger["balanced"],
            "ledger_total": ledger["total"],
        }
        for name in ("convert", "convert-jsonl"):
            t, m = best[name]
            entry[f"{name}_s"] = round(t, 2)
            entry[f"{name}_peak_mib"] = round(m)
            entry[f"{name}_time_ratio"] = round(t / floor_t, 2)
            entry[f"{name}_memory_ratio"] = round(m / floor_m, 2)
        report.append(entry)
        print(json.dumps(entry), flush=True)
        if not args.keep:
            shutil.rmtree(work)
    print(json.dumps(report, indent=2))


if __name__ == "__main__":
    main()
