"""Apply a table's events to a target database: idempotent, order-proof, set-based.

1. Event files the target's applied log already holds (by SHA-256) are skipped.
2. The engine keeps the latest change of every key among the other files (older
   ones are counted as ``compacted``): a guarded change makes the older ones moot.
3. Those changes stream out of the engine in batches of keys; each batch is
   staged in the target and written by the guarded statements (targets/base.py)
   in one transaction. A killed apply leaves whole batches applied; a rerun
   applies the rest (what is there already counts as already applied).
4. The files are recorded in the applied log.

``dry_run`` does all of it in one transaction that is rolled back, so the counts
are those of a real apply and nothing changes.

``recheck`` then holds the table to every events file, those the log names
too: the latest change of each key is staged again and compared with the
table. A row gone (deleted by hand) or a tombstone gone comes back
(``restored``); a row whose values, or position (to an earlier one), were
edited since its change was applied is written again (``repaired``); rows that
are not the latest upsert of their key at its position are counted
(``unmatched``: written by hand or by another loader, or moved to a later
position) and left as they are.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from contextlib import AbstractContextManager, ExitStack, nullcontext
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import duckdb
import sqlalchemy as sa

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import CdcnormError, InputError, MappingError, TargetError, counted, per_second
from cdcnorm.inputs import checksum
from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.sql import ident
from cdcnorm.state.events import EventFile, event_files, load_events
from cdcnorm.state.snapshot import latest
from cdcnorm.targets.base import (
    ACTION,
    APPLIED,
    BATCH,
    POSITION,
    TOMBSTONES,
    Counts,
    Session,
    Tables,
    TableSpec,
    Target,
    build_tables,
    classify,
    guarded_writes,
    held,
)

#: Collations that compare text as bytes (PostgreSQL's; "C.UTF-8" and the like start with "C.").
BYTE_COLLATIONS = ("C", "POSIX", "ucs_basic")

#: Keys per batch: one staged table, one transaction.
BATCH_ROWS = 50_000


@dataclass
class TableApply:
    table: str
    target_table: str
    counts: Counts = field(default_factory=Counts)
    events: int = 0
    files: int = 0
    #: how events written under other fields were read (``Events.notes``)
    notes: tuple[str, ...] = ()
    #: with ``recheck``: how the table differed from every events file
    recheck: Recheck | None = None


@dataclass
class Recheck:
    """How a table differed from the latest change of each key of all its events files."""

    keys: int = 0  #: keys compared
    restored: int = 0  #: rows (or tombstones) gone from the target, written again
    repaired: int = 0  #: rows edited since their change was applied (values or position), written again
    #: rows that are not the latest upsert of their key at its position (left as they are): written
    #: by hand or by another loader, or edited to a later position than any of the key's events
    unmatched: int = 0

    @property
    def differs(self) -> bool:
        return bool(self.restored or self.repaired or self.unmatched)

    def as_dict(self) -> dict[str, int]:
        return dict(self.__dict__)


#: What each kind of ``classify``'s (with ``compare``) means when every file was applied already.
RECHECK_KINDS = {
    "inserted": "restored",
    "deleted_absent": "restored",
    "updated": "repaired",
    "deleted": "repaired",
    "differs": "repaired",
}


def _ensure(session: Session, target: Target, tables: Tables) -> None:
    if tables.data.schema and target.has_schemas:
        session.run(sa.schema.CreateSchema(tables.data.schema, if_not_exists=True))
    for t in (tables.data, tables.tombstones, tables.applied):
        session.run(sa.schema.CreateTable(t, if_not_exists=True))


def _check_columns(session: Session, target: Target, spec: TableSpec, tables: Tables) -> None:
    """A table made beforehand must hold the mapping's values exactly (``targets/columns.py``):
    a column it lacks, or one whose type would change values without an error, stops the apply
    before anything is written."""
    declared = {str(n): str(t) for n, t in session.run(target.declared_columns(tables.data))}
    shown = f'"{spec.shown}"'
    for field_name in spec.fields:
        ftype = spec.types[field_name]
        want = target.type_text(ftype)
        if field_name not in declared:
            raise TargetError(
                f"{target.shown}: table {shown} has no column {field_name}",
                field=field_name,
                expected=f"a column for each field of the mapping ({want} for {ftype.describe()})",
                hint="a field added to a mapping needs its column in a table made before: ALTER TABLE "
                f'{shown} ADD COLUMN "{field_name}" {want}',
            )
        why = target.why_not_exact(declared[field_name], ftype)
        if why is not None:
            raise TargetError(
                f"{target.shown}: column {field_name} of {shown} would not hold {ftype.describe()} values "
                f"exactly: {why}",
                field=field_name,
                expected=f"{want} (the type apply gives it), or one that holds every value exactly",
                found=declared[field_name],
                hint=f"change the column's type to {want}, or drop the table and let apply create it",
            )
    _check_key(session, target, spec, tables)
    for table in (tables.data, tables.tombstones):
        query = target.position_collation(table)
        rows = session.run(query) if query is not None else []
        collation = str(rows[0][0]) if rows and rows[0][0] is not None else None
        if collation is not None and collation not in BYTE_COLLATIONS and not collation.startswith("C."):
            name = f"{table.schema}.{table.name}" if table.schema else table.name
            raise TargetError(
                f'{target.shown}: column {POSITION} of "{name}" compares by the collation "{collation}": '
                "positions would be ordered by the locale's rules, not as bytes",
                field=POSITION,
                expected='a collation that compares bytes ("C")',
                found=collation,
                hint=f'ALTER TABLE "{name}" ALTER COLUMN {POSITION} TYPE text COLLATE "C"',
            )


def _check_key(session: Session, target: Target, spec: TableSpec, tables: Tables) -> None:
    """The tables must be keyed by the mapping's key: every write names it as the conflict to
    resolve, which the database refuses in its own words for another key (a key edited in the
    mapping since apply made the tables)."""
    want = list(spec.key)
    for table in (tables.data, tables.tombstones):
        have = [str(n) for (n,) in session.run(target.primary_key(table))]
        if sorted(have) == sorted(want):
            continue
        name = f"{table.schema}.{table.name}" if table.schema else table.name
        data = spec.shown
        raise TargetError(
            f'{target.shown}: table "{name}" is keyed by ({", ".join(have) or "no primary key"}), the '
            f"mapping of {spec.table} by ({', '.join(want)})",
            field=want[0],
            expected=f"a primary key of ({', '.join(want)})",
            found=f"({', '.join(have)})" if have else "no primary key",
            hint=f'the key was edited since apply made the table: drop "{data}" and "{data}{TOMBSTONES}" '
            "and apply again (tables made anew get every events file again), or restore the mapping's key",
        )


def _check_values(
    engine: DuckDBEngine, mapping: LoadedMapping, target: Target, last: str, files: list[EventFile]
) -> None:
    """Values the target cannot store (``Target.cannot_hold``) stop the apply before anything is
    written, named by field, key, position and events file: the database's own refusal would come
    in the middle of a batch, in its words."""
    key = tuple(mapping.mapping.key)
    names = list(mapping.field_types)
    shown_key = ", ".join(f"CAST(v{names.index(k)} AS VARCHAR)" for k in key)
    checks = []
    for i, (name, ftype) in enumerate(mapping.field_types.items()):
        refusal = target.cannot_hold(ftype, f"v{i}")
        if refusal is not None:  # a delete writes only its key
            rows = "TRUE" if name in key else "__action = 'upsert'"
            checks.append((name, ftype, refusal, f"{rows} AND coalesce({refusal.condition}, FALSE)"))
    if not checks:
        return
    parts = ", ".join(
        f"count(*) FILTER (WHERE {c}), arg_min([__position, __source, {shown_key}], __position) FILTER (WHERE {c})"
        for _, _, _, c in checks
    )
    found = engine.rows(f"SELECT {parts} FROM {ident(last)}")[0]
    paths = {f.path.name: f.path for f in files}
    for (name, ftype, refusal, _), n, first in zip(checks, found[0::2], found[1::2], strict=True):
        if not n:
            continue
        position, source, *key_values = first
        key_text = ", ".join(f"{k}={v}" for k, v in zip(key, key_values, strict=True))
        more = f" (and {n - 1:,} more values)" if n > 1 else ""
        raise TargetError(
            f"{target.shown}: {counted(n, 'value')} of {mapping.table}.{name} "
            f"hold{'' if n > 1 else 's'} {refusal.what}, which the database cannot store; no row of "
            f"{mapping.table} was written",
            file=str(paths.get(source, source)),
            field=name,
            expected=f"values a {target.type_text(ftype)} column stores",
            found=f"{refusal.what} in the value of key {key_text} at position {position}{more}",
            hint="load the table into a database that stores it (SQLite, DuckDB), or correct the value at "
            "its source: once a later change of the key replaces it, the apply goes through. Other "
            "tables apply on their own with --table",
        )


def placed(
    target: Target,
    mappings: list[LoadedMapping],
    schema: str | None = None,
    *,
    applied: list[LoadedMapping] | None = None,
) -> list[TableSpec]:
    """Where the tables of ``applied`` (default: every mapping) go in ``target`` (with ``--schema``,
    if given), in their order: refused, naming the mapping file, when a field is named like a column
    apply adds, or when a table apply makes for one of them (a table, its tombstones, the applied
    log) would be one table in the target with another that ``mappings`` make. Names are compared
    ignoring case, as DuckDB and SQLite compare even quoted names (common practice). The other
    mappings only take their places: one the target cannot hold is not this apply's to refuse."""
    applying = mappings if applied is None else applied
    chosen = {id(lm) for lm in applying}
    specs: dict[int, TableSpec] = {}
    owners: dict[tuple[str, str], tuple[str, LoadedMapping]] = {}
    for lm in [*applying, *(lm for lm in mappings if id(lm) not in chosen)]:
        m = lm.mapping
        mine = id(lm) in chosen
        for added in (POSITION, ACTION):
            if mine and added in m.fields:
                raise lm.name_taken(
                    added,
                    f"field {added} of {m.table} has the name of a column apply adds to its table",
                    f"field names other than {POSITION} and {ACTION}",
                )
        try:
            spec = target.spec(m.table, schema, tuple(m.fields), tuple(m.key), lm.field_types)
        except CdcnormError:
            if mine:
                raise
            continue
        if mine:
            specs[id(lm)] = spec
        folded = (spec.schema or "").casefold()
        for name, role in ((spec.name, "table"), (spec.name + TOMBSTONES, "tombstone table")):
            shown = f"{spec.schema}.{name}" if spec.schema else name
            if mine and name.casefold() in (APPLIED, BATCH):
                raise MappingError(
                    f"the {role} of {m.table} would be {shown}, a table apply keeps for itself",
                    file=str(lm.path),
                    line=1,
                    field="table",
                    expected=f"a table name whose {role} is not {APPLIED} or {BATCH}",
                    found=m.table,
                    hint="rename the table in the mapping",
                )
            other = owners.get((folded, name.casefold()))
            if other is not None and (mine or id(other[1]) in chosen):
                other_role, other_lm = other
                raise MappingError(
                    f"the {role} of {m.table} and the {other_role} of {other_lm.table} ({other_lm.path}) "
                    f"would both be {shown} in {target.shown}",
                    file=str(lm.path),
                    line=1,
                    field="table",
                    expected=f"tables that apply keeps apart (names compared ignoring case; T{TOMBSTONES} "
                    "holds the tombstones of table T)",
                    found=m.table,
                    hint="rename one of the tables in its mapping"
                    + (", or apply them to different schemas with --table and --schema" if schema else ""),
                )
            owners.setdefault((folded, name.casefold()), (role, lm))
    return [specs[id(lm)] for lm in applying]


