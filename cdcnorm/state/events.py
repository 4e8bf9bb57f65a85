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
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import sqlglot

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.landing import runs
from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.names import path_part
from cdcnorm.sql import PLAN_DIALECT, ident, lit

SUFFIXES = {".jsonl": "jsonl", ".parquet": "parquet"}


@dataclass(frozen=True)
class EventFile:
    path: Path
    run: str  # the run that wrote it (the file's stem)
    fmt: str


@dataclass(frozen=True)
class Events:
    """A table's events loaded into the engine as ``relation``."""

    mapping: LoadedMapping
    relation: str
    files: tuple[EventFile, ...]

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


def event_files(landing: Path, table: str) -> list[EventFile]:
    """The table's committed event files, in run order."""
    folder = events_root(landing) / path_part(table)
    if not folder.is_dir():
        return []
    committed = runs.committed(landing) if (landing / runs.RUNS).is_dir() else None
    out = []
    for path in sorted(folder.iterdir()):
        fmt = SUFFIXES.get(path.suffix)
        if fmt is None or path.name.startswith(".") or not path.is_file():
            continue
        if committed is not None and path.stem not in committed:
            continue  # a run not (yet) committed
        out.append(EventFile(path, path.stem, fmt))
    return out


def tables_present(landing: Path) -> list[str]:
    root = events_root(landing)
    return sorted(p.name for p in root.iterdir() if p.is_dir() and not p.name.startswith("."))


def _json_columns(mapping: LoadedMapping) -> str:
    """read_json's column types for the envelope: the rendered forms of the fields."""
    ftypes = mapping.field_types
    key = ", ".join(f"{ident(k)} {ftypes[k].form_type}" for k in mapping.mapping.key)
    values = ", ".join(f"{ident(n)} {t.form_type}" for n, t in ftypes.items())
    cols = {
        "action": "VARCHAR",
        "key": f"STRUCT({key})",
        "position": "VARCHAR",
        "committed_at": "TIMESTAMPTZ",
        "values": f"STRUCT({values})",
    }
    return "{" + ", ".join(f"{lit(n)}: {lit(t)}" for n, t in cols.items()) + "}"


def _select(mapping: LoadedMapping, source: str, *, rendered: bool) -> str:
    keys = set(mapping.mapping.key)
    cols = []
    for i, (name, ftype) in enumerate(mapping.field_types.items()):
        part = "key" if name in keys else '"values"'
        v = f"struct_extract({part}, {lit(name)})"
        typed = ftype.unrender(v) if rendered else v
        cols.append(f"CAST({typed} AS {ftype.sql_type}) AS v{i}")
    return (
        "SELECT position AS __position, action AS __action, "
        "CAST(committed_at AS TIMESTAMPTZ) AS __cat, "
        f"parse_filename(filename) AS __source, {', '.join(cols)} FROM {source}"
    )


def load_events(
    engine: DuckDBEngine, mapping: LoadedMapping, files: list[EventFile], relation: str | None = None
) -> Events:
    """A view over the files' events, typed (the engine scans the files when it is queried)."""
    relation = relation or f"{mapping.mapping.slug}__events"
    parts = []
    jsonl = [lit(str(f.path)) for f in files if f.fmt == "jsonl"]
    parquet = [lit(str(f.path)) for f in files if f.fmt == "parquet"]
    if jsonl:
        src = (
            f"read_json([{', '.join(jsonl)}], format = 'newline_delimited', filename = true, "
            f"columns = {_json_columns(mapping)})"
        )
        parts.append(_select(mapping, src, rendered=True))
    if parquet:
        src = f"read_parquet([{', '.join(parquet)}], filename = true, union_by_name = true)"
        parts.append(_select(mapping, src, rendered=False))
    if not parts:  # no events yet: an empty relation of the right shape
        cols = ", ".join(
            f"CAST(NULL AS {t.sql_type}) AS v{i}" for i, t in enumerate(mapping.field_types.values())
        )
        parts.append(
            "SELECT CAST(NULL AS VARCHAR) AS __position, CAST(NULL AS VARCHAR) AS __action, "
            f"CAST(NULL AS TIMESTAMPTZ) AS __cat, CAST(NULL AS VARCHAR) AS __source, {cols} WHERE false"
        )
    sql = " UNION ALL ".join(parts)
    engine.view(relation, sqlglot.parse_one(sql, read=PLAN_DIALECT))
    return Events(mapping, relation, tuple(files))
