"""Read a table's events back from a landing area into the engine, typed by its mapping.

The events of a table are every file under ``events/<table>/`` (JSON Lines or
Parquet, as ``convert`` wrote them). In a landing area with run records only
committed runs count, so a run being published is never half read; a folder
holding only event files (no ``runs/``) is read whole. Either the landing
area itself or its ``events`` folder may be given.

The loaded relation has one row per event: ``__position`` (the exact,
byte-sortable text), ``__action`` (upsert or delete), ``__cat`` (committed_at),
``__source`` (the file's name) and the mapping's fields as ``v0..vn``, in the
mapping's types: key fields from the envelope's ``key``, the others from its
``values`` (NULL for a delete). Rows never pass through Python.

A run's record states the fields its events were written under (name and value
type). Events written before the mapping was edited are read by those fields
and said so (``Events.notes``): a field added since is NULL in them, a field
removed is left out, and a retyped field's values pass the new type's guarded
cast from their JSON form; one that does not (``47.50`` for an integer) stops
the reading, naming the file, the event's position and the field. Parquet
events without a record (a bare events folder, runs of earlier versions) are
read by the fields their schema states; JSON Lines events without one, as the
mapping states.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import duckdb
import sqlglot
from sqlglot import exp

from cdcnorm.engines.duckdb import CSV_MIN_BUFFER, DuckDBEngine, refusal
from cdcnorm.errors import InputError, name_list
from cdcnorm.landing import runs
from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.mapping.model import FieldSpec
from cdcnorm.names import path_part
from cdcnorm.readers.base import MAX_RECORD_BYTES
from cdcnorm.sql import ident, lit
from cdcnorm.types import FieldType, resolve
from cdcnorm.writers.base import JSON_NULLS

#: The fields a run's events were written under: (name, value type) in the mapping's order.
Written = tuple[tuple[str, str], ...]
_KEY_HINT = (
    "compact them under the mapping they were written with, or convert the table's dumps again into "
    "a new landing area under the mapping as it is now"
)

SUFFIXES = {".jsonl": "jsonl", ".parquet": "parquet"}


@dataclass(frozen=True)
class EventFile:
    path: Path
    run: str  # the run that wrote it (the file's stem)
    fmt: str
    #: the fields its run's record states; None: read as the mapping states (no record says)
    written: Written | None = None


@dataclass(frozen=True)
class Events:
    """A table's events loaded into the engine as ``relation``."""

    mapping: LoadedMapping
    relation: str
    files: tuple[EventFile, ...]
    #: how events written under other fields were read (a field added, removed or retyped since)
    notes: tuple[str, ...] = ()

    @property
    def fields(self) -> list[str]:
        return list(self.mapping.mapping.fields)

    @property
    def key(self) -> list[str]:
        return list(self.mapping.mapping.key)

    def column(self, field: str) -> str:
        return f"v{self.fields.index(field)}"


def events_root(landing: Path) -> Path:
    """The folder holding ``<table>/`` folders of event files."""
    if not landing.is_dir():
        raise InputError(
            f"{landing} is not a folder",
            expected="a landing area written by cdcnorm convert (or its events/ folder)",
            found="no such folder" if not landing.exists() else "a file",
        )
    return landing / "events" if (landing / "events").is_dir() else landing


def check_landing(landing: Path) -> None:
    """``landing`` is a landing area (it has runs) or a folder of ``<table>/`` folders holding event
    files; anything else (the dumps folder given by mistake, an empty folder) is refused, since its
    state would be empty tables and apply would make them without a word."""
    root = events_root(landing)
    if (landing / runs.RUNS).is_dir():
        return
    if any(
        f.suffix in SUFFIXES and not f.name.startswith(".")
        for folder in root.iterdir()
        if folder.is_dir()
        for f in folder.iterdir()
    ):
        return
    entries = list(landing.iterdir())
    raise InputError(
        "this folder holds no runs and no event files",
        file=str(landing),
        expected="a landing area written by cdcnorm convert (its --out folder), or a folder of "
        "<table>/ folders of event files (.jsonl, .parquet)",
        found="an empty folder"
        if not entries
        else f"{len(entries):,} {'entry' if len(entries) == 1 else 'entries'}: "
        + name_list(sorted(e.name for e in entries)[:5])
        + (", ..." if len(entries) > 5 else ""),
        hint="name the folder cdcnorm convert wrote with --out",
    )