@dataclass(frozen=True)
class _Table:
    """What every step of one table's apply works with."""

    engine: DuckDBEngine
    mapping: LoadedMapping
    target: Target
    spec: TableSpec
    tables: Tables
    #: a transaction on the target (under --dry-run, the one transaction, rolled back at the end)
    transaction: Callable[[], AbstractContextManager[Session]]
    batch_rows: int
    progress: Callable[[str, int, int], None]

    @property
    def key(self) -> tuple[str, ...]:
        return tuple(self.mapping.mapping.key)


def apply_table(
    engine: DuckDBEngine,
    mapping: LoadedMapping,
    landing: Path,
    target: Target,
    *,
    schema: str | None = None,
    dry_run: bool = False,
    recheck: bool = False,
    batch_rows: int = BATCH_ROWS,
    progress: Callable[[str, int, int], None] = lambda label, done, total: None,
) -> TableApply:
    """Apply one table's new event files to ``target``; ``progress(label, keys done, keys)`` hears
    each batch. ``recheck``: then compare the table with every events file and repair it
    (``Recheck``)."""
    m = mapping.mapping
    (spec,) = placed(target, [mapping], schema)
    tables = build_tables(spec, target.column_type, target.position_type())
    report = TableApply(m.table, spec.shown)
    files = event_files(landing, m.table)
    digests = {f.path: checksum(f.path) for f in files}
    with target.connect(spec) as begin, ExitStack() as stack:
        transaction: Callable[[], AbstractContextManager[Session]] = begin
        if dry_run:  # one transaction, rolled back: every batch sees the ones before it
            session = stack.enter_context(begin(rollback=True))
            transaction = lambda: nullcontext(session)  # noqa: E731
        t = _Table(engine, mapping, target, spec, tables, transaction, batch_rows, progress)
        _apply(t, files, digests, report)
        if recheck:
            report.recheck = _recheck(t, files, report)
    return report


