"""The conversion pipeline: the stages, in order, and what runs them.

    read -> source -> type -> order -> dedupe -> pair -> envelope -> write

``read`` loads each dump file (readers/) into the engine as raw text; every
later stage adds its steps to the table's plan (stages/); the engine runs the
plan; the writers (writers/), the quarantine and the ledger read its results.
"""

from __future__ import annotations

import json
import re
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa

from cdcnorm import ledger as ledger_mod
from cdcnorm import quarantine, zones
from cdcnorm.engines.duckdb import DuckDBEngine, engine_errors
from cdcnorm.errors import (
    DriftError,
    LedgerError,
    RejectLimitError,
    UsageError,
    closest,
    counted,
    did_you_mean,
    name_list,
    per_second,
)
from cdcnorm.inputs import display_names, expand_inputs, gather_inputs, route, set_aside_markers, text_path
from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.mapping.model import MAX_PLAIN_DELIMITER
from cdcnorm.plan import Plan, RawRelation, Source
from cdcnorm.readers import RawFile, RawTable, reader_for, streams
from cdcnorm.scratch import scratch_folder
from cdcnorm.sql import ident, lit
from cdcnorm.stages.dedupe import dedupe_rows
from cdcnorm.stages.envelope import build_envelopes
from cdcnorm.stages.order import order_rows
from cdcnorm.stages.pair import pair_images
from cdcnorm.stages.source import unite_sources
from cdcnorm.stages.type import type_rows
from cdcnorm.types import resolve
from cdcnorm.writers import WRITERS

#: The plan-building stages, in order. ``read`` comes before them all.
STAGES: list[tuple[str, Callable[[Plan], Plan]]] = [
    ("source", unite_sources),
    ("type", type_rows),
    ("order", order_rows),
    ("dedupe", dedupe_rows),
    ("pair", pair_images),
    ("envelope", build_envelopes),
]
STAGE_NAMES = ["read", *(name for name, _ in STAGES)]
#: the step whose rows --stop-after shows for a stage (else the stage's last step)
STAGE_OUTPUT = {"type": "typed"}
#: The materialised steps the writers and the events read after a run (the ``events`` view is
#: over ``kept`` and ``pairs``; the index remembers ``conflicted``); the others are dropped once
#: the run is accounted for.
RESULT_STEPS = ("kept", "pairs", "waiting", "conflicted")

Progress = Callable[[str, int, int], None]

#: Tables of at most this many rows read run two at a time, on two connections: about two of the
#: engine's row groups (122,880 rows), which its scans read on one thread each.
SHARED_ROWS = 250_000


def _no_progress(label: str, done: int, total: int) -> None:
    return None


#: Told a note about the whole run as soon as it is known (the memory note, before the wait it is
#: about); the run's result carries it too.
Notice = Callable[[str], None]


def _no_notice(note: str) -> None:
    return None


def one_at_a_time(progress: Progress) -> Progress:
    """``progress`` for callers on several threads (tables converted side by side)."""
    lock = threading.Lock()

    def tell(label: str, done: int, total: int) -> None:
        with lock:
            progress(label, done, total)

    return tell


def _rate(rows: int, since: float) -> str:
    """``, N rows/s`` for a progress label, once there is something to measure."""
    speed = per_second(rows, since)
    return f", {speed}" if speed else ""


@dataclass
class Options:
    out: Path | None = None
    fmt: str = "jsonl"
    max_rejects: int | None = None  # None: no limit
    memory_limit: str | None = None
    threads: int | None = None
    input_format: str | None = None
    write: bool = True
    recursive: bool = False
    scratch: Path | None = None  # where the run's temporary folder goes (default: the system's)
    spill_limit: str | None = None  # most temporary disk the engine may use (default: its own)
    wait: float = 30.0  # seconds to wait for another run's lock on the landing area
    replace: bool = False  # the run replaces the landing area's contents when it commits
    settle: str | None = None  # "all", or a raw position: pending images below it go to quarantine


@dataclass
class TableRun:
    mapping: LoadedMapping
    raw: RawTable
    plan: Plan
    unmapped: dict[str, list[str]] = field(default_factory=dict)
    carried: dict[int, str] = field(default_factory=dict)  # ids of the files carried images came from


@dataclass
class Drift:
    file: str
    table: str
    field: str
    column: str
    suggestion: str | None
    #: the columns a field's from lists as alternatives: none of which the file has, or (with
    #: ``several``) the ones it has, more than one
    alternatives: tuple[str, ...] = ()
    several: bool = False

    @property
    def wanted(self) -> str:
        """The column the field reads, or its alternatives, in words."""
        if self.alternatives:
            return "any of raw columns " + ", ".join(repr(c) for c in self.alternatives)
        return f"raw column {self.column!r}"

    @property
    def problem(self) -> str:
        """What is wrong, after "the mapping's field F reads ...": one clause."""
        if self.several:
            return (
                f"one of raw columns {', '.join(repr(c) for c in self.alternatives)} (its from's "
                "alternatives), and the file has each of them: which one holds its values is unknown"
            )
        return f"{self.wanted}, which the file does not have"

    def message(self) -> str:
        s = f' (did you mean "{self.suggestion}"?)' if self.suggestion else ""
        return f"{self.file}: field {self.field} of {self.table} reads {self.problem}{s}"


