"""What every target database shares: its tables, the guarded statements, one batch's apply.

A mapping's table becomes three tables in the target (all names quoted, never
spliced into SQL text):

- the table itself: the mapping's fields, the key as primary key, and
  ``cdcnorm_position``, the position of the change that last wrote the row;
- ``<table>__deleted``: a tombstone (key, position) per deleted key, so an older
  upsert that arrives later cannot bring the row back;
- ``cdcnorm_applied`` (in the same schema): the event files applied so far to each table
  (table, file, SHA-256, events).

One batch (a set of keys, at most one change each: the latest of the events
being applied) is staged in a temporary table, classified, then written with
one guarded upsert and one guarded delete (and their tombstone upkeep) in one
transaction. A change is applied only when its position is greater than both
the row's and the tombstone's; equal means already applied, lower means stale.
Positions are compared as bytes (their text's byte order is the change order).

The statements are SQLAlchemy Core; a target file gives the dialect's
``insert`` (for ON CONFLICT), column types, how the engine renders a batch
for it, and how a batch is staged.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager, contextmanager
from dataclasses import dataclass
from typing import Any, ClassVar, Protocol

import pyarrow as pa
import sqlalchemy as sa

from cdcnorm.errors import UsageError
from cdcnorm.types.base import FieldType

POSITION = "cdcnorm_position"
ACTION = "cdcnorm_action"
TOMBSTONES = "__deleted"
APPLIED = "cdcnorm_applied"
BATCH = "cdcnorm_batch"


@dataclass(frozen=True)
class TableSpec:
    """A mapping's table as the target holds it."""

    table: str  # the mapping's table name, e.g. ferry.bookings
    schema: str | None
    name: str
    fields: tuple[str, ...]
    key: tuple[str, ...]
    types: dict[str, FieldType]

    @property
    def shown(self) -> str:
        return f"{self.schema}.{self.name}" if self.schema else self.name


def split_name(
    table: str, schema: str | None, *, has_schemas: bool, max_bytes: int | None
) -> tuple[str | None, str]:
    """(schema, name) of a mapping's table in a target: a dotted prefix is the schema where the
    database has schemas (``--schema`` overrides it); refused when ambiguous or too long."""
    if has_schemas and "." in table:
        prefix, name = table.split(".", 1)
    else:
        prefix, name = None, table
    if schema is not None:
        if not has_schemas:
            raise UsageError("--schema: this database has no schemas", found=schema)
        prefix = schema
    for part, what in ((prefix, "schema"), (name, "table")):
        if part is None:
            continue
        if not part or "\x00" in part or (has_schemas and what == "table" and "." in part):
            raise UsageError(
                f"table {table!r} cannot name a {what} in the target",
                field="table",
                expected="at most one dot, between a schema and a table name, and no NUL",
                found=table,
            )
        longest = part + (TOMBSTONES if what == "table" else "")
        if max_bytes is not None and len(longest.encode("utf-8")) > max_bytes:
            raise UsageError(
                f"{what} name {part!r} is too long for the target, which would cut it",
                field="table",
                expected=f"at most {max_bytes - (len(TOMBSTONES) if what == 'table' else 0)} bytes",
                found=f"{len(part.encode('utf-8'))} bytes",
            )
    return prefix, name


@dataclass
class Tables:
    data: sa.Table
    tombstones: sa.Table
    applied: sa.Table
    batch: sa.Table


def q(name: str) -> sa.sql.elements.quoted_name:
    """A name that is always quoted (any character is harmless)."""
    return sa.sql.elements.quoted_name(name, quote=True)


