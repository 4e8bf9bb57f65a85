"""The command line: a thin layer over pipeline, mapping and lineage."""

from __future__ import annotations

import argparse
import base64
import datetime as dt
import json
import os
import re
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table
from rich.text import Text

from cdcnorm import __version__
from cdcnorm import ledger as ledger_mod
from cdcnorm.engines import ENGINES
from cdcnorm.errors import (
    EXIT_OK,
    EXIT_OUTPUT_CUT,
    CdcnormError,
    InterruptedRun,
    UsageError,
    closest,
    counted,
    first_of,
    name_list,
)
from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import STAGE_NAMES, Notice, Options, Result, describe_sources, file_notes, run
from cdcnorm.tables import print_table

#: Rows --stop-after shows unless --limit says.
STAGE_ROWS = 20


class _Guarded:
    """The standard stream of that name (looked up at each use: a test's capture takes its place),
    whose reader may go away (``cdcnorm runs area | head``). The console library's own answer, where
    it has one (its on_broken_pipe), ends the process with exit 1 wherever it was, a run
    half-converted; the oldest version this project takes (rich 13.0.0) has none and lets
    BrokenPipeError out, a traceback. Here the rest of the stream's output is dropped, the command
    goes on to its end, and ``main`` ends with EXIT_OUTPUT_CUT."""

    def __init__(self, name: str) -> None:
        self._name = name
        self.cut = False

    @property
    def _stream(self) -> Any:
        return getattr(sys, self._name)

    def write(self, text: str) -> int:
        if not self.cut:
            try:
                return int(self._stream.write(text))
            except BrokenPipeError:
                self._gone()
        return len(text)

    def flush(self) -> None:
        if not self.cut:
            try:
                self._stream.flush()
            except BrokenPipeError:
                self._gone()

    def _gone(self) -> None:
        self.cut = True
        _silence(self._stream)

    def __getattr__(self, name: str) -> Any:  # isatty, fileno, encoding ...: the stream's own
        return getattr(self._stream, name)


def _silence(stream: Any) -> None:
    """Point a stream's descriptor at the null device: what is still buffered for it (flushed as the
    interpreter ends) goes nowhere instead of raising BrokenPipeError again."""
    try:
        fd = stream.fileno()
    except (AttributeError, OSError, ValueError):  # a stream without a descriptor (a test's capture)
        return
    null = os.open(os.devnull, os.O_WRONLY)
    os.dup2(null, fd)
    os.close(null)


_stdout, _stderr = _Guarded("stdout"), _Guarded("stderr")

# No markup and no emoji codes: what the consoles print holds names and values from users' files (a
# file "t[x].csv" was shown as "t.csv", a column "a[/]b" ended in rich's MarkupError, a column
# ":x:" was shown as an emoji); styled parts are Text with a style.
err = Console(
    file=_stderr,  # type: ignore[arg-type]
    highlight=False,
    markup=False,
    emoji=False,
    width=None if sys.stderr.isatty() else 200,
)
out = Console(
    file=_stdout,  # type: ignore[arg-type]
    highlight=False,
    markup=False,
    emoji=False,
    soft_wrap=True,
    width=None if sys.stdout.isatty() else 200,
)


_CHOICE = re.compile(r"invalid choice: '?(.*?)'? \(choose from (.*)\)$")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # type: ignore[override]
        hint = f"see {self.prog} --help"
        m = _CHOICE.search(message)
        guess = closest(m.group(1), [c.strip("'") for c in m.group(2).split(", ")]) if m else None
        if guess:
            hint = f'did you mean "{guess}"? ' + hint
        raise UsageError(f"{self.prog}: {message}", hint=hint)

    def parse_args(self, args: Sequence[str] | None = None, namespace: Any = None) -> Any:  # type: ignore[override]
        """As argparse's, and an unknown option names the closest one the command has."""
        parsed, extras = self.parse_known_args(args, namespace)
        if extras:
            options = set(self._option_string_actions)
            for action in self._actions:
                if isinstance(action, argparse._SubParsersAction) and getattr(parsed, action.dest, None):
                    options |= set(action.choices[getattr(parsed, action.dest)]._option_string_actions)
            # compared without their dashes, which every option shares ("--quiet" is not near "--out")
            bare = {o.lstrip("-"): o for o in options}
            guesses = [closest(x.split("=", 1)[0].lstrip("-"), bare) for x in extras if x.startswith("-")]
            said = ", ".join(f'"{bare[g]}"' for g in dict.fromkeys(g for g in guesses if g))
            prog = self.prog + (f" {parsed.command}" if getattr(parsed, "command", None) else "")
            raise UsageError(
                f"{self.prog}: unrecognized arguments: {' '.join(extras)}",
                hint=(f"did you mean {said}? " if said else "") + f"see {prog} --help",
            )
        return parsed


