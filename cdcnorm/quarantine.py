"""The quarantine: every rejected row, with its raw values exactly as read and every reason.

One JSON object per line in ``<out>/quarantine/<table>.jsonl``: the row's raw
columns as they were read (text, or null for NULL), plus one reserved key,
``_cdcnorm``, with the table, origin file and row, the reasons (field, raw
column, expected, found, reason), and for cells that were not UTF-8 their
bytes in base64. Because the raw columns stand at the top level, a fixed
quarantine file is itself a JSON Lines dump: ``cdcnorm convert`` reads it back
(a file named ``<table>.jsonl`` goes to that table's mapping).
"""

from __future__ import annotations

from cdcnorm.plan import Plan
from cdcnorm.sql import ident, lit

META_KEY = "_cdcnorm"

_NO_REASONS = (
    'CAST([] AS STRUCT(field VARCHAR, "column" VARCHAR, expected VARCHAR, found VARCHAR, reason VARCHAR)[])'
)


def _reason(expected: str, found: str, reason: str) -> str:
    return (
        f"[{{'field': CAST(NULL AS VARCHAR), 'column': CAST(NULL AS VARCHAR), 'expected': {expected}, "
        f"'found': {found}, 'reason': {reason}}}]"
    )


def rejected_rows(plan: Plan, malformed: dict[int, str]) -> str:
    """SQL: (__file, __row, reasons, text) of every quarantined row of the table.

    ``malformed`` maps file ids to the relations of records the reader could not split.
    """
    paired_mode = plan.mapping.mapping.change.updates == "paired"
    unpaired = (
        "'before-image without an after-image at its position'"
        if paired_mode
        else "'before-image in an after-only mapping'"
    )
    conflict = _reason(
        lit("one version per (position, action, key)"),
        "CAST(__versions AS VARCHAR) || ' versions'",
        lit("conflict"),
    )
    lonely = _reason(lit("an after-image at the same position"), "__position", unpaired)
    parts = [
        f"SELECT __file, __row, reasons, CAST(NULL AS VARCHAR) AS text FROM {plan.rel('rejects')}",
        f"SELECT __file, __row, {conflict} AS reasons, CAST(NULL AS VARCHAR) AS text "
        f"FROM {plan.rel('deduped')} WHERE __fate = 'conflict'",
        f"SELECT __file, __row, {lonely} AS reasons, CAST(NULL AS VARCHAR) AS text "
        f"FROM {plan.rel('kept')} k WHERE __act = 'before' AND NOT EXISTS "
        f"(SELECT 1 FROM {plan.rel('pairs')} p WHERE p.bf = k.__file AND p.br = k.__row)",
    ]
    for file_id, rel in sorted(malformed.items()):
        parts.append(
            f"SELECT {file_id} AS __file, __row, {_reason(lit('a well-formed record'), 'text', 'reason')} AS reasons, "
            f"text FROM {ident(rel)}"
        )
    return " UNION ALL ".join(parts)


def quarantine_lines(plan: Plan, rejected_relation: str) -> str:
    """SQL: one JSON line per rejected row, sorted by file name and row."""
    parts = []
    for src in plan.sources:
        raw = "{" + ", ".join(f"{lit(c)}: s.{ident(c)}" for c in src.columns) + "}" if src.columns else None
        raw_json = f"to_json({raw})" if raw else "'{}'"
        enc = "s.__enc"
        meta = (
            f"to_json({{'table': {lit(plan.mapping.table)}, 'file': {lit(src.name)}, 'row': r.__row, "
            f"'reasons': r.reasons, 'text': r.text, 'raw_base64': CAST({enc} AS JSON)}})"
        )
        line = (
            f"'{{\"{META_KEY}\":' || {meta} || CASE WHEN {raw_json} = '{{}}' OR s.__row IS NULL THEN '}}' "
            f"ELSE ',' || substr({raw_json}, 2) END"
        )
        parts.append(
            f"SELECT {lit(src.name)} AS __name, r.__row, {line} AS line FROM {ident(rejected_relation)} r "
            f"LEFT JOIN {ident(src.relation)} s ON s.__row = r.__row WHERE r.__file = {src.file_id}"
        )
    if not parts:
        return "SELECT CAST(NULL AS VARCHAR) AS line WHERE FALSE"
    return f"SELECT line FROM ({' UNION ALL '.join(parts)}) ORDER BY __name, __row"
