"""A table's relational plan: named steps, each a sqlglot expression over earlier steps.

Stages (``cdcnorm/stages``) each take a plan and return it with their steps
added; the engine runs the steps in order, materialising those marked so (the
rest are views the engine's optimiser inlines).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import TYPE_CHECKING

from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.sql import PLAN_DIALECT, ident

if TYPE_CHECKING:
    from sqlglot import exp

#: ``lookup(relation, wanted)``: an engine's SQL of the rows of a raw relation that relation
#: ``wanted`` names, or None (``DuckDBEngine.lookup``)
Lookup = Callable[[str, str], str | None]

#: The identity index format this version writes (``Plan.content`` is its digest; the landing
#: area's files are described in ``landing/memory.py``).
INDEX_FORMAT = 4


@dataclass(frozen=True)
class Source:
    """A dump file of this table: its id, display name and raw column names."""

    file_id: int
    name: str
    columns: tuple[str, ...]
    encoding: str = "UTF-8"  # the codec its text was read with
    format: str = ""  # the reader's name: csv, jsonl, parquet


@dataclass(frozen=True)
class RawRelation:
    """An engine relation holding raw rows (``__file``, ``__row``, ``__enc`` and internal columns)."""

    name: str
    columns: tuple[str, ...]


@dataclass(frozen=True)
class Step:
    stage: str
    name: str
    relation: str
    #: the step's SQL in the plan's dialect (``PLAN_DIALECT``), as the stage wrote it
    sql: str
    materialize: bool
    #: earlier materialised steps this one is the last reader of: dropped once it has run, so a
    #: whole copy of the rows does not stay in the engine's memory (or its spill files) to the end
    frees: tuple[str, ...] = ()
    #: a view no later step reads, made only when what reads it needs it (``rejects``: when some
    #: row is not valid); every engine can still make it, and ``--show-plan`` shows it
    on_demand: bool = False

    @cached_property
    def expression(self) -> exp.Expr:
        """The step as a sqlglot expression, parsed when first asked for: an engine of another
        dialect transpiles it, ``--show-plan`` prints it. The engine of the plan's own dialect
        runs ``sql`` as written; parsing every step of every table cost a quarter of a
        50-table run and 30% of a 300-field table's (``tests/test_plan_engines.py`` checks
        that the text and sqlglot's writing of the expression give the same rows)."""
        import sqlglot  # only another engine and --show-plan parse a step (a fifth of a second to import)

        return sqlglot.parse_one(self.sql, read=PLAN_DIALECT)