def build_tables(
    spec: TableSpec,
    column_type: Callable[[FieldType], sa.types.TypeEngine[Any]],
    position_type: sa.types.TypeEngine[Any],
) -> Tables:
    md = sa.MetaData()
    schema = q(spec.schema) if spec.schema else None
    cols = [
        sa.Column(
            q(f),
            column_type(spec.types[f]),
            primary_key=f in spec.key,
            nullable=f not in spec.key,
            autoincrement=False,
        )
        for f in spec.fields
    ]
    data = sa.Table(
        q(spec.name), md, *cols, sa.Column(q(POSITION), position_type, nullable=False), schema=schema
    )
    tomb = sa.Table(
        q(spec.name + TOMBSTONES),
        md,
        *[
            sa.Column(q(k), column_type(spec.types[k]), primary_key=True, autoincrement=False)
            for k in spec.key
        ],
        sa.Column(q(POSITION), position_type, nullable=False),
        schema=schema,
    )
    applied = sa.Table(
        q(APPLIED),
        md,
        sa.Column("table_name", sa.Text, primary_key=True),
        sa.Column("sha256", sa.Text, primary_key=True),
        sa.Column("file", sa.Text, nullable=False),
        sa.Column("events", sa.BigInteger, nullable=False),
        sa.Column("applied_at", sa.Text, nullable=False),
        schema=schema,  # beside the tables it speaks of: a schema's log names its own tables
    )
    batch = sa.Table(
        q(BATCH),
        md,
        # one change per key: the key is the batch's primary key, so every lookup by key is indexed
        *[
            sa.Column(q(f), column_type(spec.types[f]), primary_key=f in spec.key, autoincrement=False)
            for f in spec.fields
        ],
        sa.Column(q(POSITION), position_type),
        sa.Column(q(ACTION), sa.Text),
        prefixes=["TEMPORARY"],
    )
    return Tables(data, tomb, applied, batch)


def _on_key(a: sa.Table, b: sa.Table, key: tuple[str, ...]) -> sa.ColumnElement[bool]:
    return sa.and_(*[a.c[k] == b.c[k] for k in key])


def _differs(row: Any, change: Any, fields: list[str]) -> sa.ColumnElement[bool]:
    """True when any of ``fields`` of a row (its columns ``row``) holds other than a change's
    (``change``), NULL being equal to NULL."""
    return sa.or_(sa.false(), *[row[f].is_distinct_from(change[f]) for f in fields])


def classify(t: Tables, key: tuple[str, ...], *, compare: bool = False) -> sa.Select[Any]:
    """What each staged change would do, counted: (kind, n) rows. ``compare``: an upsert the row
    already holds by position (already applied) whose values the row does not hold is ``differs``
    (edited since it was applied: ``guarded_writes(repair=True)`` writes it again)."""
    b, d, r = t.batch, t.tombstones, t.data
    row_pos = sa.func.coalesce(r.c[POSITION], "")
    tomb_pos = sa.func.coalesce(d.c[POSITION], "")
    guard = sa.case((row_pos >= tomb_pos, row_pos), else_=tomb_pos)
    edits = []
    if compare:
        values = [c.name for c in b.c if c.name not in (*key, POSITION, ACTION)]
        edited = sa.and_(b.c[ACTION] == "upsert", r.c[POSITION] == b.c[POSITION], _differs(r.c, b.c, values))
        edits.append((edited, "differs"))
    kind = sa.case(
        *edits,
        (b.c[POSITION] == guard, "already_applied"),
        (b.c[POSITION] < guard, "stale"),
        (sa.and_(b.c[ACTION] == "delete", r.c[key[0]].is_(None)), "deleted_absent"),
        (b.c[ACTION] == "delete", "deleted"),
        (r.c[key[0]].is_(None), "inserted"),
        else_="updated",
    ).label("kind")
    joined = b.outerjoin(r, _on_key(b, r, key)).outerjoin(d, _on_key(b, d, key))
    each = sa.select(kind).select_from(joined).subquery("each_change")
    return sa.select(each.c.kind, sa.func.count()).group_by(each.c.kind)


def held(t: Tables, key: tuple[str, ...]) -> sa.Select[Any]:
    """How many of the staged upserts the table holds as the row of their key, at their position: (n,)."""
    b, r = t.batch, t.data
    on = sa.and_(_on_key(b, r, key), r.c[POSITION] == b.c[POSITION])
    return sa.select(sa.func.count()).select_from(b.join(r, on)).where(b.c[ACTION] == "upsert")


