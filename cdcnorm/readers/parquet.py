"""Parquet dumps, read by the engine: typed columns as their text, BLOB as the text the fields
reading it take (``blob_forms``: hex; base64 for a ``bytes`` field with ``encoding: base64``; a
16-byte value's 8-4-4-4-12 form for a ``uuid`` field), nested values (structs, lists, maps) as
RFC 8259 JSON text. A mapped dotted column (``after.id``) that is not a
top-level column reads the member of a struct column, as a nested key of JSON Lines does. A string
equal to a null token other than "" is NULL.

The engine reads a decimal of more than 38 digits (Parquet's DECIMAL; pyarrow's decimal256) as a
floating-point number, which changes its value: a file holding one is read from a copy in scratch in
which such decimals are their exact text (``_exact_decimals``), with a note."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.mapping.model import Mapping
from cdcnorm.readers import streams
from cdcnorm.readers.base import RawFile, RawTable

FORMAT = "parquet"
SUFFIXES = (".parquet", ".pq")


def _members(prefix: str, struct_type: str) -> list[str]:
    """Dotted names of the leaf members of a struct type, nested structs followed (sqlglot parses
    the type): the values a mapped dotted name most likely means."""
    from sqlglot import exp  # only for files with struct columns (a fifth of a second to import)

    out = []
    typ = exp.DataType.build(struct_type, dialect="duckdb")
    for member in typ.expressions:
        name = f"{prefix}.{member.name}"
        kind = member.args.get("kind")
        if isinstance(kind, exp.DataType) and kind.is_type(exp.DataType.Type.STRUCT):
            out.extend(_members(name, kind.sql(dialect="duckdb")))
        else:
            out.append(name)
    return out


def blob_forms(mapping: Mapping) -> dict[str, dict[str, str]]:
    """Raw column -> {field: the form of a BLOB value it reads}: ``base64`` for a bytes field with
    ``encoding: base64`` (hex text would be misread as base64: ``0102`` is base64 too), ``uuid`` for
    a uuid field (a UUID stored as 16 bytes with no logical type: RFC 9562 section 4 writes its
    octets in order as 8-4-4-4-12 hex), ``hex`` otherwise (a bytes field's default, a hex position)."""
    out: dict[str, dict[str, str]] = {}
    for role, column in mapping.change_columns().items():
        out.setdefault(column, {})[role] = "hex"
    for name, spec in mapping.fields.items():
        form = {"bytes": "base64" if spec.encoding == "base64" else "hex", "uuid": "uuid"}.get(
            spec.kind, "hex"
        )
        before = mapping.before_column(name)
        for column in [*mapping.raw_columns(name), *([before] if before else [])]:
            out.setdefault(column, {})[name] = form
    return out


def _blob_form(readers: dict[str, str], column: str, path: Path) -> str:
    """The one form the fields reading BLOB column ``column`` take; fields that would read it in
    different forms are an InputError (one text cannot be both)."""
    forms = set(readers.values()) or {"hex"}
    if len(forms) == 1:
        return forms.pop()
    said = ", ".join(f"{f} ({form})" for f, form in sorted(readers.items()))
    raise InputError(
        "fields read this binary column in different forms",
        file=str(path),
        field=column,
        expected="fields that read a binary (BLOB) column as one form: hex, base64 or a UUID",
        found=said,
        hint="read it with one field, or give the bytes fields the same encoding",
    )


#: The most digits of a decimal the engine reads as one (DuckDB's DECIMAL: 38); a longer one it
#: reads as a DOUBLE.
ENGINE_DECIMAL_DIGITS = 38
#: Rows of a file converted at a time for its exact copy (memory stays bounded).
COPY_BATCH = 64 * 1024


def _as_text_type(typ: pa.DataType) -> pa.DataType:
    """``typ`` with every decimal of more than ENGINE_DECIMAL_DIGITS digits, nested ones too, made
    text (pyarrow's cast writes a decimal's exact digits, its scale's zeros kept)."""
    if pa.types.is_decimal(typ) and typ.precision > ENGINE_DECIMAL_DIGITS:
        return pa.string()
    if pa.types.is_struct(typ):
        return pa.struct(
            [f.with_type(_as_text_type(f.type)) for f in (typ.field(i) for i in range(typ.num_fields))]
        )
    if pa.types.is_map(typ):
        return pa.map_(_as_text_type(typ.key_type), typ.item_field.with_type(_as_text_type(typ.item_type)))
    if pa.types.is_large_list(typ):
        return pa.large_list(typ.value_field.with_type(_as_text_type(typ.value_type)))
    if pa.types.is_fixed_size_list(typ):
        return pa.list_(typ.value_field.with_type(_as_text_type(typ.value_type)), typ.list_size)
    if pa.types.is_list(typ):
        return pa.list_(typ.value_field.with_type(_as_text_type(typ.value_type)))
    return typ


def _exact_decimals(f: RawFile, path: Path, schema: pa.Schema, scratch: Path) -> Path:
    """``path``, or where it holds a decimal of more than ENGINE_DECIMAL_DIGITS digits, a copy of it
    in ``scratch`` in which each such decimal is its exact text (streamed a batch of rows at a time;
    the rows stay in order), with a note on ``f`` naming the columns."""
    exact = pa.schema([fd.with_type(_as_text_type(fd.type)) for fd in schema], metadata=schema.metadata)
    changed = [fd.name for fd, to in zip(schema, exact, strict=True) if fd.type != to.type]
    if not changed:
        return path
    target = streams.scratch_copy(f.path, scratch)
    try:
        with pq.ParquetWriter(target, exact) as out:
            for batch in pq.ParquetFile(path).iter_batches(batch_size=COPY_BATCH):
                out.write_table(pa.Table.from_batches([batch]).cast(exact))
    except (pa.ArrowException, OSError) as e:
        target.unlink(missing_ok=True)
        raise InputError(
            f"cannot read this Parquet file: {str(e).splitlines()[0]}", file=str(f.path)
        ) from None
    nested = [n for n in changed if not pa.types.is_decimal(schema.field(n).type)]
    f.notes.append(
        f"decimals of more than {ENGINE_DECIMAL_DIGITS} digits read as their exact text ({', '.join(changed)}): "
        "the engine reads them as floating-point numbers"
        + (f"; in {', '.join(nested)} they are JSON strings" if nested else "")
    )
    return target


def _own_schema(path: Path) -> pa.Schema | None:
    """The file's schema as it states it (the engine renames a name that differs from another only
    in case); None when pyarrow cannot read it."""
    try:
        return pq.read_schema(path)
    except (pa.ArrowException, OSError):
        return None


def _check_members(schema: pa.Schema, nested: list[tuple[str, ...]], path: Path) -> None:
    """A mapped member of a struct beside another that differs from it only in case cannot be read:
    the engine binds members without regard to case and could read the other one."""
    for keys in nested:
        if keys[0] not in schema.names:
            continue
        typ: pa.DataType = schema.field(keys[0]).type
        for depth in range(1, len(keys)):
            if not pa.types.is_struct(typ):
                break
            names = [typ.field(i).name for i in range(typ.num_fields)]
            clash = sorted(n for n in names if n.lower() == keys[depth].lower())
            if len(clash) > 1:
                raise InputError(
                    f"struct {'.'.join(keys[:depth])} has members that differ only in case: {', '.join(clash)}",
                    file=str(path),
                    field=".".join(keys),
                    expected="member names that differ in more than case on the way to a mapped member",
                    found=", ".join(names),
                    hint="the engine reads struct members without regard to case; write the file with "
                    "other names, or flatten the struct",
                )
            i = typ.get_field_index(keys[depth])
            if i < 0:
                break
            typ = typ.field(i).type


def read_files(
    files: list[RawFile], mapping: Mapping, engine: DuckDBEngine, raw: RawTable, scratch: Path
) -> None:
    """Files of one schema are read in one scan (thousands of small files cost one, not one each)."""
    nested = [tuple(c.split(".")) for c in mapping.mapped_columns() if "." in c]
    described: dict[str, list[tuple[tuple[str, ...], str, tuple[str, ...]]]] = {}
    groups: dict[tuple[tuple[tuple[str, ...], str, tuple[str, ...]], ...], list[RawFile]] = {}
    # a compressed file (``.parquet.gz``) is decompressed first: the engine's Parquet reader reads
    # only what the format itself compresses
    where = {f.file_id: streams.engine_readable(f.path, scratch / "decompressed", reads=()) for f in files}
    for f in files:
        f.format = FORMAT
        schema = _own_schema(where[f.file_id])
        own = list(schema.names) if schema is not None else None
        if schema is not None:
            _check_members(schema, nested, f.path)
            where[f.file_id] = _exact_decimals(f, where[f.file_id], schema, scratch / "decimals")
        repeated = sorted(n for n, k in Counter(own or []).items() if k > 1)
        if repeated:  # as a CSV header that repeats a name: which one a mapping means is unknown
            raise InputError(
                f"the file's schema repeats column names {repeated}",
                file=str(f.path),
                expected="each column name once",
                found=", ".join(own or []),
            )
        # the engine describes each schema once: files that state the same one read the same
        seen = (
            None
            if schema is None
            else schema.to_string(show_field_metadata=False, show_schema_metadata=False)
        )
        try:
            cols = (
                described[seen] if seen in described else engine.scan_parquet(where[f.file_id], nested, own)
            )
        except duckdb.Error as e:
            raise _unreadable(f, e) from None
        if seen is not None:
            described[seen] = cols
        f.columns = [".".join(k) for k, _, _ in cols]
        f.members = [m for k, t, _ in cols if t.startswith("STRUCT") for m in _members(k[0], t)]
        groups.setdefault(tuple(cols), []).append(f)
    tokens = [t for t in mapping.nulls if t != ""]
    readers = blob_forms(mapping)
    for shape, group in groups.items():
        internal = [raw.internal(".".join(k)) for k, _, _ in shape]
        forms = {
            i: _blob_form(readers.get(".".join(k), {}), ".".join(k), group[0].path)
            for (k, t, _), i in zip(shape, internal, strict=True)
            if t == "BLOB"
        }
        _load(group, where, list(shape), internal, tokens, engine, raw, forms)


def _unreadable(f: RawFile, e: duckdb.Error) -> InputError:
    try:
        with open(f.path, "rb") as start:
            if wrong := streams.refused_start(f.path, start.read(1 << 16), decompressed=False):
                return wrong
    except OSError:
        pass
    return InputError(f"cannot read this Parquet file: {str(e).splitlines()[0]}", file=str(f.path))


def _load(
    group: list[RawFile],
    where: dict[int, Path],
    cols: list[tuple[tuple[str, ...], str, tuple[str, ...]]],
    internal: list[str],
    tokens: list[str],
    engine: DuckDBEngine,
    raw: RawTable,
    forms: dict[str, str],
) -> None:
    staged = raw.relation("parquet")
    paths = {str(where[f.file_id]): f for f in group}
    try:
        spans = engine.load_parquet_as_text(
            staged,
            list(paths),
            [(e, t, i) for (_, t, e), i in zip(cols, internal, strict=True)],
            tokens,
            {k[0] for k, _, _ in cols},
            forms,
        )
    except duckdb.Error as e:
        engine.drop(staged)
        if len(group) == 1:
            raise _unreadable(group[0], e) from None
        for f in group:  # find the file the engine cannot read
            _load([f], where, cols, internal, tokens, engine, raw, forms)
        return
    good = []
    for p, f in paths.items():
        f.rows, lo, hi = spans.get(p, (0, 0, -1))
        if f.rows and hi - lo + 1 != f.rows:
            raise InputError("the engine did not keep this file's rows in order", file=str(f.path))
        f.empty = f.rows == 0
        if f.empty:
            f.notes.append("the file has no rows")
        else:
            good.append((p, f.file_id, lo, f.rows))
    if good:
        view = f"{staged}_rows"
        engine.number_rows(view, staged, good, internal)
        raw.add_relation(view, internal)
    else:
        engine.drop(staged)
