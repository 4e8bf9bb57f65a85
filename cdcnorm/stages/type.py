"""Stage type: guarded casts of every raw value, and the reasons for every bad row."""

from __future__ import annotations

from collections.abc import Callable

from cdcnorm import positions
from cdcnorm.plan import Plan
from cdcnorm.sql import lit
from cdcnorm.stages.source import alternative_named, image_named
from cdcnorm.types import resolve
from cdcnorm.types.timestamp import epoch_expected, timestamp_explain


def _reason(
    field: str | None, column: str, expected: str, found: str, reason: str, column_sql: str | None = None
) -> str:
    return (
        f"{{'field': {lit(field) if field else 'CAST(NULL AS VARCHAR)'}, 'column': {column_sql or lit(column)}, "
        f"'expected': {lit(expected)}, 'found': {found}, 'reason': {reason}}}"
    )


def _invalid(raw: str, typed: str) -> Callable[[str, str], str]:
    """A raw value is there, but its typed value is not: the text is not a valid value."""
    return lambda s, t: f"{s}{raw} IS NOT NULL AND {t}{typed} IS NULL"


def _missing(raw: str) -> Callable[[str, str], str]:
    return lambda s, t: f"{s}{raw} IS NULL"


class _Checks:
    """Typed columns, the ok condition and the reasons, written against raw ``s`` and typed ``t``."""

    def __init__(self) -> None:
        self.typed: list[tuple[str, str]] = []  # (name, SQL over raw columns)
        self.ok: list[str] = []  # SQL over the one-pass relation q
        self.reasons: list[str] = []  # SQL over s. and t.

    def check(self, bad: Callable[[str, str], str], reason: str) -> None:
        """``bad(s, t)`` writes the condition with raw columns under prefix s, typed under t;
        the row is ok only when no ``bad`` holds."""
        self.ok.append(f"NOT coalesce({bad('q.', 'q.')}, FALSE)")
        self.reasons.append(f"CASE WHEN {bad('s.', 't.')} THEN {reason} END")