@dataclass(frozen=True)
class Plan:
    mapping: LoadedMapping
    sources: tuple[Source, ...]
    #: where the raw rows are, and the internal column name of every raw column name
    relations: tuple[RawRelation, ...] = ()
    internal: dict[str, str] = field(default_factory=dict)
    malformed: str | None = None
    #: pending before-images carried in that this run sends to quarantine: None (they keep
    #: waiting), "all", or SQL of a position key below which they do
    settle: str | None = None
    #: the orders of the fields (indices of ``fields``) that earlier runs' identity files were
    #: written in, where they differ from the mapping's now (fields reordered, or fewer: fields
    #: added since): their digests are compared with ``content(order=...)``
    earlier_orders: tuple[tuple[int, ...], ...] = ()

    @property
    def fed_back(self) -> tuple[int, ...]:
        """The ids of the files that are quarantine files fed back (JSON Lines whose lines carry the
        ``_cdcnorm`` object): a version of a change they hold settles a conflict an earlier run
        quarantined."""
        from cdcnorm.quarantine import meta_column

        return tuple(s.file_id for s in self.sources if s.format == "jsonl" and meta_column(s.columns))

    @property
    def fewer_orders(self) -> list[int]:
        """The k (1-based) of the ``earlier_orders`` that lack fields the mapping has now."""
        return [k for k, o in enumerate(self.earlier_orders, start=1) if len(o) < len(self.fields)]

    steps: tuple[Step, ...] = field(default_factory=tuple)

    def types(self) -> dict[str, str]:
        """The engine types of the typed row's columns (what earlier runs' files are read back as)."""
        from cdcnorm import positions

        change = self.mapping.mapping.change
        seq = change.sequence
        out = {
            "__act": "VARCHAR",
            "__pos": positions.key_type(change.position.kind, change.position.width),
            "__seq": positions.key_type(seq.kind, positions.sequence_width(seq, change.position))
            if seq
            else positions.key_type("integer"),
            "__cat": "TIMESTAMPTZ",
        }
        for i, ftype in enumerate(self.mapping.field_types.values()):
            out[f"v{i}"] = ftype.sql_type
        return out

    def content(
        self, prefix: str = "", *, format_3: bool = False, order: tuple[int, ...] | None = None
    ) -> str:
        """SQL: the 128-bit digest of a row's content (commit time and every value), to tell a
        repeat of an identity that an earlier run emitted from a conflicting version.

        It is the MD5 (RFC 1321) of the row's canonical text (its 16 bytes as one number, first
        byte most significant), defined here rather than by any engine's text of a row, so it stays
        the same across engine versions: the commit time and then each field in the mapping's order,
        each value's canonical text (``FieldType.canonical``: its JSON form; a timestamp's
        microseconds since the epoch; an empty bytes value ``=``, which no base64 text is) written
        as ``<n>:<text>`` (``n`` its length in characters) for text and json, whose text may hold
        anything, or as ``<text>;`` for any other type, whose text is never empty and never holds a
        ``;``; NULL is a lone ``;``. No two rows share a canonical text. Index format 4 stores it.

        ``format_3``: the digest index format 3 stored, which wrote an empty bytes value as
        nothing, the same text as NULL (a repeat of its identities is compared with it).
        ``order``: the fields in this order (indices of ``fields``), as a mapping whose fields were
        since reordered wrote them."""
        from cdcnorm.positions import HEX_KEY
        from cdcnorm.types.timestamp import timestamp_canonical

        # one concat of every part, which skips a NULL part (DuckDB's concat does; sqlglot writes it
        # for engines whose concat does not with each part in coalesce(part, '')): a value's text and
        # its ';' (NULL: the ';' alone), or a text's ``<n>:<text>`` (NULL: ';'). A chain of || over
        # every part would copy the growing text at each step (0.1 s more per 1M rows); a text's three
        # parts as three parts (its NULL test a CASE) cost 0.17 s more per 1M rows than one coalesce;
        # concat_ws('', ...), the same text, cost 0.19 s more per 1M rows in the index write
        parts = [timestamp_canonical(f"{prefix}__cat"), "';'"]
        ftypes = list(self.mapping.field_types.values())
        for i in order if order is not None else range(len(ftypes)):
            ftype = ftypes[i]
            v = f"{prefix}v{i}"
            text = (
                f"CAST({ftype.render(v)} AS VARCHAR)"
                if format_3 and ftype.name == "bytes"
                else ftype.canonical(v)
            )
            if ftype.free_text:  # one short chain: NULL anywhere in it makes it NULL, hence ';'
                parts.append(f"coalesce(CAST(length({text}) AS VARCHAR) || ':' || {text}, ';')")
            else:
                parts += [text, "';'"]
        text = f"concat({', '.join(parts)})"
        # the 32 hex digits read as one number: the digest's bytes in order (most significant first)
        return f"{HEX_KEY}(md5({text}))"

    def legacy_content(self, prefix: str = "") -> str:
        """SQL: the digest index formats 1 and 2 stored: the MD5 of the running engine's text of the
        row as a struct. That text is the one DuckDB 2.0 wrote them with; 1.x wrote a backslash or
        bytes value differently (the plans need DuckDB 2.0 in any case)."""
        names = ["c", *(f"v{i}" for i in range(len(self.fields)))]
        cols = [f"{prefix}__cat", *(f"{prefix}v{i}" for i in range(len(self.fields)))]
        struct = "{" + ", ".join(f"'{n}': {c}" for n, c in zip(names, cols, strict=True)) + "}"
        return f"md5_number(CAST({struct} AS VARCHAR))"

    def raw(self, column: str) -> str:
        """The quoted internal name of a raw column (what the plan's SQL says for it)."""
        return ident(self.internal[column])

    def field_raw(self, name: str) -> str:
        """The quoted name of the column holding a field's raw text: its raw column's internal
        name, or, for a field whose ``from`` lists alternatives, the source stage's column of the
        alternative each file has (``alternative_files``)."""
        if name in self.mapping.mapping.alternatives:
            return ident(f"__from{self.fields.index(name)}")
        if self.mapping.mapping.change.images is not None:
            return ident(f"__image{self.fields.index(name)}")
        return self.raw(self.mapping.mapping.raw_column(name))

    def prior_raw(self, name: str) -> str:
        """With ``change.images``: the quoted name of the source stage's column of a field's
        before-image text on an update's row (NULL on other rows)."""
        return ident(f"__prior{self.fields.index(name)}")

    def alternative_files(self, name: str) -> list[tuple[str, list[int]]]:
        """For each raw column field ``name`` may read, in ``from``'s order, the ids of the files
        that read it: a file reads the first of the columns it has."""
        taken: set[int] = set()
        out = []
        for col in self.mapping.mapping.raw_columns(name):
            ids = [s.file_id for s in self.sources if col in s.columns and s.file_id not in taken]
            taken.update(ids)
            out.append((col, ids))
        return out

    def raw_union(self, columns: list[str], wanted: str | None = None, lookup: Lookup | None = None) -> str:
        """SQL: ``__file``, ``__row``, ``__enc`` and the given internal columns of every raw
        relation (NULL where a relation lacks one); with ``wanted`` (a relation with ``__file``
        and ``__row``), only its rows are looked up: by ``lookup(relation, wanted)``, the engine's
        relation of them, where it gives one, else by a semi-join."""
        semi = f" SEMI JOIN {wanted} q ON x.__file = q.__file AND x.__row = q.__row" if wanted else ""
        parts = []
        for rel in self.relations:
            picked = "".join(
                f", x.{ident(c)}" if c in rel.columns else f", CAST(NULL AS VARCHAR) AS {ident(c)}"
                for c in columns
            )
            found = lookup(rel.name, wanted) if lookup and wanted else None
            source = f"{found} x" if found else f"{ident(rel.name)} x{semi}"
            parts.append(f"SELECT x.__file, x.__row, x.__enc{picked} FROM {source}")
        if not parts:
            nulls = "".join(f", CAST(NULL AS VARCHAR) AS {ident(c)}" for c in columns)
            parts.append(
                "SELECT CAST(NULL AS INTEGER) AS __file, CAST(NULL AS BIGINT) AS __row, "
                f"CAST(NULL AS VARCHAR) AS __enc{nulls} WHERE FALSE"
            )
        return " UNION ALL ".join(parts)

    @property
    def fields(self) -> list[str]:
        return list(self.mapping.mapping.fields)

    @property
    def key_index(self) -> list[int]:
        names = self.fields
        return [names.index(k) for k in self.mapping.mapping.key]

    def relation(self, name: str) -> str:
        """The engine relation name of a step (or of a relation the landing area loads)."""
        return f"{self.mapping.mapping.slug}__{name}"

    def rel(self, name: str) -> str:
        """The quoted engine relation name of a step."""
        return ident(self.relation(name))

    def add(
        self,
        stage: str,
        name: str,
        sql: str,
        *,
        materialize: bool = False,
        frees: tuple[str, ...] = (),
        on_demand: bool = False,
    ) -> Plan:
        step = Step(stage, name, self.relation(name), sql, materialize, frees, on_demand)
        return replace(self, steps=(*self.steps, step))

    def step(self, name: str) -> Step:
        for s in self.steps:
            if s.name == name:
                return s
        raise KeyError(name)

    def until(self, stage: str) -> Plan:
        """The plan cut after the last step of ``stage``."""
        last = max(i for i, s in enumerate(self.steps) if s.stage == stage)
        return replace(self, steps=self.steps[: last + 1])

    def show(self, render: Callable[[exp.Expr], str] | None = None, *, temporary: bool = False) -> str:
        """The plan as SQL statements; ``render`` writes a step for an engine (default: the plan's
        own dialect). ``temporary``: the engine makes the steps temporary relations of a session
        (Spark's temporary views); else tables and views of the run's own database, replaced when
        they exist (DuckDB: an in-memory database every connection of the run sees)."""
        from sqlglot import exp

        out = [f"-- plan for {self.mapping.table}"]
        for s in self.steps:
            create = exp.Create(
                this=exp.Table(this=exp.to_identifier(s.relation, quoted=True)),
                kind="TABLE" if s.materialize else "VIEW",
                expression=s.expression,
                replace=not temporary,
                properties=exp.Properties(expressions=[exp.TemporaryProperty()]) if temporary else None,
            )
            out.append(f"-- stage {s.stage}: {s.name}")
            out.append((render(create) if render else create.sql(dialect=PLAN_DIALECT, pretty=True)) + ";")
            for name in s.frees:
                out.append(f"-- {name} is read no more: dropped")
        return "\n".join(out)