def _apply(t: _Table, files: list[EventFile], digests: dict[Path, str], report: TableApply) -> None:
    target, spec, tables = t.target, t.spec, t.tables
    with t.transaction() as s:
        existed = bool(s.run(target.declared_columns(tables.data)))
        _ensure(s, target, tables)
        _check_columns(s, target, spec, tables)
        a = tables.applied
        logged = a.c.table_name == spec.name
        done = {str(sha): int(n) for sha, n in s.run(sa.select(a.c.sha256, a.c.events).where(logged))}
        emptied = (
            existed
            and sum(done.values()) > 0
            and not s.run(sa.select(sa.literal(1)).select_from(tables.data).limit(1))
            and not s.run(sa.select(sa.literal(1)).select_from(tables.tombstones).limit(1))
        )
        if done and (not existed or emptied):
            # the log speaks of a table that is no longer there (dropped, to be made anew), or
            # of events of which neither a row nor a tombstone is left (both tables emptied: each
            # event applied leaves one or the other): every file is applied into it again
            s.run(sa.delete(a).where(logged))
            gone = f'"{spec.shown}" was not in the target' if not existed else f'"{spec.shown}" was emptied'
            report.notes = (
                f"{gone}, though its applied log named {counted(len(done), 'events file')} of "
                f"{counted(sum(done.values()), 'event')}: every file is applied into it anew",
            )
            done = {}
    new = [f for f in files if digests[f.path] not in done]
    for f in files:
        if digests[f.path] in done:
            report.counts.files_skipped += 1
            report.counts.already_applied += done[digests[f.path]]
            report.events += done[digests[f.path]]
    report.files = len(files)
    if not new:
        return
    t.progress(f"{t.mapping.table}: read {counted(len(new), 'new event file')}", 0, 1)
    last, per_file = _latest(t, new, report)
    total = sum(per_file.values())
    keys = t.engine.count(last)
    report.events += total
    report.counts.compacted += total - keys

    def counted_kinds(s: Session) -> None:
        for kind, n in s.run(classify(tables, t.key)):
            report.counts.add(str(kind), int(n))

    writes = guarded_writes(tables, spec, target.insert)
    _write_batches(t, last, keys, writes, ("apply", "applied"), before=counted_kinds)
    now = datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    with t.transaction() as s:
        for f in new:
            s.run(
                target.insert(tables.applied)
                .values(
                    table_name=spec.name,
                    sha256=digests[f.path],
                    file=f.path.name,
                    events=int(per_file.get(f.path.name, 0)),
                    applied_at=now,
                )
                .on_conflict_do_nothing()  # another apply of the same file got there first
            )
    t.engine.drop(last)