@dataclass
class Result:
    engine: DuckDBEngine
    tables: dict[str, TableRun]
    ledger: ledger_mod.Ledger
    drift: list[Drift]
    outputs: dict[str, Path] = field(default_factory=dict)
    stopped_after: str | None = None
    run: str | None = None  # the landing area's run id, once committed
    inputs: list[dict[str, Any]] = field(default_factory=list)
    skipped: list[dict[str, Any]] = field(default_factory=list)
    hidden: list[str] = field(default_factory=list)  # hidden files the input folders hold, not read
    markers: list[str] = field(default_factory=list)  # marker files the input folders hold, not read
    repeated: list[str] = field(default_factory=list)  # inputs named more than once, read once
    no_input: list[str] = field(default_factory=list)  # tables no input file is for
    pending: int = 0  # before-images this run's tables leave waiting
    waiting: int = 0  # before-images waiting in the whole landing area after this run

    @property
    def memory_note(self) -> str | None:
        """What the run's memory limit could not promise for an input this large, or None."""
        return self.engine.memory_note()

    @property
    def quarantined(self) -> int:
        return self.ledger.total.quarantined

    def stage_output(self, table: str, stage: str, limit: int | None = None) -> pa.Table:
        """The rows of the last step of ``stage`` for ``table``, after a run stopped at or after
        that stage (``stop_after``): a whole run keeps only the steps in RESULT_STEPS."""
        run = self.table(table)
        if stage == "read":
            return self._read_rows(run, limit)
        steps = [s for s in run.plan.steps if s.stage == stage]
        # the stage's own output: the typed rows (with ok), not the rejects listed beside them
        step = next((s for s in steps if s.name == STAGE_OUTPUT.get(stage)), steps[-1])
        columns = [str(r[0]) for r in self.engine.rows(f"DESCRIBE SELECT * FROM {ident(step.relation)}")]
        names = _shown_names(run.plan)
        shown = _shown_keys(run.plan)
        picked = [
            f"{shown.get(c, f's.{ident(c)}')} AS {ident(names.get(c, c))}"
            for c in columns
            if c != "__file" and not (c == "__seq" and c not in shown)
        ]
        join = ""
        if "__file" in columns:  # the file's name, not its number
            picked.insert(0, "f.name AS file")
            join = " LEFT JOIN __files f ON f.id = s.__file"
        # a stable order, so --limit shows the same rows every time: change order for the stages
        # that order rows, else by file and record
        keys = ["__pos", "__seq", "__rank"] if stage in ("order", "dedupe", "pair") else []
        keys = [f"s.{k}" for k in keys if k in columns]
        keys += (["f.name"] if join else []) + [f"s.{k}" for k in ("__row",) if k in columns]
        order = f" ORDER BY {', '.join(keys)}" if keys else ""
        sql = f"SELECT {', '.join(picked)} FROM {ident(step.relation)} s{join}{order}" + (
            f" LIMIT {limit}" if limit else ""
        )
        return self.engine.arrow(sql)

    def _read_rows(self, run: TableRun, limit: int | None) -> pa.Table:
        """The raw rows as read, under their raw column names, with file names."""
        if not run.plan.relations:
            return pa.table({})
        cols = [(c, run.plan.internal[c]) for c in run.raw.columns]
        union = run.plan.raw_union([i for _, i in cols])
        shown = ", ".join(f"{ident(i)} AS {ident(c)}" for c, i in cols)
        sql = (
            f"SELECT f.name AS file, u.__row AS record{', ' + shown if shown else ''}, u.__enc AS not_utf8 "
            f"FROM ({union}) u JOIN __files f ON f.id = u.__file ORDER BY f.name, u.__row"
            + (f" LIMIT {limit}" if limit else "")
        )
        return self.engine.arrow(sql)

    def events(self, table: str, *, render: bool = False) -> pa.Table:
        """The table's envelopes in output order: native types, or their JSON forms."""
        from cdcnorm.writers.base import sorted_envelopes

        return sorted_envelopes(self.table(table).plan, self.engine, "__files", render=render)

    def table(self, name: str) -> TableRun:
        """A converted table by its name; a usage error naming the closest otherwise."""
        if name not in self.tables:
            raise UsageError(
                f"no table {name!r} in this run{did_you_mean(name, self.tables)}",
                expected="one of " + (", ".join(self.tables) or "(no table: nothing was converted)"),
                found=name,
            )
        return self.tables[name]


