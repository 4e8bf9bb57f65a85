"""The quarantine: every rejected row, with its raw values exactly as read and every reason.

One JSON object per line in ``<out>/quarantine/<table>.jsonl``: the row's raw
columns as they were read (text, or null for NULL), plus one member,
``_cdcnorm`` (``__cdcnorm`` for a row with a raw column ``_cdcnorm``: see
``meta_key``; no column name is reserved), with the table, origin file and row, the reasons (field, raw
column, expected, found, reason), and for cells that were not UTF-8 their
bytes in base64. Because the raw columns stand at the top level, a fixed
quarantine file is itself a JSON Lines dump: ``cdcnorm convert`` reads it back
(a file named ``<table>.jsonl`` goes to that table's mapping).
"""

from __future__ import annotations

import re
from collections.abc import Iterable

from cdcnorm.plan import Lookup, Plan
from cdcnorm.sql import ident, lit
from cdcnorm.stages.order import position_text

META_KEY = "_cdcnorm"
_META_NAME = re.compile(r"_+cdcnorm")


def _longest(names: Iterable[str]) -> str | None:
    shaped = [n for n in names if _META_NAME.fullmatch(n)]
    return max(shaped, key=len) if shaped else None


def meta_column(columns: Iterable[str]) -> str | None:
    """The member of a JSON Lines file that is a quarantine line's ``_cdcnorm`` object, not raw
    columns: of the objects the reader flattened (``_cdcnorm.reasons``, ...) whose names are made
    of underscores and ``cdcnorm``, the one with the most underscores (see ``meta_key``); None when
    there is none. A member of that name that is no object (a string, say) is the dump's own."""
    return _longest(c.split(".", 1)[0] for c in columns if "." in c)


def meta_key(columns: Iterable[str]) -> str:
    """The name of the ``_cdcnorm`` member in the quarantine lines of rows whose raw columns are
    ``columns``: ``_cdcnorm``, with one underscore more than the longest raw column of that shape
    (a dump column named ``_cdcnorm`` is kept, under its name), so that ``meta_column`` tells it
    apart when the file is read back."""
    taken = _longest(c.split(".", 1)[0] for c in columns)
    return "_" + taken if taken else META_KEY


def dump_columns(columns: Iterable[str], fmt: str) -> tuple[str, ...]:
    """A file's columns that are the dump's own, in order: all of them, but in a JSON Lines file
    (a quarantine file fed back) the ``_cdcnorm`` member and its members, which the reader flattens
    into a column each (``_cdcnorm.reasons``). In a CSV or Parquet dump a column of that name is
    the dump's."""
    columns = tuple(columns)
    meta = meta_column(columns) if fmt == "jsonl" else None
    if meta is None:
        return columns
    return tuple(c for c in columns if c != meta and not c.startswith(meta + "."))


_NO_REASONS = (
    'CAST([] AS STRUCT(field VARCHAR, "column" VARCHAR, expected VARCHAR, found VARCHAR, reason VARCHAR)[])'
)


def _reason(expected: str, found: str, reason: str) -> str:
    return (
        f"[{{'field': CAST(NULL AS VARCHAR), 'column': CAST(NULL AS VARCHAR), 'expected': {expected}, "
        f"'found': {found}, 'reason': {reason}}}]"
    )


def rejected_rows(plan: Plan, all_valid: bool = False) -> str:
    """SQL: (__file, __row, reasons, text) of every quarantined row of the table, including the
    records the reader could not split (``plan.malformed``). ``all_valid``: every typed row is
    valid, so the reasons (``rejects``) are not read, nor need to be made."""
    paired_mode = plan.mapping.mapping.change.updates == "paired"
    unpaired = (
        "'before-image without an after-image: settled, it waits no more'"
        if paired_mode
        else "'before-image in an after-only mapping'"
    )
    conflict = _reason(
        "CASE WHEN __earlier_run IS NULL THEN 'one version per (position, action, key)' "
        "WHEN __unsettled THEN 'a version fed back from the quarantine of run ' || __earlier_run "
        "ELSE 'the version run ' || __earlier_run || ' emitted' END",
        "CASE WHEN __earlier_run IS NULL THEN CAST(__versions AS VARCHAR) || ' versions' "
        "WHEN __unsettled THEN 'another delivery of the change' "
        "WHEN __other_fields THEN 'content under other fields' ELSE 'other content' END",
        "CASE WHEN __earlier_run IS NULL THEN 'conflict' WHEN __unsettled THEN 'conflict with run ' || "
        "__earlier_run || ', which quarantined versions of this change that differ: none is chosen until "
        "one is fed back from its quarantine file' "
        "WHEN __other_fields THEN 'conflict with run ' || "
        "__earlier_run || ', whose fields differ from the mapping''s now: its content cannot be compared' "
        "ELSE 'conflict with run ' || __earlier_run END",
    )
    ambiguous = _reason(
        lit("one change of a key per position and sequence, or a before-image and its after-image"),
        "CAST(__versions AS VARCHAR) || ' kinds of change of this key'",
        lit("ambiguous order: changes of one key at one position and sequence cannot be ordered"),
    )
    unpairable = _reason(
        lit("one before-image and one after-image per key changed at one position and sequence"),
        "CAST(__befores AS VARCHAR) || ' before-images and ' || CAST(__afters AS VARCHAR) || "
        "' after-images whose keys differ'",
        lit("ambiguous pairing: which before-image belongs to which after-image cannot be told"),
    )
    lonely = _reason(
        lit("an after-image at the same position"),
        position_text(plan),
        f"CASE WHEN __partner_rejected THEN 'before-image whose after-image at this position was quarantined' "
        f"ELSE {unpaired} END",
    )
    parts = [
        f"SELECT __file, __row, reasons, CAST(NULL AS VARCHAR) AS text FROM {plan.rel('rejects')}",
        f"SELECT __file, __row, {conflict} AS reasons, CAST(NULL AS VARCHAR) AS text "
        f"FROM {plan.rel('fates')} WHERE __fate = 'conflict'",
        f"SELECT __file, __row, {ambiguous} AS reasons, CAST(NULL AS VARCHAR) AS text "
        f"FROM {plan.rel('fates')} WHERE __fate = 'ambiguous'",
        f"SELECT __file, __row, {lonely} AS reasons, CAST(NULL AS VARCHAR) AS text "
        f"FROM {plan.rel('waiting')} WHERE __settled",
        f"SELECT __file, __row, {unpairable} AS reasons, CAST(NULL AS VARCHAR) AS text "
        f"FROM {plan.rel('unpairable')}",
    ]
    if all_valid:
        parts = parts[1:]
    if plan.malformed:
        parts.append(
            f"SELECT __file, __row, {_reason(lit('a well-formed record'), 'text', 'reason')} AS reasons, "
            f"text FROM {ident(plan.malformed)}"
        )
    return " UNION ALL ".join(parts)


