"""The state commands: ``snapshot`` (events to state files) and ``apply`` (events to a database)."""

from __future__ import annotations

import argparse
import json
import os
import sqlite3
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from rich.console import Console
from rich.table import Table

from cdcnorm.errors import EXIT_DIFFERS, EXIT_OK, TargetError, UsageError, counted, did_you_mean
from cdcnorm.landing.area import writable_folder
from cdcnorm.mapping import load_mappings
from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.scratch import scratch_folder
from cdcnorm.tables import print_table

if TYPE_CHECKING:
    from cdcnorm.engines.duckdb import DuckDBEngine
    from cdcnorm.state.snapshot import AsOf

#: Where ``apply`` finds its target when --target is not given (keeps a password off the command line).
TARGET_ENV = "CDCNORM_TARGET"


def add_commands(sub: Any) -> None:
    from cdcnorm.cli import engine_args, seconds  # the options and parsers every command shares

    snap = sub.add_parser(
        "snapshot", help="compact a landing area's events to the state of every table (latest or as of)"
    )
    snap.add_argument("landing", help="the landing area (convert's --out), or a folder of event files")
    snap.add_argument("--out", required=True, help="folder for the state files, one per table")
    when = snap.add_mutually_exclusive_group()
    when.add_argument(
        "--as-of", metavar="POSITION", help="the state at this position (raw or normalised form)"
    )
    when.add_argument(
        "--as-of-time",
        metavar="TIME",
        help="the state of the changes committed by this RFC 3339 time, its offset included (e.g. 2026-03-01T12:00:00Z)",
    )
    snap.add_argument(
        "--format",
        dest="fmt",
        choices=["parquet", "csv", "jsonl"],
        default="parquet",
        help="file format of each table's state (default parquet)",
    )
    snap.add_argument("--table", help="only this table")
    snap.add_argument("--mappings", default="mappings", help="folder of mapping files (default: mappings/)")
    engine_args(snap)
    snap.add_argument("--json", action="store_true", help="print the result as JSON on stdout")
    snap.add_argument("--quiet", action="store_true", help="print nothing but errors and warnings")

    app = sub.add_parser("apply", help="load a landing area's events into database tables, idempotently")
    app.add_argument("landing", help="the landing area (convert's --out), or a folder of event files")
    app.add_argument(
        "--target",
        help=f"database URL: sqlite:///file.db, duckdb:///file.duckdb, postgresql://user@host/db "
        f"(default: the {TARGET_ENV} environment variable)",
    )
    app.add_argument("--schema", help="the schema of every table (instead of the table name's prefix)")
    app.add_argument("--dry-run", action="store_true", help="report what would change, change nothing")
    app.add_argument(
        "--recheck",
        action="store_true",
        help="then compare each table with all its events files, those applied before too: rows deleted or "
        "edited by hand are written again, rows no event wrote are counted (exit 14 when any differs)",
    )
    app.add_argument("--table", help="only this table")
    app.add_argument("--mappings", default="mappings", help="folder of mapping files (default: mappings/)")
    app.add_argument("--batch-rows", type=int, default=50_000, help="keys per batch (default 50000)")
    app.add_argument("--wait", type=seconds, default=30.0, help="seconds to wait for another apply")
    engine_args(app)
    app.add_argument("--json", action="store_true", help="print the counts as JSON on stdout")
    app.add_argument("--quiet", action="store_true", help="print nothing but errors and warnings")


def chosen_mappings(mappings: list[LoadedMapping], table: str | None) -> list[LoadedMapping]:
    """The mappings a command works on: all, or ``--table``'s (a misspelt name is suggested)."""
    if table is not None:
        names = [m.table for m in mappings]
        if table not in names:
            raise UsageError(f"--table {table!r} has no mapping{did_you_mean(table, names)}", found=table)
        return [m for m in mappings if m.table == table]
    return mappings


def _unmapped(mappings: list[LoadedMapping], landing: Path) -> list[str]:
    """Tables with events in the landing area but no mapping (reported, never dropped silently)."""
    from cdcnorm.state.events import tables_present

    names = {m.table for m in mappings}
    return [t for t in tables_present(landing) if t not in names]


def _engine(args: argparse.Namespace, scratch: Path, mappings: list[LoadedMapping]) -> Any:
    from cdcnorm import zones
    from cdcnorm.engines.duckdb import DuckDBEngine

    engine = DuckDBEngine(
        memory_limit=args.memory_limit,
        threads=args.threads,
        temp_directory=str(scratch / "spill"),
        spill_limit=args.spill_limit,
    )
    zones.register(engine, mappings)  # an --as-of in a zone's local time needs its table
    return engine


def _print_notes(err: Console, notes: list[tuple[str, Sequence[str]]]) -> None:
    """How events written under other fields were read (``Events.notes``), and a table apply made
    anew: a line each."""
    for table, lines in notes:
        for line in lines:
            err.print(f"note: {table}: {line}", markup=False, soft_wrap=True)