def _shown_keys(plan: Plan) -> dict[str, str]:
    """SQL of the position and sequence keys as --stop-after shows them: their normalised text, as
    the envelope's ``position`` writes them (a hex position as hex, not as the number of its key);
    a mapping without a sequence has none to show."""
    from cdcnorm import positions

    change = plan.mapping.mapping.change
    shown = {"__pos": positions.position_text(change.position, "s.__pos")}
    if change.sequence:
        shown["__seq"] = positions.sequence_text(change.sequence, change.position, "s.__seq")
    return shown


def _shown_names(plan: Plan) -> dict[str, str]:
    """What --stop-after calls the plan's columns: raw columns by their names in the dump, typed
    values by their field names (``prior.<field>``, ``after.<field>`` in pairs)."""
    names = {internal: f"raw:{raw}" for raw, internal in plan.internal.items()}
    names.update(
        {
            "__row": "record",
            "__enc": "not valid text (base64)",
            "__act": "action",
            "__pos": "position",
            "__seq": "sequence",
            "__cat": "committed_at",
            "__rank": "image rank",
            "__ok": "ok",
            "__fate": "fate",
            "__role": "role",
            "__carried": "carried in",
            "__versions": "versions",
            "__earlier_run": "earlier run",
            "__other_fields": "other fields differ",
            "__unsettled": "conflict not settled",
            "__same_key": "same key",
            "__unpaired_after": "unpaired after-image",
            "__action": "envelope action",
            "__has_prior": "has prior",
            "__changed": "changed",
        }
    )
    for i, name in enumerate(plan.fields):
        names[f"__from{i}"] = "raw:" + " or ".join(plan.mapping.mapping.raw_columns(name))
        names[f"__image{i}"] = f"raw image:{name}"  # change.images: the image a row's value is read from
        names[f"__prior{i}"] = f"raw before:{name}"
        names[f"b{i}"] = f"before.{name}"
        names[f"v{i}"] = name
        names[f"p{i}"] = f"prior.{name}"
        names[f"a{i}"] = f"after.{name}"
    return names


def _separator(header: str) -> str | None:
    """The separator a header row read as one column seems to use: a tab, or the one run of
    punctuation between its names where every such run is the same (``;``, ``|``, ``|~|``)."""
    if "\t" in header:
        return "\t"
    runs: set[str] = set(re.findall(r"[^\w\s$.\-\"'()\[\]]+", header))
    if len(runs) == 1 and len(sep := runs.pop()) <= MAX_PLAIN_DELIMITER:
        return sep
    return None


def _drift_hint(d: Drift, columns: list[str]) -> str:
    if d.several:
        return (
            f"set fields.{d.field}.from to the one that holds its values (a file may have one of the "
            "alternatives only)"
        )
    sep = _separator(columns[0]) if len(columns) == 1 else None
    if sep is not None:
        if len(sep) > 1:  # only plain text takes a delimiter of several characters
            return (
                f"the file seems to use {sep!r} between fields: set csv.escapes: none and csv.delimiter: "
                f"{json.dumps(sep)} in the mapping (plain text, as bulk-copy exports write it)"
            )
        said = f"the file seems to use {sep!r} between fields: set csv.delimiter in the mapping"
        if sep == "\t":  # COPY's text format, and MySQL's INTO OUTFILE by default
            said += (
                " (a PostgreSQL COPY or MySQL INTO OUTFILE text dump: csv.escapes: backslash, whose"
                " delimiter is a tab; tab-separated text that quotes and escapes nothing: csv.escapes: none)"
            )
        return said
    key = (
        f"fields.{d.field}.from"
        if d.field not in ("action", "position", "sequence", "committed_at")
        else f"change.{d.field}.column"
    )
    if d.suggestion:
        return f'did you mean "{d.suggestion}"? (or set {key})'
    return f"rename the column in the dump or set {key}"


def read_all(
    mappings: Sequence[LoadedMapping],
    routed: dict[str, list[Path]],
    engine: DuckDBEngine,
    options: Options,
    progress: Progress,
    scratch: Path,
) -> dict[str, RawTable]:
    """Load every routed file into the engine, a table at a time; file ids follow display names."""
    all_files = [p for ps in routed.values() for p in ps]
    names = display_names(all_files)
    by_name = {m.table: m for m in mappings}
    out: dict[str, RawTable] = {}
    next_id = 0
    done = 0
    rows = 0
    started = time.perf_counter()
    for table, paths in routed.items():
        if not paths:
            continue
        raw = RawTable(by_name[table].mapping.slug)
        for path in sorted(paths, key=lambda p: names[p]):
            raw.files.append(RawFile(next_id, path, names[path]))
            next_id += 1
        by_format: dict[str, list[RawFile]] = {}
        modules = {}
        for f in raw.files:
            module = reader_for(f.path, options.input_format or by_name[table].mapping.format)
            modules[module.FORMAT] = module
            by_format.setdefault(module.FORMAT, []).append(f)
        for fmt, files in by_format.items():
            progress(
                f"read {table}: {counted(len(files), fmt + ' file')}{_rate(rows, started)}",
                done,
                len(all_files),
            )
            modules[fmt].read_files(files, by_name[table].mapping, engine, raw, scratch / raw.slug)
            done += len(files)
            rows += sum(f.rows_read for f in files)
        out[table] = raw
    progress(f"read {rows:,} rows{_rate(rows, started)}", done, len(all_files))
    return out


