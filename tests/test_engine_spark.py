"""The same plan on Spark: every step of a table's plan runs on a local Spark session (the
Spark adapter renders it, Spark's own parser and analyser take it), and the envelopes, their
order, the quarantined rows with their reasons and the ledger's counts equal DuckDB's.

Spark is the oracle here as much as DuckDB is: two engines, one plan, one answer. Needs
pyspark and a Java runtime (``pip install 'cdcnorm[spark]'``); CI sets
``CDCNORM_REQUIRE_SPARK=1`` so that a missing one fails instead of skipping.
"""

from __future__ import annotations

import os
import shutil
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pyarrow as pa
import pytest
import sqlglot

from cdcnorm import ledger as ledger_mod
from cdcnorm import quarantine
from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.landing import memory
from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, compile_table, expand_inputs, read_all, route
from cdcnorm.plan import Plan
from cdcnorm.readers import RawTable
from cdcnorm.sql import PLAN_DIALECT
from cdcnorm.writers.base import project
from tests.conftest import ROOT

sys.path.insert(0, str(ROOT / "tests" / "bench"))
import dumpgen

pyspark_missing = shutil.which("java") is None
try:
    import pyspark  # noqa: F401
except ImportError:
    pyspark_missing = True

if pyspark_missing and os.environ.get("CDCNORM_REQUIRE_SPARK"):
    pytest.fail("CDCNORM_REQUIRE_SPARK is set but pyspark or java is missing", pytrace=False)
pytestmark = pytest.mark.skipif(pyspark_missing, reason="needs pyspark and a Java runtime")


@pytest.fixture(scope="module")
def spark() -> Iterator[Any]:
    from cdcnorm.engines.spark import session

    s = session(threads=2)
    yield s
    s.stop()


def _read(mappings_dir: Path, dumps: Path, scratch: Path) -> tuple[DuckDBEngine, list[tuple[Plan, RawTable]]]:
    mappings = load_mappings(mappings_dir)
    duck = DuckDBEngine()
    read = read_all(
        mappings, route(expand_inputs([dumps]), mappings), duck, Options(), lambda *a: None, scratch
    )
    by_name = {m.table: m for m in mappings}
    return duck, [(compile_table(by_name[t], raw), raw) for t, raw in read.items()]


def _run(engine: Any, plan: Plan, raw: RawTable, duck: DuckDBEngine) -> dict[str, Any]:
    """Run the plan on ``engine`` (the raw rows come from DuckDB's reading, as Arrow) and return
    what a run writes: the sorted envelopes, the quarantined rows, the ledger's counts."""
    from cdcnorm.engines.spark import SparkEngine

    files = pa.table(
        {"id": pa.array([f.file_id for f in raw.files], pa.int32()), "name": [f.name for f in raw.files]}
    )
    engine.register("__files", files)
    if isinstance(engine, SparkEngine):
        for rel in plan.relations:
            engine.register(rel.name, duck.arrow(f'SELECT * FROM "{rel.name}"'))
        if plan.malformed:
            engine.register(plan.malformed, duck.arrow(f'SELECT * FROM "{plan.malformed}"'))
        empty = memory.empty_relation(memory.carried_columns(plan))
        engine.view(plan.rel("carried").strip('"'), sqlglot.parse_one(empty, read=PLAN_DIALECT))
    else:
        memory.load_carried(engine, plan, None, 0)
    for step in plan.steps:
        if step.name == "seen":  # a first run: nothing emitted earlier
            empty = memory.empty_relation(memory.earlier_columns(plan))
            engine.view(plan.rel("earlier").strip('"'), sqlglot.parse_one(empty, read=PLAN_DIALECT))
        (engine.materialize if step.materialize else engine.view)(step.relation, step.expression)
    envelopes = engine.arrow(project(plan, "__files", render=True)).to_pylist()
    rejected = engine.arrow(
        f"SELECT __file, __row, reasons, text FROM ({quarantine.rejected_rows(plan)}) ORDER BY __file, __row"
    ).to_pylist()
    counts = ledger_mod.TableLedger(plan.mapping.table)
    ids = {f.file_id: f.name for f in raw.files}
    for f in raw.files:
        counts.files[f.name] = ledger_mod.FileCounts(read=f.rows_read, quarantined=f.malformed)
    ledger_mod.count_fates(plan, engine.rows, counts, ids)
    return {"envelopes": envelopes, "rejected": rejected, "ledger": counts.files, "balanced": counts.balanced}


