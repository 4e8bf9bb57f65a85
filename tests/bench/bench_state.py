"""Benchmark: snapshot and apply against their floors.

- snapshot of N events (Parquet events of several runs in one landing area) against the floor:
  reading those events and writing them as one Parquet file (DuckDB, one COPY);
- apply of about 1M events into PostgreSQL against the floor of a plain COPY of the same rows
  (every event's fields and position, as CSV) into an empty table of the same types;
- apply of the same events into SQLite (and DuckDB), timed;
- ``apply --recheck`` of each target right after (every key compared again, nothing differs), timed.

Every command is a fresh process, timed from outside with its peak RSS. PostgreSQL is the
server named by CDCNORM_TEST_PG (``.ci/run`` starts one; skipped without it).

    python tests/bench/bench_state.py --runs 5 --rows-per-run 1500000
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import dumpgen
from bench_convert import run_isolated

SNAPSHOT_FLOOR = """
import sys, duckdb
con = duckdb.connect()
con.execute(f"COPY (SELECT * FROM read_parquet('{sys.argv[1]}/events/*/*.parquet')) TO '{sys.argv[2]}' (FORMAT PARQUET)")
"""

COPY_FLOOR = """
import io, sys, duckdb, psycopg
landing, url, events = sys.argv[1], sys.argv[2], sys.argv[3:]
con = duckdb.connect()
files = ", ".join(repr(e) for e in events)
rel = con.sql(
    f"SELECT key.delivery_id, v.recipient, v.locker, CAST(v.fee AS VARCHAR) AS fee, v.parcels, "
    f"CAST(v.weight_kg AS VARCHAR) AS weight_kg, strftime(v.dropped_at, '%Y-%m-%dT%H:%M:%S.%fZ') AS dropped_at, "
    f"v.state, CAST(v.express AS VARCHAR) AS express, v.note, position "
    f"FROM (SELECT key, \\"values\\" AS v, position FROM read_parquet([{files}]))"
)
with psycopg.connect(url) as pg:
    pg.execute("DROP TABLE IF EXISTS copy_floor")
    pg.execute(
        "CREATE TABLE copy_floor (delivery_id bigint, recipient text, locker text, fee numeric(12,2), "
        "parcels bigint, weight_kg double precision, dropped_at timestamptz, state text, express boolean, "
        "note text, position text COLLATE \\"C\\")"
    )
    with pg.cursor() as cur, cur.copy("COPY copy_floor FROM STDIN (FORMAT csv)") as copy:
        import pyarrow.csv as pacsv
        for batch in rel.to_arrow_reader(100_000):
            buf = io.BytesIO()
            pacsv.write_csv(batch, buf, pacsv.WriteOptions(include_header=False))
            copy.write(buf.getvalue())
    pg.commit()