def find_drift(mapping: LoadedMapping, raw: RawTable) -> tuple[list[Drift], dict[str, list[str]]]:
    m = mapping.mapping
    drift = []
    unmapped = {}
    wanted = m.mapped_columns()
    roles = {v: k for k, v in m.change_columns().items()}
    # the structs a mapped member is read through (a Parquet column "after" for "after.id")
    read_through = {".".join(keys) for keys in m.read_through()}
    alternatives = m.alternatives
    # a column read only as one of a field's alternatives may be missing, if another is there
    single = set(m.change_columns().values()) | {m.raw_column(f) for f in m.fields if f not in alternatives}
    for src in raw.files:
        if not src.columns_known:
            continue
        spare = [c for c in src.columns if c not in wanted] + src.members
        for col in wanted:
            if col not in src.columns and col in single:
                fields = [f for f in m.fields if m.raw_column(f) == col] or [roles.get(col, col)]
                # a renamed column is not mapped yet; a struct's members are candidates too
                drift.append(Drift(src.name, m.table, fields[0], col, closest(col, spare)))
        for name, cols in alternatives.items():
            has = [c for c in cols if c in src.columns]
            if not has:
                drift.append(Drift(src.name, m.table, name, cols[0], closest(cols[0], spare), tuple(cols)))
            elif len(has) > 1:
                # which one holds the field's value is unknown (in JSON Lines, lines may differ):
                # never read one and leave the other's values behind without a word
                drift.append(Drift(src.name, m.table, name, has[0], None, tuple(has), several=True))
        # a struct read through (Parquet ``after`` for ``after.id``): its members no field reads
        read_from = {keys[0] for keys in m.read_through()}
        # a quarantine line's _cdcnorm member (fed back as JSON Lines) is no raw column
        unmapped[src.name] = [
            c
            for c in quarantine.dump_columns(src.columns, src.format)
            if c not in wanted and c not in read_through
        ] + [c for c in src.members if c not in wanted and c.split(".")[0] in read_from]
    return drift, unmapped


def unread_columns(mapping: LoadedMapping, unmapped: dict[str, list[str]], file: str) -> list[str]:
    """A file's raw columns no field reads that ``unused`` does not list (``unmapped``: from
    ``find_drift``): their values are in no event, and no one said that was meant."""
    return [c for c in unmapped.get(file, []) if not mapping.mapping.left_out(c)]


def note_unread(mapping: LoadedMapping, raw: RawTable, unmapped: dict[str, list[str]]) -> None:
    """A note on each file with raw columns no field reads and ``unused`` does not list: their
    values are in no event (a column the source added since the mapping was written, say)."""
    for src in raw.files:
        unread = unread_columns(mapping, unmapped, src.name)
        if unread:
            names = name_list(unread)
            one = len(unread) == 1
            src.notes.append(
                f"raw column{'' if one else 's'} {names} read by no field of {mapping.table}: "
                f"{'its' if one else 'their'} values are in no event (map {'it' if one else 'them'} "
                f"under fields, or list {'it' if one else 'them'} under unused)"
            )


def compile_table(
    mapping: LoadedMapping,
    raw: RawTable,
    settle: str | None = None,
    earlier_orders: tuple[tuple[int, ...], ...] = (),
) -> Plan:
    """Build the table's plan: every stage adds its steps, in order."""
    for c in mapping.mapping.mapped_columns():
        raw.internal(c)  # a mapped column no file has still has a name (its values are NULL)
    plan = Plan(
        mapping=mapping,
        sources=tuple(Source(f.file_id, f.name, tuple(f.columns), f.encoding, f.format) for f in raw.files),
        relations=tuple(RawRelation(name, tuple(cols)) for name, cols in raw.relations),
        internal={c: raw.internal(c) for c in raw.columns},
        malformed=raw.malformed_relation if any(f.malformed for f in raw.files) else None,
        settle=settle,
        earlier_orders=earlier_orders,
    )
    for _, stage in STAGES:
        plan = stage(plan)
    return plan


def _out_apart(out: Path, inputs: Iterable[str | Path]) -> None:
    """The landing area is not an input folder, nor inside one: the next run would read its files as
    dumps (its quarantine files as rows to convert again) with ``--recursive``, and stop on its
    sub-folders without."""
    where = out.resolve()
    for raw in inputs:
        folder = Path(raw)
        if not folder.is_dir():
            continue
        inside = folder.resolve() in where.parents
        if where == folder.resolve() or inside:
            raise UsageError(
                f"--out {out} is {'inside ' if inside else ''}the input folder {folder}: the next run "
                "would find the landing area among the dumps",
                expected="a landing area apart from the dumps",
                found=str(out),
                hint=f"write it to a folder of its own, e.g. --out {folder.resolve().parent / 'landing'}",
            )


