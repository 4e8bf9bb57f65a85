"""What runs remember: identities emitted earlier, and before-images still waiting.

Both are Parquet files in the landing area, read and written by the engine,
never loaded into Python. Identity files are sorted by position, so reading
only the positions a run can meet skips most of a long history.

- ``index/emitted/<table>/<run>.parquet``: the identities a run emitted or
  merged. Format 4 (the file's key-value metadata ``cdcnorm_index_format``
  says ``4``): ``__pos`` and ``__seq``, the key fields, ``__act``,
  ``__content_hi`` and ``__content_lo`` (the 128-bit content digest,
  ``Plan.content``, as two unsigned 64-bit halves), ``__run``, ``__unpaired``
  (an after-image emitted without its before-image). A 128-bit position or
  sequence key (hex, hex-pair) is stored as two unsigned 64-bit halves too,
  ``__pos_hi``/``__pos_lo`` (Parquet has no 128-bit integers; the halves sort
  as the key does); another key is stored as its normalised text.
  Older formats, written before and still read, state no format: format 3
  (``__content_hi`` marks it) has format 4's layout and digest, except that an
  empty bytes value was digested as NULL (``Plan.content(format_3=True)``);
  formats 1 and 2 hold the older digest, the MD5 of the engine's text of the
  row (``Plan.legacy_content``): format 2 has the layout of format 3 with
  ``__digest_hi``/``__digest_lo``; format 1 holds every key as normalised text
  and the digest as 32 hex digits in ``__hash``. A repeat of an identity from a
  file of an older format is compared with the digest that format stored, so
  an area written by any format continues the same way.
- ``index/pending/<table>/<run>.parquet``: every before-image waiting after
  that run (carried ones included): origin ``__name`` and ``__row``, the typed
  row (positions and sequences as normalised text, fixed width, so text order
  is key order), ``__run`` (the run that read it) and ``__raw`` (its raw
  columns as a JSON object, for the quarantine if it is ever settled).

Both state the mapping's fields they were written under in their key-value
metadata (``cdcnorm_fields``) and are read by field name: a mapping edited
between runs never puts one field's value into another (files written before
they stated it are read by position).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from cdcnorm import positions
from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.errors import InputError
from cdcnorm.plan import INDEX_FORMAT, Plan
from cdcnorm.sql import ident, lit


def _kinds(plan: Plan) -> tuple[tuple[str, int], tuple[str, int] | None]:
    change = plan.mapping.mapping.change
    pos = (change.position.kind, change.position.width)
    seq = change.sequence
    return pos, ((seq.kind, positions.sequence_width(seq, change.position)) if seq else None)


def _store(plan: Plan, col: str, which: str) -> str:
    """SQL: a position (``which`` = "__pos") or sequence key as stored (its normalised text)."""
    pos, seq = _kinds(plan)
    kind = pos if which == "__pos" else seq
    if kind is None or kind[0] == "text":  # a text key is stored as itself
        return col
    return positions.text(kind[0], col, width=kind[1])


def _restore(plan: Plan, col: str, name: str) -> str:
    pos, seq = _kinds(plan)
    kind = pos if name == "__pos" else seq
    if kind is None:
        return f"CAST({col} AS {positions.key_type('integer')})"
    if kind[0] == "text":
        return col
    return positions.key(kind[0], col, width=kind[1])


#: What a format 2 identity file has that a format 1 file has not.
FORMAT_2_MARK = "__digest_hi"
#: What a format 3 identity file has that formats 1 and 2 have not (format 4 has it too).
FORMAT_3_MARK = "__content_hi"
#: The key of the identity files' key-value metadata that says their format (``INDEX_FORMAT``,
#: format 4 on; older files have none).
FORMAT_KEY = "cdcnorm_index_format"
_LOW64 = f"CAST({(1 << 64) - 1} AS UHUGEINT)"
#: The key of the key-value metadata of identity and pending files that lists the mapping's fields
#: the file was written under, as JSON ``[[name, engine type], ...]`` in the order of its ``v0..vn``.
FIELDS_KEY = "cdcnorm_fields"


def layout(plan: Plan) -> list[list[str]]:
    """The table's fields as (name, engine type), in the order of ``v0..vn``."""
    types = plan.types()
    return [[name, types[f"v{i}"]] for i, name in enumerate(plan.fields)]