def guarded_writes(
    t: Tables, spec: TableSpec, insert: Callable[[sa.Table], Any], *, repair: bool = False
) -> list[sa.Executable]:
    """The guarded statements of one batch, in order: upsert, drop superseded tombstones, delete,
    write tombstones. ``repair``: an upsert also rewrites a row at its own position whose values
    differ from it (``classify``'s ``differs``)."""
    b, d, r = t.batch, t.tombstones, t.data
    key = spec.key
    cols = [*spec.fields, POSITION]
    newer_than_tomb = sa.or_(d.c[POSITION].is_(None), b.c[POSITION] > d.c[POSITION])
    picked = (
        sa.select(*[b.c[c] for c in cols])
        .select_from(b.outerjoin(d, _on_key(b, d, key)))
        .where(b.c[ACTION] == "upsert", newer_than_tomb)
    )
    up = insert(r).from_select([r.c[c] for c in cols], picked)
    newer = r.c[POSITION] < up.excluded[POSITION]
    if repair:
        values = [c for c in spec.fields if c not in key]
        newer = sa.or_(
            newer, sa.and_(r.c[POSITION] == up.excluded[POSITION], _differs(r.c, up.excluded, values))
        )
    up = up.on_conflict_do_update(
        index_elements=[r.c[k] for k in key],
        set_={r.c[c]: up.excluded[c] for c in cols if c not in key},
        where=newer,
    )

    def batch_keys(action: str) -> sa.Select[Any]:
        return sa.select(*[b.c[k] for k in key]).where(b.c[ACTION] == action)

    # The IN over the batch's keys lets every database drive the delete from the (small) batch
    # through the table's primary key, instead of probing the batch for every row of the table.
    drop_tombs = sa.delete(d).where(
        sa.tuple_(*[d.c[k] for k in key]).in_(batch_keys("upsert")),
        sa.exists(
            sa.select(sa.literal(1))
            .select_from(b)
            .where(_on_key(b, d, key), b.c[ACTION] == "upsert", b.c[POSITION] > d.c[POSITION])
        ),
    )
    delete = sa.delete(r).where(
        sa.tuple_(*[r.c[k] for k in key]).in_(batch_keys("delete")),
        sa.exists(
            sa.select(sa.literal(1))
            .select_from(b)
            .where(_on_key(b, r, key), b.c[ACTION] == "delete", b.c[POSITION] > r.c[POSITION])
        ),
    )
    gone = sa.select(*[b.c[c] for c in [*key, POSITION]]).where(
        b.c[ACTION] == "delete",
        ~sa.exists(sa.select(sa.literal(1)).select_from(r).where(_on_key(b, r, key))),
    )
    tombs = insert(d).from_select([d.c[c] for c in [*key, POSITION]], gone)
    tombs = tombs.on_conflict_do_update(
        index_elements=[d.c[k] for k in key],
        set_={d.c[POSITION]: tombs.excluded[POSITION]},
        where=d.c[POSITION] < tombs.excluded[POSITION],
    )
    return [up, drop_tombs, delete, tombs]


@dataclass
class Counts:
    inserted: int = 0
    updated: int = 0
    deleted: int = 0
    deleted_absent: int = 0
    stale: int = 0
    already_applied: int = 0
    compacted: int = 0  # older changes of a key that a later change in the same apply replaced
    files_skipped: int = 0  # event files an earlier apply recorded

    def add(self, kind: str, n: int) -> None:
        setattr(self, kind, getattr(self, kind) + int(n))

    def as_dict(self) -> dict[str, int]:
        return dict(self.__dict__)


class AlchemySession:
    """A transaction on a SQLAlchemy connection; a target's subclass gives its ``stage``."""

    def __init__(self, conn: sa.Connection) -> None:
        self.conn = conn

    def run(self, statement: sa.Executable) -> list[tuple[Any, ...]]:
        result = self.conn.execute(statement)
        return [tuple(r) for r in result] if result.returns_rows else []


def alchemy_begin(conn: sa.Connection, session: Callable[[sa.Connection], Session]) -> Begin:
    """Transactions on ``conn``, each a ``session``; rolled back at the end with ``rollback``."""

    @contextmanager
    def begin(rollback: bool = False) -> Iterator[Session]:
        with conn.begin() as tx:
            yield session(conn)
            if rollback:
                tx.rollback()

    return begin