def run(
    mappings: Sequence[LoadedMapping],
    inputs: Iterable[str | Path],
    options: Options | None = None,
    *,
    stop_after: str | None = None,
    progress: Progress = _no_progress,
    strict_drift: bool = True,
    notice: Notice = _no_notice,
) -> Result:
    """Read, plan, execute and (when ``options.write``) write every table as one run of the
    landing area ``options.out``. ``notice`` hears the memory note when the run starts."""
    options = options or Options()
    inputs = list(inputs)  # read twice: the files, then which of them were named, not found
    if stop_after is not None and stop_after not in STAGE_NAMES:
        raise UsageError(f"unknown stage {stop_after!r}; stages are {', '.join(STAGE_NAMES)}")
    if options.fmt not in WRITERS:
        raise UsageError(f"unknown output format {options.fmt!r}; formats are {', '.join(WRITERS)}")
    for folder, what in ((options.out, "landing area"), (options.scratch, "scratch folder")):
        if folder is not None:
            text_path(folder, what)
    if options.out is not None and options.write:
        _out_apart(options.out, inputs)
    files, hidden_files, again = gather_inputs(inputs, recursive=options.recursive)
    files, marker_files = set_aside_markers(files, mappings, inputs)
    if not files and options.settle is None:
        raise UsageError("no input files given")
    routed = route(files, mappings)
    hidden = [str(h) for h in hidden_files]
    markers = [str(m) for m in marker_files]
    repeated = [str(r) for r in again]
    no_input = [t for t, paths in routed.items() if not paths] if files else []
    with scratch_folder(options.scratch) as scratch, engine_errors(scratch):
        if not (options.write and options.out is not None and stop_after is None):
            result = _run(
                mappings, routed, options, scratch, stop_after, progress, strict_drift, None, notice
            )
            result.hidden, result.markers, result.repeated = hidden, markers, repeated
            result.no_input = no_input
            return result
        from cdcnorm.landing import open_landing
        from cdcnorm.landing.outputs import commit_run, new_inputs

        with open_landing(options.out, options.wait) as area:
            area.replacing = options.replace  # the earlier runs' files go when this one commits
            routed, inputs_info, skipped, later = new_inputs(area, routed)
            has_pending = options.settle is not None and any(area.waiting(m.table) for m in mappings)
            if not any(routed.values()) and not has_pending:
                engine = DuckDBEngine(temp_directory=str(scratch / "spill"))
                return Result(
                    engine,
                    {},
                    ledger_mod.Ledger(),
                    [],
                    skipped=skipped,
                    hidden=hidden,
                    markers=markers,
                    repeated=repeated,
                    no_input=no_input,
                )
            result = _run(mappings, routed, options, scratch, None, progress, strict_drift, area, notice)
            result.skipped = skipped
            result.hidden, result.markers, result.repeated = hidden, markers, repeated
            result.no_input = no_input
            total = result.ledger.total
            if not any(routed.values()) and total.quarantined == total.emitted == total.merged == 0:
                # a settle that ends no wait (every image is at or above --before): a run would
                # change nothing, so none is added
                result.waiting = total.pending
                return result
            commit_run(result, area, options, inputs_info, later, progress)
        if options.max_rejects is not None and result.quarantined > options.max_rejects:
            raise RejectLimitError(
                f"{result.quarantined} rows were quarantined, more than --max-rejects {options.max_rejects}"
                " (the run was committed)",
                expected=f"at most {options.max_rejects} rejected rows",
                found=str(result.quarantined),
                hint=f"see {options.out / 'quarantine'}",
                details={"run": result.run, "ledger": result.ledger.as_dict()},
            )
        return result


def position_key_of(engine: DuckDBEngine, spec: Any, text: str) -> str | None:
    """SQL of the key of ``text`` as a position of kind ``spec``, or None when it is not one."""
    from cdcnorm import positions
    from cdcnorm.sql import lit

    key = positions.position_key(spec, lit(text))
    return key if engine.rows(f"SELECT {key}")[0][0] is not None else None


def _settle_key(engine: DuckDBEngine, mapping: LoadedMapping, settle: str | None) -> str | None:
    """The settle option as SQL for the plan: None, "all", or the position's key (checked)."""
    if settle is None or settle == "all":
        return settle
    from cdcnorm import positions

    spec = mapping.mapping.change.position
    key = position_key_of(engine, spec, settle)
    if key is None:
        raise UsageError(
            f"--before {settle!r} is not a position of {mapping.table}",
            expected=positions.expected(spec),
            found=settle,
            hint="settle the tables whose positions are of another kind one at a time, with --table",
        )
    return f"({key})"