def _same_on_both(spark: Any, mappings_dir: Path, dumps: Path, tmp_path: Path) -> dict[str, tuple[int, int]]:
    """Each table's (events, quarantined rows), equal on both engines."""
    from cdcnorm.engines.spark import SparkEngine

    duck, plans = _read(mappings_dir, dumps, tmp_path)
    compared = {}
    for plan, raw in plans:
        if any(t.name == "json" for t in plan.mapping.field_types.values()):
            continue  # refused by the Spark adapter (test below)
        on_duck = _run(duck, plan, raw, duck)
        on_spark = _run(SparkEngine(spark), plan, raw, duck)
        assert on_duck["balanced"] and on_spark["ledger"] == on_duck["ledger"], plan.mapping.table
        assert on_spark["rejected"] == on_duck["rejected"], plan.mapping.table
        # the same envelopes in the same order: the keys sort the same as 128-bit integers
        # (DuckDB) and as 16 bytes (Spark)
        assert on_spark["envelopes"] == on_duck["envelopes"], plan.mapping.table
        compared[plan.mapping.table] = (len(on_duck["envelopes"]), len(on_duck["rejected"]))
    return compared


def test_the_demo_plans_give_the_same_events_on_spark(spark: Any, tmp_path: Path) -> None:
    compared = _same_on_both(spark, ROOT / "mappings", ROOT / "examples" / "dumps", tmp_path)
    assert compared == {"ferry.bookings": (8, 5), "ferry.passengers": (5, 4)}


def test_the_benchmark_dump_gives_the_same_events_on_spark(spark: Any, tmp_path: Path) -> None:
    """The realistic dump: hex positions and sequences under ``__$`` names, quoted line breaks,
    decimals, floats, timestamps, booleans, overlap duplicates, late rows and dirty values."""
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    dumpgen.generate(20_000, dumps)
    dumpgen.write_mapping(tmp_path / "mappings")
    compared = _same_on_both(spark, tmp_path / "mappings", dumps, tmp_path / "scratch")
    events, quarantined = compared["lockers.deliveries"]
    assert events > 10_000 and quarantined > 0


def _one_mapping(tmp_path: Path, table: str, prefix: str, position: str, fields: str) -> None:
    """A mapping folder ``tmp_path/mappings`` of one insert-only table keyed by an integer ``id``:
    its files ``<prefix>*.csv``, the rest of its position's braces, its fields after ``id``."""
    (tmp_path / "mappings").mkdir()
    (tmp_path / "mappings" / "t.yaml").write_text(
        f"table: {table}\nfiles: ['{prefix}*.csv']\nkey: [id]\nchange:\n"
        "  action: {column: op, codes: {I: insert}}\n"
        f"  position: {{column: pos, {position}\nfields:\n  id: integer\n{fields}",
        encoding="utf-8",
    )


def test_zero_padded_hex_positions_give_the_same_events_on_spark(spark: Any, tmp_path: Path) -> None:
    """Leading zeros do not count towards a hex width: a 44-digit text with 14 significant digits
    is a valid 20-digit position on both engines (Spark's lpad would cut the text, not pad it)."""
    _one_mapping(tmp_path, "t.hex", "h", "kind: hex, width: 20}\n  sequence: {column: seq, kind: hex}", "")
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    rows = [
        ("0x" + "0" * 30 + "2A000001F80006", "1"),
        ("2A000001F80005", "0" * 40 + "2"),
        ("0X" + "0" * 3 + "F" * 20, "3"),
        ("0x" + "0" * 2 + "F" * 21, "4"),  # 21 significant digits: too wide
        ("0x" + "0" * 50, "5"),
    ]
    body = "".join(f"I,{pos},{seq},{i}\n" for i, (pos, seq) in enumerate(rows))
    (dumps / "h.csv").write_text("op,pos,seq,id\n" + body, encoding="utf-8")
    assert _same_on_both(spark, tmp_path / "mappings", dumps, tmp_path / "scratch") == {"t.hex": (4, 1)}


