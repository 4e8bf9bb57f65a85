"""Writing one run into the landing area: new inputs only, every file staged, then committed."""

from __future__ import annotations

import json
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from cdcnorm import __version__
from cdcnorm.errors import LedgerError, counted
from cdcnorm.inputs import checksum
from cdcnorm.landing import memory, runs
from cdcnorm.landing.area import Landing
from cdcnorm.names import path_part
from cdcnorm.quarantine import quarantine_lines, raw_rows
from cdcnorm.writers import WRITERS
from cdcnorm.writers.base import sorted_events

if TYPE_CHECKING:
    from cdcnorm.engines.duckdb import DuckDBEngine
    from cdcnorm.pipeline import Options, Progress, Result


@dataclass
class Checksums:
    """Checksums still being computed (in a thread, while the run converts)."""

    pool: ThreadPoolExecutor = field(default_factory=lambda: ThreadPoolExecutor(max_workers=1))
    pending: dict[str, Future[str]] = field(default_factory=dict)

    def resolve(self, inputs: list[dict[str, Any]]) -> None:
        for item in inputs:
            if item["sha256"] is None:
                item["sha256"] = self.pending[item["path"]].result()
        self.pool.shutdown()


def new_inputs(
    area: Landing, routed: dict[str, list[Path]]
) -> tuple[dict[str, list[Path]], list[dict[str, Any]], list[dict[str, Any]], Checksums]:
    """Leave out inputs an earlier run converted (same SHA-256). Only a file whose size equals an
    earlier input's can be one, so only those are hashed before the run; the others are hashed
    while it converts, for the run record."""
    earlier = [] if area.replacing else runs.records(area.root)
    by_sha = {} if area.replacing else runs.checksums(area.root)
    sizes = {item["bytes"] for rec in earlier for item in rec.get("inputs", [])}
    later = Checksums()
    kept: dict[str, list[Path]] = {}
    info: list[dict[str, Any]] = []
    skipped: list[dict[str, Any]] = []
    for table, paths in routed.items():
        kept[table] = []
        for p in paths:
            size = p.stat().st_size
            item: dict[str, Any] = {
                "path": str(p),
                "name": p.name,
                "table": table,
                "bytes": size,
                "sha256": None,
            }
            if size in sizes:
                item["sha256"] = checksum(p)
                if item["sha256"] in by_sha:
                    skipped.append({**item, "converted_by": by_sha[item["sha256"]]})
                    continue
            else:
                later.pending[str(p)] = later.pool.submit(checksum, p)
            info.append(item)
            kept[table].append(p)
    return kept, info, skipped, later


def _now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _stage_table(
    engine: DuckDBEngine,
    result: Result,
    table: str,
    staging: Path,
    run: str,
    writer: Any,
    progress: Progress,
) -> dict[str, Any]:
    """Stage one table's files (quarantine, identities, waiting images, events); what was staged."""
    from cdcnorm.pipeline import free_raw, rejected_relation

    trun = result.tables[table]
    plan = trun.plan
    part = path_part(table)
    counts = result.ledger.tables[table].total
    progress(f"{table}: write {counted(counts.quarantined, 'quarantined row')} and the index", 0, 1)
    out: dict[str, Any] = {"events": None, "quarantine": None}
    # the fields the events are written under, for reading them back after a mapping edit
    out["fields"] = [[n, t.value_type()] for n, t in plan.mapping.field_types.items()]
    # written while the raw rows are there (they go before the events are sorted); the count of
    # lines checks the ledger's count of quarantined rows below. No rejected row: no file, and no
    # statement to plan (6 ms of a small table's time), the count of rejected rows being 0 too
    rel = f"quarantine/{part}/{run}.jsonl"
    lines = 0
    if engine.count(rejected_relation(trun)):
        lines_sql = quarantine_lines(plan, rejected_relation(trun), lookup=engine.lookup)
        lines = engine.copy(lines_sql, staging / rel, "lines")
    if lines:
        out["quarantine"] = rel
    else:  # no file (its folder goes once every table is staged)
        (staging / rel).unlink(missing_ok=True)
    memory.write_emitted(engine, plan, staging / "index" / "emitted" / part / f"{run}.parquet", run)
    memory.write_conflicted(engine, plan, staging / "index" / "conflicted" / part / f"{run}.parquet", run)
    out["pending"] = memory.write_pending(
        engine,
        plan,
        staging / "index" / "pending" / part / f"{run}.parquet",
        run,
        raw_rows(plan, plan.rel("waiting"), engine.lookup),
    )
    free_raw(trun, engine)  # the raw rows are needed no more: free them before the events are sorted
    written = 0
    # one event per emitted row, but for a record holding both images whose update changed the key:
    # it gives a delete and an upsert (change.images)
    events = counts.upserts + counts.deletes
    if events:
        progress(f"{table}: sort and write {counted(events, 'event')}", 0, 1)
        rel = f"events/{part}/{run}{writer.SUFFIX}"
        # one streaming pass: the engine sorts the flat events, then builds and writes the envelopes
        ordered = f"({sorted_events(plan, '__files')}) AS ordered_events"
        written = writer.write(plan, engine, "__files", staging / rel, ordered)
        out["events"] = rel
    # The ledger is counted from aggregates; the files are written from the rows themselves.
    if written != events or lines != counts.quarantined:
        raise LedgerError(
            f"{table}: wrote {written} events and {lines} quarantine lines, but the ledger counts "
            f"{events} events ({counts.upserts} upserts, {counts.deletes} deletes) and "
            f"{counts.quarantined} quarantined rows",
            hint="this is a bug in cdcnorm; please report it with the inputs",
        )
    return out