def _run(
    mappings: Sequence[LoadedMapping],
    routed: dict[str, list[Path]],
    options: Options,
    scratch: Path,
    stop_after: str | None,
    progress: Progress,
    strict_drift: bool,
    area: Any,
    notice: Notice = _no_notice,
) -> Result:
    from cdcnorm.landing import memory

    by_name = {m.table: m for m in mappings}
    engine = DuckDBEngine(
        memory_limit=options.memory_limit,
        threads=options.threads,
        temp_directory=str(scratch / "spill"),
        spill_limit=options.spill_limit,
        input_bytes=sum(
            streams.planned_size(p, options.input_format or by_name[t].mapping.format)
            for t, paths in routed.items()
            for p in paths
        ),
    )
    if (note := engine.memory_note()) is not None:
        notice(note)
    zones.register(engine, mappings)
    read = read_all(mappings, routed, engine, options, progress, scratch)
    if area is not None and options.settle is not None:
        for m in mappings:  # a settle run visits every table with images waiting
            if m.table not in read and area.waiting(m.table):
                read[m.table] = RawTable(m.mapping.slug)
    runs: dict[str, TableRun] = {}
    drifts: list[Drift] = []
    file_names: list[tuple[int, str]] = []
    next_id = sum(len(raw.files) for raw in read.values())
    for table, raw in read.items():
        drift, unmapped = find_drift(by_name[table], raw)
        drifts.extend(drift)
        note_unread(by_name[table], raw, unmapped)
        settle_key = _settle_key(engine, by_name[table], options.settle)
        plan = compile_table(by_name[table], raw, settle_key)
        orders = memory.field_orders(engine, plan, area.emitted_files(table) if area else [])
        if orders:  # identities written before the mapping's fields were reordered
            plan = compile_table(by_name[table], raw, settle_key, orders)
        file_names.extend((f.file_id, f.name) for f in raw.files)
        carried = memory.load_carried(engine, plan, area.pending_file(table) if area else None, next_id)
        next_id += len(carried)
        file_names.extend(carried)
        runs[table] = TableRun(by_name[table], raw, plan, unmapped, dict(carried))
    if drifts and strict_drift:
        d = drifts[0]
        columns = next(f.columns for f in runs[d.table].raw.files if f.name == d.file)
        raise DriftError(
            f"schema drift: the mapping's field {d.field} reads {d.problem}"
            + (f" ({len(drifts) - 1} more drift errors: run cdcnorm check)" if len(drifts) > 1 else ""),
            file=d.file,
            field=d.field,
            expected=(
                f"one of the columns {', '.join(repr(c) for c in d.alternatives)}, not several"
                if d.several
                else f"a column named {' or '.join(repr(c) for c in d.alternatives or (d.column,))}"
            ),
            found="columns " + name_list(columns),
            hint=_drift_hint(d, columns),
        )
    # made by the engine from literals: an Arrow array built from Python lists would import pandas
    # (pyarrow checks for it), a fifth of a second of every run
    listed = ", ".join(f"({i}, {lit(n)})" for i, n in file_names)
    engine.execute(
        "CREATE OR REPLACE TABLE __files AS SELECT CAST(id AS INTEGER) AS id, CAST(name AS VARCHAR) AS name "
        + (
            f"FROM (VALUES {listed}) v(id, name)"
            if listed
            else "FROM (SELECT 0 AS id, '' AS name) WHERE FALSE"
        )
    )
    result = Result(engine, runs, ledger_mod.Ledger(), drifts, stopped_after=stop_after)
    if stop_after == "read":
        return result
    drifted = {d.table for d in drifts}
    total = len(runs)
    todo = [t for t in runs if t not in drifted]
    counted: dict[str, ledger_mod.TableLedger] = {}
    tell = one_at_a_time(progress)

    def convert(e: DuckDBEngine, table: str) -> None:
        ledger = _run_table(e, runs[table], stop_after, area, tell)
        if ledger is not None:
            counted[table] = ledger

    each_table(engine, runs, todo, convert)
    for table in todo:  # the ledger lists the tables in the order they were read
        if table in counted:
            result.ledger.tables[table] = counted[table]
    progress("account", total, total)
    if stop_after is not None:
        return result
    if not result.ledger.balanced:
        raise LedgerError(
            "the row ledger does not balance: " + json.dumps(result.ledger.as_dict()["total"]),
            hint="this is a bug in cdcnorm; please report it with the inputs",
        )
    return result


def each_table(
    engine: DuckDBEngine,
    runs: dict[str, TableRun],
    tables: Sequence[str],
    work: Callable[[DuckDBEngine, str], None],
) -> None:
    """``work(engine, table)`` for each of ``tables``. A large table's steps use every thread: one at
    a time. A small table's are mostly the engine's fixed cost per statement, on one thread: two
    at a time, each on its own connection (``DuckDBEngine.spread``)."""
    for table in tables:
        if runs[table].raw.rows_read > SHARED_ROWS:
            work(engine, table)
    engine.spread([t for t in tables if runs[t].raw.rows_read <= SHARED_ROWS], work)


