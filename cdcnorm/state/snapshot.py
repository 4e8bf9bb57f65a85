"""Compact a table's events to its state: the latest change of every key, deleted keys absent.

The change order is the byte order of ``position`` (see positions.py), never
the order of files or runs: a later run may hold an older change. The state
as of a position keeps the events at or below it (every sequence at that log
position); as of a time, the events committed at or before it. Compaction is
one grouping in the engine (a window per key), so it runs within the engine's
memory limit whatever the number of events, and the rows are written sorted
by key: the same events give the same bytes.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from cdcnorm import positions
from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError, UsageError, counted
from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.sql import ident, lit
from cdcnorm.state.events import Events
from cdcnorm.types.json import RawJson

#: Characters of a timestamp position's normalised text (``2026-03-01T08:00:00.000000Z``).
TIMESTAMP_WIDTH = 27


@dataclass(frozen=True)
class AsOf:
    """Which events count: all, those at or below a position, or those committed by a time."""

    condition: str = "TRUE"  # SQL over the events relation
    label: str = "latest"
    #: SQL over the events relation: the events the condition cannot place (left out, and said so)
    unplaced: str | None = None
    #: why they cannot be placed, for the note
    why: str = ""


def left_out(engine: DuckDBEngine, events: Events, as_of: AsOf) -> str | None:
    """A note on the events ``as_of`` leaves out because it cannot place them, or None."""
    if as_of.unplaced is None:
        return None
    ((n, first),) = engine.rows(
        f"SELECT count(*), min(__position) FROM {ident(events.relation)} WHERE {as_of.unplaced}"
    )
    if not n:
        return None
    return (
        f"{counted(int(n), 'event')} {'has' if n == 1 else 'have'} {as_of.why}: left out of the state "
        f"(the first at position {first}); --as-of POSITION places every event"
    )


def position_part(mapping: LoadedMapping, position: str = "__position") -> str:
    """SQL: the log-position part of a ``position`` text (without sequence and rank)."""
    if mapping.mapping.change.position.kind == "timestamp":
        return f"left({position}, {TIMESTAMP_WIDTH})"
    return f"split_part({position}, '.', 1)"  # no other kind's normalised text holds a dot


def as_of_position(engine: DuckDBEngine, mapping: LoadedMapping, text: str) -> AsOf:
    """``--as-of``: a position in the mapping's raw form (``16/B374D848``), or a normalised
    ``position`` of an event (all of it, with sequence and rank, or its log-position part)."""
    spec = mapping.mapping.change.position
    key = positions.position_key(spec, lit(text))
    normal = engine.rows(f"SELECT {positions.position_text(spec, key)}")[0][0]
    if normal is not None:
        return AsOf(f"{position_part(mapping)} <= {lit(str(normal))}", f"position {text}")
    normalised = _normalised(engine, mapping, text)
    if normalised == text:  # a full normalised position, exactly as events hold it
        return AsOf(f"__position <= {lit(text)}", f"position {text}")
    # compared as text, anything else would select by byte order, not log order
    raise UsageError(
        f"--as-of {text!r} is not a position of {mapping.table}",
        field="position",
        expected=positions.expected(spec)
        + ", or an event's normalised position"
        + (f" (did you mean {normalised}?)" if normalised else ""),
        found=text,
    )


def _normalised(engine: DuckDBEngine, mapping: LoadedMapping, text: str) -> str | None:
    """``text`` read as an event's ``position`` (log position, sequence, rank) and written again
    in its normalised form; None when its parts do not read as such."""
    change = mapping.mapping.change
    head = str(engine.rows(f"SELECT {position_part(mapping, lit(text))}")[0][0] or "")
    parts = text[len(head) :].split(".")[1:]
    if not head or len(parts) != (2 if change.sequence else 1) or parts[-1] not in ("0", "1", "2"):
        return None

    def again(kind: str, part: str, key: str, normal: str) -> str | None:
        if kind == "text":  # a text's normalised form is its UTF-8 bytes in hex
            return part if re.fullmatch(r"(?:[0-9A-F]{2})+", part) else None
        value = engine.rows(f"SELECT {normal.replace('__key__', key)}")[0][0]
        return None if value is None else str(value)

    spec = change.position
    out = [
        again(
            spec.kind, head, positions.position_key(spec, lit(head)), positions.position_text(spec, "__key__")
        )
    ]
    if change.sequence:
        seq = change.sequence
        out.append(
            again(
                seq.kind,
                parts[0],
                positions.sequence_key(seq, spec, lit(parts[0])),
                positions.sequence_text(seq, spec, "__key__"),
            )
        )
    if any(o is None for o in out):
        return None
    return ".".join([*(str(o) for o in out), parts[-1]])


def as_of_time(engine: DuckDBEngine, mapping: LoadedMapping, text: str) -> AsOf:
    """``--as-of-time``: an RFC 3339 timestamp; events committed at or before it."""
    if mapping.mapping.change.committed_at is None:
        raise UsageError(
            f"--as-of-time needs commit times, and the mapping of {mapping.table} has no change.committed_at",
            file=str(mapping.path),
            hint="use --as-of POSITION, or map the commit time column",
        )
    from cdcnorm.types.timestamp import has_offset, timestamp_cast

    cast = timestamp_cast(lit(text), "+00:00")
    valid, offset = engine.rows(f"SELECT {cast} IS NOT NULL, {has_offset(lit(text))}")[0]
    if not valid:
        raise UsageError(
            f"--as-of-time {text!r} is not a timestamp",
            expected="an RFC 3339 timestamp, e.g. 2026-03-01T12:00:00Z",
            found=text,
        )
    if not offset:  # RFC 3339 section 5.6: a time has its offset; UTC is not guessed
        raise UsageError(
            f"--as-of-time {text!r} has no offset: which time it means depends on a zone",
            expected="an RFC 3339 timestamp with its offset, e.g. 2026-03-01T12:00:00Z",
            found=text,
            hint=f"add Z for UTC ({text}Z), or the offset of the time meant",
        )
    return AsOf(f"__cat <= {cast}", f"time {text}", "__cat IS NULL", "no commit time, so no time places it")


def latest(engine: DuckDBEngine, events: Events, as_of: AsOf = AsOf(), relation: str | None = None) -> str:
    """Materialise the latest event of every key (fields v0..vn, ``__position``, ``__action``,
    ``__source``); two different events of one key at its latest position stop the run."""
    relation = relation or f"{events.mapping.mapping.slug}__latest"
    keys = ", ".join(events.column(k) for k in events.key)
    n = len(events.fields)
    values = ", ".join(f"v{i}" for i in range(n))
    # The row's whole content, to tell a repeated event from a conflicting one at one position.
    members = ", ".join(f"'v{i}': v{i}" for i in range(n))
    content = f"{{'a': __action, {members}}}"
    latest = (
        f"SELECT *, row_number() OVER w AS __n, lead(__position) OVER w AS __next_pos, "
        f"lead({content}) OVER w AS __next_content, {content} AS __content "
        f"FROM {ident(events.relation)} WHERE {as_of.condition} "
        f"WINDOW w AS (PARTITION BY {keys} ORDER BY __position DESC, __action, __source)"
    )
    engine.materialize(
        relation,
        f"SELECT {values}, __position, __action, __source, "
        "(__next_pos = __position AND __next_content IS DISTINCT FROM __content) AS __conflict "
        f"FROM ({latest}) WHERE __n = 1",
    )
    conflict = engine.rows(f"SELECT __position, __source FROM {ident(relation)} WHERE __conflict LIMIT 1")
    if conflict:
        pos, source = conflict[0]
        raise InputError(
            f"two different events of one key of {events.mapping.table} at one position",
            file=str(source),
            field="position",
            expected="one change per key and position (as convert writes them)",
            found=f"position {pos}",
            hint="the folder mixes events of different landing areas; snapshot each on its own",
        )
    return relation


def compact(engine: DuckDBEngine, events: Events, as_of: AsOf = AsOf(), relation: str | None = None) -> str:
    """Materialise the state: one row per live key (fields v0..vn and ``__position``)."""
    relation = relation or f"{events.mapping.mapping.slug}__state"
    last = latest(engine, events, as_of)
    values = ", ".join(f"v{i}" for i in range(len(events.fields)))
    keys = ", ".join(events.column(k) for k in events.key)
    engine.materialize(
        relation,
        f"SELECT {values}, __position FROM {ident(last)} WHERE __action = 'upsert' ORDER BY {keys}",
    )
    engine.drop(last)
    return relation


#: The column of a state file that holds each row's event position; ``FALLBACK_POSITION`` when a
#: field has its name (names compared ignoring case, as the engine and the targets compare them).
POSITION = "position"
FALLBACK_POSITION = "cdcnorm_position"


def position_column(mapping: LoadedMapping) -> str:
    """The name of the state's position column for this mapping: ``position``, or
    ``cdcnorm_position`` when a field is named ``position`` (the column's name in apply's tables
    too); a mapping with fields of both names is refused, naming the field."""
    taken = {f.casefold(): f for f in mapping.mapping.fields}
    if POSITION not in taken:
        return POSITION
    if FALLBACK_POSITION not in taken:
        return FALLBACK_POSITION
    raise mapping.name_taken(
        taken[FALLBACK_POSITION],
        f"fields {taken[POSITION]} and {taken[FALLBACK_POSITION]} of {mapping.table} have the names of "
        "the column a state file adds to each row for its position",
        f"a mapping without one of the fields {POSITION} and {FALLBACK_POSITION}",
    )


def position_note(mapping: LoadedMapping) -> str | None:
    """A note when the state's position column is not ``position``."""
    column = position_column(mapping)
    if column == POSITION:
        return None
    return f"a field is named {POSITION}: each row's event position is in the column {column}"