def test_decimals_of_every_precision_give_the_same_events_on_spark(spark: Any, tmp_path: Path) -> None:
    """Zeros after a fraction's last digit, exponent notation with zeros around its digits, and a
    decimal(p,p) written with its 0 before the point: the same envelopes and rejections on both
    engines (Spark writes that 0 itself; the plan adds it only where the text lacks it). Python's
    decimal is the reference for the values kept."""
    from decimal import Decimal

    _one_mapping(
        tmp_path,
        "t.dec",
        "d",
        "kind: integer}",
        "  a: decimal(38,2)\n  b: decimal(2,2)\n  c: decimal(38,34)\n",
    )
    rows = [
        ("1.250", "-.5", "10000E-1"),
        ("1.0", ".05", "0.00001E6"),
        ("123456789012345678901234567890123456.70", "0", "-1.5E0"),
        ("1.255", "0.5", "1"),  # a digit beyond decimal(38,2)'s scale: quarantined on both
    ]
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    body = "".join(f"I,{i},{i},{a},{b},{c}\n" for i, (a, b, c) in enumerate(rows, start=1))
    # the header again (two exports joined with theirs): one reason that says so, on both engines
    (dumps / "d.csv").write_text("op,pos,id,a,b,c\n" + body + "op,pos,id,a,b,c\n", encoding="utf-8")
    assert _same_on_both(spark, tmp_path / "mappings", dumps, tmp_path / "scratch") == {"t.dec": (3, 2)}
    duck, ((plan, raw),) = _read(tmp_path / "mappings", dumps, tmp_path / "again")
    values = [e["values"] for e in _run(duck, plan, raw, duck)["envelopes"]]
    assert [(v["a"], v["b"], v["c"]) for v in values] == [
        ("1.25", "-0.50", "1000.0000000000000000000000000000000000"),
        ("1.00", "0.05", "10.0000000000000000000000000000000000"),
        ("123456789012345678901234567890123456.70", "0.00", "-1.5000000000000000000000000000000000"),
    ]
    assert all(
        Decimal(v["a"]) == Decimal(r[0]) and Decimal(v["b"]) == Decimal(r[1])
        for v, r in zip(values, rows[:3], strict=True)
    )


def test_numbers_with_a_decimal_comma_and_group_marks_give_the_same_events_on_spark(
    spark: Any, tmp_path: Path
) -> None:
    """decimal_mark and group_mark: the same values and the same reasons on both engines."""
    _one_mapping(
        tmp_path,
        "t.marks",
        "m",
        "kind: integer}",
        "  a: {type: 'decimal(12,2)', decimal_mark: ',', group_mark: '.'}\n"
        '  b: {type: float, decimal_mark: \',\', group_mark: "\\u202f"}\n  c: {type: integer, group_mark: "\'"}\n',
    )
    rows = [
        ("1.234,56", "1\u202f234,5e3", "1'234'567"),
        ("-,5", "0,1", "12"),
        ("12.34", "1,5", "1'234"),  # a point that groups two digits: quarantined on both
        ("1.234.567,8", "1\u202f23,5", "1'23"),  # misgrouped b and c: quarantined on both
    ]
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    body = "".join(f'I,{i},{i},"{a}","{b}","{c}"\n' for i, (a, b, c) in enumerate(rows, start=1))
    (dumps / "m.csv").write_text("op,pos,id,a,b,c\n" + body, encoding="utf-8")
    assert _same_on_both(spark, tmp_path / "mappings", dumps, tmp_path / "scratch") == {"t.marks": (2, 2)}


