"""The mapping file's model: one YAML file declares one table.

Every key is documented here and in the README ("Mapping files"); unknown keys
are errors (with the closest valid key suggested), never ignored.
"""

from __future__ import annotations

import re
from functools import cached_property
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

ACTIONS = ("delete", "insert", "before", "after", "snapshot")
Action = Literal["delete", "insert", "before", "after", "snapshot"]
PositionKind = Literal["integer", "hex", "hex-pair", "timestamp", "text"]

#: The longest delimiter plain text (``csv.escapes: none``) takes: bulk-copy exports separate
#: fields by a few characters no value holds (``|~|``, say).
MAX_PLAIN_DELIMITER = 16

_ZONE = re.compile(r"^(Z|UTC|[+-](0\d|1\d|2[0-3]):?[0-5]\d)$")


def check_zone(value: str) -> str:
    """A fixed UTC offset, or an IANA zone name known to zoneinfo (with the tzdata package)."""
    if _ZONE.match(value):
        return value
    from cdcnorm import zones
    from cdcnorm.errors import did_you_mean

    if value in zones.names():
        return value
    raise ValueError(
        f'zone must be a fixed UTC offset such as "+00:00", "-05:30" or "Z", or an IANA zone name such as '
        f'"Europe/Oslo", not "{value}"{did_you_mean(value, zones.names())}'
    )


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class Located(ValueError):
    """A check of the whole mapping that is about one of its keys: ``loc`` is that key's path, so
    the error names it and its line (a plain ValueError of the whole mapping points at line 1)."""

    def __init__(self, message: str, *loc: str, found: str | None = None, hint: str | None = None) -> None:
        super().__init__(message)
        self.loc = loc
        self.found = found  # the value at fault (else none is shown: never the whole mapping)
        self.hint = hint


class ActionSpec(Strict):
    """Which raw column holds the operation code, and what each code means."""

    column: str = Field(description="Raw column with the operation code.")
    codes: dict[str, Action] = Field(
        description="Raw code -> one of delete, insert, before, after, snapshot.", min_length=1
    )

    @field_validator("codes", mode="before")
    @classmethod
    def _codes_as_text(cls, value: Any) -> Any:
        if isinstance(value, dict):
            for k in value:
                if not isinstance(k, str):
                    # YAML reads 010 as the number 8 and 1.0 as 1.0: the code would not be the text
                    raise ValueError(
                        f"action code {k!r} was read as a {type(k).__name__}, not as text: "
                        f'quote it, e.g. "{k}": ... (YAML reads an unquoted 010 as the number 8)'
                    )
            return dict(value)
        return value


class PositionSpec(Strict):
    """The log position: the primary order of changes."""

    column: str
    kind: PositionKind = Field(
        description="integer | hex (byte string, any case, optional 0x) | hex-pair (two hex numbers 16/B374D848) | timestamp | text"
    )
    width: int = Field(
        default=32,
        ge=1,
        le=128,
        description="hex only: digits the normalised position is padded to (32 = 16 bytes).",
    )
    zone: str = Field(default="+00:00", description="timestamp only: offset for values written without one.")

    @field_validator("zone")
    @classmethod
    def _zone_ok(cls, v: str) -> str:
        return check_zone(v)

    @model_validator(mode="after")
    def _options_apply(self) -> PositionSpec:
        if "width" in self.model_fields_set and self.kind != "hex":
            raise ValueError(f"width applies to hex positions only, not to kind {self.kind}; remove it")
        if "zone" in self.model_fields_set and self.kind != "timestamp":
            raise ValueError(f"zone applies to timestamp positions only, not to kind {self.kind}; remove it")
        return self


SequenceKind = Literal["integer", "hex", "hex-pair", "text"]


class SequenceSpec(Strict):
    """Optional tie-breaker inside one position: the order of changes within one transaction."""

    column: str
    kind: SequenceKind = Field(
        default="integer",
        description="integer | hex (byte string, any case, optional 0x; at most `width` digits) | hex-pair | text",
    )
    width: int | None = Field(
        default=None,
        ge=1,
        le=128,
        description="hex only: digits the sequence is padded to (default: the position's width, or 32).",
    )


#: why a count since the epoch takes no zone
EPOCH_ZONE = "zone does not apply to a count since the epoch, which is in UTC; remove one of zone and epoch"