def type_rows(plan: Plan) -> Plan:
    """Add ``typed`` (all rows, typed, with an ``__ok`` flag) and ``rejects`` (bad rows with reasons)."""
    m = plan.mapping.mapping
    ch = m.change
    c = _Checks()

    # a cell whose bytes are not text in the codec its file was read with (UTF-8, or csv.encoding)
    codecs = {s.file_id: s.encoding for s in plan.sources if s.encoding != "UTF-8"}
    codec = "'UTF-8'"
    if codecs:
        whens = " ".join(f"WHEN {i} THEN {lit(e)}" for i, e in sorted(codecs.items()))
        codec = f"CASE s.__file {whens} ELSE 'UTF-8' END"
    c.check(
        lambda s, t: f"{s}__enc IS NOT NULL",
        "{'field': CAST(NULL AS VARCHAR), 'column': array_to_string(json_keys(s.__enc), ', '), "
        f"'expected': {codec} || ' text', 'found': s.__enc, "
        f"'reason': 'not ' || {codec} || ' (found shows the bytes, base64)'}}",
    )
    act_col = plan.raw(ch.action.column)
    codes = " ".join(f"WHEN {lit(k)} THEN {lit(v)}" for k, v in sorted(ch.action.codes.items()))
    c.typed.append(("__act", f"CASE {act_col} {codes} END"))
    c.check(
        lambda s, t: f"{t}__act IS NULL",
        _reason(
            "action",
            ch.action.column,
            "one of codes " + ", ".join(sorted(ch.action.codes)),
            f"s.{act_col}",
            f"CASE WHEN s.{act_col} IS NULL THEN 'missing action code' ELSE 'unknown action code' END",
        ),
    )
    pos_col = plan.raw(ch.position.column)
    c.typed.append(("__pos", positions.position_key(ch.position, pos_col)))
    # a time position says why, as a timestamp field does: a local time in a DST gap is well formed
    why = (
        timestamp_explain(f"s.{pos_col}", ch.position.zone)
        if ch.position.kind == "timestamp"
        else "'malformed position'"
    )
    c.check(
        lambda s, t: f"{t}__pos IS NULL",
        _reason(
            "position",
            ch.position.column,
            positions.expected(ch.position),
            f"s.{pos_col}",
            f"CASE WHEN s.{pos_col} IS NULL THEN 'missing position' ELSE {why} END",
        ),
    )
    if ch.sequence:
        col = plan.raw(ch.sequence.column)
        c.typed.append(("__seq", positions.sequence_key(ch.sequence, ch.position, col)))
        c.check(
            lambda s, t: f"{t}__seq IS NULL",
            _reason(
                "sequence",
                ch.sequence.column,
                positions.expected_kind(ch.sequence.kind, positions.sequence_width(ch.sequence, ch.position)),
                f"s.{col}",
                f"CASE WHEN s.{col} IS NULL THEN 'missing sequence' ELSE 'malformed sequence' END",
            ),
        )
    else:
        c.typed.append(("__seq", positions.NO_SEQUENCE))  # no sequence: one constant
    if ch.committed_at:
        col = plan.raw(ch.committed_at.column)
        ftype = resolve(ch.committed_at.as_field())
        epoch = ch.committed_at.epoch
        expected = epoch_expected(epoch) if epoch else "an RFC 3339 timestamp"
        cast, why = ftype.cast(col), ftype.explain(f"s.{col}")
        c.typed.append(("__cat", cast))
        c.check(
            _invalid(col, "__cat"), _reason("committed_at", ch.committed_at.column, expected, f"s.{col}", why)
        )
    else:
        c.typed.append(("__cat", "CAST(NULL AS TIMESTAMPTZ)"))
    keys = set(m.key)
    alternatives = m.alternatives
    images = m.change.images is not None
    for i, (name, ftype) in enumerate(plan.mapping.field_types.items()):
        column = m.raw_column(name)
        raw = plan.field_raw(name)
        # a field with alternatives names the column its row's file had; with images, the image's
        named = alternative_named(plan, name, "s.") if name in alternatives else None
        if images:
            named = image_named(plan, name, "s.")
        c.typed.append((f"v{i}", ftype.cast(raw)))
        if not ftype.accepts_any:
            c.check(
                _invalid(raw, f"v{i}"),
                _reason(name, column, ftype.expected(), f"s.{raw}", ftype.explain(f"s.{raw}"), named),
            )
        if name in keys or m.fields[name].required:
            what = "missing key" if name in keys else "missing required value"
            c.check(
                _missing(raw),
                _reason(name, column, ftype.expected(), "CAST(NULL AS VARCHAR)", lit(what), named),
            )
        if images:
            # an update's before-image: its prior (and its key, when the update changed the key)
            prior = plan.prior_raw(name)
            before = m.before_column(name) or ""
            c.typed.append((f"b{i}", ftype.cast(prior)))
            if not ftype.accepts_any:
                c.check(
                    _invalid(prior, f"b{i}"),
                    _reason(name, before, ftype.expected(), f"s.{prior}", ftype.explain(f"s.{prior}")),
                )

    src = plan.rel("source")
    raw_cols = ", ".join(
        [plan.raw(col) for col in m.mapped_columns()]
        + [plan.field_raw(name) for name in plan.fields if name in alternatives or images]
        + [plan.prior_raw(name) for name in plan.fields if images]
    )
    inner = f"SELECT __file, __row, __enc, {raw_cols}, {', '.join(f'{sql} AS {n}' for n, sql in c.typed)} FROM {src}"
    ok = " AND ".join(c.ok)
    typed_cols = ", ".join(f"q.{n}" for n, _ in c.typed)
    plan = plan.add(
        "type",
        "typed",
        f"SELECT q.__file, q.__row, {typed_cols}, ({ok}) AS __ok FROM ({inner}) q",
        materialize=True,
    )
    reasons = f"list_filter([{', '.join(c.reasons)}], lambda x: x IS NOT NULL)"
    # A record whose cells are its columns' names is the header again (files joined with their
    # headers, as ``cat`` joins exports, or a header in a file read as headerless): one reason that
    # says so, not one per field that the names are not valid values. The change columns must be
    # their names; another mapped column may be absent from the file (NULL).
    change_cols = set(m.change_columns().values())
    named = " AND ".join(
        f"s.{plan.raw(col)} = {lit(col)}"
        if col in change_cols
        else f"coalesce(s.{plan.raw(col)} = {lit(col)}, TRUE)"
        for col in m.mapped_columns()
    )
    header = _reason(
        None,
        "",
        "a data record",
        "'the names of the columns'",
        lit(
            "the header row again: files joined with their headers, or a header in a file read as headerless"
        ),
        column_sql="CAST(NULL AS VARCHAR)",
    )
    reasons = f"CASE WHEN {named} THEN [{header}] ELSE {reasons} END"
    rejects = (
        f"SELECT t.__file, t.__row, {reasons} AS reasons "
        f"FROM {plan.rel('typed')} t JOIN {src} s ON s.__file = t.__file AND s.__row = t.__row WHERE NOT t.__ok"
    )
    # only the quarantine reads the reasons: made when some row is not valid (binding them is
    # most of a small table's accounting)
    return plan.add("type", "rejects", rejects, on_demand=True)
