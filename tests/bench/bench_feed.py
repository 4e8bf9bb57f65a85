"""Benchmark: a month of nightly deliveries converted one run at a time into one landing area.

Each night brings about 200k rows of the realistic dump (``dumpgen.py``: the live
and the archive export of the day, which overlap) plus a re-delivery of the
tail of the night before (rows an earlier run already emitted, so they are
duplicates of that run). Every run is a fresh process; its wall time is taken
from outside. What runs remember (identities, pending images) grows every
night: the question is whether the last run is slower than the first.

    python tests/bench/bench_feed.py --nights 30 --rows 200000
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import dumpgen


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--nights", type=int, default=30)
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--keep", type=Path)
    args = ap.parse_args()
    work = args.keep or Path(tempfile.mkdtemp(prefix="cdcnorm-feed-"))
    work.mkdir(parents=True, exist_ok=True)
    mappings = dumpgen.write_mapping(work / "mappings").parent
    landing = work / "landing"
    changes_per_night = int(args.rows / 1.5)
    times = []
    previous_archive: Path | None = None
    for night in range(args.nights):
        folder = work / f"night-{night + 1:02d}"
        folder.mkdir()
        files = dumpgen._chunk(
            args.rows, folder, 100 + night, first_change=changes_per_night * night, part=night
        )
        if previous_archive is not None:
            lines = previous_archive.read_text(encoding="utf-8").splitlines(keepends=True)
            # the tail of the night before, again (whole records: quoted fields may span lines)
            import csv
            import io

            rows = list(csv.reader(io.StringIO("".join(lines))))
            buf = io.StringIO()
            w = csv.writer(buf, lineterminator="\n")
            w.writerow(rows[0])
            w.writerows(rows[-(len(rows) // 50) :])
            (folder / "deliveries-again.csv").write_text(buf.getvalue(), encoding="utf-8")
        previous_archive = files[1]
        cmd = [
            sys.executable,
            "-m",
            "cdcnorm",
            "convert",
            "--quiet",
            "--mappings",
            str(mappings),
            str(folder),
            "--out",
            str(landing),
            "--format",
            "parquet",
        ]
        t0 = time.perf_counter()
        subprocess.run(cmd, check=True)
        times.append(time.perf_counter() - t0)
        record = json.loads(sorted((landing / "runs").glob("*.json"))[-1].read_text())
        total = record["ledger"]["total"]
        print(
            json.dumps(
                {
                    "night": night + 1,
                    "seconds": round(times[-1], 2),
                    "read": total["read"],
                    "duplicate": total["duplicate"],
                    "pending_in": total["pending_in"],
                    "pending": total["pending"],
                    "balanced": record["ledger"]["balanced"],
                }
            ),
            flush=True,
        )
    first, last = times[0], times[-1]
    print(
        json.dumps(
            {
                "cores": os.cpu_count(),
                "nights": args.nights,
                "rows_per_night": args.rows,
                "first_s": round(first, 2),
                "last_s": round(last, 2),
                "last_over_first": round(last / first, 2),
                "median_first_5": round(statistics.median(times[:5]), 2),
                "median_last_5": round(statistics.median(times[-5:]), 2),
                "median_ratio": round(statistics.median(times[-5:]) / statistics.median(times[:5]), 2),
            }
        ),
        flush=True,
    )
    if args.keep is None:
        shutil.rmtree(work)


if __name__ == "__main__":
    main()