#: what a time or timestamp with non-zero digits below the microsecond becomes (the engines, the
#: events and the targets hold microseconds): quarantined (reject, the default), rounded to the
#: nearest microsecond (ties to the even one, as PostgreSQL reads such text), or truncated (as
#: Python's datetime.fromisoformat reads it)
SubMicrosecond = Literal["reject", "round", "truncate"]
SUB_MICROSECOND_DESCRIPTION = (
    "time, timestamp: a value with non-zero digits below the microsecond (SQL Server's datetime2(7), "
    "nanoseconds since the epoch) is quarantined (reject, the default), rounded to the nearest "
    "microsecond, ties to the even one (round), or cut (truncate); convert notes how many per file."
)


def check_sub_microsecond(sub: str | None, epoch: str | None) -> None:
    """``sub_microsecond`` only where digits below the microsecond can be: text, or nanoseconds."""
    if sub is not None and epoch in ("s", "ms", "us"):
        raise ValueError(
            f"sub_microsecond does not apply to a count of whole {EPOCH_NAMES[epoch]}, which has no digits "
            "below the microsecond; remove it (it applies to RFC 3339 text and to epoch: ns)"
        )


EPOCH_NAMES = {"s": "seconds", "ms": "milliseconds", "us": "microseconds", "ns": "nanoseconds"}


class CommittedAtSpec(Strict):
    column: str
    zone: str = Field(default="+00:00", description="Offset for values written without one.")
    epoch: Literal["s", "ms", "us", "ns"] | None = Field(
        default=None,
        description="The values are whole seconds, milliseconds, microseconds or nanoseconds since "
        "1970-01-01T00:00:00Z (not RFC 3339 text).",
    )
    sub_microsecond: SubMicrosecond | None = Field(default=None, description=SUB_MICROSECOND_DESCRIPTION)

    @field_validator("zone")
    @classmethod
    def _zone_ok(cls, v: str) -> str:
        return check_zone(v)

    @model_validator(mode="after")
    def _one_way(self) -> CommittedAtSpec:
        if self.epoch is not None and "zone" in self.model_fields_set:
            raise ValueError(EPOCH_ZONE)
        check_sub_microsecond(self.sub_microsecond, self.epoch)
        return self

    def as_field(self) -> FieldSpec:
        """The commit time as a timestamp field reads it (its cast, reason and ``sub_microsecond``)."""
        zone = None if self.epoch else self.zone
        return FieldSpec(type="timestamp", zone=zone, epoch=self.epoch, sub_microsecond=self.sub_microsecond)


class ImagesSpec(Strict):
    """A record that holds both images of its change, each a member of the record: a JSON Lines
    object, a Parquet struct, or (CSV) the columns ``<member>.<field>``."""

    before: str = Field(
        min_length=1, description="The member holding the row before the change (null for an insert)."
    )
    after: str = Field(
        min_length=1, description="The member holding the row after the change (null for a delete)."
    )

    @model_validator(mode="after")
    def _two_members(self) -> ImagesSpec:
        if self.before == self.after:
            raise ValueError(
                f"before and after name one member, {self.before!r}; name the two images' members"
            )
        return self


class ChangeSpec(Strict):
    action: ActionSpec
    position: PositionSpec
    sequence: SequenceSpec | None = None
    committed_at: CommittedAtSpec | None = None
    updates: Literal["paired", "after-only"] = Field(
        default="paired",
        description="paired: an update is a before row and an after row at one position; after-only: one after row.",
    )
    images: ImagesSpec | None = Field(
        default=None,
        description="Each record holds both images of its change: an update's before-image is its prior, "
        "a delete's is its key and last image. Fields are read from the images' members.",
    )

    @model_validator(mode="after")
    def _images_or_updates(self) -> ChangeSpec:
        if self.images is None:
            return self
        if "updates" in self.model_fields_set:
            raise ValueError(
                "updates does not apply with images: each record holds both images of its change; remove it"
            )
        befores = sorted(k for k, v in self.action.codes.items() if v == "before")
        if befores:
            raise ValueError(
                f"action code {befores[0]!r} is a before-image, but with images a record is one whole "
                "change: map its code to insert, after (an update), delete or snapshot"
            )
        return self