class Session(Protocol):
    """One transaction on a target."""

    def run(self, statement: sa.Executable) -> list[tuple[Any, ...]]: ...

    def stage(self, tables: Tables, batch: pa.RecordBatch) -> None: ...


@dataclass(frozen=True)
class Refusal:
    """Values a target refuses: ``condition`` (engine SQL, true for such a value) and what they hold
    that the target's column cannot (for messages)."""

    condition: str
    what: str


class Begin(Protocol):
    """Starts a transaction (rolled back at its end with ``rollback``)."""

    def __call__(self, rollback: bool = False) -> AbstractContextManager[Session]: ...


class Target:
    """A target database. Subclasses (one file each in targets/) give the dialect's parts."""

    scheme: ClassVar[str]
    has_schemas: ClassVar[bool] = True
    max_name_bytes: ClassVar[int | None] = None

    def __init__(self, url: str, wait: float) -> None:
        self.url = url
        self.wait = wait

    def column_type(self, ftype: FieldType) -> sa.types.TypeEngine[Any]:
        raise NotImplementedError

    def position_type(self) -> sa.types.TypeEngine[Any]:
        """Positions compare as bytes: a binary collation where the database has others."""
        return sa.Text()

    def batch_form(self, ftype: FieldType, v: str) -> str:
        """Engine SQL: how a typed value ``v`` is handed to this target in a batch."""
        raise NotImplementedError

    def insert(self, table: sa.Table) -> Any:
        """The dialect's INSERT with ON CONFLICT."""
        raise NotImplementedError

    def cannot_hold(self, ftype: FieldType, v: str) -> Refusal | None:
        """Values of ``ftype`` this database refuses to store in the column apply gives them (engine
        SQL over the typed value ``v``); None where it stores every value. Apply looks for them
        before it writes anything."""
        return None

    #: the SQLAlchemy dialect statements are compiled for, and the sqlglot dialect of type names
    sa_dialect: ClassVar[sa.engine.Dialect]
    type_dialect: ClassVar[str] = "postgres"

    def declared_columns(self, table: sa.Table) -> sa.Executable:
        """A query of (column name, declared type) rows of ``table`` as the target holds it."""
        raise NotImplementedError

    def primary_key(self, table: sa.Table) -> sa.Executable:
        """A query of the names of ``table``'s primary key columns (a row each; none where the
        table has no primary key or does not exist)."""
        raise NotImplementedError

    def position_collation(self, table: sa.Table) -> sa.Executable | None:
        """A query of the collation ``table``'s position column compares by, where the database
        has collations (one row); None where text always compares as bytes."""
        return None

    def why_not_exact(self, declared: str, ftype: FieldType) -> str | None:
        """Why a column declared so would change values of ``ftype`` without an error (``columns``)."""
        from cdcnorm.targets.columns import why_not_exact

        return why_not_exact(declared, ftype, self.type_dialect)

    def type_text(self, ftype: FieldType) -> str:
        """The type apply gives a column of ``ftype``, as the target's DDL writes it."""
        return str(self.column_type(ftype).compile(dialect=self.sa_dialect))

    def connect(self, spec: TableSpec) -> AbstractContextManager[Begin]:
        """A connection held for one table's apply (and the table's lock); it gives transactions."""
        raise NotImplementedError

    def spec(
        self,
        table: str,
        schema: str | None,
        fields: tuple[str, ...],
        key: tuple[str, ...],
        types: dict[str, FieldType],
    ) -> TableSpec:
        prefix, name = split_name(table, schema, has_schemas=self.has_schemas, max_bytes=self.max_name_bytes)
        return TableSpec(table, prefix, name, fields, key, types)

    @property
    def shown(self) -> str:
        """The target for messages: never with a password."""
        return sa.engine.make_url(self.url).render_as_string(hide_password=True)


def scrub(message: str, url: str) -> str:
    """``message`` without the URL's password, wherever it appears."""
    password = sa.engine.make_url(url).password
    if password:
        message = message.replace(str(password), "***")
    return re.sub(r"(://[^:/@\s]*:)[^@\s]*@", r"\1***@", message)