def commit_run(
    result: Result,
    area: Landing,
    options: Options,
    inputs: list[dict[str, Any]],
    later: Checksums,
    progress: Progress,
) -> None:
    """Stage every file of the run, then commit it (the run record last). A run stopped before its
    commit (an error, Ctrl-C) removes what it staged."""
    from cdcnorm.pipeline import each_table, one_at_a_time

    started = _now()
    run = area.next_run()
    with area.staged(run) as staging:
        writer = WRITERS[options.fmt]
        engine = result.engine
        outputs: dict[str, dict[str, Any]] = {}

        tell = one_at_a_time(progress)

        def stage(e: DuckDBEngine, table: str) -> None:
            outputs[table] = _stage_table(e, result, table, staging, run, writer, tell)

        tables = list(result.tables)
        each_table(engine, result.tables, tables, stage)  # as the plans ran: small tables side by side
        outputs = {t: outputs[t] for t in tables}
        for table, out in outputs.items():
            result.pending += out["pending"]
            if out["events"]:
                result.outputs[table] = area.root / out["events"]
        # no quarantine folder for a table that quarantined nothing, nor one for a run without any
        for folder in [staging / "quarantine" / path_part(t) for t in tables] + [staging / "quarantine"]:
            if folder.is_dir() and not any(folder.iterdir()):
                folder.rmdir()
        later.resolve(inputs)
        # images waiting in the whole area after this run: this run's tables, and the others' last word
        waiting_by_table = {t: o["pending"] for t, o in outputs.items()}
        folder = area.root / "index" / "pending"
        for table_dir in sorted(folder.iterdir()) if folder.is_dir() else []:
            if table_dir.name not in waiting_by_table and area.pending_file(table_dir.name) is not None:
                waiting_by_table[table_dir.name] = area.waiting_count(table_dir.name)
        result.waiting = sum(waiting_by_table.values())
        from cdcnorm.pipeline import file_notes  # the pipeline calls this module

        record = {
            "run": run,
            "started": started,
            "finished": _now(),
            "cdcnorm": __version__,
            "options": {
                "format": options.fmt,
                "settle": options.settle,
                "replace": options.replace,
                "memory_limit": options.memory_limit,
            },
            "inputs": inputs,
            "skipped": result.skipped,
            "hidden": result.hidden,
            "markers": result.markers,
            "repeated": result.repeated,
            "no_input": result.no_input,
            "notes": file_notes(result),
            "ledger": result.ledger.as_dict(),
            "pending": result.pending,
            "waiting": result.waiting,
            "waiting_by_table": waiting_by_table,
            "tables": outputs,
        }
        folder = staging / runs.RUNS
        folder.mkdir(parents=True, exist_ok=True)
        (folder / f"{run}.json").write_text(json.dumps(record, indent=2) + "\n", encoding="utf-8")
        area.publish(staging, run)
        result.run = run