class FieldSpec(Strict):
    """One typed output field."""

    type: str = Field(
        description="integer, decimal(p,s), float, boolean, date, time, timestamp, text, bytes, uuid, json"
    )
    from_: str | list[str] | None = Field(
        default=None,
        alias="from",
        description="Raw column name, when it differs from the field name; a list names alternatives, "
        "the first of them a file has is read (a column renamed at the source: [new_name, old_name]).",
    )
    zone: str | None = Field(
        default=None, description="timestamp: offset for values without one (default +00:00)."
    )
    epoch: Literal["s", "ms", "us", "ns"] | None = Field(
        default=None,
        description="timestamp: the values are whole seconds, milliseconds, microseconds or "
        "nanoseconds since 1970-01-01T00:00:00Z (not RFC 3339 text).",
    )
    sub_microsecond: SubMicrosecond | None = Field(default=None, description=SUB_MICROSECOND_DESCRIPTION)
    layout: str | None = Field(
        default=None,
        description="date, timestamp: how the values are written when not as RFC 3339, in strftime codes "
        "(%Y %m %b %B %d %H %I %p %M %S %f %z %%): '%d/%m/%Y %H:%M:%S', '%d-%b-%Y'.",
    )
    decimal_mark: Literal[".", ","] | None = Field(
        default=None, description="decimal, float: the mark before the fraction (default a point)."
    )
    group_mark: Literal[".", ",", " ", "\u00a0", "\u202f", "'"] | None = Field(
        default=None,
        description="integer, decimal, float: the mark between groups of three digits (1.234.567), "
        "where the values have one (default none).",
    )
    encoding: Literal["hex", "base64"] | None = Field(
        default=None, description="bytes: hex or base64 (default hex)."
    )
    max_length: int | None = Field(
        default=None, ge=1, description="text: longest value allowed, in characters."
    )
    required: bool = Field(
        default=False, description="A NULL value is a quarantine reason (always true for key fields)."
    )

    @field_validator("zone")
    @classmethod
    def _zone_ok(cls, v: str | None) -> str | None:
        return None if v is None else check_zone(v)

    @field_validator("from_")
    @classmethod
    def _alternatives(cls, v: str | list[str] | None) -> str | list[str] | None:
        if isinstance(v, list):
            if not v:
                raise ValueError("from lists no column; name one, or the alternatives a file may have")
            twice = sorted({c for c in v if v.count(c) > 1})
            if twice:
                raise ValueError(f"from names {twice[0]!r} twice; name each alternative once")
        return v

    @property
    def columns(self) -> list[str] | None:
        """The raw columns ``from`` names, in order (None: the field's own name)."""
        return [self.from_] if isinstance(self.from_, str) else self.from_

    @property
    def kind(self) -> str:
        """The type's name without its parameters: ``decimal`` for ``decimal(12,2)``."""
        return self.type.split("(")[0].strip().lower()

    @model_validator(mode="after")
    def _options_apply(self) -> FieldSpec:
        name = self.kind
        options: tuple[tuple[str, tuple[str, ...]], ...] = (
            ("zone", ("timestamp",)),
            ("epoch", ("timestamp",)),
            ("sub_microsecond", ("time", "timestamp")),
            ("layout", ("date", "timestamp")),
            ("decimal_mark", ("decimal", "float")),
            ("group_mark", ("integer", "decimal", "float")),
            ("encoding", ("bytes",)),
        )
        for option, types in (*options, ("max_length", ("text",))):
            if getattr(self, option) is not None and name not in types:
                raise ValueError(
                    f"{option} applies to {' and '.join(types)} fields only, not to {self.type}; remove it"
                )
        if self.epoch is not None and self.zone is not None:
            raise ValueError(EPOCH_ZONE)
        check_sub_microsecond(self.sub_microsecond, self.epoch)
        fraction = name in ("decimal", "float")  # an integer has no decimal mark: any group mark
        if fraction and self.group_mark is not None and self.group_mark == (self.decimal_mark or "."):
            raise ValueError(
                f"group_mark {self.group_mark!r} is the decimal mark too: set decimal_mark to the other "
                "(1.234,5 is group_mark '.', decimal_mark ',')"
            )
        if self.layout is not None:
            from cdcnorm.types.formats import parse_layout

            if self.epoch is not None:
                raise ValueError("layout and epoch are two ways to write a timestamp; keep one of them")
            if self.sub_microsecond is not None:
                raise ValueError(
                    "sub_microsecond does not apply with a layout, whose %f reads up to 6 digits; remove it"
                )
            layout = parse_layout(self.layout, name)
            if layout.has_offset and self.zone is not None:
                raise ValueError(
                    f"zone does not apply: layout {self.layout!r} reads each value's own offset (%z); remove it"
                )
        return self