#: The key of the key-value metadata of identity and pending files that states the kinds (and
#: widths) of the position and sequence their keys were stored as, as JSON.
ORDER_KEY = "cdcnorm_order"


def order_spec(plan: Plan) -> dict[str, list[Any] | None]:
    """The position's and sequence's kind and width, as stored keys depend on them."""
    pos, seq = _kinds(plan)
    return {"position": list(pos), "sequence": list(seq) if seq else None}


def _metadata(plan: Plan, *extra: tuple[str, str]) -> str:
    """SQL: the KV_METADATA of a memory file: its fields and order, and ``extra`` (key, value) pairs."""
    pairs = [(FIELDS_KEY, json.dumps(layout(plan))), (ORDER_KEY, json.dumps(order_spec(plan))), *extra]
    return "{" + ", ".join(f"{k}: {lit(v)}" for k, v in pairs) + "}"


def _stated(engine: DuckDBEngine, files: list[str]) -> dict[str, dict[str, str]]:
    """What each of these memory files states in its key-value metadata, read once: file -> key ->
    value (a file written before it stated anything has no entry)."""
    out: dict[str, dict[str, str]] = {}
    for f, k, v in engine.rows(
        f"SELECT file_name, decode(key), decode(value) FROM parquet_kv_metadata([{', '.join(lit(f) for f in files)}])"
    ):
        out.setdefault(str(f), {})[str(k)] = str(v)
    return out


def _fields_of(stated: dict[str, str] | None) -> list[list[str]] | None:
    """The fields a memory file states it was written under (None: it states none)."""
    text = (stated or {}).get(FIELDS_KEY)
    return None if text is None else list(json.loads(text))


def _say(spec: list[Any] | None) -> str:
    return "none" if spec is None else f"kind {spec[0]}, width {spec[1]}"


def _check_order(plan: Plan, stated: dict[str, dict[str, str]], what: str) -> None:
    """Stop when a file's keys were stored under another kind or width of position or sequence:
    they would be read as other positions (or not at all), and repeats would be emitted again."""
    now = order_spec(plan)
    for file, keys in sorted(stated.items()):
        if ORDER_KEY not in keys:
            continue
        then = json.loads(keys[ORDER_KEY])
        for part in ("position", "sequence"):
            if then.get(part) != now[part]:
                raise InputError(
                    f"{what} were stored under another {part} of {plan.mapping.mapping.table} than "
                    "the mapping's now: their positions cannot be compared with this run's",
                    file=file,
                    expected=f"the {part} {_say(now[part])}",
                    found=f"the {part} {_say(then.get(part))}",
                    hint="keep change.position and change.sequence as they were for this landing area, "
                    "or start another (another --out, or --replace)",
                )


def _reordered(stored: list[list[str]], now: list[list[str]]) -> tuple[int, ...] | None:
    """The order (indices of ``now``) of the stored fields when each is a field of the mapping's
    now, by name and type: the mapping's fields in another order, or fewer of them (fields added
    since), whose digest runs over those fields alone; else None (the same fields, or some that
    are gone or retyped)."""
    names = [name for name, _ in now]
    if (
        stored == now
        or len(set(names)) != len(names)
        or len({name for name, _ in stored}) != len(stored)
        or any(list(f) not in now for f in stored)
    ):
        return None
    return tuple(names.index(name) for name, _ in stored)


def field_orders(engine: DuckDBEngine, plan: Plan, files: list[Path]) -> tuple[tuple[int, ...], ...]:
    """The field orders (``Plan.earlier_orders``) of these identity files written before the
    mapping's fields were reordered or added to: their content digests run over those fields, in
    that order."""
    if not files:
        return ()
    now = layout(plan)
    stated = _stated(engine, [str(f) for f in files]).values()
    found = {_reordered(fields, now) for keys in stated if (fields := _fields_of(keys)) is not None}
    return tuple(sorted(o for o in found if o is not None))