def test_epoch_counts_and_spaced_offsets_give_the_same_events_on_spark(spark: Any, tmp_path: Path) -> None:
    """Timestamps given as counts since the epoch (every unit, the first and last instant of
    years 0001-9999, nanoseconds that would truncate) and written with a space before the offset,
    digits below the microsecond rounded (ties to even) or cut: the same envelopes and rejections on
    both engines."""
    _one_mapping(
        tmp_path,
        "t.ticks",
        "e",
        "kind: integer}\n  committed_at: {column: ts, epoch: ms}",
        "  s: {type: timestamp, epoch: s}\n  ns: {type: timestamp, epoch: ns}\n  at: timestamp\n  flag: boolean\n"
        "  near: {type: timestamp, sub_microsecond: round}\n"
        "  cut: {type: timestamp, epoch: ns, sub_microsecond: truncate}\n",
    )
    rows = [
        ("1772352000250", "-62135596800", "1772352000123456000", "2026-03-01 08:00:00.1230000 +01:00", "Y"),
        ("-1", "253402300799", "-62135596800000000000", "2026-03-01 08:00:00 -05:30", " off "),
        ("0", "0", "1772352000123456789", "2026-03-01T08:00:00Z", "t"),  # would truncate
        ("253402300800000", "1", "0", "2026-03-01T08:00:00Z", "f"),  # after year 9999
    ]
    fine = [
        ("2026-03-01 08:00:00.1234565 +01:00", "-1500"),  # a tie, down; cut to the earlier microsecond
        ("2026-03-01T08:00:00.1234575Z", "1772352000123456789"),  # a tie, up
        ("2026-12-31T23:59:59.99999951Z", "1"),  # up into the next year
        ("2026-03-01T08:00:00Z", "0"),
    ]
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    body = "".join(
        f"I,{i},{i},{','.join(r + f)}\n" for i, (r, f) in enumerate(zip(rows, fine, strict=True), start=1)
    )
    (dumps / "e.csv").write_text("op,pos,id,ts,s,ns,at,flag,near,cut\n" + body, encoding="utf-8")
    assert _same_on_both(spark, tmp_path / "mappings", dumps, tmp_path / "scratch") == {"t.ticks": (2, 2)}


@pytest.mark.parametrize(
    ("field", "value", "refusal"),
    [
        # Spark has no time-of-day type
        ("{type: time, sub_microsecond: round}", "08:00:00.1234567", "no time-of-day type"),
        # Spark's datetime patterns parse otherwise than the engine's strptime (month names in one
        # case only)
        ("{type: timestamp, layout: '%d-%b-%Y %H:%M'}", "01-MAR-2026 08:00", "layout"),
    ],
)
def test_what_spark_reads_otherwise_is_refused_by_name(
    tmp_path: Path, field: str, value: str, refusal: str
) -> None:
    """A plan Spark would read otherwise is refused with the reason when rendered, not sent to a
    session that answers with its own wording."""
    from cdcnorm.engines.spark import UnsupportedByEngine, render

    _one_mapping(tmp_path, "t.clock", "c", "kind: integer}", f"  at: {field}\n")
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    (dumps / "c.csv").write_text(f"op,pos,id,at\nI,1,1,{value}\n", encoding="utf-8")
    _, ((plan, _),) = _read(tmp_path / "mappings", dumps, tmp_path / "scratch")
    with pytest.raises(UnsupportedByEngine, match=refusal) as caught:
        render(plan.step("typed").expression)
    assert "DuckDB engine" in (caught.value.hint or "")


def test_a_json_field_is_refused_by_name_on_spark(spark: Any, tmp_path: Path) -> None:
    from cdcnorm.engines.spark import SparkEngine, UnsupportedByEngine

    _, plans = _read(ROOT / "mappings", ROOT / "examples" / "dumps", tmp_path)
    (plan,) = [p for p, _ in plans if p.mapping.table == "ferry.sailings"]
    typed = plan.step("typed")
    with pytest.raises(UnsupportedByEngine, match="JSON") as caught:
        SparkEngine(spark).render(typed.expression)
    assert "DuckDB engine" in (caught.value.hint or "")


def test_fields_read_from_renamed_columns_give_the_same_events_on_spark(spark: Any, tmp_path: Path) -> None:
    """A field whose from lists alternatives reads, per file, the first of them the file has (the
    source stage's CASE over file ids): the golden case, on both engines."""
    case = ROOT / "tests" / "cases" / "source" / "renamed-columns"
    (tmp_path / "mappings").mkdir()
    shutil.copy(case / "mapping.yaml", tmp_path / "mappings" / "members.yaml")
    compared = _same_on_both(spark, tmp_path / "mappings", case / "dumps", tmp_path / "scratch")
    assert compared == {"club.members": (3, 2)}


def test_records_holding_both_images_give_the_same_events_on_spark(spark: Any, tmp_path: Path) -> None:
    """change.images: the source stage picks each row's image, the pair stage pairs a record with
    itself (a key change gives two events): the golden case, on both engines."""
    case = ROOT / "tests" / "cases" / "pair" / "both-images"
    (tmp_path / "mappings").mkdir()
    shutil.copy(case / "mapping.yaml", tmp_path / "mappings" / "tools.yaml")
    compared = _same_on_both(spark, tmp_path / "mappings", case / "dumps", tmp_path / "scratch")
    assert compared == {"depot.tools": (10, 2)}