def _run_table(
    engine: DuckDBEngine, trun: TableRun, stop_after: str | None, area: Any, progress: Progress
) -> ledger_mod.TableLedger | None:
    """Run one table's plan (up to ``stop_after``); the table's ledger, or None when stopped."""
    from cdcnorm.landing import memory

    table = trun.mapping.table
    plan = trun.plan if stop_after is None else trun.plan.until(stop_after)
    rows = trun.raw.rows_read
    last = ""
    for j, step in enumerate(plan.steps):
        progress(
            f"{table}: {step.stage} ({step.name}), step {j + 1} of {len(plan.steps)}, {rows:,} rows{last}",
            j,
            len(plan.steps),
        )
        began = time.perf_counter()
        if step.name == "seen":  # what earlier runs emitted, at the positions this run has
            memory.load_earlier(
                engine,
                plan,
                area.emitted_files(table) if area else [],
                area.conflicted_files(table) if area else [],
            )
        if step.materialize:
            engine.materialize(step.relation, step.sql)
            for name in step.frees:
                engine.drop(plan.step(name).relation)
        elif not step.on_demand or stop_after is not None:
            engine.view(step.relation, step.sql)
        if step.materialize and (speed := per_second(rows, began)):
            last = f"; {step.name} ran at {speed}"
    if stop_after is not None:
        return None
    progress(f"{table}: account", 0, 1)
    counted = _account(trun, engine)
    for step in plan.steps:  # counted: what the writers do not read goes now
        if step.materialize and step.name not in RESULT_STEPS:
            engine.drop(step.relation)
    engine.drop(plan.relation("earlier"))
    return counted


def rejected_relation(trun: TableRun) -> str:
    return f"{trun.mapping.mapping.slug}__quarantined"


def _account(trun: TableRun, engine: DuckDBEngine) -> ledger_mod.TableLedger:
    plan = trun.plan
    rejected = rejected_relation(trun)
    ((invalid,),) = engine.rows(f"SELECT count(*) FROM {plan.rel('typed')} WHERE NOT __ok")
    if invalid:  # the reasons are made only where some row has them
        step = plan.step("rejects")
        engine.view(step.relation, step.sql)
    engine.materialize(rejected, quarantine.rejected_rows(plan, all_valid=not invalid))
    tl = ledger_mod.TableLedger(trun.mapping.table)
    ids = {s.file_id: s.name for s in plan.sources} | trun.carried
    for f in trun.raw.files:
        tl.files[f.name] = ledger_mod.FileCounts(read=f.rows_read, quarantined=f.malformed)
    ledger_mod.count_fates(plan, engine.rows, tl, ids)
    if plan.fewer_orders:  # repeats compared on the fields an earlier run wrote: said per file
        added = [
            f
            for i, f in enumerate(plan.fields)
            if any(i not in plan.earlier_orders[k - 1] for k in plan.fewer_orders)
        ]
        by_id = {f.file_id: f for f in trun.raw.files}
        for file_id, n in engine.rows(
            f"SELECT __file, count(*) FROM {plan.rel('seen')} WHERE __same AND __fewer GROUP BY ALL ORDER BY 1"
        ):
            if file_id in by_id:
                rows = "1 row repeats a row" if n == 1 else f"{n} rows repeat rows"
                names = ", ".join(added)
                by_id[file_id].notes.append(
                    f"{rows} emitted before {names} joined the mapping: compared on the fields emitted "
                    f"then, {'it is a duplicate' if n == 1 else 'they are duplicates'}, and {names} of "
                    f"{'that change is' if n == 1 else 'those changes are'} in no event"
                )
    _note_null_marks(trun, engine)
    _note_sub_microseconds(trun, engine)
    for reason, n in engine.rows(ledger_mod.reason_counts(ident(rejected))):
        tl.reasons[str(reason)] = int(n)
    return tl


#: what a note says ``sub_microsecond`` did to a value
SUB_MICROSECOND_DONE = {
    "round": "rounded to the nearest microsecond, ties to the even one (sub_microsecond: round)",
    "truncate": "cut to the microsecond (sub_microsecond: truncate)",
}


def _note_sub_microseconds(trun: TableRun, engine: DuckDBEngine) -> None:
    """A note on each file whose rows (not quarantined) had time or timestamp values with digits
    below the microsecond that the mapping's ``sub_microsecond`` rounded or cut: how many, per field."""
    plan, mapping = trun.plan, trun.mapping.mapping
    counts: list[tuple[str, str, str]] = []  # (field, SQL count, what was done)
    images = mapping.change.images is not None
    for name, ftype in trun.mapping.field_types.items():
        sub = mapping.fields[name].sub_microsecond
        if sub in SUB_MICROSECOND_DONE:
            raws = [plan.field_raw(name)] + ([plan.prior_raw(name)] if images else [])
            fine = [ftype.fine(f"s.{r}") for r in raws]
            counts.append(
                (name, " + ".join(f"count_if(coalesce({f}, FALSE))" for f in fine), SUB_MICROSECOND_DONE[sub])
            )
    cat = mapping.change.committed_at
    if cat is not None and cat.sub_microsecond in SUB_MICROSECOND_DONE:
        cat_fine = resolve(cat.as_field()).fine(f"s.{plan.raw(cat.column)}")
        counts.append(
            (
                "committed_at",
                f"count_if(coalesce({cat_fine}, FALSE))",
                SUB_MICROSECOND_DONE[cat.sub_microsecond],
            )
        )
    by_id = {f.file_id: f for f in trun.raw.files}
    if not counts or not by_id:
        return
    rows = engine.rows(
        f"SELECT t.__file, {', '.join(sql for _, sql, _ in counts)} FROM {plan.rel('typed')} t "
        f"JOIN {plan.rel('source')} s ON s.__file = t.__file AND s.__row = t.__row WHERE t.__ok GROUP BY ALL ORDER BY 1"
    )
    for file_id, *ns in rows:
        for (name, _, done), n in zip(counts, ns, strict=True):
            if n and file_id in by_id:
                values = "1 value" if n == 1 else f"{n:,} values"
                by_id[file_id].notes.append(f"{values} of {name} had digits below the microsecond: {done}")