def _field_shorthand(value: Any) -> Any:
    if isinstance(value, str):
        return {"type": value}
    return value


class CsvOptions(Strict):
    delimiter: str = Field(
        default=",",
        min_length=1,
        max_length=MAX_PLAIN_DELIMITER,
        description="Field separator (a tab with escapes: backslash or none); one character, or up to"
        f" {MAX_PLAIN_DELIMITER} with escapes: none.",
    )
    quote: str = Field(default='"', min_length=1, max_length=1)
    escapes: Literal["quotes", "backslash", "none"] = Field(
        default="quotes",
        description="quotes: RFC 4180 (fields quoted, a quote doubled). backslash: PostgreSQL's COPY text"
        " format: nothing is quoted, \\N alone is NULL, \\b \\f \\n \\r \\t \\v are control"
        " characters, a backslash before any other character is that character; octal and hex"
        " sequences are quarantined. backslash with a quote given: MySQL's and MariaDB's SELECT ..."
        " INTO OUTFILE with ENCLOSED BY: fields may be quoted, a backslash escapes in or out of quotes"
        " (\\0 \\b \\n \\r \\t \\Z are control characters), \\N and the unquoted word NULL are NULL."
        " none: plain delimited text (tab-separated values, bulk-copy exports): nothing is quoted or"
        " escaped, a record is one line, every delimiter separates fields; no quote is given.",
    )
    header: bool = Field(default=True, description="false: columns are named by `columns`.")
    columns: list[str] | None = Field(
        default=None, description="Column names when the file has no header row."
    )
    encoding: str = Field(
        default="utf-8",
        description="Text encoding of the dumps (any Python codec name: utf-8, latin-1, cp1252, ...).",
    )
    empty: str | None = Field(
        default=None,
        min_length=1,
        description="A field that is exactly this text is an empty text: SQL Server's bcp writes an empty"
        ' string as one NUL character ("\\0") and NULL as an empty field.',
    )

    @model_validator(mode="before")
    @classmethod
    def _text_format_delimiter(cls, data: Any) -> Any:
        # COPY's text format separates fields by a tab unless told otherwise (PostgreSQL's
        # documentation, COPY, "Text Format")
        if (
            isinstance(data, dict)
            and data.get("escapes") in ("backslash", "none")
            and "delimiter" not in data
        ):
            return {**data, "delimiter": "\t"}
        return data

    @model_validator(mode="after")
    def _readable(self) -> CsvOptions:
        # a delimiter equal to the quote, or a line end as either, leaves records that cannot be
        # told apart (RFC 4180 section 2 separates fields by a comma and quotes them with DQUOTE)
        for name, ch in (("delimiter", self.delimiter), ("quote", self.quote)):
            if "\r" in ch or "\n" in ch:
                raise ValueError(f"csv.{name} cannot hold a line end: records end at line ends")
        if self.escapes == "none" and "quote" in self.model_fields_set:
            raise ValueError("csv.quote is given, but with escapes: none nothing is quoted: drop quote")
        if self.escapes != "none" and len(self.delimiter) > 1:
            raise ValueError(
                f"csv.delimiter {self.delimiter!r} is more than one character, which only plain text"
                " reads: set csv.escapes: none (nothing quoted or escaped), or give one character"
            )
        if self.escapes == "backslash":
            for name, ch in (("delimiter", self.delimiter), ("quote", self.quote)):
                if ch == "\\":
                    raise ValueError(f"csv.{name} cannot be a backslash with escapes: backslash")
        if self.quoted and self.delimiter == self.quote:
            raise ValueError(
                f"csv.delimiter and csv.quote are both {self.delimiter!r}: fields could not be told apart"
            )
        if self.header and self.columns is not None:
            raise ValueError(
                "csv.columns names the columns of files without a header row: add header: false, or drop columns"
            )
        if self.columns is not None and len(set(self.columns)) != len(self.columns):
            repeated = sorted({c for c in self.columns if self.columns.count(c) > 1})
            raise ValueError(f"csv.columns repeats {repeated}: which column a field means is unclear")
        return self

    @property
    def quoted(self) -> bool:
        """Fields may be quoted: always with escapes: quotes; with escapes: backslash only where a
        quote is given (MySQL's ENCLOSED BY form; without one, COPY's text format quotes nothing)."""
        return self.escapes == "quotes" or (self.escapes == "backslash" and "quote" in self.model_fields_set)

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, v: str) -> str:
        import codecs

        try:
            return codecs.lookup(v).name
        except LookupError:
            raise ValueError(f'unknown text encoding "{v}"; write e.g. utf-8, latin-1 or cp1252') from None


