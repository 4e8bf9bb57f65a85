"""One plan, several engines: every step of every table's plan is a sqlglot expression that each
engine adapter renders in its dialect with nothing sqlglot calls unsupported, and the text parses
back in that dialect (sqlglot as the reference transpiler). That Spark also runs the rendered
plan, with DuckDB's results, is tests/test_engine_spark.py."""

from __future__ import annotations

from pathlib import Path

import pytest
import sqlglot
from sqlglot import exp
from sqlglot.errors import ErrorLevel

from cdcnorm.engines import spark as spark_engine
from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, compile_table, expand_inputs, read_all, route
from cdcnorm.positions import HEX_KEY
from tests.conftest import ROOT


def _rendered(expression: exp.Expr, dialect: str) -> str:
    if dialect == "spark":
        rewritten = expression.copy().transform(spark_engine._rewrite)
        return rewritten.sql(dialect="spark", unsupported_level=ErrorLevel.RAISE)
    return expression.sql(dialect=dialect, unsupported_level=ErrorLevel.RAISE)


@pytest.mark.parametrize("dialect", ["spark", "duckdb"])
def test_every_plan_step_transpiles(tmp_path: Path, dialect: str) -> None:
    mappings = load_mappings(ROOT / "mappings")
    routed = route(expand_inputs([ROOT / "examples" / "dumps"]), mappings)
    read = read_all(mappings, routed, DuckDBEngine(), Options(), lambda *a: None, tmp_path)
    by_name = {m.table: m for m in mappings}
    steps = 0
    for table, raw in read.items():
        plan = compile_table(by_name[table], raw)
        has_json = any(t.name == "json" for t in plan.mapping.field_types.values())
        for step in plan.steps:
            if dialect == "spark" and has_json and step.stage == "type":
                with pytest.raises(spark_engine.UnsupportedByEngine):
                    _rendered(step.expression, dialect)
                continue
            text = _rendered(step.expression, dialect)
            assert sqlglot.parse_one(text, read=dialect) is not None, (table, step.name)
            if dialect == "spark":  # no DuckDB-only spelling is left in the Spark text
                for name in ("REGEXP_FULL_MATCH", "MD5_NUMBER", "EPOCH_US", "UBIGINT", "UHUGEINT", "UINT128"):
                    assert name not in text.upper(), (table, step.name, name)
                assert HEX_KEY.upper() not in text.upper(), (table, step.name)
            steps += 1
    assert steps >= 40