def _columns_by_name(
    plan: Plan, file: str, stored: list[list[str]] | None, wanted: list[int], what: str, hint: str
) -> dict[int, str]:
    """For each wanted field index, the column of the file that holds it: found by the field's
    name in the file's stated fields (``v<j>`` of the j-th), so that fields added, removed or
    reordered in the mapping since the file was written never put one field's value in another.
    A wanted field the file lacks, or holds with another type, stops the run: its values cannot
    be had. A file that states no fields (written before they were stated) is read by position."""
    now = layout(plan)
    if stored is None:
        return {i: f"v{i}" for i in wanted}
    where = {name: (j, typ) for j, (name, typ) in enumerate(stored)}
    lacking = [now[i][0] for i in wanted if now[i][0] not in where]
    retyped = [
        f"{now[i][0]} ({where[now[i][0]][1]} then, {now[i][1]} now)"
        for i in wanted
        if now[i][0] in where and where[now[i][0]][1] != now[i][1]
    ]
    if lacking or retyped:
        found = "; ".join(
            part
            for part in (
                f"fields it lacks: {', '.join(lacking)}" if lacking else "",
                f"fields typed otherwise: {', '.join(retyped)}" if retyped else "",
            )
            if part
        )
        raise InputError(
            f"{what} were stored under other fields of {plan.mapping.mapping.table} than the mapping's now",
            file=file,
            expected="the fields " + ", ".join(name for name, _ in stored),
            found=found,
            hint=hint,
        )
    return {i: f"v{where[now[i][0]][0]}" for i in wanted}


def _wide(plan: Plan, which: str) -> bool:
    """Whether the position (``__pos``) or sequence (``__seq``) key is a 128-bit integer."""
    return plan.types()[which] == "UHUGEINT"


def halves(col: str, name: str) -> list[str]:
    """SQL: a 128-bit key as its two unsigned 64-bit halves, named ``<name>_hi`` and ``<name>_lo``."""
    return [f"CAST({col} >> 64 AS UBIGINT) AS {name}_hi", f"CAST({col} & {_LOW64} AS UBIGINT) AS {name}_lo"]


def joined(name: str) -> str:
    """SQL: the 128-bit key stored as ``<name>_hi`` and ``<name>_lo``."""
    return f"((CAST({name}_hi AS UHUGEINT) << 64) | {name}_lo)"


def empty_relation(columns: dict[str, str]) -> str:
    return (
        "SELECT " + ", ".join(f"CAST(NULL AS {t}) AS {ident(c)}" for c, t in columns.items()) + " WHERE FALSE"
    )


def carried_columns(plan: Plan) -> dict[str, str]:
    types = plan.types()
    cols = {"__file": "INTEGER", "__row": "BIGINT", "__pos": types["__pos"], "__seq": types["__seq"]}
    cols["__cat"] = "TIMESTAMPTZ"
    cols.update({f"v{i}": types[f"v{i}"] for i in range(len(plan.fields))})
    cols.update({"__run": "VARCHAR", "__raw": "VARCHAR"})
    return cols


def earlier_columns(plan: Plan) -> dict[str, str]:
    types = plan.types()
    cols = {"__pos": types["__pos"], "__seq": types["__seq"], "__act": "VARCHAR"}
    cols.update({f"v{i}": types[f"v{i}"] for i in plan.key_index})
    cols.update({"__hash": "UHUGEINT", "__format": "INTEGER", "__run": "VARCHAR", "__unpaired": "BOOLEAN"})
    cols["__other_fields"] = "BOOLEAN"  # the file's fields differ from the mapping's: content not comparable
    cols["__order"] = "INTEGER"  # 0, or k: the file's fields are in plan.earlier_orders[k - 1]
    cols["__conflicted"] = "BOOLEAN"  # a version of a change a run quarantined as a conflict
    return cols