def event_files(landing: Path, table: str) -> list[EventFile]:
    """The table's committed event files, in run order."""
    folder = events_root(landing) / path_part(table)
    if not folder.is_dir():
        return []
    committed = runs.committed(landing) if (landing / runs.RUNS).is_dir() else None
    written = _written(landing, table) if committed else {}
    out = []
    for path in sorted(folder.iterdir()):
        fmt = SUFFIXES.get(path.suffix)
        if fmt is None or path.name.startswith(".") or not path.is_file():
            continue
        if committed is not None and path.stem not in committed:
            continue  # a run not (yet) committed
        out.append(EventFile(path, path.stem, fmt, written.get(path.stem)))
    return out


def _written(landing: Path, table: str) -> dict[str, Written]:
    """run -> the fields its record says the table's events were written under."""
    out: dict[str, Written] = {}
    for rec in runs.records(landing):
        fields = rec.get("tables", {}).get(table, {}).get("fields")
        if fields:
            out[rec["run"]] = tuple((str(n), str(t)) for n, t in fields)
    return out


def tables_present(landing: Path) -> list[str]:
    root = events_root(landing)
    return sorted(p.name for p in root.iterdir() if p.is_dir() and not p.name.startswith("."))


def _json_columns(mapping: LoadedMapping, types: dict[str, FieldType]) -> str:
    """read_json's column types for the envelope: the rendered forms of the fields written."""
    key = ", ".join(f"{ident(k)} {types[k].form_type}" for k in mapping.mapping.key if k in types)
    values = ", ".join(f"{ident(n)} {t.form_type}" for n, t in types.items())
    cols = {"action": "VARCHAR", "position": "VARCHAR", "committed_at": "TIMESTAMPTZ"}
    if key:
        cols["key"] = f"STRUCT({key})"
    if values:
        cols["values"] = f"STRUCT({values})"
    return "{" + ", ".join(f"{lit(n)}: {lit(t)}" for n, t in cols.items()) + "}"


def _as_text(old: FieldType, typed: str) -> str:
    """SQL: a value's JSON form as text, which a retyped field's new type casts."""
    return f"CAST({old.render(typed)} AS VARCHAR)"


def _typed(mapping: LoadedMapping, name: str, old: FieldType, rendered: bool) -> str:
    """SQL: the value of field ``name`` as it was written (the type ``old``)."""
    part = "key" if name in mapping.mapping.key else '"values"'
    v = f"struct_extract({part}, {lit(name)})"
    return old.unrender(v) if rendered else v


def _retyped(mapping: LoadedMapping, types: dict[str, FieldType]) -> dict[str, FieldType]:
    """The fields written under another value type than the mapping's now: name -> type then."""
    now = mapping.field_types
    return {n: old for n, old in types.items() if n in now and old.value_type() != now[n].value_type()}


def _select(mapping: LoadedMapping, source: str, types: dict[str, FieldType], *, rendered: bool) -> str:
    cols = []
    retyped = _retyped(mapping, types)
    for i, (name, ftype) in enumerate(mapping.field_types.items()):
        old = types.get(name)
        if old is None:  # added to the mapping after these events were written
            cols.append(f"CAST(NULL AS {ftype.sql_type}) AS v{i}")
            continue
        typed = _typed(mapping, name, old, rendered)
        if name in retyped:
            typed = ftype.cast(_as_text(old, typed))
        if name in mapping.mapping.key:
            # a key field is never NULL in an event (convert quarantines such a row): a NULL one is
            # a field made part of the key since, which the events' keys lack (read as NULL, apply
            # would fail in the target's words, or snapshot would make them one key)
            said = (
                f"filename || {lit(f': the events were written under another key of {mapping.table}: ')}"
                f" || {lit(f'an event has no {name} in its key ({_KEY_HINT})')}"
            )
            typed = f"CASE WHEN {typed} IS NULL THEN {refusal(said)} ELSE {typed} END"
        cols.append(f"CAST({typed} AS {ftype.sql_type}) AS v{i}")
    return (
        "SELECT position AS __position, action AS __action, "
        "CAST(committed_at AS TIMESTAMPTZ) AS __cat, "
        f"parse_filename(filename) AS __source, {', '.join(cols)} FROM {source}"
    )