_SIZE = re.compile(r"^\s*[0-9]+(\.[0-9]+)?\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*$", re.IGNORECASE)


def _memory_size(text: str) -> str:
    """An argparse type: a size such as 500MB or 1.5GiB (memory or disk), refused at parse time."""
    if not _SIZE.match(text):
        raise argparse.ArgumentTypeError(f"{text!r} is not a memory size; write e.g. 500MB, 2GB or 1.5GiB")
    return text.strip()


def _number(kind: type[int] | type[float], least: float, what: str) -> Any:
    """An argparse type: a number of ``kind`` of at least ``least``, refused at parse time."""

    def parse(text: str) -> int | float:
        try:
            n = kind(text)
        except ValueError:
            n = None
        if n is None or not n >= least:
            raise argparse.ArgumentTypeError(f"{text!r} is not {what}")
        return n

    return parse


_positive = _number(int, 1, "a whole number of at least 1")
#: The most engine threads ``--threads`` takes (or the machine's core count, if more): the engine
#: starts every one, and 100,000 on the demo ran for minutes before they were all up.
MAX_THREADS = 1024


def _threads(text: str) -> int:
    """An argparse type: engine threads, from 1 to ``MAX_THREADS`` (or the core count)."""
    n: int = _positive(text)
    cores = os.cpu_count() or 1
    most = max(MAX_THREADS, cores)
    if n > most:
        raise argparse.ArgumentTypeError(
            f"{text!r} threads are too many: at most {most:,} (this machine has {cores} cores)"
        )
    return n


_count = _number(int, 0, "a whole number of 0 or more")
seconds = _number(float, 0, "a number of seconds (0 or more)")


def engine_args(p: argparse.ArgumentParser, scratch_holds: str = "the engine's spill files") -> None:
    """The engine's options, the same for every command that runs it."""
    p.add_argument(
        "--memory-limit",
        type=_memory_size,
        help="engine memory limit, e.g. 2GB (default: half the machine's memory); the engine spills to disk beyond it",
    )
    p.add_argument(
        "--threads",
        type=_threads,
        help="engine threads (default: all cores, fewer under a small --memory-limit)",
    )
    p.add_argument(
        "--scratch",
        type=Path,
        help=f"folder for temporary files: {scratch_holds} (default: the system's temporary folder)",
    )
    p.add_argument(
        "--spill-limit",
        type=_memory_size,
        help="most disk the engine's spill files may take, e.g. 20GB (default: 90%% of the space free "
        "in the scratch folder when the command starts)",
    )