def load_carried(engine: DuckDBEngine, plan: Plan, path: Path | None, first_id: int) -> list[tuple[int, str]]:
    """Create ``<table>__carried`` from the pending file (or empty); the file names it refers to
    get ids from ``first_id`` on, returned as (id, name) for the files relation."""
    rel = plan.rel("carried")
    if path is None:
        engine.execute(f"CREATE OR REPLACE TABLE {rel} AS {empty_relation(carried_columns(plan))}")
        return []
    src = f"read_parquet({lit(str(path))})"
    names = [str(r[0]) for r in engine.rows(f"SELECT DISTINCT __name FROM {src} ORDER BY 1")]
    ids = [(first_id + i, n) for i, n in enumerate(names)]
    values = "(VALUES " + ", ".join(f"({i}, {lit(n)})" for i, n in ids) + ") f(id, name)" if ids else None
    types = carried_columns(plan)
    what = "before-images waiting for their after-images"
    stated = _stated(engine, [str(path)]) if ids else {}
    _check_order(plan, stated, what)
    held = _columns_by_name(
        plan,
        str(path),
        _fields_of(stated.get(str(path))),
        list(range(len(plan.fields))),
        what,
        "settle them first with the mapping they were read under (cdcnorm settle LANDING --all "
        "--mappings OLD), or keep the field's name and type",
    )
    cols = [
        "CAST(f.id AS INTEGER) AS __file",
        "CAST(p.__row AS BIGINT) AS __row",
        f"{_restore(plan, 'p.__pos', '__pos')} AS __pos",
        f"{_restore(plan, 'p.__seq', '__seq')} AS __seq",
        "CAST(p.__cat AS TIMESTAMPTZ) AS __cat",
        *(f"CAST(p.{held[i]} AS {types[f'v{i}']}) AS v{i}" for i in range(len(plan.fields))),
        "p.__run",
        "p.__raw",
    ]
    if values is None:
        engine.execute(f"CREATE OR REPLACE TABLE {rel} AS {empty_relation(types)}")
    else:
        engine.execute(
            f"CREATE OR REPLACE TABLE {rel} AS SELECT {', '.join(cols)} FROM {src} p JOIN {values} ON p.__name = f.name"
        )
    return ids


def load_earlier(
    engine: DuckDBEngine, plan: Plan, files: list[Path], conflicted: Sequence[Path] = ()
) -> None:
    """Create ``<table>__earlier``: the identities earlier runs emitted (``files``) or quarantined
    as conflicts (``conflicted``, marked ``__conflicted``), at the positions this run's rows can
    meet (between the lowest and highest position of the run's good rows), from identity files of
    any format."""
    rel = plan.rel("earlier")
    empty = f"CREATE OR REPLACE TABLE {rel} AS {empty_relation(earlier_columns(plan))}"
    marked = {str(f) for f in conflicted}
    files = [*files, *conflicted]
    if not files:
        engine.execute(empty)
        return
    lo, hi = engine.rows(f"SELECT min(__pos), max(__pos) FROM {plan.rel('typed')} WHERE __ok")[0]
    if lo is None:
        engine.execute(empty)
        return
    lo_key, hi_key = (f"CAST({lit(str(x))} AS {plan.types()['__pos']})" for x in (lo, hi))
    names = [lit(str(f)) for f in files]
    # every file's column names: the format marks, and the key fields it holds (v<j>)
    held_names: dict[str, set[str]] = {}
    for f, m in engine.rows(f"SELECT DISTINCT file_name, name FROM parquet_schema([{', '.join(names)}])"):
        held_names.setdefault(str(f), set()).add(str(m))
    marks = {(f, m) for f, ms in held_names.items() for m in ms if m in (FORMAT_2_MARK, FORMAT_3_MARK)}
    metadata = _stated(engine, [str(f) for f in files])
    stated = {f: keys[FORMAT_KEY] for f, keys in metadata.items() if FORMAT_KEY in keys}
    for f, v in stated.items():
        if v != str(INDEX_FORMAT):
            raise InputError(
                f"identity file of index format {v}, which this version of cdcnorm does not read",
                file=f,
                expected=f"index format {INDEX_FORMAT} or older",
                found=f"index format {v}",
                hint="continue this landing area with the version of cdcnorm that wrote it, or a later one",
            )
    _check_order(plan, metadata, "identities emitted by earlier runs")
    layouts = {f: fields for f, keys in metadata.items() if (fields := _fields_of(keys)) is not None}
    groups: dict[tuple[int, str, tuple[str, ...], bool], list[Path]] = {}
    for path in files:
        values = tuple(sorted(m for m in held_names.get(str(path), ()) if m[:1] == "v" and m[1:].isdigit()))
        key = (
            _format(marks, stated, str(path)),
            json.dumps(layouts.get(str(path))),
            values,
            str(path) in marked,
        )
        groups.setdefault(key, []).append(path)
    parts = []
    hint = "a key field is compared with the one stored: keep the key, its names and types, or start a new landing area (another --out, or --replace)"
    for (fmt, _, values, is_conflict), group in sorted(groups.items()):
        stored = layouts.get(str(group[0]))
        order = _reordered(stored, layout(plan)) if stored is not None else None
        k = plan.earlier_orders.index(order) + 1 if order in plan.earlier_orders else 0
        other = stored is not None and stored != layout(plan) and k == 0
        held = _columns_by_name(
            plan, str(group[0]), stored, list(plan.key_index), "identities emitted by earlier runs", hint
        )
        lacking = [plan.fields[i] for i in plan.key_index if held[i] not in values]
        if lacking:
            then = [stored[int(v[1:])][0] for v in values] if stored else values
            raise InputError(
                f"identities emitted by earlier runs hold another key of {plan.mapping.mapping.table} "
                "than the mapping's now",
                file=str(group[0]),
                expected=f"the key ({', '.join(plan.fields[i] for i in plan.key_index)})",
                found=f"identities keyed by ({', '.join(then)}): no {', '.join(lacking)}",
                hint=hint,
            )
        parts.append(_earlier_rows(plan, fmt, group, lo_key, hi_key, held, other, k, is_conflict))
    engine.execute(f"CREATE OR REPLACE TABLE {rel} AS {' UNION ALL '.join(parts)}")