def raw_rows(plan: Plan, wanted: str, lookup: Lookup | None = None) -> str:
    """SQL: (__file, __row, __enc, raw) for the rows of relation ``wanted`` (which has __file and
    __row): ``raw`` is the JSON object of the row's raw columns under its own file's names, as read.
    Only the wanted rows are looked up (by ``lookup``, where the engine gives one: ``Plan.raw_union``);
    a before-image carried in from an earlier run brings the
    raw object it was read with."""
    used = {c for r in plan.relations for c in r.columns} | {
        plan.internal[c] for s in plan.sources for c in s.columns
    }
    internal = sorted(used, key=lambda c: int(c[1:]))
    union = plan.raw_union(internal, wanted, lookup)
    by_columns: dict[tuple[str, ...], list[int]] = {}
    for src in plan.sources:
        by_columns.setdefault(dump_columns(src.columns, src.format), []).append(src.file_id)
    parts = []
    for columns, ids in by_columns.items():
        # json_object, not a struct: a struct's member names are case-insensitive, and a header may
        # hold both "name" and "Name"
        raw = (
            "json_object(" + ", ".join(f"{lit(c)}, s.{plan.raw(c)}" for c in columns) + ")"
            if columns
            else "'{}'"
        )
        parts.append(
            f"SELECT s.__file, s.__row, s.__enc, CAST({raw} AS VARCHAR) AS raw, {lit(meta_key(columns))} AS meta "
            f"FROM ({union}) s WHERE s.__file IN ({', '.join(str(i) for i in ids)})"
        )
    parts.append(
        f"SELECT c.__file, c.__row, CAST(NULL AS VARCHAR) AS __enc, c.__raw AS raw, "
        f"{_carried_meta_key('c.__raw')} AS meta FROM {plan.rel('carried')} c "
        f"SEMI JOIN {wanted} q ON c.__file = q.__file AND c.__row = q.__row"
    )
    return " UNION ALL ".join(parts)


def _carried_meta_key(raw: str) -> str:
    """SQL: ``meta_key`` of the raw columns of a carried row (``raw``, their JSON object)."""
    tops = f"list_transform(json_keys({raw}), lambda k: split_part(k, '.', 1))"
    taken = f"list_filter({tops}, lambda k: regexp_full_match(k, '{_META_NAME.pattern}'))"
    return (
        f"CASE WHEN len({taken}) > 0 THEN repeat('_', list_max(list_transform({taken}, lambda k: length(k))) - 6) "
        f"|| 'cdcnorm' ELSE {lit(META_KEY)} END"
    )


def quarantine_lines(
    plan: Plan, rejected_relation: str, files_relation: str = "__files", lookup: Lookup | None = None
) -> str:
    """SQL: one JSON line per rejected row, sorted by file name and row: the ``_cdcnorm`` object,
    then the row's raw columns as read."""
    rejected = ident(rejected_relation)
    meta = (
        f"to_json({{'table': {lit(plan.mapping.table)}, 'file': f.name, 'row': r.__row, "
        f"'reasons': r.reasons, 'text': r.text, 'raw_base64': CAST(s.__enc AS JSON)}})"
    )
    # the member's name is _cdcnorm unless a raw column of the row has it (meta_key)
    line = (
        f"'{{' || to_json(coalesce(s.meta, {lit(META_KEY)})) || ':' || {meta} || "
        "CASE WHEN s.raw IS NULL OR s.raw = '{}' THEN '}' ELSE ',' || substr(s.raw, 2) END"
    )
    return (
        f"SELECT line FROM (SELECT f.name AS __name, r.__row, {line} AS line FROM {rejected} r "
        f"JOIN {files_relation} f ON f.id = r.__file "
        f"LEFT JOIN ({raw_rows(plan, rejected, lookup)}) s ON s.__file = r.__file AND s.__row = r.__row) "
        "ORDER BY __name, __row"
    )