def _note_null_marks(trun: TableRun, engine: DuckDBEngine) -> None:
    """A note on each RFC 4180 or plain-text CSV file whose text fields hold ``\\N``, read as that
    text: MySQL and PostgreSQL write it for NULL in their own dumps, as Hive's text tables do in
    plain text, which the mapping does not say these are."""
    mapping = trun.mapping.mapping
    if mapping.csv.escapes == "backslash" or "\\N" in mapping.nulls:
        return
    texts = [(i, f) for i, (f, t) in enumerate(trun.mapping.field_types.items()) if t.name == "text"]
    by_id = {f.file_id: f for f in trun.raw.files if f.format == "csv"}
    if not texts or not by_id:
        return
    marked = " OR ".join(f"v{i} = {lit(chr(92) + 'N')}" for i, _ in texts)
    for file_id, n in engine.rows(
        f"SELECT __file, count(*) FROM {trun.plan.rel('typed')} WHERE __ok AND ({marked}) GROUP BY ALL ORDER BY 1"
    ):
        if file_id in by_id:
            names = ", ".join(f for _, f in texts)
            said = f"{'1 row holds' if n == 1 else f'{n} rows hold'} \\N in text field"
            said += f"{'s' if len(texts) != 1 else ''} {names}, kept as that text: "
            if mapping.csv.escapes == "none":  # plain text: nothing escapes, so \N is a null token
                said += 'some tools write \\N for NULL in plain text (Hive\'s text tables); if so, add "\\N" to nulls'
            else:
                said += (
                    "MySQL and PostgreSQL write \\N for NULL in their own dumps; if this is one, set csv.escapes: "
                    'backslash in the mapping (with csv.quote for MySQL\'s ENCLOSED BY form), or add "\\N" to nulls'
                )
            by_id[file_id].notes.append(said)


def show_plans(
    mappings: Sequence[LoadedMapping],
    inputs: Iterable[str | Path],
    options: Options,
    table: str | None,
    engine_name: str = "duckdb",
) -> list[str]:
    """Each table's plan as SQL as the engine ``engine_name`` runs it (the files are read, so the
    plan names their relations)."""
    from cdcnorm.engines import engine_class, renderer

    render = renderer(engine_name)
    temporary = bool(engine_class(engine_name).TEMPORARY)
    inputs = list(inputs)
    files = set_aside_markers(expand_inputs(inputs, recursive=options.recursive), mappings, inputs)[0]
    routed = route(files, mappings)
    with scratch_folder(options.scratch) as scratch, engine_errors(scratch):
        engine = DuckDBEngine(temp_directory=str(scratch / "spill"))
        zones.register(engine, mappings)
        read = read_all(mappings, routed, engine, options, _no_progress, scratch)
        by_name = {m.table: m for m in mappings}
        plans = [compile_table(by_name[t], raw) for t, raw in read.items() if not table or t == table]
        return [plan.show(render, temporary=temporary) for plan in plans]


def free_raw(trun: TableRun, engine: DuckDBEngine) -> None:
    """Drop the table's raw relations (and the tables under them)."""
    for rel in trun.plan.relations:
        engine.drop_raw(rel.name)


def file_notes(result: Result) -> list[dict[str, str]]:
    """What the readers noted about the files (an empty file, a file read record by record)."""
    return [
        {"table": table, "file": src.name, "note": note}
        for table, trun in result.tables.items()
        for src in trun.raw.files
        for note in src.notes
    ]


def describe_sources(result: Result) -> list[dict[str, Any]]:
    rows = []
    for table, trun in result.tables.items():
        for src in trun.raw.files:
            rows.append(
                {
                    "table": table,
                    "file": src.name,
                    "format": src.format,
                    "rows": src.rows_read,
                    "malformed": src.malformed,
                    "unmapped_columns": trun.unmapped.get(src.name, []),
                    # of those, the ones unused does not list: what convert notes
                    "unread_columns": unread_columns(trun.mapping, trun.unmapped, src.name),
                    "notes": src.notes,
                }
            )
    return rows