def _format(marks: set[tuple[str, str]], stated: dict[str, str], file: str) -> int:
    """The index format of an identity file: what its metadata says, or the marks its columns carry."""
    if file in stated:
        return int(stated[file])
    if (file, FORMAT_3_MARK) in marks:
        return 3
    return 2 if (file, FORMAT_2_MARK) in marks else 1


def _earlier_rows(
    plan: Plan,
    fmt: int,
    files: list[Path],
    lo: str,
    hi: str,
    held: dict[int, str],
    other: bool,
    order: int,
    conflicted: bool = False,
) -> str:
    """SQL: the identities of identity files of one format and one layout, keys restored (the
    key field ``i`` from the column ``held[i]``), between ``lo`` and ``hi``; ``other``: the files
    were written under fields other than the mapping's now, so their digests digest other text;
    ``order``: k when they were written with the fields in ``plan.earlier_orders[k - 1]``, else 0."""
    types = earlier_columns(plan)
    src = f"read_parquet([{', '.join(lit(str(f)) for f in files)}])"
    keys = {}
    for c in ("__pos", "__seq"):
        keys[c] = joined(c) if fmt >= 2 and _wide(plan, c) else _restore(plan, c, c)
    digest = {1: f"{positions.HEX_KEY}(__hash)", 2: joined("__digest")}.get(fmt, joined("__content"))
    cols = [
        f"{keys['__pos']} AS __pos",
        f"{keys['__seq']} AS __seq",
        "__act",
        *(f"CAST({held[i]} AS {types[f'v{i}']}) AS v{i}" for i in plan.key_index),
        f"{digest} AS __hash",
        f"{fmt} AS __format",
        "__run",
        "__unpaired",
        f"{'TRUE' if other else 'FALSE'} AS __other_fields",
        f"{order} AS __order",
        f"{'TRUE' if conflicted else 'FALSE'} AS __conflicted",
    ]
    if fmt >= 2 and _wide(plan, "__pos"):
        # the high halves alone let the reader skip row groups by their statistics
        near = f"__pos_hi BETWEEN CAST({lo} >> 64 AS UBIGINT) AND CAST({hi} >> 64 AS UBIGINT) AND "
    else:
        near = f"__pos BETWEEN {_store(plan, lo, '__pos')} AND {_store(plan, hi, '__pos')} AND "
    return f"SELECT * FROM (SELECT {', '.join(cols)} FROM {src} WHERE {near}TRUE) WHERE __pos BETWEEN {lo} AND {hi}"


def _stored_identity(plan: Plan) -> str:
    """SQL: the stored columns of an identity and its digest (format 4) from the row ``k``
    (``__pos``, ``__seq``, ``__act``, the key fields and ``__content``)."""
    stored = [
        x
        for c in ("__pos", "__seq")
        for x in (halves(f"k.{c}", c) if _wide(plan, c) else [f"{_store(plan, f'k.{c}', c)} AS {c}"])
    ]
    keys = "".join(f", k.v{i}" for i in plan.key_index)
    return f"{', '.join(stored)}, k.__act{keys}, {', '.join(halves('k.__content', '__content'))}"