def _conversion_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("inputs", nargs="+", help="dump files or folders of dump files (CSV, JSON Lines, Parquet)")
    p.add_argument("--mappings", default="mappings", help="folder of mapping files (default: mappings/)")
    p.add_argument(
        "--input-format", choices=["csv", "jsonl", "parquet"], help="read every input as this format"
    )
    engine_args(p, "the engine's spill files, decompressed copies")
    p.add_argument(
        "--recursive", action="store_true", help="read the dump files in sub-folders of folders too"
    )
    p.add_argument("--json", action="store_true", help="print the result as JSON on stdout")
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="cdcnorm", description="Normalise CDC dumps into upsert/delete envelopes; trace column lineage."
    )
    parser.add_argument("--version", action="version", version=f"cdcnorm {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    check = sub.add_parser("check", help="what would pass, what would be quarantined, schema drift")
    _conversion_args(check)

    conv = sub.add_parser(
        "convert", help="convert dumps into one run of a landing area: envelopes, quarantine, ledger"
    )
    _conversion_args(conv)
    conv.add_argument(
        "--out", default="build", help="the landing area: a folder that accumulates runs (default: build/)"
    )
    conv.add_argument(
        "--replace",
        action="store_true",
        help="this run replaces the landing area's contents when it commits (a one-off conversion; "
        "a run that fails leaves the area as it was)",
    )
    conv.add_argument(
        "--wait",
        type=seconds,
        default=30.0,
        help="seconds to wait while another run writes to the area (default 30)",
    )
    conv.add_argument(
        "--format", dest="fmt", choices=["jsonl", "parquet"], default="jsonl", help="event file format"
    )
    conv.add_argument(
        "--max-rejects",
        type=_count,
        default=None,
        help="exit 5 when more rows than this are quarantined (0: none allowed; default: no limit)",
    )
    conv.add_argument(
        "--show-plan",
        nargs="?",
        const="duckdb",
        choices=list(ENGINES),
        metavar="ENGINE",
        help="print each table's plan as SQL and stop; as Spark SQL with --show-plan spark "
        "(default: duckdb, the engine convert runs)",
    )
    conv.add_argument("--stop-after", choices=STAGE_NAMES, help="run up to this stage and show its output")
    conv.add_argument("--limit", type=_count, help=f"rows shown by --stop-after (default {STAGE_ROWS})")
    conv.add_argument("--table", help="with --show-plan/--stop-after: only this table")

    runs_cmd = sub.add_parser(
        "runs", help="list the runs of a landing area: inputs, rows and their fates, pending"
    )
    runs_cmd.add_argument("landing", help="the landing area (convert's --out)")
    runs_cmd.add_argument("--json", action="store_true", help="print the run records as JSON")

    settle = sub.add_parser(
        "settle", help="end the wait of pending before-images: they go to quarantine, as a run of their own"
    )
    settle.add_argument("landing", help="the landing area (convert's --out)")
    settle.add_argument("--mappings", default="mappings", help="folder of mapping files (default: mappings/)")
    which = settle.add_mutually_exclusive_group(required=True)
    which.add_argument(
        "--before", metavar="POSITION", help="settle images at log positions below this one (raw form)"
    )
    which.add_argument("--all", action="store_true", help="settle every pending image")
    settle.add_argument(
        "--table",
        help="settle only this table's images (a --before position is then of its kind alone)",
    )
    settle.add_argument(
        "--wait",
        type=seconds,
        default=30.0,
        help="seconds to wait while another run writes to the area (default 30)",
    )
    settle.add_argument("--json", action="store_true", help="print the result as JSON on stdout")
    settle.add_argument("--quiet", action="store_true", help="print nothing but errors")

    sub.add_parser("mapping-schema", help="print the JSON Schema of mapping files (for editors)")

    demo = sub.add_parser(
        "demo", help="convert the example dumps with the example mappings and print the ledger"
    )
    demo.add_argument("--out", default="build/demo", help="output folder (default: build/demo)")
    demo.add_argument(
        "--root",
        help="folder holding examples/dumps/ and mappings/ (default: the demo data shipped with cdcnorm)",
    )

    from cdcnorm.lineage import cli as lineage_cli
    from cdcnorm.state import cli as state_cli

    state_cli.add_commands(sub)
    lineage_cli.add_commands(sub)
    return parser


#: seconds between two progress lines when standard error is not a terminal (a scheduled job's log)
LOG_EVERY = 10.0


def _progress(quiet: bool) -> tuple[Progress | None, Any]:
    if quiet:
        return None, lambda label, done, total: None
    if not err.is_terminal:
        return None, _progress_lines()
    bar = Progress(
        TextColumn("{task.description}", markup=False),
        BarColumn(),
        TextColumn("{task.completed}/{task.total}"),
        TimeElapsedColumn(),
        console=err,
        transient=True,
    )
    task = bar.add_task("cdcnorm", total=1)

    def update(label: str, done: int, total: int) -> None:
        bar.update(task, description=label, completed=done, total=max(total, 1))

    return bar, update


@contextmanager
def showing_progress(quiet: bool) -> Iterator[Callable[[str, int, int], None]]:
    """A command's ``progress(label, done, total)`` for the time of the block: a bar on a terminal,
    a plain line now and then in a log, nothing when ``quiet``."""
    bar, update = _progress(quiet)
    if bar:
        bar.start()
    try:
        yield update
    finally:
        if bar:
            bar.stop()


def _notice(quiet: bool) -> Notice:
    """Print a note about the whole run on standard error when the run starts (the memory note:
    a long run should not wait until its end to say it may pass its limit); the summary repeats it."""
    if quiet:
        return lambda note: None
    return lambda note: err.print(f"note: {note}", markup=False, soft_wrap=True)


def _progress_lines() -> Any:
    """Progress for a log (standard error not a terminal): a plain line at a step that starts
    LOG_EVERY seconds or more after the last line, so a short run prints none and a long one
    (a nightly job) shows where it is and its rates (before: nothing until the end)."""
    started = last = time.monotonic()

    def update(label: str, done: int, total: int) -> None:
        nonlocal last
        now = time.monotonic()
        if now - last >= LOG_EVERY:
            last = now
            err.print(f"cdcnorm: {now - started:.0f} s: {label}", markup=False, soft_wrap=True)

    return update


def _ledger_table(result: Result) -> Table:
    t = Table(title="row ledger (read + carried in = emitted + merged + duplicate + quarantined + pending)")
    for col in (
        "table",
        "file",
        "read",
        "carried in",
        "emitted",
        "merged",
        "duplicate",
        "quarantined",
        "pending",
        "upserts",
        "deletes",
        "unpaired",
    ):
        t.add_column(col, justify="left" if col in ("table", "file") else "right")
    for name, tl in sorted(result.ledger.tables.items()):
        for fname, c in _ledger_rows(tl):
            t.add_row(name, fname, *(str(v) for v in c.as_dict().values()))
    total = result.ledger.total.as_dict().values()
    t.add_row("all", "", *(str(v) for v in total), style="bold")
    return t


#: Files of one table the ledger shows one by one; beyond, it shows those with quarantined or
#: pending rows (as many) and one row of the others' counts: a row a file made 3,000 two-row files'
#: ledger a 3,000-line screen that took 4.3 s to lay out, twice the run (6.8 s in all, now 2.5 s).
LEDGER_FILES = 20

T = TypeVar("T")


def _folded(rows: list[T], notable: Callable[[T], object]) -> tuple[list[T], list[T], str]:
    """A table's file rows as printed: all of them (nothing folded, label ""), or beyond
    LEDGER_FILES the notable ones (as many), the others, and the label of the others' row."""
    if len(rows) <= LEDGER_FILES:
        return rows, [], ""
    shown = [r for r in rows if notable(r)][:LEDGER_FILES]
    rest = rows[:]
    for r in shown:
        rest.remove(r)
    return shown, rest, f"{len(rest):,} {'other ' if shown else ''}files"


def _ledger_rows(tl: ledger_mod.TableLedger) -> list[tuple[str, ledger_mod.FileCounts]]:
    """The (file, counts) rows of a table in the printed ledger; they add up to its total."""
    shown, rest, label = _folded(sorted(tl.files.items()), lambda f: f[1].quarantined or f[1].pending)
    if not label:
        return shown
    summed = ledger_mod.FileCounts()
    for _, c in rest:
        summed.add(c)
    return [*shown, (label, summed)]


def _json_value(v: object) -> object:
    """A stage row's value as the envelope writes it (in --json and the table): bytes as base64 (RFC 4648), times
    as RFC 3339 (UTC as Z), the rest (decimals, UUIDs) as its text."""
    if isinstance(v, bytes | bytearray | memoryview):
        return base64.b64encode(bytes(v)).decode("ascii")
    if isinstance(v, dt.datetime) and v.tzinfo is not None:
        return v.astimezone(dt.UTC).isoformat().replace("+00:00", "Z")
    if isinstance(v, dt.date | dt.time | dt.datetime):
        return v.isoformat()
    return str(v)


def _show_stage(result: Result, stage: str, limit: int, table: str | None, as_json: bool) -> None:
    for name in result.tables:
        if table and name != table:
            continue
        data = result.stage_output(name, stage, limit)
        if as_json:
            rows = data.to_pylist()
            out.print_json(json.dumps({"table": name, "stage": stage, "rows": rows}, default=_json_value))
            continue
        t = Table(title=f"{name}: after stage {stage} (first {limit} rows)")
        for col in data.column_names:
            t.add_column(col, overflow="fold")
        for row in data.to_pylist():
            t.add_row(*("NULL" if v is None else str(_json_value(v)) for v in row.values()))
        print_table(out, t)


def cmd_convert(args: argparse.Namespace, *, check: bool = False) -> int:
    mappings = load_mappings(Path(args.mappings))
    table = getattr(args, "table", None)
    if table is not None:
        from cdcnorm.errors import did_you_mean

        tables = [m.table for m in mappings]
        if table not in tables:
            raise UsageError(
                f"--table {table!r} names no mapping's table{did_you_mean(table, tables)}",
                expected="one of " + ", ".join(tables),
                found=table,
            )
        if not (args.show_plan or args.stop_after):
            raise UsageError(
                "--table goes with --show-plan or --stop-after",
                hint="to convert one table only, name only its files (or its mapping file with --mappings)",
            )
    if getattr(args, "limit", None) is not None and not args.stop_after:
        raise UsageError(
            "--limit goes with --stop-after", hint="--stop-after STAGE --limit N shows N rows of that stage"
        )
    options = Options(
        out=None if check else Path(args.out),
        fmt=getattr(args, "fmt", "jsonl"),
        max_rejects=getattr(args, "max_rejects", None),
        memory_limit=args.memory_limit,
        threads=args.threads,
        input_format=args.input_format,
        write=not check,
        recursive=args.recursive,
        wait=getattr(args, "wait", 30.0),
        replace=getattr(args, "replace", False),
        scratch=args.scratch,
        spill_limit=args.spill_limit,
    )
    if getattr(args, "show_plan", False):
        from cdcnorm.pipeline import show_plans

        for text in show_plans(mappings, args.inputs, options, args.table, args.show_plan):
            out.print(text, markup=False)
        return EXIT_OK
    stop = getattr(args, "stop_after", None)
    began = time.monotonic()
    with showing_progress(args.quiet or args.json) as update:
        result = run(
            mappings,
            args.inputs,
            options,
            stop_after=stop,
            progress=update,
            strict_drift=not check,
            notice=_notice(args.quiet or args.json),
        )
    if stop:
        _show_stage(result, stop, STAGE_ROWS if args.limit is None else args.limit, args.table, args.json)
        return EXIT_OK
    if check:
        return _report_check(result, args)
    _report_run(result, args, Path(args.out), time.monotonic() - began)
    return EXIT_OK


def _print_hidden(result: Result) -> None:
    """The files the input folders hold that the run left out, and why; the inputs named twice; the
    tables no input was for."""
    hidden, markers, repeated = result.hidden, result.markers, result.repeated
    if result.no_input:
        out.print(
            f"note: no input for {counted(len(result.no_input), 'table')} (no file given matches its "
            f"mapping's files patterns): {', '.join(result.no_input)}",
            markup=False,
            soft_wrap=True,
        )
    if repeated:
        out.print(
            f"note: {counted(len(repeated), 'input')} named more than once (given again, or in a folder "
            f"given too), read once: {first_of(repeated)}",
            markup=False,
            soft_wrap=True,
        )
    for files, what, why, how in (
        (
            hidden,
            "hidden file",
            "a name starting with a dot: a copy in progress, by common practice",
            "name a file to read it",
        ),
        (
            markers,
            "marker file",
            "a name starting with an underscore that no mapping reads: a writer's marker or metadata, "
            "as _SUCCESS, by common practice",
            "a mapping whose files pattern matches one reads it",
        ),
    ):
        if files:
            out.print(
                f"note: left out {counted(len(files), what)} ({why}): {first_of(files)}; {how}",
                markup=False,
                soft_wrap=True,
            )


def _report_run(
    result: Result, args: argparse.Namespace, landing: Path, seconds: float | None = None
) -> None:
    skipped = [f"{s['name']} (run {s['converted_by']})" for s in result.skipped]
    if args.json:
        out.print_json(
            json.dumps(
                {
                    "run": result.run,
                    "ledger": result.ledger.as_dict(),
                    "outputs": {k: str(v) for k, v in result.outputs.items()},
                    "pending": result.pending,
                    "waiting": result.waiting,
                    "skipped": result.skipped,
                    "hidden": result.hidden,
                    "markers": result.markers,
                    "repeated": result.repeated,
                    "no_input": result.no_input,
                    "notes": file_notes(result),
                    "memory_note": result.memory_note,
                }
            )
        )
        return
    if args.quiet:
        return
    if skipped:
        out.print("skipped, converted before: " + ", ".join(skipped))
    _print_hidden(result)
    if result.run is None:
        if getattr(args, "command", None) == "settle":
            n = result.waiting
            why = (
                "no before-image waits"
                if n == 0
                else f"no before-image waits below --before {args.before} ({counted(n, 'before-image')} "
                f"{'waits' if n == 1 else 'wait'} at or above it)"
            )
            out.print(
                f"nothing to settle: {why}; no run was added to {landing}", markup=False, soft_wrap=True
            )
        else:
            out.print(f"nothing new to convert: no run was added to {landing}")
        return
    print_table(out, _ledger_table(result))
    if any(len(tl.files) > LEDGER_FILES for tl in result.ledger.tables.values()):
        out.print(
            f"a table of more than {LEDGER_FILES} files shows its files with quarantined or pending rows and "
            f"one row for the others; every file's counts: --json, or cdcnorm runs {landing} --json",
            markup=False,
            soft_wrap=True,
        )
    _print_notes(result)
    total = result.ledger.total
    # how long the run took and its rate: what a nightly job's window is sized by
    took = f" ({_took(total.read, seconds)})" if seconds is not None else ""
    out.print(
        f"ledger balanced: {total.read:,} rows read, {total.pending_in:,} carried in, every row accounted for{took}"
    )
    waiting = (
        "1 before-image waits for its after-image"
        if result.waiting == 1
        else f"{result.waiting:,} before-images wait for their after-images"
    )
    out.print(
        f"run {result.run} committed to {landing}: events in {landing / 'events'}"
        + (
            f"; {counted(total.quarantined, 'quarantined row')} in {landing / 'quarantine'}"
            if total.quarantined
            else ""
        )
        + (f"; {waiting} (cdcnorm settle ends the wait)" if result.waiting else "")
    )


def _took(rows: int, seconds: float) -> str:
    """``1.2 s, 31 rows/s``: a run's wall time and the rows it read per second."""
    rate = f", {rows / seconds:,.0f} rows/s" if rows and seconds > 0 else ""
    return f"{seconds:,.1f} s{rate}"


def _print_notes(result: Result) -> None:
    """One line per note and the files it is about: 3,000 files with the same note are one line
    naming two of them (``--json`` lists each file's notes); then the run's memory note."""
    files: dict[tuple[str, str], list[str]] = {}
    for n in file_notes(result):
        files.setdefault((n["table"], n["note"]), []).append(n["file"])
    for (table, note), names in files.items():
        named = (
            ", ".join(names)
            if len(names) <= 3
            else f"{names[0]}, {names[1]} and {len(names) - 2:,} other files"
        )
        out.print(f"note: {named} ({table}): {note}", markup=False, soft_wrap=True)
    if result.memory_note:  # the run's own, about no one file
        out.print(f"note: {result.memory_note}", markup=False, soft_wrap=True)


def cmd_runs(args: argparse.Namespace) -> int:
    from cdcnorm.landing import runs

    root = Path(args.landing)
    if not (root / runs.RUNS).is_dir():
        raise UsageError(
            "this folder holds no runs", file=str(root), hint="name the --out folder of cdcnorm convert"
        )
    records = runs.records(root)
    if args.json:
        out.print_json(json.dumps(records))
        return EXIT_OK
    t = Table(title=f"runs of {root}")
    cols = ["run", "finished", "inputs", "skipped", "read", "pending_in", "emitted", "merged", "duplicate"]
    cols += ["quarantined", "pending", "waiting", "settle"]
    for col in cols:
        t.add_column(
            col.replace("_", " "), justify="left" if col in ("run", "finished", "settle") else "right"
        )
    for rec in records:
        row = runs.summary(rec)
        t.add_row(*("" if row[c] is None else str(row[c]) for c in cols))
    print_table(out, t)
    return EXIT_OK


def cmd_settle(args: argparse.Namespace) -> int:
    from cdcnorm.pipeline import Options, position_key_of, run
    from cdcnorm.state.cli import chosen_mappings

    mappings = chosen_mappings(load_mappings(Path(args.mappings)), args.table)
    if args.before is not None:
        from cdcnorm import positions
        from cdcnorm.engines.duckdb import DuckDBEngine

        engine = DuckDBEngine()
        from cdcnorm import zones

        zones.register(engine, mappings)
        specs = [m.mapping.change.position for m in mappings]
        if not any(position_key_of(engine, p, args.before) is not None for p in specs):
            kinds: dict[str, list[str]] = {}
            for m in mappings:
                kinds.setdefault(positions.expected(m.mapping.change.position), []).append(m.table)
            raise UsageError(
                f"--before {args.before!r} is not a log position of any mapping",
                expected="; ".join(f"{', '.join(tables)}: {kind}" for kind, tables in sorted(kinds.items())),
                found=args.before,
                hint=None if args.table else "--table settles one table, by a position of its kind",
            )
    options = Options(out=Path(args.landing), wait=args.wait, settle="all" if args.all else args.before)
    result = run(mappings, [], options)
    args.out = args.landing
    _report_run(result, args, Path(args.landing))
    return EXIT_OK


def _report_check(result: Result, args: argparse.Namespace) -> int:
    sources = describe_sources(result)
    drift = [d.message() for d in result.drift]
    report = {
        "files": sources,
        "drift": drift,
        "tables": result.ledger.as_dict()["tables"],
        "hidden": result.hidden,
        "markers": result.markers,
        "repeated": result.repeated,
        "no_input": result.no_input,
        "memory_note": result.memory_note,
    }
    if args.json:
        out.print_json(json.dumps(report))
    elif not args.quiet:
        t = Table(title="cdcnorm check")
        # the raw columns no field reads that the mapping's unused does not list (as convert notes)
        for col in ("table", "file", "rows", "would pass", "quarantine", "unmapped raw columns"):
            t.add_column(col, justify="right" if col in ("rows", "would pass", "quarantine") else "left")
        rows = []
        for s in sources:
            tl = result.ledger.tables.get(s["table"])
            fc = tl.files.get(s["file"]) if tl else None
            passing = fc.emitted + fc.merged + fc.duplicate if fc else None
            rows.append(
                (
                    s["table"],
                    s["file"],
                    s["rows"],
                    passing,
                    fc.quarantined if fc else None,
                    s["unread_columns"],
                )
            )
        folded = False
        for table in dict.fromkeys(r[0] for r in rows):
            mine = [r for r in rows if r[0] == table]
            # as the ledger does: the files to look at, and the others' sums
            shown, rest, label = _folded(mine, lambda r: r[3] is None or r[4] or r[5])
            if label:
                folded = True
                mine = [*shown, (table, label, *(sum(r[i] or 0 for r in rest) for i in (2, 3, 4)), [])]
            for table_, name, n, passing, quarantined, unmapped in mine:
                t.add_row(
                    table_,
                    name,
                    str(n),
                    "-" if passing is None else str(passing),
                    "-" if quarantined is None else str(quarantined),
                    name_list(unmapped) or "-",
                )
        print_table(out, t)
        if folded:
            out.print(
                f"a table of more than {LEDGER_FILES} files shows its files with quarantined rows, unmapped "
                "columns or drift, and one row for the others; every file: --json",
                markup=False,
                soft_wrap=True,
            )
        for name, tl in sorted(result.ledger.tables.items()):
            for reason, n in sorted(tl.reasons.items()):
                out.print(f"{name}: {n} x {reason}")
        _print_notes(result)
        _print_hidden(result)
        for d in drift:
            out.print(Text.assemble(("drift", "red"), " ", d))
    return 4 if drift else EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    # the demo's mappings and dumps ship inside the package, so `cdcnorm demo` works anywhere
    root = Path(args.root) if args.root else Path(__file__).resolve().parent / "demo"
    ns = argparse.Namespace(
        mappings=str(root / "mappings"),
        inputs=[str(root / "examples" / "dumps")],
        out=args.out,
        fmt="jsonl",
        max_rejects=None,
        memory_limit=None,
        scratch=None,
        spill_limit=None,
        threads=None,
        input_format=None,
        recursive=False,
        replace=True,
        wait=30.0,
        json=False,
        quiet=False,
        show_plan=False,
        stop_after=None,
        limit=None,
        table=None,
    )
    code = cmd_convert(ns)
    if code == EXIT_OK:
        out.print(f"demo done: see {args.out}/events, {args.out}/quarantine and {args.out}/runs")
    return code


#: What Ctrl-C leaves, by command: what it wrote is whole or not there (files are written under a
#: temporary name and renamed, a landing area's run is committed by its journal, a target's batch
#: in one transaction).
INTERRUPTED = {
    "convert": "nothing was committed and no output was left half-written",
    "demo": "nothing was committed and no output was left half-written",
    "settle": "nothing was committed and no output was left half-written",
    "snapshot": (
        "no state file was left half-written: each table's file is written whole before it replaces the "
        "old one, so the tables done before the interrupt have their new state and the others their old one"
    ),
    "apply": (
        "each batch is applied in a transaction of its own: the batches done before the interrupt stay "
        "applied, the one under way was rolled back; apply again to apply the rest"
    ),
    "apply --dry-run": "a dry run changes nothing: its one transaction was rolled back",
    # the commands that only read and print
    **dict.fromkeys(("check", "runs", "mapping-schema", "trace", "impact"), "nothing was written"),
    "lineage": (
        "no diagram was left half-written: it is written under a temporary name, removed on the "
        "interrupt, and only a whole file replaces the old one"
    ),
}


def _interrupted(command: str | None, argv: Sequence[str] | None) -> int:
    # no command yet: interrupted while the arguments were read
    said = INTERRUPTED.get(command) if command else "nothing was read or written"
    return _report(InterruptedRun("interrupted" + (f": {said}" if said else "")), argv)


def main(argv: Sequence[str] | None = None) -> int:
    code = _main(argv)
    if _stdout.cut or _stderr.cut:
        if not _stderr.cut:
            err.print(
                "note: the output's reader closed before its end (a pipe such as `| head`): the rest of "
                f"the output was dropped; the command ran to its end (its own exit code: {code})",
                soft_wrap=True,
            )
        return code if code != EXIT_OK else EXIT_OUTPUT_CUT
    return code


def _main(argv: Sequence[str] | None) -> int:
    command: str | None = None
    try:
        args = build_parser().parse_args(argv)
        command = f"{args.command} --dry-run" if getattr(args, "dry_run", False) else args.command
        if args.command == "convert":
            return cmd_convert(args)
        if args.command == "check":
            return cmd_convert(args, check=True)
        if args.command == "mapping-schema":
            from cdcnorm.mapping.model import Mapping

            out.print_json(json.dumps(Mapping.model_json_schema(by_alias=True)))
            return EXIT_OK
        if args.command == "demo":
            return cmd_demo(args)
        if args.command == "runs":
            return cmd_runs(args)
        if args.command == "settle":
            return cmd_settle(args)
        from cdcnorm.state import cli as state_cli

        code = state_cli.run_command(args, out, err)
        if code is not None:
            return code
        from cdcnorm.lineage import cli as lineage_cli

        return lineage_cli.run_command(args, out)
    except CdcnormError as e:
        return _report(e, argv)
    except KeyboardInterrupt:
        return _interrupted(command, argv)
    except Exception as e:
        import duckdb

        from cdcnorm.engines.duckdb import disk_full, interrupted, out_of_memory

        if interrupted(e):  # Ctrl-C while the engine was working, in any of the client's forms
            return _interrupted(command, argv)

        if isinstance(e, duckdb.OutOfMemoryException):
            # some steps cannot spill below a minimum: say so in our words, never a traceback
            return _report(out_of_memory(e), argv)
        full = disk_full(e) if isinstance(e, (duckdb.Error, OSError)) else None
        if full is not None:
            return _report(full, argv)
        raise


def _report(e: CdcnormError, argv: Sequence[str] | None) -> int:
    if "--json" in (argv if argv is not None else sys.argv):
        out.print(json.dumps(e.as_dict()), soft_wrap=True)
    err.print("error: " + e.render(), markup=False, soft_wrap=True)  # never broken inside a message
    return e.exit_code
