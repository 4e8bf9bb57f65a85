"""The command line: a thin layer over pipeline, mapping and lineage."""

from __future__ import annotations

import argparse
import json
import re
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from cdcnorm import __version__
from cdcnorm.errors import EXIT_OK, CdcnormError, UsageError
from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import STAGE_NAMES, Options, Result, describe_sources, run

err = Console(stderr=True, highlight=False, width=None if sys.stderr.isatty() else 200)
out = Console(highlight=False, soft_wrap=True, width=None if sys.stdout.isatty() else 200)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # type: ignore[override]
        raise UsageError(f"{self.prog}: {message}", hint=f"see {self.prog} --help")


_SIZE = re.compile(r"^\s*[0-9]+(\.[0-9]+)?\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*$", re.IGNORECASE)


def _memory(text: str) -> str:
    if not _SIZE.match(text):
        raise argparse.ArgumentTypeError(f"{text!r} is not a memory size; write e.g. 500MB, 2GB or 1.5GiB")
    return text.strip()


def _positive(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number of at least 1")
    return n


def _conversion_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("inputs", nargs="+", help="dump files or folders of dump files (CSV, JSON Lines, Parquet)")
    p.add_argument("--mappings", default="mappings", help="folder of mapping files (default: mappings/)")
    p.add_argument(
        "--input-format", choices=["csv", "jsonl", "parquet"], help="read every input as this format"
    )
    p.add_argument(
        "--memory-limit",
        type=_memory,
        help="engine memory limit, e.g. 2GB (default: half the machine's memory); the engine spills to disk beyond it",
    )
    p.add_argument("--threads", type=_positive, help="engine threads (default: all cores)")
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

    conv = sub.add_parser("convert", help="convert dumps into envelopes, quarantine and ledger")
    _conversion_args(conv)
    conv.add_argument("--out", default="build", help="output folder (default: build/)")
    conv.add_argument(
        "--format", dest="fmt", choices=["jsonl", "parquet"], default="jsonl", help="event file format"
    )
    conv.add_argument(
        "--max-rejects", type=int, default=0, help="exit 5 when more rows are quarantined (0: no limit)"
    )
    conv.add_argument("--show-plan", action="store_true", help="print each table's plan as SQL and stop")
    conv.add_argument("--stop-after", choices=STAGE_NAMES, help="run up to this stage and show its output")
    conv.add_argument("--limit", type=int, default=20, help="rows shown by --stop-after (default 20)")
    conv.add_argument("--table", help="with --show-plan/--stop-after: only this table")

    sub.add_parser("mapping-schema", help="print the JSON Schema of mapping files (for editors)")

    demo = sub.add_parser(
        "demo", help="convert the example dumps with the example mappings and print the ledger"
    )
    demo.add_argument("--out", default="build/demo", help="output folder (default: build/demo)")
    demo.add_argument("--root", default=".", help="project folder holding examples/ and mappings/")

    from cdcnorm.lineage import cli as lineage_cli

    lineage_cli.add_commands(sub)
    return parser


def _progress(quiet: bool) -> tuple[Progress | None, Any]:
    if quiet or not err.is_terminal:
        return None, lambda label, done, total: None
    bar = Progress(
        TextColumn("{task.description}"),
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


def _ledger_table(result: Result) -> Table:
    t = Table(title="row ledger (read = emitted + merged + duplicate + quarantined)")
    for col in (
        "table",
        "file",
        "read",
        "emitted",
        "merged",
        "duplicate",
        "quarantined",
        "upserts",
        "deletes",
        "unpaired",
    ):
        t.add_column(col, justify="left" if col in ("table", "file") else "right")
    for name, tl in sorted(result.ledger.tables.items()):
        for fname, c in sorted(tl.files.items()):
            t.add_row(name, fname, *(str(v) for v in c.as_dict().values()))
    total = result.ledger.total.as_dict().values()
    t.add_row("all", "", *(str(v) for v in total), style="bold")
    return t


def _show_stage(result: Result, stage: str, limit: int, table: str | None, as_json: bool) -> None:
    for name in result.tables:
        if table and name != table:
            continue
        data = result.stage_output(name, stage, limit)
        if as_json:
            out.print_json(json.dumps({"table": name, "stage": stage, "rows": data.to_pylist()}, default=str))
            continue
        t = Table(title=f"{name}: after stage {stage} (first {limit} rows)")
        for col in data.column_names:
            t.add_column(col, overflow="fold")
        for row in data.to_pylist():
            t.add_row(*("NULL" if v is None else str(v) for v in row.values()))
        out.print(t)


def cmd_convert(args: argparse.Namespace, *, check: bool = False) -> int:
    mappings = load_mappings(Path(args.mappings))
    options = Options(
        out=None if check else Path(args.out),
        fmt=getattr(args, "fmt", "jsonl"),
        max_rejects=getattr(args, "max_rejects", 0),
        memory_limit=args.memory_limit,
        threads=args.threads,
        input_format=args.input_format,
        write=not check,
        recursive=args.recursive,
    )
    if getattr(args, "show_plan", False):
        from cdcnorm.pipeline import show_plans

        for text in show_plans(mappings, args.inputs, options, args.table):
            out.print(text, markup=False)
        return EXIT_OK
    bar, update = _progress(args.quiet or args.json)
    stop = getattr(args, "stop_after", None)
    if bar:
        bar.start()
    try:
        result = run(mappings, args.inputs, options, stop_after=stop, progress=update, strict_drift=not check)
    finally:
        if bar:
            bar.stop()
    if stop:
        _show_stage(result, stop, args.limit, args.table, args.json)
        return EXIT_OK
    if check:
        return _report_check(result, args)
    if args.json:
        out.print_json(
            json.dumps(
                {"ledger": result.ledger.as_dict(), "outputs": {k: str(v) for k, v in result.outputs.items()}}
            )
        )
    elif not args.quiet:
        out.print(_ledger_table(result))
        out.print(f"ledger balanced: {result.ledger.total.read} rows read, every row accounted for")
        out.print(
            f"events in {Path(args.out) / 'events'}; ledger in {Path(args.out) / 'ledger.json'}"
            + (
                f"; {result.quarantined} quarantined rows in {Path(args.out) / 'quarantine'}"
                if result.quarantined
                else ""
            )
        )
    return EXIT_OK


def _report_check(result: Result, args: argparse.Namespace) -> int:
    sources = describe_sources(result)
    drift = [d.message() for d in result.drift]
    report = {
        "files": sources,
        "drift": drift,
        "tables": result.ledger.as_dict()["tables"],
    }
    if args.json:
        out.print_json(json.dumps(report))
    elif not args.quiet:
        t = Table(title="cdcnorm check")
        for col in ("table", "file", "rows", "would pass", "quarantine", "unmapped raw columns"):
            t.add_column(col)
        for s in sources:
            tl = result.ledger.tables.get(s["table"])
            fc = tl.files.get(s["file"]) if tl else None
            t.add_row(
                s["table"],
                s["file"],
                str(s["rows"]),
                str(fc.emitted + fc.merged + fc.duplicate) if fc else "-",
                str(fc.quarantined) if fc else "-",
                ", ".join(s["unmapped_columns"]) or "-",
            )
        out.print(t)
        for name, tl in sorted(result.ledger.tables.items()):
            for reason, n in sorted(tl.reasons.items()):
                out.print(f"{name}: {n} x {reason}")
        for d in drift:
            out.print(f"[red]drift[/red] {d}")
    return 4 if drift else EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    root = Path(args.root)
    ns = argparse.Namespace(
        mappings=str(root / "mappings"),
        inputs=[str(root / "examples" / "dumps")],
        out=args.out,
        fmt="jsonl",
        max_rejects=0,
        memory_limit=None,
        threads=None,
        input_format=None,
        recursive=False,
        json=False,
        quiet=False,
        show_plan=False,
        stop_after=None,
        limit=20,
        table=None,
    )
    code = cmd_convert(ns)
    if code == EXIT_OK:
        out.print(f"demo done: see {args.out}/events, {args.out}/quarantine and {args.out}/ledger.json")
    return code


def main(argv: Sequence[str] | None = None) -> int:
    try:
        args = build_parser().parse_args(argv)
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
        from cdcnorm.lineage import cli as lineage_cli

        return lineage_cli.run_command(args, out)
    except CdcnormError as e:
        if "--json" in (argv if argv is not None else sys.argv):
            print(json.dumps(e.as_dict()), file=sys.stdout)
        err.print("error: " + e.render(), markup=False)
        return e.exit_code
    except KeyboardInterrupt:
        err.print("interrupted: no output was left half-written", markup=False)
        return 130


def entry() -> None:
    raise SystemExit(main())


if __name__ == "__main__":
    entry()
