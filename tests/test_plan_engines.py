"""One plan, several engines: every step of every table's plan is a sqlglot expression that each
engine adapter renders in its dialect with nothing sqlglot calls unsupported, and the text parses
back in that dialect (sqlglot as the reference transpiler). That Spark also runs the rendered
plan, with DuckDB's results, is tests/test_engine_spark.py."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest
import sqlglot
from sqlglot import exp
from sqlglot.errors import ErrorLevel

from cdcnorm.engines import spark as spark_engine
from cdcnorm.engines.duckdb import DuckDBEngine, check_version
from cdcnorm.errors import CdcnormError
from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, compile_table, expand_inputs, read_all, route, run
from cdcnorm.positions import HEX_DIGITS, HEX_KEY
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
                assert HEX_DIGITS.upper() not in text.upper(), (table, step.name)
            steps += 1
    assert steps >= 40


def test_the_engine_writes_each_step_without_changing_the_plan(tmp_path: Path) -> None:
    # DuckDBEngine.render writes a step without copying it: the text must be sqlglot's own for a
    # copy (the reference), and the step must be left equal to what it was
    mappings = load_mappings(ROOT / "mappings")
    routed = route(expand_inputs([ROOT / "examples" / "dumps"]), mappings)
    engine = DuckDBEngine()
    read = read_all(mappings, routed, engine, Options(), lambda *a: None, tmp_path)
    by_name = {m.table: m for m in mappings}
    steps = 0
    for table, raw in read.items():
        for step in compile_table(by_name[table], raw).steps:
            before = step.expression.copy()
            reference = before.sql(dialect="duckdb")
            assert engine.render(step.expression) == reference, (table, step.name)
            assert step.expression == before, (table, step.name)
            assert engine.render(step.expression) == reference, (table, step.name)
            steps += 1
    assert steps >= 40


def test_each_step_s_text_and_its_expression_give_the_same_rows(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The DuckDB engine runs each step's text as the stage wrote it; another engine runs what
    sqlglot writes of the step's expression. While the examples convert in two runs (the
    second meets the first's identities and waiting images), every step is also run as
    sqlglot's DuckDB text of its parsed expression, and the two must give the same rows: what
    sqlglot reads of the plan is what DuckDB reads of it (sqlglot as the reference parser)."""
    compared: list[str] = []
    original = {"materialize": DuckDBEngine.materialize, "view": DuckDBEngine.view}

    def checked(kind: str) -> Callable[[DuckDBEngine, str, exp.Expr | str], None]:
        def run_step(self: DuckDBEngine, name: str, expression: exp.Expr | str) -> None:
            if isinstance(expression, str):
                text = expression
                written = sqlglot.parse_one(text, read="duckdb").sql(dialect="duckdb")
                ((extra, missing),) = self.rows(
                    f"SELECT (SELECT count(*) FROM (({text}) EXCEPT ALL ({written}))), "
                    f"(SELECT count(*) FROM (({written}) EXCEPT ALL ({text})))"
                )
                assert (extra, missing) == (0, 0), name
                compared.append(name.split("__")[-1])
            original[kind](self, name, expression)

        return run_step

    monkeypatch.setattr(DuckDBEngine, "materialize", checked("materialize"))
    monkeypatch.setattr(DuckDBEngine, "view", checked("view"))
    mappings = load_mappings(ROOT / "mappings")
    dumps = ROOT / "examples" / "dumps"
    runs = [["bookings-archive.csv", "passengers.csv"], ["bookings-live.csv", "sailings.jsonl"]]
    for names in runs:
        result = run(mappings, [dumps / n for n in names], Options(out=tmp_path / "area"))
        assert result.ledger.balanced
    assert len(compared) >= 75, len(compared)
    assert {"typed", "seen", "pairs", "waiting", "kept", "events", "quarantined"} <= set(compared)


def test_the_engine_reads_hex_keys_wider_than_64_bits() -> None:
    """What DuckDB 2.0 is needed for (OLDEST_DUCKDB): DuckDB 1.3.2, 1.4.1 and 1.5.6 gave NULL for
    these (measured), and every hex position would have been refused."""
    engine = DuckDBEngine()
    (row,) = engine.rows(f"SELECT {HEX_KEY}(repeat('f', 32)), {HEX_KEY}('1' || repeat('0', 16))")
    assert row == (2**128 - 1, 1 << 64)  # Python's own integers


@pytest.mark.parametrize("width", [1, 8, 16, 20, 31, 32])
def test_a_hex_key_gives_back_its_last_digits_with_leading_zeros(width: int) -> None:
    """``plan_hex_digits`` against Python's own formatting (``format(k, "032X")``): the engine's
    shortcut below 32 digits must keep every leading zero and drop nothing."""
    engine = DuckDBEngine()
    keys = [
        0,
        1,
        15,
        16,
        (1 << (4 * width)) - 1,
        1 << (4 * width - 1),
        2**128 - 1,
        0x0123456789ABCDEF0FEDCBA987654321,
    ]
    listed = ", ".join(f"(CAST('{k}' AS UHUGEINT))" for k in keys)
    got = engine.rows(f"SELECT {HEX_DIGITS}(k, {width}) FROM (VALUES {listed}) v(k)")
    assert [g for (g,) in got] == [format(k, "032X")[-width:] for k in keys]


@pytest.mark.parametrize("version", ["1.2.2", "1.5.6", "1.10.0", "2.0.0"])
def test_an_older_duckdb_is_refused_by_name(version: str) -> None:
    with pytest.raises(CdcnormError) as caught:
        check_version(version)
    message = str(caught.value)
    assert "needs DuckDB 2.0.1 or later" in message and version in message
    assert "pip install 'duckdb>=2.0.1'" in message


@pytest.mark.parametrize("version", ["2.0.1", "2.0.2", "2.1.0.dev12", "10.0.0"])
def test_duckdb_2_0_1_or_later_is_taken(version: str) -> None:
    check_version(version)


@pytest.mark.parametrize("version", ["29.0.1", "30.0.0", "30.24.0"])
def test_an_older_sqlglot_is_refused_by_name(version: str) -> None:
    """sqlglot 30.24 still wrote DuckDB lambdas as ``x -> ...`` (measured), which DuckDB 2 refuses."""
    with pytest.raises(CdcnormError) as caught:
        check_version("2.0.1", version)
    assert "needs sqlglot 30.25.0 or later" in str(caught.value) and version in str(caught.value)


def test_the_plans_lambdas_are_written_as_duckdb_2_takes_them() -> None:
    """What sqlglot 30.25 is needed for: the plan dialect's arrow lambda, in DuckDB's SQL."""
    expression = sqlglot.parse_one("SELECT list_filter([1, NULL, 2], x -> x IS NOT NULL)", read="duckdb")
    assert "->" not in expression.sql("duckdb")
    assert DuckDBEngine().rows(expression) == [([1, 2],)]