"""


def cdcnorm(*args: str) -> list[str]:
    return [sys.executable, "-m", "cdcnorm", *args]


def convert_into(landing: Path, mappings: Path, files: list[Path]) -> None:
    """One run of the dump ``files`` into ``landing``, as Parquet events."""
    args = ["convert", "--quiet", "--format", "parquet", "--mappings", str(mappings), "--out", str(landing)]
    subprocess.run(cdcnorm(*args, *map(str, files)), check=True)


def events_of(landing: Path) -> int:
    import duckdb

    return int(
        duckdb.sql(f"SELECT count(*) FROM read_parquet('{landing}/events/*/*.parquet')").fetchall()[0][0]
    )


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--rows-per-run", type=int, default=1_500_000)
    ap.add_argument("--apply-rows", type=int, default=1_500_000, help="dump rows behind the apply benchmark")
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--limit", default="500MB", help="--memory-limit of the bounded snapshot run")
    ap.add_argument("--keep", type=Path)
    args = ap.parse_args()
    work = args.keep or Path(tempfile.mkdtemp(prefix="cdcnorm-state-"))
    work.mkdir(parents=True, exist_ok=True)
    mappings = dumpgen.write_mapping(work / "mappings").parent
    landing = work / "landing"
    if not landing.exists():
        for night in range(args.runs):
            folder = work / f"night-{night}"
            folder.mkdir(exist_ok=True)
            files = dumpgen._chunk(
                args.rows_per_run,
                folder,
                200 + night,
                first_change=int(args.rows_per_run / 1.5) * night,
                part=night,
            )
            convert_into(landing, mappings, files)
            shutil.rmtree(folder)
    n_events = events_of(landing)
    report: dict[str, object] = {"events": n_events}

    best: dict[str, tuple[float, float]] = {}
    for _ in range(args.repeat):
        for name, cmd in {
            "snapshot_floor": [
                sys.executable,
                "-c",
                SNAPSHOT_FLOOR,
                str(landing),
                str(work / "floor.parquet"),
            ],
            "snapshot": cdcnorm(
                "snapshot", str(landing), "--mappings", str(mappings), "--out", str(work / "state")
            ),
        }.items():
            wall, mib = run_isolated(cmd)
            if name not in best or wall < best[name][0]:
                best[name] = (wall, mib)
    report["snapshot_floor_s"], report["snapshot_floor_peak_mib"] = (
        round(best["snapshot_floor"][0], 2),
        round(best["snapshot_floor"][1]),
    )
    report["snapshot_s"], report["snapshot_peak_mib"] = (
        round(best["snapshot"][0], 2),
        round(best["snapshot"][1]),
    )
    report["snapshot_ratio"] = round(best["snapshot"][0] / best["snapshot_floor"][0], 2)
    wall, mib = run_isolated(
        cdcnorm(
            "snapshot",
            str(landing),
            "--mappings",
            str(mappings),
            "--out",
            str(work / "state-limited"),
            "--memory-limit",
            args.limit,
        )
    )
    report[f"snapshot_limit_{args.limit}_s"], report[f"snapshot_limit_{args.limit}_peak_mib"] = (
        round(wall, 2),
        round(mib),
    )

    # apply: the first run's events (about 1M from 1.5M dump rows)
    one = work / "one-run"
    if not one.exists():
        folder = work / "apply-dump"
        folder.mkdir(exist_ok=True)
        files = dumpgen._chunk(args.apply_rows, folder, 300, first_change=0, part=0)
        convert_into(one, mappings, files)
        shutil.rmtree(folder)
    report["apply_events"] = events_of(one)
    event_files = [str(p) for p in sorted(one.glob("events/*/*.parquet"))]
    for kind in ("sqlite", "duckdb"):
        target = work / f"w.{kind}"
        target.unlink(missing_ok=True)
        wall, mib = run_isolated(
            cdcnorm("apply", str(one), "--mappings", str(mappings), "--target", f"{kind}:///{target}")
        )
        report[f"apply_{kind}_s"], report[f"apply_{kind}_peak_mib"] = round(wall, 2), round(mib)
        # the same target held to every events file again (nothing differs: every key compared)
        wall, mib = run_isolated(
            cdcnorm(
                "apply", str(one), "--mappings", str(mappings), "--target", f"{kind}:///{target}", "--recheck"
            )
        )
        report[f"recheck_{kind}_s"], report[f"recheck_{kind}_peak_mib"] = round(wall, 2), round(mib)
    url = os.environ.get("CDCNORM_TEST_PG")
    if url:
        import psycopg

        times: dict[str, list[float]] = {"copy": [], "apply": []}
        mem = {}
        for _ in range(args.repeat):
            with psycopg.connect(url, autocommit=True) as pg:
                pg.execute("DROP SCHEMA IF EXISTS lockers CASCADE")
            wall, mib = run_isolated([sys.executable, "-c", COPY_FLOOR, str(one), url, *event_files])
            times["copy"].append(wall)
            mem["copy"] = mib
            wall, mib = run_isolated(cdcnorm("apply", str(one), "--mappings", str(mappings), "--target", url))
            times["apply"].append(wall)
            mem["apply"] = mib
        report["pg_copy_floor_s"] = round(min(times["copy"]), 2)
        report["apply_postgresql_s"] = round(min(times["apply"]), 2)
        report["apply_postgresql_peak_mib"] = round(mem["apply"])
        report["apply_postgresql_ratio"] = round(min(times["apply"]) / min(times["copy"]), 2)
        wall, mib = run_isolated(
            cdcnorm("apply", str(one), "--mappings", str(mappings), "--target", url, "--recheck")
        )
        report["recheck_postgresql_s"], report["recheck_postgresql_peak_mib"] = round(wall, 2), round(mib)
    else:
        report["postgresql"] = "skipped: set CDCNORM_TEST_PG"
    print(json.dumps(report, indent=2))
    if args.keep is None:
        shutil.rmtree(work)


if __name__ == "__main__":
    main()