def _warn_unmapped(err: Console, landing: Path, mappings: str, missing: list[str], fate: str) -> None:
    """A warning for each table with events but no mapping: what the command left alone."""
    for name in missing:
        err.print(
            f"warning: {landing}: events of {name} have no mapping in {mappings}; {fate}",
            markup=False,
            soft_wrap=True,
        )


def _as_of(engine: DuckDBEngine, m: LoadedMapping, args: argparse.Namespace) -> AsOf:
    """The events of table ``m`` that ``--as-of`` or ``--as-of-time`` keeps (all without them)."""
    from cdcnorm.state import snapshot

    if args.as_of is not None:
        return snapshot.as_of_position(engine, m, args.as_of)
    if args.as_of_time is not None:
        return snapshot.as_of_time(engine, m, args.as_of_time)
    return snapshot.AsOf()


def cmd_snapshot(args: argparse.Namespace, out: Console, err: Console) -> int:
    from cdcnorm.cli import showing_progress
    from cdcnorm.engines.duckdb import engine_errors
    from cdcnorm.names import path_part
    from cdcnorm.state import snapshot
    from cdcnorm.state.events import check_landing, event_files, load_events

    landing = Path(args.landing)
    check_landing(landing)
    mappings = load_mappings(Path(args.mappings))
    chosen = chosen_mappings(mappings, args.table)
    for m in chosen:  # before any work: fields named as the state's position column are refused
        snapshot.position_column(m)
    folder = Path(args.out)
    writable_folder(folder)  # before any work: a file there, or no right to write, is exit 4
    rows: list[dict[str, Any]] = []
    with (
        scratch_folder(args.scratch) as scratch,
        engine_errors(scratch),
        showing_progress(args.quiet or args.json) as progress,
    ):
        engine = _engine(args, scratch, chosen)
        # every table's --as-of or --as-of-time before any file is written: one the value does not
        # fit (a position of another kind, a table without commit times) stops the command with
        # nothing written, not after the tables before it
        as_ofs = {m.table: _as_of(engine, m, args) for m in chosen}
        for i, m in enumerate(chosen):
            files = event_files(landing, m.table)
            progress(f"{m.table}: read {counted(len(files), 'event file')}", i, len(chosen))
            events = load_events(engine, m, files)
            as_of = as_ofs[m.table]
            progress(f"{m.table}: compact", i, len(chosen))
            state = snapshot.compact(engine, events, as_of)
            unplaced = snapshot.left_out(engine, events, as_of)
            moved = snapshot.position_note(m)
            ambiguous = snapshot.json_null_note(engine, events, state) if args.fmt == "jsonl" else None
            path = folder / (path_part(m.table) + snapshot.FORMATS[args.fmt])
            progress(f"{m.table}: write {path.name}", i, len(chosen))
            n = snapshot.write_snapshot(engine, events, state, path, args.fmt)
            rows.append(
                {
                    "table": m.table,
                    "rows": n,
                    "event_files": len(files),
                    "as_of": as_of.label,
                    "file": str(path),
                    "notes": [
                        *events.notes,
                        *([unplaced] if unplaced else []),
                        *([moved] if moved else []),
                        *([ambiguous] if ambiguous else []),
                    ],
                }
            )
            engine.drop(state)
    missing = _unmapped(mappings, landing) if args.table is None else []
    if args.json:
        out.print_json(json.dumps({"tables": rows, "unmapped": missing}))
        return EXIT_OK
    if args.quiet:
        _warn_unmapped(err, landing, args.mappings, missing, "not compacted")
        return EXIT_OK
    t = Table(title=f"state of {landing} ({rows[0]['as_of'] if rows else 'latest'})")
    for col in ("table", "rows", "event files", "file"):
        t.add_column(col, justify="right" if col in ("rows", "event files") else "left")
    for r in rows:
        t.add_row(r["table"], str(r["rows"]), str(r["event_files"]), r["file"])
    print_table(out, t)
    _print_notes(err, [(r["table"], r["notes"]) for r in rows])
    _warn_unmapped(err, landing, args.mappings, missing, "not compacted")
    return EXIT_OK