def write_emitted(engine: DuckDBEngine, plan: Plan, path: Path, run: str) -> None:
    """The identities this run settled for good (format 4): every kept row (carried ones included)
    except the before-images left waiting; an after-image emitted without its before-image is marked."""
    paired = plan.mapping.mapping.change.updates == "paired"
    kept, waiting, pairs = plan.rel("kept"), plan.rel("waiting"), plan.rel("pairs")
    unpaired = (
        f"(k.__act = 'after' AND NOT EXISTS (SELECT 1 FROM {pairs} q WHERE NOT q.ghost AND q.af = k.__file "
        "AND q.ar = k.__row))"
        if paired
        else "FALSE"
    )
    sql = (
        f"SELECT {_stored_identity(plan)}, {lit(run)} AS __run, {unpaired} AS __unpaired "
        f"FROM (SELECT *, {plan.content()} AS __content FROM {kept}) k WHERE NOT EXISTS (SELECT 1 FROM {waiting} w "
        # sorted on the keys: their order is the stored columns' order, and cheaper to sort
        "WHERE NOT w.__settled AND w.__file = k.__file AND w.__row = k.__row) ORDER BY k.__pos, k.__seq"
    )
    path.parent.mkdir(parents=True, exist_ok=True)
    metadata = _metadata(plan, (FORMAT_KEY, str(INDEX_FORMAT)))
    engine.execute(f"COPY ({sql}) TO {lit(str(path))} (FORMAT PARQUET, KV_METADATA {metadata})")


def write_conflicted(engine: DuckDBEngine, plan: Plan, path: Path, run: str) -> int:
    """The identities this run quarantined as conflicts among its own rows (``conflicted``), with
    each version's digest, in the emitted identities' format: the next runs hold a later version of
    such a change as a conflict too, until one is fed back from the quarantine. Written only when
    there is one; returns how many versions."""
    rel = plan.rel("conflicted")
    count = int(engine.rows(f"SELECT count(*) FROM {rel}")[0][0])
    if not count:
        return 0
    sql = f"SELECT {_stored_identity(plan)}, {lit(run)} AS __run, FALSE AS __unpaired FROM {rel} k ORDER BY k.__pos, k.__seq"
    path.parent.mkdir(parents=True, exist_ok=True)
    metadata = _metadata(plan, (FORMAT_KEY, str(INDEX_FORMAT)))
    engine.execute(f"COPY ({sql}) TO {lit(str(path))} (FORMAT PARQUET, KV_METADATA {metadata})")
    return count


def write_pending(engine: DuckDBEngine, plan: Plan, path: Path, run: str, raw_rows: str) -> int:
    """The before-images still waiting after this run; ``raw_rows`` is SQL of (__file, __row,
    raw) giving this run's rows' raw columns as JSON. Returns how many."""
    values = "".join(f", w.v{i}" for i in range(len(plan.fields)))
    sql = (
        f"SELECT f.name AS __name, w.__row, {_store(plan, 'w.__pos', '__pos')} AS __pos, {_store(plan, 'w.__seq', '__seq')} AS __seq, "
        f"w.__cat{values}, coalesce(c.__run, {lit(run)}) AS __run, coalesce(c.__raw, r.raw) AS __raw "
        f"FROM {plan.rel('waiting')} w JOIN __files f ON f.id = w.__file "
        f"LEFT JOIN {plan.rel('carried')} c ON c.__file = w.__file AND c.__row = w.__row "
        f"LEFT JOIN ({raw_rows}) r ON r.__file = w.__file AND r.__row = w.__row "
        "WHERE NOT w.__settled ORDER BY __pos, __seq"
    )
    path.parent.mkdir(parents=True, exist_ok=True)
    engine.execute(f"COPY ({sql}) TO {lit(str(path))} (FORMAT PARQUET, KV_METADATA {_metadata(plan)})")
    return int(engine.rows(f"SELECT count(*) FROM {plan.rel('waiting')} WHERE NOT __settled")[0][0])