def _latest(t: _Table, files: list[EventFile], report: TableApply) -> tuple[str, dict[str, int]]:
    """The latest change of each key among ``files`` (an engine table) and the events each file holds."""
    engine, mapping = t.engine, t.mapping
    events = load_events(engine, mapping, files, f"{mapping.mapping.slug}__apply_events")
    report.notes = tuple(dict.fromkeys((*report.notes, *events.notes)))
    try:
        per_file = {
            str(f): int(n)
            for f, n in engine.rows(f"SELECT __source, count(*) FROM {ident(events.relation)} GROUP BY ALL")
        }
        last = latest(engine, events)
    except duckdb.Error as e:  # the engine could not read an events file
        raise InputError(
            f"an events file of {mapping.table} cannot be read: {str(e).splitlines()[0]}",
            expected="event files as cdcnorm convert writes them",
        ) from None
    _check_values(engine, mapping, t.target, last, files)
    return last, per_file


def _write_batches(
    t: _Table,
    last: str,
    keys: int,
    writes: list[sa.Executable],
    verbs: tuple[str, str],
    *,
    before: Callable[[Session], None],
    after: Callable[[Session], None] = lambda s: None,
) -> None:
    """Stream the changes of ``last`` to the target in batches of keys: each batch staged, counted
    (``before``), written (``writes``) and counted again (``after``) in one transaction; ``verbs``:
    the progress lines' (``apply``, ``applied``)."""
    ftypes = list(t.mapping.field_types.values())
    forms = [f"{t.target.batch_form(ft, f'v{i}')} AS v{i}" for i, ft in enumerate(ftypes)]
    sql = f"SELECT {', '.join(forms)}, __position, __action FROM {ident(last)}"
    reader = t.engine.con.sql(sql).to_arrow_reader(t.batch_rows)
    assert reader is not None
    done_rows = 0
    began = time.perf_counter()
    table = t.mapping.table
    t.progress(f"{table}: {verbs[0]} {counted(keys, 'key')}", 0, keys)
    for batch in reader:
        if not batch.num_rows:
            continue
        with t.transaction() as s:
            s.run(sa.schema.CreateTable(t.tables.batch, if_not_exists=True))
            s.run(sa.delete(t.tables.batch))
            s.stage(t.tables, batch)
            before(s)
            for statement in writes:
                s.run(statement)
            after(s)
        done_rows += batch.num_rows
        rate = per_second(done_rows, began, "key")
        label = f"{table}: {verbs[1]} {done_rows:,} of {keys:,} keys" + (f", {rate}" if rate else "")
        t.progress(label, done_rows, keys)


