"""Type a list of raw texts with one field type, through the real pipeline."""

from __future__ import annotations

import csv
import io
from typing import Any

from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.mapping.model import FieldSpec
from cdcnorm.sql import lit
from cdcnorm.types import resolve
from tests.conftest import ConvertFn

_ENGINE: dict[str, DuckDBEngine] = {}


def typed_text(spec: dict[str, Any], text: str) -> tuple[Any, str | None]:
    """(JSON value, None) or (None, reason) of one raw text typed by a field of ``spec`` in the
    engine alone (one engine per test process): for properties over many values."""
    ftype = resolve(FieldSpec(**spec))
    engine = _ENGINE.setdefault("engine", DuckDBEngine())
    ((value, reason),) = engine.rows(
        f"SELECT {ftype.render('v')}, CASE WHEN v IS NULL THEN {ftype.explain(lit(text))} END "
        f"FROM (SELECT {ftype.cast(lit(text))} AS v)"
    )
    return value, reason


def type_values(convert: ConvertFn, type_spec: str, values: list[str]) -> list[tuple[Any, str | None]]:
    """For each raw text: (JSON value, None) when it passes, (None, reason) when quarantined."""
    mapping = f"""
    table: t.values
    files: ["v*.csv"]
    key: [id]
    change:
      action: {{column: op, codes: {{I: insert}}}}
      position: {{column: pos, kind: integer}}
    fields:
      id: integer
      value: {type_spec}
    """
    buf = io.StringIO()
    w = csv.writer(buf, quoting=csv.QUOTE_ALL, lineterminator="\n")
    w.writerow(["op", "pos", "id", "value"])
    for i, v in enumerate(values):
        w.writerow(["I", str(i + 1), str(i + 1), v])
    done = convert(mapping, {"v.csv": buf.getvalue()})
    events = {e["key"]["id"]: e["values"]["value"] for e in done.events("t.values")}
    rejected = {}
    for q in done.quarantine("t.values"):
        rejected[int(q["id"])] = "; ".join(r["reason"] for r in q["_cdcnorm"]["reasons"])
    out: list[tuple[Any, str | None]] = []
    for i in range(1, len(values) + 1):
        out.append((events[i], None) if i in events else (None, rejected[i]))
    return out