def json_null_note(engine: DuckDBEngine, events: Events, relation: str) -> str | None:
    """A note for a JSON Lines state whose json fields hold the JSON value ``null`` in some rows: a
    line writes it ``null``, as it writes no value (the Parquet and CSV state keep them apart, and so
    do the JSON Lines events, whose ``json_nulls`` member names such fields)."""
    ftypes = list(events.mapping.field_types.items())
    json_fields = [(i, name) for i, (name, t) in enumerate(ftypes) if t.name == "json"]
    if not json_fields:
        return None
    counts = ", ".join(f"count(*) FILTER (WHERE CAST(v{i} AS VARCHAR) = 'null')" for i, _ in json_fields)
    (found,) = engine.rows(f"SELECT {counts} FROM {ident(relation)}")
    held = [(name, int(n)) for (_, name), n in zip(json_fields, found, strict=True) if n]
    if not held:
        return None
    said = ", ".join(f"{name} in {counted(n, 'row')}" for name, n in held)
    return (
        f"the JSON value null ({said}) is written null in the JSON Lines state, as no value is; "
        "the Parquet and CSV state keep them apart"
    )


def state_projection(
    events: Events, relation: str, *, render: bool, as_line: bool = False, as_text: bool = False
) -> str:
    """SQL: the state rows under their field names, sorted by key (JSON forms with ``render``,
    as text with ``as_text``)."""
    ftypes = events.mapping.field_types
    keys = ", ".join(events.column(k) for k in events.key)
    raw = RawJson() if as_line else None
    cols = []
    for i, (name, ftype) in enumerate(ftypes.items()):
        v = ftype.render(f"v{i}") if render else f"v{i}"
        if raw is not None and ftype.name == "json":  # spliced in as written (see types/json.py)
            v = raw.placeholder(f"v{i}")
        cols.append((name, f"CAST({v} AS VARCHAR)" if as_text else v))
    cols.append((position_column(events.mapping), "__position"))
    if raw is not None:
        select = f"{raw.line(cols)} AS line"
    else:
        select = ", ".join(f"{e} AS {ident(n)}" for n, e in cols)
    return f"SELECT {select} FROM {ident(relation)} ORDER BY {keys}"


def write_snapshot(engine: DuckDBEngine, events: Events, relation: str, path: Path, fmt: str) -> int:
    """Write the state to ``path``: Parquet (native types), CSV (RFC 4180, the JSON forms as text,
    a header) or JSON Lines; rows written."""
    if fmt == "parquet":
        sql = state_projection(events, relation, render=False)
        return engine.copy(sql, path, "parquet")
    if fmt == "jsonl":
        sql = state_projection(events, relation, render=True, as_line=True)
        return engine.copy(sql, path, "lines")
    sql = state_projection(events, relation, render=True, as_text=True)
    return engine.copy(sql, path, "csv")


FORMATS = {"parquet": ".parquet", "csv": ".csv", "jsonl": ".jsonl"}