def _recheck(t: _Table, files: list[EventFile], report: TableApply) -> Recheck:
    """Compare the table with the latest change of each key of every events file (all applied by
    now) and write again what differs: ``Recheck``."""
    found = Recheck()
    matched = 0
    if files:
        t.progress(f"{t.mapping.table}: recheck {counted(len(files), 'event file')}", 0, 1)
        last, _ = _latest(t, files, report)
        found.keys = t.engine.count(last)

        def kinds(s: Session) -> None:
            for kind, n in s.run(classify(t.tables, t.key, compare=True)):
                if (fate := RECHECK_KINDS.get(str(kind))) is not None:
                    setattr(found, fate, getattr(found, fate) + int(n))

        def holds(s: Session) -> None:  # the upserts the table holds once the batch is written
            nonlocal matched
            matched += int(s.run(held(t.tables, t.key))[0][0])

        writes = guarded_writes(t.tables, t.spec, t.target.insert, repair=True)
        _write_batches(t, last, found.keys, writes, ("recheck", "rechecked"), before=kinds, after=holds)
        t.engine.drop(last)
    with t.transaction() as s:
        rows = int(s.run(sa.select(sa.func.count()).select_from(t.tables.data))[0][0])
    found.unmatched = rows - matched
    return found


__all__ = ["BATCH_ROWS", "POSITION", "Recheck", "TableApply", "apply_table"]