def cmd_apply(args: argparse.Namespace, out: Console, err: Console) -> int:
    from cdcnorm.cli import showing_progress
    from cdcnorm.state.apply import apply_table, placed
    from cdcnorm.state.events import check_landing
    from cdcnorm.targets import target_for
    from cdcnorm.targets.base import scrub

    url = args.target or os.environ.get(TARGET_ENV)
    if not url:
        raise UsageError(
            "apply needs a target database",
            expected=f"--target URL or the {TARGET_ENV} environment variable",
            hint="e.g. --target sqlite:///warehouse.db",
        )
    if args.batch_rows < 1:
        raise UsageError("--batch-rows must be at least 1", found=str(args.batch_rows))
    target = target_for(url, args.wait)
    landing = Path(args.landing)
    check_landing(landing)
    mappings = load_mappings(Path(args.mappings))
    chosen = chosen_mappings(mappings, args.table)
    # before anything is written: every table apply makes has a place of its own (with --schema,
    # among the tables of this apply; without it, among every mapping's, as each will be applied)
    placed(target, chosen if args.schema is not None else mappings, args.schema, applied=chosen)

    import duckdb
    import psycopg
    import sqlalchemy as sa

    from cdcnorm.engines.duckdb import engine_errors

    # what a target database raises: its driver's errors (some reach us unwrapped, as COPY's) and
    # SQLAlchemy's wrappers of them
    database_errors = (sa.exc.SQLAlchemyError, duckdb.Error, psycopg.Error, sqlite3.Error, OSError)
    reports = []
    with (
        scratch_folder(args.scratch) as scratch,
        engine_errors(scratch),
        showing_progress(args.quiet or args.json) as progress,
    ):
        engine = _engine(args, scratch, chosen)
        for m in chosen:
            try:
                reports.append(
                    apply_table(
                        engine,
                        m,
                        landing,
                        target,
                        schema=args.schema,
                        dry_run=args.dry_run,
                        recheck=args.recheck,
                        batch_rows=args.batch_rows,
                        progress=progress,
                    )
                )
            except database_errors as e:  # the database's own errors, in its words, without a password
                first = str(getattr(e, "orig", None) or e).strip().splitlines()[0]
                raise TargetError(
                    f"{target.shown}: applying {m.table}: {scrub(first, url)}",
                    hint="check the URL, that the server runs, that the user may create tables, and that "
                    "tables made by an earlier apply have the mapping's fields (a field added to a mapping "
                    "needs its column: ALTER TABLE ... ADD COLUMN)",
                ) from None
    missing = _unmapped(mappings, landing) if args.table is None else []
    data = {
        "target": target.shown,
        "dry_run": args.dry_run,
        "tables": [
            {
                "table": r.table,
                "target_table": r.target_table,
                "events": r.events,
                "files": r.files,
                **r.counts.as_dict(),
                **({"recheck": r.recheck.as_dict()} if r.recheck is not None else {}),
                "notes": list(r.notes),
            }
            for r in reports
        ],
        "unmapped": missing,
    }
    differs = [r for r in reports if r.recheck is not None and r.recheck.differs]
    code = EXIT_DIFFERS if differs else EXIT_OK
    if args.json:
        out.print_json(json.dumps(data))
        return code
    if args.quiet:
        _warn_unmapped(err, landing, args.mappings, missing, "not applied")
        _say_differs(err, differs, args.dry_run)
        return code
    title = f"{'dry run: would apply' if args.dry_run else 'applied'} {landing} to {target.shown}"
    t = Table(title=title)
    cols = [
        "table",
        "events",
        "inserted",
        "updated",
        "deleted",
        "deleted_absent",
        "stale",
        "already_applied",
        "compacted",
        "files_skipped",
    ]
    for col in cols:
        t.add_column(col.replace("_", " "), justify="left" if col == "table" else "right")
    for row in data["tables"]:
        t.add_row(row["target_table"], *(str(row[c]) for c in cols[1:]))
    print_table(out, t)
    if args.recheck:
        verb = "would write again" if args.dry_run else "written again"
        t = Table(title=f"rechecked against every events file ({verb}: restored, repaired)")
        checks = ["keys", "restored", "repaired", "unmatched"]
        for col in ["table", *checks]:
            t.add_column(col, justify="left" if col == "table" else "right")
        for r in reports:
            assert r.recheck is not None
            t.add_row(r.target_table, *(str(getattr(r.recheck, c)) for c in checks))
        print_table(out, t)
    _print_notes(err, [(r.table, r.notes) for r in reports])
    _warn_unmapped(err, landing, args.mappings, missing, "not applied")
    _say_differs(err, differs, args.dry_run)
    return code


def _say_differs(err: Console, differs: list[Any], dry_run: bool) -> None:
    """A line per table ``apply --recheck`` found differing from its events (``Recheck``)."""
    for r in differs:
        c = r.recheck
        parts = [
            f"{c.restored:,} gone (rows or tombstones deleted by hand?)" if c.restored else "",
            f"{counted(c.repaired, 'row')} edited since applied" if c.repaired else "",
            f"{counted(c.unmatched, 'row')} its events do not account for, left as they are"
            if c.unmatched
            else "",
        ]
        done = "would be written again (dry run)" if dry_run else "written again"
        fixed = f"; the rows gone or edited {done}" if c.restored or c.repaired else ""
        err.print(
            f"warning: {r.target_table} differed from its events: {', '.join(p for p in parts if p)}{fixed}",
            markup=False,
            soft_wrap=True,
        )


def run_command(args: argparse.Namespace, out: Console, err: Console) -> int | None:
    if args.command == "snapshot":
        return cmd_snapshot(args, out, err)
    if args.command == "apply":
        return cmd_apply(args, out, err)
    return None