def _covers(name: str, column: str) -> bool:
    """Whether raw column name ``name`` is ``column`` or a nested object ``column`` is a member of."""
    return column == name or column.startswith(name + ".")


class Mapping(Strict):
    """One table: which dumps it reads, how changes are coded, and its typed fields."""

    table: str = Field(description="Canonical table name, e.g. ferry.bookings.")
    files: list[str] = Field(min_length=1, description="Glob patterns on the dump file name.")
    key: list[str] = Field(min_length=1, description="Fields that identify a row.")
    nulls: list[str] = Field(default_factory=lambda: [""], description="Raw tokens that mean NULL.")
    change: ChangeSpec
    fields: dict[str, Annotated[FieldSpec, Field()]]
    csv: CsvOptions = Field(default_factory=CsvOptions, description="CSV dialect of this table's CSV dumps.")
    format: Literal["csv", "jsonl", "parquet"] | None = Field(
        default=None,
        description="Format of this table's dumps whatever their names end in (JSON Lines written as "
        "part-0000.json, say); by default each file's suffix tells it.",
    )
    unused: list[str] = Field(
        default_factory=list,
        description="Raw columns no field reads, on purpose (a nested object's name covers its "
        "members): convert notes any other raw column no field reads, since its values are in no event.",
    )

    @field_validator("fields", mode="before")
    @classmethod
    def _shorthand(cls, value: Any) -> Any:
        if isinstance(value, dict):
            return {str(k): _field_shorthand(v) for k, v in value.items()}
        return value

    @field_validator("files")
    @classmethod
    def _patterns_of_names(cls, v: list[str]) -> list[str]:
        for pattern in v:
            if "/" in pattern:  # no file name holds one (POSIX)
                name = pattern.rsplit("/", 1)[-1]
                raise ValueError(
                    f"files pattern {pattern!r} has a folder in it, but patterns match file names only, "
                    f"so it would match no file; write {name!r} and give the folders as inputs "
                    "(--recursive reads sub-folders)"
                )
        return v

    @field_validator("table")
    @classmethod
    def _table_is_a_safe_name(cls, v: str) -> str:
        from cdcnorm.names import problem

        why = problem(v)
        if why:
            raise ValueError(
                f"table {v!r} cannot name the output's folders: {why}; write e.g. ferry.bookings"
            )
        return v

    @model_validator(mode="after")
    def _keys_are_fields(self) -> Mapping:
        blank = [f for f in self.fields if not f.strip()]
        if blank:  # the envelope would name it by its internal column (v2, say)
            raise Located(
                f"a field needs a name: fields has {blank[0]!r}", "fields", blank[0], found=blank[0]
            )
        missing = [k for k in self.key if k not in self.fields]
        if missing:
            from cdcnorm.errors import closest, name_list

            guess = closest(missing[0], self.fields)
            raise Located(
                f"key names {missing[0]!r}, which is not one of the fields ({name_list(self.fields)})",
                "key",
                found=missing[0],
                hint=f'did you mean "{guess}"?' if guess else "name key fields under fields",
            )
        twice = sorted({k for k in self.key if self.key.count(k) > 1})
        if twice:
            raise Located(f"key names {twice[0]!r} twice; name each key field once", "key", found=twice[0])
        for k in self.key:
            if self.fields[k].type.strip().lower().startswith("json"):
                # two spellings of one JSON value ({"a":1,"b":2} and {"b":2,"a":1}) would be two keys
                raise Located(
                    f"key field {k} is json, whose values compare as their text, not as JSON values: "
                    "key by a field of another type (a member of it, mapped with a dotted from)",
                    "key",
                    found=k,
                )
        return self

    @model_validator(mode="after")
    def _empty_is_not_null(self) -> Mapping:
        if self.csv.empty is not None and self.csv.empty in self.nulls:
            raise Located(
                f"csv.empty is {self.csv.empty!r}, which nulls lists too: a field cannot be NULL and an empty text",
                "csv",
                "empty",
                found=self.csv.empty,
            )
        return self

    @model_validator(mode="after")
    def _unused_columns_are_not_read(self) -> Mapping:
        readers = {col: f"change.{role}" for role, col in self.change_columns().items()}
        readers |= {c: f"field {f}" for f in self.fields for c in self.raw_columns(f)}
        readers |= {c: f"field {f}" for f in self.fields if (c := self.before_column(f)) is not None}
        for name in self.unused:
            read = [col for col in readers if _covers(name, col)]
            if read:
                raise Located(
                    f"unused lists raw column {name!r}, which {readers[read[0]]} reads "
                    f"({read[0]!r}); take it out of unused",
                    "unused",
                    found=name,
                )
        return self

    @model_validator(mode="after")
    def _images_read_one_name(self) -> Mapping:
        if self.change.images is None:
            return self
        listed = [f for f in self.fields if isinstance(self.fields[f].from_, list)]
        if listed:
            raise Located(
                f"field {listed[0]} lists alternatives in from, which change.images does not take: each "
                "field is read from the member of that name in both images",
                "fields",
                listed[0],
                found=listed[0],
            )
        return self

    def left_out(self, column: str) -> bool:
        """Whether ``unused`` lists this raw column (or a nested object it is a member of)."""
        return any(_covers(u, column) for u in self.unused)

    def raw_column(self, field: str) -> str:
        """The raw column a field reads (the first alternative, when ``from`` lists several; its
        after-image's member with ``change.images``)."""
        return self.raw_columns(field)[0]

    def raw_columns(self, field: str) -> list[str]:
        """The raw columns a field may read: ``from``'s alternatives in order, the first a file has
        being read; one for most fields."""
        images = self.change.images
        if images is not None:
            return [f"{images.after}.{self.fields[field].from_ or field}"]
        return self.fields[field].columns or [field]

    def before_column(self, field: str) -> str | None:
        """With ``change.images``, the raw column of a field's before-image (None without)."""
        images = self.change.images
        return None if images is None else f"{images.before}.{self.fields[field].from_ or field}"

    @cached_property
    def alternatives(self) -> dict[str, list[str]]:
        """The fields whose ``from`` lists more than one column, and those columns (once per
        mapping: the plan asks for every field, 300 of them in a wide table)."""
        return {f: cols for f in self.fields if len(cols := self.raw_columns(f)) > 1}

    def change_columns(self) -> dict[str, str]:
        """Role -> raw column for the change metadata."""
        c = self.change
        cols = {"action": c.action.column, "position": c.position.column}
        if c.sequence:
            cols["sequence"] = c.sequence.column
        if c.committed_at:
            cols["committed_at"] = c.committed_at.column
        return cols

    def mapped_columns(self) -> list[str]:
        """Every raw column this mapping reads, change columns first, without repeats."""
        seen: dict[str, None] = {}
        for col in self.change_columns().values():
            seen.setdefault(col)
        for name in self.fields:
            for col in self.raw_columns(name):
                seen.setdefault(col)
        for name in self.fields:
            before = self.before_column(name)
            if before is not None:
                seen.setdefault(before)
        return list(seen)

    def read_through(self) -> list[tuple[str, ...]]:
        """The nested objects (JSON Lines) or structs (Parquet) a mapped dotted column is read
        through, as key paths: ``("after",)`` and ``("after", "place")`` for ``after.place.city``."""
        return sorted(
            {tuple(c.split("."))[:n] for c in self.mapped_columns() for n in range(1, c.count(".") + 1)}
        )

    @property
    def slug(self) -> str:
        """A name safe for files and SQL identifiers."""
        return re.sub(r"[^0-9A-Za-z_]+", "_", self.table)