def _types(mapping: LoadedMapping, written: Written | None) -> dict[str, FieldType]:
    """The types of the fields as written (as the mapping states them when no record says)."""
    now = mapping.field_types
    if written is None:
        return dict(now)
    # a field written as the mapping types it now is read by the mapping's own type
    return {
        n: now[n] if n in now and now[n].value_type() == t else resolve(FieldSpec(type=t)) for n, t in written
    }


def _source(
    engine: DuckDBEngine, mapping: LoadedMapping, files: list[EventFile], types: dict[str, FieldType]
) -> str:
    paths = ", ".join(lit(str(f.path)) for f in files)
    if files[0].fmt == "parquet":
        return f"read_parquet([{paths}], filename = true, union_by_name = true)"
    if any(t.name == "json" for t in types.values()):
        # a line as long as the longest record a reader takes, in buffers the engine's memory holds
        line = min(MAX_RECORD_BYTES, max(CSV_MIN_BUFFER, engine.engine_memory // 8))
        return _tokens_kept(mapping, paths, types, engine.number_tag, line)
    return (
        f"read_json([{paths}], format = 'newline_delimited', filename = true, "
        f"columns = {_json_columns(mapping, types)})"
    )


def _tokens_kept(mapping: LoadedMapping, paths: str, types: dict[str, FieldType], tag: str, line: int) -> str:
    """The JSON Lines events as ``read_json`` gives them, but json fields with their tokens as
    written: the engine's JSON parser re-renders numbers (``2.50`` as ``2.5``, ``1E2`` as
    ``100.0``, a long fraction through a double), so each line's number tokens are made tagged
    strings first (as the JSON Lines reader does), every member is read as text and untagged,
    then cast to the type ``read_json`` would have given it."""
    from cdcnorm.types.json import tag_numbers_of_valid, untag

    def struct(names: list[str]) -> str:
        return "{" + ", ".join(f"{json.dumps(n)}: {json.dumps(_read_as(types[n]))}" for n in names) + "}"

    key = [k for k in mapping.mapping.key if k in types]
    shape = (
        '{"action": "VARCHAR", "position": "VARCHAR", "committed_at": "VARCHAR"'
        + (f', "key": {struct(key)}' if key else "")
        + (f', "values": {struct(list(types))}' if types else "")
        + f', "{JSON_NULLS}": {{"values": "VARCHAR[]"}}'
        + "}"
    )
    # a json field holding the JSON null is written null, as no value is: the event's json_nulls
    # member names it (see writers/base.py)

    def json_null(n: str) -> str:
        return f"list_contains(struct_extract(struct_extract(e, {lit(JSON_NULLS)}), 'values'), {lit(n)})"

    def typed(part: str, names: list[str]) -> str:
        whole = f"struct_extract(e, {lit(part)})"

        def member(n: str) -> str:
            value = f"CAST({untag(f'CAST(struct_extract({whole}, {lit(n)}) AS VARCHAR)', tag)} AS {types[n].form_type})"
            if part == "values" and types[n].name == "json":
                return f"CASE WHEN {json_null(n)} THEN CAST('null' AS JSON) ELSE {value} END"
            return value

        members = ", ".join(f"{ident(n)} := {member(n)}" for n in names)
        return f", CASE WHEN {whole} IS NULL THEN NULL ELSE struct_pack({members}) END AS {ident(part)}"

    lines = (
        f"read_csv([{paths}], columns = {{'line': 'VARCHAR'}}, header = false, delim = chr(1), "
        f"quote = '', escape = '', auto_detect = false, strict_mode = true, filename = true, "
        f"max_line_size = {line}, buffer_size = {line})"
    )
    # events are valid JSON (cdcnorm wrote them): the fast tagging applies
    parsed = (
        f"SELECT filename, from_json({tag_numbers_of_valid('line', tag)}, {lit(shape)}) AS e FROM {lines}"
    )
    return (
        "(SELECT e.action AS action, e.position AS position, "
        f"CAST(e.committed_at AS TIMESTAMPTZ) AS committed_at{typed('key', key) if key else ''}"
        f"{typed('values', list(types)) if types else ''}, filename FROM ({parsed}))"
    )


def _read_as(t: FieldType) -> str:
    """The type a member is first read as: a json field as JSON, any other as its text."""
    return "JSON" if t.name == "json" else "VARCHAR"


def _runs(files: list[EventFile]) -> str:
    first = f"run {files[0].run}"
    return first if len(files) == 1 else f"{first} and {len(files) - 1} later"


def _notes(mapping: LoadedMapping, files: list[EventFile], types: dict[str, FieldType]) -> list[str]:
    """What reading events written under ``types`` with the mapping as it is now means."""
    now = mapping.field_types
    which = f"the events of {_runs(files)}"
    notes = []
    added = [n for n in now if n not in types]
    removed = [n for n in types if n not in now]
    if added:
        they = "they are" if len(added) > 1 else "it is"
        notes.append(f"{which} were written before {_names(added)} joined the mapping: {they} NULL in them")
    if removed:
        notes.append(f"{which} hold {_names(removed)}, which the mapping no longer has: left out")
    for n, old in _retyped(mapping, types).items():
        notes.append(
            f"{which} hold {n} as {old.value_type()}: read as {now[n].value_type()}, "
            "each value through that type's cast"
        )
    return notes


def _names(names: list[str]) -> str:
    return ("fields " if len(names) > 1 else "field ") + ", ".join(names)


def _check_retyped(
    engine: DuckDBEngine,
    mapping: LoadedMapping,
    files: list[EventFile],
    source: str,
    types: dict[str, FieldType],
) -> None:
    """Stop at the first value of a retyped field that its new type refuses, naming where it is."""
    now = mapping.field_types
    rendered = files[0].fmt == "jsonl"
    by_name = {f.path.name: f for f in files}
    for name, old in _retyped(mapping, types).items():
        text = _as_text(old, _typed(mapping, name, old, rendered))
        sql = (
            f"SELECT parse_filename(filename), position, t, {now[name].explain('t')} "
            f"FROM (SELECT filename, position, {text} AS t FROM {source}) "
            f"WHERE t IS NOT NULL AND ({now[name].cast('t')}) IS NULL LIMIT 1"
        )
        bad = engine.rows(sql)
        if bad:
            file, position, value, why = bad[0]
            run = by_name[file].run
            raise InputError(
                f"an event written before field {name} was retyped does not read as its type now",
                file=str(by_name[file].path),
                field=name,
                expected=f"{now[name].describe()}, as the mapping states it now",
                found=f"{value!r} ({why}), in the event at position {position}: run {run} wrote it "
                f"as {old.value_type()}",
                hint=f"keep {name} as {old.value_type()} in the mapping, or convert the table's dumps "
                "again into a new landing area under the mapping as it is now",
            )


#: the value type of a field from the engine's type of its Parquet column, where no record says
_STORED = {
    "BIGINT": "integer",
    "DOUBLE": "float",
    "BOOLEAN": "boolean",
    "DATE": "date",
    "TIME": "time",
    "TIMESTAMPTZ": "timestamp",
    "BLOB": "bytes",
    "UUID": "uuid",
    "JSON": "json",
    "VARCHAR": "text",
}


def _parquet_written(engine: DuckDBEngine, mapping: LoadedMapping, path: Path) -> Written | None:
    """The fields a Parquet events file was written under, from its ``values`` column's type
    (for files no run record speaks of); None when it cannot be read so."""
    try:
        ((_, typ, *_),) = engine.rows(f'DESCRIBE SELECT "values" FROM read_parquet({lit(str(path))})')
        struct = exp.DataType.build(str(typ), dialect="duckdb")
    except (duckdb.Error, sqlglot.errors.SqlglotError, ValueError):
        return None
    out = []
    now = mapping.field_types
    for member in struct.expressions:
        kind = member.args.get("kind")
        if not isinstance(kind, exp.DataType):
            return None
        stored = kind.sql(dialect="duckdb")
        ftype = now.get(member.name)
        if ftype is not None and (
            kind == exp.DataType.build(ftype.sql_type, dialect="duckdb")
            or (stored == "VARCHAR" and ftype.sql_type in ("VARCHAR", "JSON", "UUID"))
        ):
            out.append((member.name, ftype.value_type()))  # stored as the mapping stores it now
        elif kind.is_type(exp.DataType.Type.DECIMAL):
            out.append((member.name, stored.lower().replace(" ", "")))
        elif stored in _STORED:
            out.append((member.name, _STORED[stored]))
        else:
            return None
    return tuple(out)


def _key_members(engine: DuckDBEngine, paths: list[Path]) -> set[str] | None:
    """The members of the ``key`` column of Parquet events files (None where it cannot be read)."""
    files = ", ".join(lit(str(p)) for p in paths)
    try:
        ((_, typ, *_),) = engine.rows(
            f"DESCRIBE SELECT key FROM read_parquet([{files}], union_by_name = true)"
        )
        struct = exp.DataType.build(str(typ), dialect="duckdb")
    except (duckdb.Error, sqlglot.errors.SqlglotError, ValueError):
        return None
    return {m.name for m in struct.expressions}


def _check_parquet_key(engine: DuckDBEngine, mapping: LoadedMapping, files: list[EventFile]) -> None:
    """A key field none of the files' keys hold (a field made part of the key since) is named, with
    the first file lacking it: the engine would only say it cannot find the struct's member."""
    members = _key_members(engine, [f.path for f in files])
    lacking = [k for k in mapping.mapping.key if members is not None and k not in members]
    if not lacking:
        return  # a file lacking one that others hold reads it as NULL, which _select refuses
    first = next(
        (f for f in files if not (_key_members(engine, [f.path]) or set()) >= set(mapping.mapping.key)),
        files[0],
    )
    raise InputError(
        f"the events were written under another key of {mapping.table}: their keys have no "
        f"{', '.join(lacking)}",
        file=str(first.path),
        field=lacking[0],
        expected=f"events keyed by ({', '.join(mapping.mapping.key)})",
        found=f"keys of {', '.join(sorted(members or ()))}",
        hint=_KEY_HINT,
    )


def load_events(
    engine: DuckDBEngine, mapping: LoadedMapping, files: list[EventFile], relation: str | None = None
) -> Events:
    """A view over the files' events, typed (the engine scans the files when it is queried)."""
    relation = relation or f"{mapping.mapping.slug}__events"
    groups: dict[tuple[str, Written | None], list[EventFile]] = {}
    for f in files:
        written = f.written
        if written is None and f.fmt == "parquet":  # no record says: the file's own schema does
            written = _parquet_written(engine, mapping, f.path)
        groups.setdefault((f.fmt, written), []).append(f)
    parts, notes = [], []
    for (fmt, written), group in groups.items():
        types = _types(mapping, written)
        source = _source(engine, mapping, group, types)
        if written is not None:
            lacking = [k for k in mapping.mapping.key if k not in types]
            if lacking:  # their keys cannot be had: a key field added or renamed since
                raise InputError(
                    f"the events of {_runs(group)} were written under another key of {mapping.table}: "
                    f"they lack {', '.join(lacking)}",
                    file=str(group[0].path),
                    field=lacking[0],
                    expected=f"events keyed by ({', '.join(mapping.mapping.key)})",
                    found=f"fields {', '.join(types)}",
                    hint=_KEY_HINT,
                )
            notes += _notes(mapping, group, types)
            _check_retyped(engine, mapping, group, source, types)
        if fmt == "parquet":
            _check_parquet_key(engine, mapping, group)
        parts.append(_select(mapping, source, types, rendered=fmt == "jsonl"))
    if not parts:  # no events yet: an empty relation of the right shape
        cols = ", ".join(
            f"CAST(NULL AS {t.sql_type}) AS v{i}" for i, t in enumerate(mapping.field_types.values())
        )
        parts.append(
            "SELECT CAST(NULL AS VARCHAR) AS __position, CAST(NULL AS VARCHAR) AS __action, "
            f"CAST(NULL AS TIMESTAMPTZ) AS __cat, CAST(NULL AS VARCHAR) AS __source, {cols} WHERE false"
        )
    sql = " UNION ALL ".join(parts)
    engine.view(relation, sql)
    return Events(mapping, relation, tuple(files), tuple(notes))
