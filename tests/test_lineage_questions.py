"""Diagnostics, impact of schema edits, exports and the lineage commands on the demo models."""

from __future__ import annotations

import json
import shutil
import xml.etree.ElementTree as ET
from decimal import Decimal
from pathlib import Path
from typing import Any

import duckdb
import networkx as nx
import pytest

from cdcnorm.lineage.export import export
from cdcnorm.lineage.graph import build_project
from cdcnorm.lineage.models import load_models
from cdcnorm.lineage.questions import Edit, _path_counts, impact, trace
from cdcnorm.mapping import load_mappings
from tests.conftest import ROOT, cli
from tests.test_lineage import CASES, project_from

MODELS = ROOT / "examples" / "models"


def _empty(folder: Path) -> str:
    """An empty mappings folder: lineage with no mappings (a folder named that is not there is an
    error)."""
    folder.mkdir(exist_ok=True)
    return str(folder)


MAPPINGS = ROOT / "mappings"
SCHEMA = CASES["schema"]


def test_unresolvable_references_are_reported_not_guessed(tmp_path: Path) -> None:
    project = project_from(
        tmp_path,
        {
            "amb.sql": "SELECT id FROM shop.orders o JOIN shop.customers c ON c.id = o.customer_id",
            "unknown.sql": "SELECT x.amount FROM shop.ordrs x",  # a typo of a declared table
            "missing.sql": "SELECT o.amout FROM shop.orders o",
            "star.sql": "SELECT * FROM nowhere",
            "broken.sql": "SELECT FROM WHERE (",
            "typo.sql": "SELEC broken",
            "fine.sql": "SELECT id FROM shop.orders",
            "ins.sql": "INSERT INTO shop.refunds (order_id, amont) SELECT id, amount FROM shop.orders",
            "unpiv.sql": "UNPIVOT shop.orders ON amount, status INTO NAME k VALUE v",
            "piv.sql": "PIVOT shop.orders ON status USING sum(amount)",
            "selfy.sql": "CREATE VIEW selfy AS SELECT amount FROM selfy",
        },
        SCHEMA,
    )
    got = {(d.model, d.reason): d for d in project.diagnostics}
    # each named as what it is (before, an UNPIVOT was "a PIVOT statement")
    assert got[("unpiv", "unsupported")].reference == "an UNPIVOT statement is not traced"
    assert got[("piv", "unsupported")].reference == "a PIVOT statement is not traced"
    # a view that reads itself (before: "a model in the cycle", with no cycle reported)
    assert got[("selfy", "unknown table")].reference == "selfy (the model reads itself)"
    assert got[("amb", "ambiguous")].candidates == ("o.id", "c.id")
    assert got[("unknown", "unknown table")].candidates == ("shop.orders",)
    missing = got[("missing", "not in schema")]
    assert (
        missing.reference == "shop.orders.amout" and missing.candidates[0] == "amount" and missing.line == 1
    )
    assert ("star", "unknown table") in got or ("star", "star over unknown sources") in got
    assert got[("broken", "parse error")].file == "broken.sql"
    assert got[("typo", "parse error")].reference.startswith("not a SQL statement")
    # an INSERT into a declared table naming a column it lacks
    ins = got[("shop.refunds", "not in schema")]
    assert ins.reference == "shop.refunds.amont" and ins.candidates == ("amount",) and ins.file == "ins.sql"
    assert trace(project, "fine.id")["value"] == ["shop.orders.id"]  # the rest of the project still builds
    assert trace(project, "amb.id")["unresolved"][0]["reason"] == "ambiguous"


def test_a_column_named_without_its_table_says_where_it_was_looked_for(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: "m.sql:1: m: not in schema: amout", naming neither the tables searched nor the
    # closest names (they were in --json only)
    models = tmp_path / "models"
    models.mkdir()
    (models / "m.sql").write_text(
        "WITH c AS (SELECT id AS cid FROM shop.customers)\nSELECT amout FROM shop.orders o JOIN c ON c.cid = o.customer_id"
    )
    (tmp_path / "catalog.yaml").write_text(json.dumps({"tables": SCHEMA}))
    capsys.readouterr()
    args = (
        "--models",
        str(models),
        "--mappings",
        _empty(tmp_path / "none"),
        "--catalog",
        str(tmp_path / "catalog.yaml"),
    )
    assert cli("trace", "m.amout", *args) == 11
    out = capsys.readouterr().out
    assert "m.sql:2: m: not in schema: amout (in none of shop.orders, c; candidates: amount)" in out
    assert cli("trace", "m.amout", *args, "--json") == 11
    (d,) = json.loads(capsys.readouterr().out)["unresolved"]
    assert d["searched"] == ["shop.orders", "c"] and d["candidates"] == ["amount"]


def test_a_file_that_cannot_be_parsed_makes_answers_about_a_table_it_names_incomplete(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # a statement that could not be parsed defines no model: what it reads is unknown, so an impact
    # that passes through a table it names may miss its dependents, and a trace through a table it
    # may define may be wrong. Before, both said "complete" and exited 0.
    models = {
        "totals.sql": "SELECT id, amount * 2 AS doubled FROM shop.orders",
        "half.sql": "CREATE VIEW half AS SELECT id, doubled / 2 AS amount_again FROM totals WHERE",
        "reader.sql": "SELECT amount_again FROM half",
        "other.sql": "SELECT region FROM shop.customers",
        "words.sql": "SELECT 'unterminated FROM shop.orders",  # not even tokenized: it counts everywhere
    }
    project = project_from(tmp_path, models, SCHEMA)
    reasons = {(d.file, d.reason) for d in project.diagnostics if d.unresolved}
    assert reasons == {("half.sql", "parse error"), ("words.sql", "parse error")}
    files = {d["file"] for d in impact(project, "shop.orders.amount", None, mappings=[])["unresolved"]}
    assert {"half.sql", "words.sql"} <= files
    # a file naming no table on the way counts only when its words cannot be told
    other = impact(project, "shop.customers.region", None, mappings=[])
    assert {d["file"] for d in other["unresolved"]} == {"words.sql"} and not other["complete"]
    assert "half.sql" in {d["file"] for d in trace(project, "reader.amount_again")["unresolved"]}
    # through the CLI: exit 11 (incomplete), the file and line of the parse error named
    (tmp_path / "models" / "words.sql").unlink()
    (tmp_path / "schema.yaml").write_text(json.dumps({"tables": SCHEMA}))
    common = ("--models", str(tmp_path / "models"), "--mappings", _empty(tmp_path / "none"))
    catalog = ("--catalog", str(tmp_path / "schema.yaml"))
    capsys.readouterr()
    assert cli("impact", "shop.orders.amount", *common, *catalog) == 11
    out = capsys.readouterr().out
    assert "incomplete: 1 unresolved reference on the way" in out and "half.sql:1: half: parse error" in out
    assert cli("impact", "shop.customers.region", *common, *catalog) == 0
    assert "complete: every reference on the way was resolved" in capsys.readouterr().out
    # fixed, the answer is whole again
    (tmp_path / "models" / "half.sql").write_text(models["half.sql"] + " id > 0")
    assert cli("impact", "shop.orders.amount", *common, *catalog) == 0
    assert "half.amount_again" in capsys.readouterr().out


def test_a_statement_sqlglot_reads_only_as_text_counts_as_not_parsed(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """sqlglot passes `CREATE VIEW v AS PIVOT ...` on as an opaque command: before, a warning went to
    standard error, the view was passed over, and the impact of a column it reads said complete.
    DuckDB (the oracle) creates the view, and it reads shop.orders.amount."""
    pivot = "CREATE VIEW by_status AS PIVOT shop.orders ON status IN ('open', 'paid') USING sum(amount) GROUP BY customer_id"
    con = duckdb.connect()
    con.execute("CREATE SCHEMA shop")
    con.execute("CREATE TABLE shop.orders (id INT, customer_id INT, amount DECIMAL(12,2), status TEXT)")
    con.execute("INSERT INTO shop.orders VALUES (1, 7, 2.50, 'open'), (2, 7, 1.00, 'paid')")
    con.execute(pivot)
    assert con.execute("SELECT open, paid FROM by_status").fetchall() == [(Decimal("2.50"), Decimal("1.00"))]
    models = {
        "piv.sql": "-- the pivot\n" + pivot + ";",
        # a command naming no table on the way, beside a model: answers through shop.customers stay whole
        "setup.sql": "LOAD icu;\nCREATE VIEW regions AS SELECT region FROM shop.customers",
    }
    (tmp_path / "schema.yaml").write_text(json.dumps({"tables": SCHEMA}))
    (tmp_path / "models").mkdir()
    for name, text in models.items():
        (tmp_path / "models" / name).write_text(text)
    common = ("--models", str(tmp_path / "models"), "--mappings", _empty(tmp_path / "none"))
    catalog = ("--catalog", str(tmp_path / "schema.yaml"))
    capsys.readouterr()
    assert cli("impact", "shop.orders.amount", *common, *catalog) == 11
    printed = capsys.readouterr()
    assert "piv.sql:2: piv: parse error: sqlglot reads this statement only as text" in printed.out
    assert "Falling back" not in printed.err  # sqlglot's own warning, replaced by the diagnostic
    assert cli("impact", "shop.customers.region", *common, *catalog) == 0
    assert "regions.region" in capsys.readouterr().out
    # the view's name is no typo: the message points at the file that may define it
    assert cli("trace", "by_status", *common, *catalog) == 7
    assert "piv.sql:2 could not be parsed and may define it" in capsys.readouterr().err


def test_columns_of_tables_without_a_schema_are_inferred_only_when_one_source_can_own_them(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    models = {
        # fx.rates and cal.days are declared nowhere: their columns come from how the models use them
        "local.sql": "SELECT o.id, o.amount * rate AS local_amount FROM shop.orders o "
        "JOIN fx.rates r ON r.currency = o.status",
        "by_day.sql": "WITH d AS (SELECT day, is_holiday FROM cal.days) "
        "SELECT o.id, d.is_holiday FROM shop.orders o JOIN d ON d.day = CAST(o.placed_at AS DATE)",
        "two.sql": "SELECT weight FROM fx.rates JOIN cal.days ON cal.days.day = fx.rates.day",
        "star.sql": "SELECT * FROM ref.zones",
    }
    project = project_from(tmp_path, models, SCHEMA)
    got = {(d.model, d.reason, d.reference) for d in project.diagnostics}
    assert ("local", "inferred", "fx.rates.rate") in got and ("local", "inferred", "fx.rates.currency") in got
    assert ("by_day", "inferred", "cal.days.is_holiday") in got
    # two sources without a schema could own `weight`: never guessed
    amb = [d for d in project.diagnostics if d.model == "two" and d.reason == "ambiguous"]
    assert amb and amb[0].candidates == ("fx.rates.weight", "cal.days.weight")
    assert ("source", "fx.rates", "weight") not in project.graph
    answer = trace(project, "local.local_amount")
    assert answer["value"] == ["fx.rates.rate", "shop.orders.amount"]
    assert answer["influence"] == ["fx.rates.currency", "shop.orders.status"]
    assert answer["inferred"] == ["fx.rates.currency", "fx.rates.rate"]
    assert answer["complete"]  # inferred columns are an assumption the answer names, not a gap
    assert trace(project, "by_day.is_holiday")["value"] == ["cal.days.is_holiday"]
    assert not trace(project, "two.weight")["complete"]
    # an edit of an inferred column is checked against the columns the models were seen to read
    dropped = impact(project, "fx.rates.rate", Edit("drop"), mappings=[], loaded=None)
    assert [(d["model"], d["reason"], d["reference"]) for d in dropped["broken_models"]] == [
        ("local", "not in schema", "rate")
    ]
    # the diagrams draw the tables without a schema as placeholders, also one with no known column
    dot = export(project.graph, tmp_path / "g.dot").read_text()
    assert "fx.rates (no schema: columns inferred from the models)" in dot
    assert "ref.zones (no schema: columns inferred from the models)" in dot and "(no columns known)" in dot
    assert "dashed" in dot
    folder = tmp_path / "models"
    (tmp_path / "shop.json").write_text(json.dumps({"tables": SCHEMA}))
    code = cli(
        "trace", "local.local_amount", "--models", str(folder), "--catalog", str(tmp_path / "shop.json")
    )
    out = capsys.readouterr().out
    assert code == 0 and "fx.rates.rate (inferred: no schema declares it)" in out


@pytest.fixture(scope="module")
def demo() -> tuple[object, list[object], object]:
    mappings = load_mappings(MAPPINGS)
    loaded = load_models(MODELS, "duckdb")
    return build_project(None, mappings, "duckdb", loaded=loaded), mappings, loaded


def test_demo_builds_without_diagnostics(demo: tuple) -> None:  # type: ignore[type-arg]
    project = demo[0]
    assert project.diagnostics == []
    assert len(project.models) >= 6
    # models built on models, upstream first
    assert (
        project.order.index("stg_bookings")
        < project.order.index("daily_revenue")
        < project.order.index("route_rankings")
    )


def test_trace_reaches_the_dump_columns(demo: tuple) -> None:  # type: ignore[type-arg]
    answer = trace(demo[0], "people.display_name")
    assert answer["value"] == ["ferry.bookings.passenger", "ferry.passengers.full_name"]
    assert "ferry.bookings.pax_name" in answer["raw"]  # the mapping renames pax_name to passenger


def test_paths_are_counted_as_networkx_lists_them(demo: tuple) -> None:  # type: ignore[type-arg]
    project = demo[0]
    views = project.view()
    for node in [n for n in project.graph.nodes if n[0] == "model"]:
        by_value, by_any = _path_counts(project, node)
        for n in nx.ancestors(views.every, node):
            assert by_any[n] == len(list(nx.all_simple_paths(views.every, n, node))), (n, node)
            assert by_value.get(n, 0) == len(list(nx.all_simple_paths(views.value, n, node))), (n, node)


def test_impact_of_a_retype_to_float(demo: tuple) -> None:  # type: ignore[type-arg]
    project, mappings, loaded = demo
    r = impact(project, "ferry.bookings.fare", Edit("retype", "float"), mappings=mappings, loaded=loaded)
    assert r["broken_models"] == [] and r["broken_mappings"] == []
    changes = {v["column"]: v for v in r["value_changes"]}
    assert changes["stg_bookings.fare"]["how"].startswith("copied")
    assert "exact decimal becomes a float" in changes["daily_revenue.total_fare"]["change"]
    # a mapping's float is a double: DuckDB, building the model over it, says DOUBLE (before, the
    # binding check read `float` as SQL's, DuckDB's 4-byte FLOAT)
    assert (changes["stg_bookings.fare"]["type_after"], changes["stg_bookings.fare"]["types_from"]) == (
        "DOUBLE",
        "duckdb",
    )


def test_impact_of_a_retype_of_a_model_column(demo: tuple) -> None:  # type: ignore[type-arg]
    """A model column's type is its query's: before, a retype took it for TEXT (`TEXT -> float`),
    called every reader "computed from it" with its type unchanged, and a retype to the same type
    written otherwise (`decimal(12,2)` for `DECIMAL(12, 2)`) was a change."""
    project, mappings, loaded = demo
    r = impact(
        project, "daily_revenue.total_fare", Edit("retype", "DOUBLE"), mappings=mappings, loaded=loaded
    )
    changes = {v["column"]: v for v in r["value_changes"]}
    copied = changes["route_rankings.total_fare"]
    assert copied["how"].startswith("copied") and copied["type_after"] == "DOUBLE"
    assert "TEXT" not in copied["change"] and "an exact decimal becomes a float" in copied["change"]
    same = impact(
        project,
        "daily_revenue.total_fare",
        Edit("retype", copied["type_before"].lower().replace(" ", "")),
        mappings=mappings,
        loaded=loaded,
    )
    assert same["value_changes"] == []


def test_a_dependent_is_a_copy_only_when_every_route_to_it_copies(tmp_path: Path) -> None:
    # `both.amount` copies `shop.orders.amount` in one branch of its UNION and doubles it (through
    # `twice`) in the other: its values are computed from it, whichever route is the shorter
    folder = tmp_path / "models"
    folder.mkdir()
    (folder / "twice.sql").write_text("SELECT amount * 2 AS amount FROM shop.orders\n")
    (folder / "both.sql").write_text("SELECT amount FROM shop.orders UNION ALL SELECT amount FROM twice\n")
    (folder / "plain.sql").write_text("SELECT amount FROM shop.orders\n")
    loaded = load_models(folder, "duckdb")
    project = build_project(None, [], "duckdb", loaded=loaded, tables=SCHEMA)
    r = impact(project, "shop.orders.amount", Edit("retype", "DOUBLE"), mappings=[], loaded=loaded)
    how = {v["column"]: v["how"].split(":")[0] for v in r["value_changes"]}
    assert how == {
        "twice.amount": "computed from it",
        "both.amount": "computed from it",
        "plain.amount": "copied",
    }


def test_an_influence_path_holds_an_influence_edge(tmp_path: Path) -> None:
    # `b.x` copies `a.x` and is filtered by `a.y`, both copies of shop.orders.amount: the shortest
    # path of all was the copy, so the influence answer showed no influence edge and no kind
    project = project_from(
        tmp_path,
        {"a.sql": "SELECT amount AS x, amount AS y FROM shop.orders", "b.sql": "SELECT x FROM a WHERE y > 0"},
        SCHEMA,
    )
    got = trace(project, "b.x")
    assert got["influence"] == ["shop.orders.amount"]
    assert got["influence_kinds"] == {"shop.orders.amount": ["filter"]}
    (path,) = [p for p in got["paths"] if p["lineage"] == "influence"]
    assert [(s["to"], s["edge"]) for s in path["steps"]] == [("a.y", "value"), ("b.x", "influence")]
    assert got["more_paths"] == {"value": [], "influence": []}


def test_trace_shows_as_many_paths_as_asked_shortest_first(tmp_path: Path) -> None:
    # shop.orders.amount reaches `c.z` through `a.x` and `a.y`, and through `d.w` a step longer
    project = project_from(
        tmp_path,
        {
            "a.sql": "SELECT amount AS x, amount AS y FROM shop.orders",
            "d.sql": "SELECT x AS w FROM a",
            "c.sql": "SELECT a.x + a.y + d.w AS z FROM a, d",
        },
        SCHEMA,
    )
    one = trace(project, "c.z")
    assert len([p for p in one["paths"] if p["lineage"] == "value"]) == 1
    assert one["more_paths"]["value"] == ["shop.orders.amount"]
    every = trace(project, "c.z", paths=10)
    routes = sorted(tuple(s["to"] for s in p["steps"]) for p in every["paths"] if p["lineage"] == "value")
    assert routes == [("a.x", "c.z"), ("a.x", "d.w", "c.z"), ("a.y", "c.z")]
    lengths = [len(p["steps"]) for p in every["paths"] if p["lineage"] == "value"]
    assert lengths == sorted(lengths) and every["more_paths"]["value"] == []
    # the paths counted without listing them are networkx's simple paths, listed
    views = project.view()
    node = ("model", "c", "z")
    by_value, by_any = _path_counts(project, node)
    for n in by_any:
        if n != node:
            assert by_value.get(n, 0) == len(list(nx.all_simple_paths(views.value, n, node)))
            assert by_any[n] == len(list(nx.all_simple_paths(views.every, n, node)))
    assert by_value[("source", "shop.orders", "amount")] == 3
    two = trace(project, "c.z", paths=2)
    assert [len(p["steps"]) for p in two["paths"] if p["lineage"] == "value"] == [2, 2]
    assert two["more_paths"]["value"] == ["shop.orders.amount"]


SIZES = (
    "SELECT CASE WHEN amount > 100 THEN 'big' ELSE 'small' END AS size, amount * 2 AS doubled,\n"
    "  CAST(amount AS BIGINT) AS whole, sum(amount) OVER () AS total FROM shop.orders\n"
)


def test_a_retype_reports_each_dependents_type_as_the_engine_gives_it(tmp_path: Path) -> None:
    import duckdb

    folder = tmp_path / "models"
    folder.mkdir()
    (folder / "sizes.sql").write_text(SIZES)
    loaded = load_models(folder, "duckdb")
    project = build_project(None, [], "duckdb", loaded=loaded, tables=SCHEMA)
    r = impact(project, "shop.orders.amount", Edit("retype", "DOUBLE"), mappings=[], loaded=loaded)
    got = {v["column"]: (v["type_before"], v["type_after"], v["types_from"]) for v in r["value_changes"]}

    # the reference: DuckDB itself (a real database), describing the model over the table as
    # declared and as retyped
    def described(amount_type: str) -> dict[str, str]:
        con = duckdb.connect()
        con.execute(f"CREATE SCHEMA shop; CREATE TABLE shop.orders (amount {amount_type})")
        return {str(r[0]): str(r[1]) for r in con.execute(f"DESCRIBE {SIZES}").fetchall()}

    before, after = described(SCHEMA["shop.orders"]["amount"]), described("DOUBLE")
    assert got == {
        f"sizes.{c}": (before[c], after[c], "duckdb") for c in ("size", "doubled", "whole", "total")
    }
    assert before["doubled"] != "DECIMAL(12,2)" and before["total"] == "DECIMAL(38,2)"  # not the input's type
    size = next(v for v in r["value_changes"] if v["column"] == "sizes.size")
    assert size["change"].startswith("its type stays VARCHAR")


def test_a_retype_types_what_the_engine_does_not_build_by_sqlglot_and_declared_columns(
    tmp_path: Path,
) -> None:
    # an INSERT into a table the models create with typed columns is not built by the binding
    # check: the declared type holds (the engine casts what is inserted), the rest is sqlglot's
    folder = tmp_path / "models"
    folder.mkdir()
    (folder / "totals.sql").write_text(
        "CREATE TABLE totals (n BIGINT, total DECIMAL(14,2), twice DECIMAL(12,2));\n"
        "INSERT INTO totals (n, total, twice) SELECT count(*), sum(amount), max(amount) * 2 FROM shop.orders;\n"
    )
    loaded = load_models(folder, "duckdb")
    project = build_project(None, [], "duckdb", loaded=loaded, tables=SCHEMA)
    r = impact(project, "shop.orders.amount", Edit("retype", "DOUBLE"), mappings=[], loaded=loaded)
    got = {v["column"]: (v["type_before"], v["type_after"], v["types_from"]) for v in r["value_changes"]}
    assert got["totals.total"] == ("DECIMAL(14, 2)", "DECIMAL(14, 2)", "sqlglot")
    assert got["totals.twice"] == ("DECIMAL(12, 2)", "DECIMAL(12, 2)", "sqlglot")


def test_an_edit_re_resolves_only_what_it_reaches_and_equals_a_full_rebuild(tmp_path: Path) -> None:
    """Incremental re-resolution (graph.simulate) against the reference, a full rebuild with the
    edit: the same new diagnostics for every edit of a sample of source and model columns."""
    import random

    from cdcnorm.lineage.graph import simulate
    from tests.bench.bench_lineage import generate

    schema = generate(tmp_path, size=60)
    loaded = load_models(tmp_path, "duckdb")
    project = build_project(None, [], "duckdb", loaded=loaded, tables=schema)
    before = {(d.model, d.reason, d.reference) for d in project.diagnostics}
    rng = random.Random(3)
    nodes = sorted(n for n in project.graph.nodes if n[0] in ("source", "model"))
    checked = 0
    for node in rng.sample(nodes, 12):
        for edit in (("drop", ""), ("rename", f"{node[2]}_renamed")):
            edits = {node: edit}
            full = build_project(None, [], "duckdb", loaded=loaded, edits=edits, tables=schema)
            want = sorted({(d.model, d.reason, d.reference) for d in full.diagnostics} - before)
            got = sorted({(d.model, d.reason, d.reference) for d in simulate(project, edits)} - before)
            assert got == want, (node, edit)
            checked += bool(want)
    assert checked > 6  # most edits break something: the comparison is not of empty answers


def test_impact_of_dropping_a_join_key(demo: tuple) -> None:  # type: ignore[type-arg]
    project, mappings, loaded = demo
    r = impact(project, "ferry.bookings.sailing_ref", Edit("drop"), mappings=mappings, loaded=loaded)
    assert [m["field"] for m in r["broken_mappings"]] == ["sailing_ref"]
    assert [(d["model"], d["reference"]) for d in r["broken_models"]] == [
        ("stg_bookings", "ferry.bookings.sailing_ref")
    ]
    assert "daily_revenue.total_fare" in r["influence_dependents"]
    rows = {x["column"]: x["clauses"] for x in r["row_changes"]}
    assert "join" in rows["daily_revenue.total_fare"]


def test_impact_of_renaming_a_model_column(demo: tuple) -> None:  # type: ignore[type-arg]
    project, mappings, loaded = demo
    r = impact(
        project, "daily_revenue.total_fare", Edit("rename", "fare_total"), mappings=mappings, loaded=loaded
    )
    assert {d["model"] for d in r["broken_models"]} == {"route_rankings"}


def test_exports(demo: tuple, tmp_path: Path) -> None:  # type: ignore[type-arg]
    g = demo[0].graph
    dot = export(g, tmp_path / "g.dot").read_text()
    assert "cluster_" in dot and "style=dashed" in dot
    g2 = nx.read_graphml(export(g, tmp_path / "g.graphml"))
    assert g2.number_of_nodes() == g.number_of_nodes() and g2.number_of_edges() == g.number_of_edges()
    data = json.loads(export(g, tmp_path / "g.json").read_text())
    assert len(data["links"]) == g.number_of_edges()
    if shutil.which("dot"):
        svg = export(g, tmp_path / "g.svg").read_text()
        assert ET.fromstring(svg).tag.endswith("svg")
        assert export(g, tmp_path / "g.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature


@pytest.mark.skipif(shutil.which("dot") is None, reason="Graphviz's dot draws SVG (make setup installs it)")
def test_a_diagram_shows_names_holding_markup_or_backslashes_as_written(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Graphviz is the oracle: the SVG it draws holds each name as written. Before, a column named
    <b>x</b> was passed to DOT as an HTML-like label and dot refused the file (a traceback), and a
    backslash in a name was read as DOT's escape (a\\N shows the node's id)."""
    models = tmp_path / "models"
    models.mkdir()
    names = ["<b>x</b>", "</script><img src=x>", "a\\Nb\\l", 'q"uote']
    cols = ", ".join(f'booking_id AS "{n.replace(chr(34), chr(34) * 2)}"' for n in names)
    (models / "odd.sql").write_text(f"SELECT {cols} FROM ferry.bookings\n")
    svg = tmp_path / "odd.svg"
    assert cli("lineage", "--models", str(models), "--mappings", str(MAPPINGS), "--out", str(svg)) == 0
    texts = {t.text for t in ET.fromstring(svg.read_text()).iter() if t.tag.endswith("text")}
    assert set(names) <= texts, texts
    assert "Traceback" not in capsys.readouterr().err


def test_lineage_commands_end_to_end(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    args = ["--models", str(MODELS), "--mappings", str(MAPPINGS)]
    assert cli("trace", *args, "daily_revenue.total_fare", "--json") == 0
    one = json.loads(capsys.readouterr().out)
    assert set(one) == {
        "column",
        "value",
        "influence",
        "influence_kinds",
        "raw",
        "paths",
        "more_paths",
        "unresolved",
        "complete",
        "inferred",
    }
    assert one["complete"] is True
    assert one["more_paths"] == {"value": [], "influence": ["ferry.bookings.refunded"]}
    assert cli("trace", *args, "daily_revenue.total_fare", "--json", "--paths", "50") == 0
    every = json.loads(capsys.readouterr().out)
    assert every["more_paths"] == {"value": [], "influence": []}
    refunded = [p for p in every["paths"] if p["source"] == "ferry.bookings.refunded"]
    assert len(refunded) > 1 and all(any(s["edge"] == "influence" for s in p["steps"]) for p in refunded)
    assert one["value"] == ["ferry.bookings.fare", "ferry.bookings.seats"]
    assert "ferry.bookings.refunded" in one["influence"] and "ferry.bookings.is_refunded" in one["raw"]
    assert cli("trace", *args, "daily_revenue", "--json") == 0
    many = json.loads(capsys.readouterr().out)
    assert [a["column"] for a in many] == [
        f"daily_revenue.{c}" for c in ("route", "booking_day", "total_fare", "seats_sold")
    ]
    assert cli("trace", *args, "daily_revenue.total_fare") == 0
    assert "influence lineage" in capsys.readouterr().out
    assert cli("impact", *args, "ferry.bookings.fare", "--retype", "float", "--json") == 0
    r = json.loads(capsys.readouterr().out)
    assert set(r) == {
        "column",
        "edit",
        "value_dependents",
        "influence_dependents",
        "broken_models",
        "broken_mappings",
        "value_changes",
        "row_changes",
        "unresolved",
        "complete",
        "binding",
        "inferred",
    }
    assert r["complete"] is True and r["unresolved"] == []
    assert r["binding"] == {"checked": True, "broken": [], "unavailable": []}  # float: every model still runs
    assert cli("impact", *args, "ferry.bookings.sailing_ref", "--drop") == 8  # a CI gate: something breaks
    capsys.readouterr()
    assert (
        cli("impact", *args, "ferry.bookings.pax_phone", "--drop", "--json") == 8
    )  # the mapping field breaks
    assert json.loads(capsys.readouterr().out)["broken_models"] == []  # no model reads pax_phone
    out = tmp_path / "around.dot"
    assert (
        cli(
            "lineage",
            *args,
            "--out",
            str(out),
            "--focus",
            "daily_revenue.total_fare",
            "--hops",
            "1",
            "--json",
        )
        == 0
    )
    summary = json.loads(capsys.readouterr().out)
    assert 0 < summary["nodes"] < 20 and out.exists()
    assert cli("trace", *args, "daily_revenu.total_fare") == 7
    assert 'did you mean "daily_revenue.total_fare"' in capsys.readouterr().err


def test_renaming_a_source_column_breaks_only_its_mapping(demo: tuple) -> None:  # type: ignore[type-arg]
    project, mappings, loaded = demo
    r = impact(
        project,
        "dump:ferry.bookings.sailing_ref",
        Edit("rename", "sailing"),
        mappings=mappings,
        loaded=loaded,
    )
    (broken,) = r["broken_mappings"]
    assert broken["fix"] == "set fields.sailing_ref.from: sailing"
    assert r["broken_models"] == []  # the canonical field keeps its name once the mapping follows the rename


def test_a_cycle_is_reported_and_everything_outside_it_still_resolves(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Two models that read each other: one diagnostic per model naming the cycle and its files;
    a mart outside the cycle still traces to its source (complete, exit 0); an impact whose
    dependents pass through the cycle says it may be incomplete (exit 11), never a clean 0."""
    models = tmp_path / "models"
    models.mkdir()
    (models / "stg_fares.sql").write_text("SELECT booking_id, fare FROM ferry.bookings\n")
    (models / "fare_marts.sql").write_text("SELECT booking_id, fare * 2 AS double_fare FROM stg_fares\n")
    (models / "loop_x.sql").write_text(
        "SELECT y.booking_id, b.seats\nFROM loop_y AS y\nJOIN ferry.bookings AS b ON b.booking_id = y.booking_id\n"
    )
    (models / "loop_y.sql").write_text("SELECT booking_id, seats FROM loop_x\n")
    args = ["--models", str(models), "--mappings", str(MAPPINGS), "--json"]
    assert cli("trace", *args, "fare_marts.double_fare") == 0
    answer = json.loads(capsys.readouterr().out)
    assert answer["value"] == ["ferry.bookings.fare"] and answer["complete"] is True
    assert cli("impact", *args, "ferry.bookings.fare") == 0
    assert json.loads(capsys.readouterr().out)["complete"] is True
    assert cli("impact", *args, "ferry.bookings.seats") == 11
    r = json.loads(capsys.readouterr().out)
    assert "loop_x.seats" in r["value_dependents"] and r["complete"] is False
    cycles = [d for d in r["unresolved"] if d["reason"] == "cycle"]
    # networkx finds the cycle from either model: both spellings name the same loop
    ref = cycles[0]["reference"]
    assert "loop_x -> loop_y -> loop_x" in ref or "loop_y -> loop_x -> loop_y" in ref
    assert "loop_x.sql" in cycles[0]["reference"] and "loop_y.sql" in cycles[0]["reference"]
    assert cli("trace", *args[:4], "loop_x.seats") == 11  # the text answer, too
    assert "incomplete" in capsys.readouterr().out


def test_a_model_named_in_another_case_or_in_quotes_is_found_and_an_unknown_one_suggested(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: trace MixedCase (or "MixedCase") said "write a column as <table>.<column>" although
    # trace MixedCase.Fare found the column: DuckDB folds the view's name, as the column lookup did
    args = _models(
        tmp_path, {"m.sql": 'CREATE VIEW "MixedCase" AS SELECT fare AS "Fare" FROM ferry.bookings;\n'}
    )
    capsys.readouterr()
    for written in ("MixedCase", '"MixedCase"', "MIXEDCASE", "mixedcase"):
        assert cli("trace", *args, written, "--json") == 0, written
        (answer,) = json.loads(capsys.readouterr().out)
        assert answer["value"] == ["ferry.bookings.fare"]
    assert cli("trace", *args, "MixedCas") == 7
    assert "no model 'MixedCas' (did you mean \"mixedcase\"?)" in capsys.readouterr().err


SHAPE_CHANGES = {
    # statement after the model's CREATE -> the start of the reason its answers give
    "ALTER TABLE seat_counts RENAME COLUMN seats TO seat_total": "ALTER of seat_counts",
    "ALTER TABLE seat_counts ADD COLUMN spare INTEGER": "ALTER of seat_counts",
    "ALTER TABLE seat_counts RENAME TO seat_board": "ALTER of seat_counts",
    "DROP TABLE seat_counts": "DROP of seat_counts",
    "TRUNCATE seat_counts": "TRUNCATE of seat_counts",
}


@pytest.mark.parametrize("change", list(SHAPE_CHANGES))
def test_a_statement_that_changes_a_models_shape_makes_its_answers_incomplete(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], change: str
) -> None:
    # before: an ALTER, DROP or TRUNCATE was charged to the file's name, so trace seat_counts.seats
    # was "complete" (exit 0) while, after the file ran, no such column (or table) existed
    create = (
        "CREATE TABLE seat_counts AS SELECT sailing_ref, sum(seats) AS seats FROM ferry.bookings GROUP BY 1"
    )
    args = _models(tmp_path, {"fixups.sql": f"{create};\n{change};\n"})
    capsys.readouterr()
    assert cli("trace", *args, "seat_counts.seats", "--json") == 11
    (reason,) = [u["reference"] for u in json.loads(capsys.readouterr().out)["unresolved"]]
    assert reason.startswith(SHAPE_CHANGES[change])
    assert cli("impact", *args, "ferry.bookings.seats", "--json") == 11
    capsys.readouterr()
    # DuckDB as the oracle that the statement does change what the model's lineage describes: its
    # columns, its rows, or whether it exists under that name
    con = _bookings_in_duckdb()
    con.execute("INSERT INTO ferry.bookings (booking_id, sailing_ref, seats) VALUES (1, 501, 2)")
    con.execute(create)

    def shape() -> tuple[object, ...] | None:
        names = "SELECT column_name FROM duckdb_columns() WHERE table_name = 'seat_counts'"
        columns = [r[0] for r in con.execute(names).fetchall()]
        return (columns, con.execute("SELECT count(*) FROM seat_counts").fetchone()) if columns else None

    before = shape()
    con.execute(change)
    assert shape() != before


def test_names_in_other_case_or_the_default_schema_find_the_model_and_updates_and_duplicates_are_reported(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """FROM STG_FARES (DuckDB folds unquoted names to lower case), main.stg_fares and
    memory.main.stg_fares (the default schema and catalog) all read the model stg_fares; an UPDATE
    is an unsupported statement charged to the table it changes; a second file defining a model
    is a diagnostic, not merged."""
    models = tmp_path / "models"
    (models / "extra").mkdir(parents=True)
    (models / "stg_fares.sql").write_text("SELECT booking_id, fare FROM ferry.bookings\n")
    (models / "a_upper.sql").write_text("SELECT booking_id, fare * 2 AS d FROM STG_FARES\n")
    (models / "b_main.sql").write_text("SELECT booking_id, fare FROM main.stg_fares\n")
    (models / "c_db.sql").write_text("SELECT f.fare FROM memory.main.stg_fares AS f\n")
    (models / "z_fix.sql").write_text("-- a fix-up\nUPDATE stg_fares SET fare = 0 WHERE booking_id = 1;\n")
    (models / "extra" / "a_upper.sql").write_text("SELECT 1 AS d\n")
    args = ["--models", str(models), "--mappings", str(MAPPINGS), "--json"]
    for column in ("a_upper.d", "b_main.fare", "c_db.fare"):
        assert cli("trace", *args, column) == 11  # complete but for the UPDATE upstream
        answer = json.loads(capsys.readouterr().out)
        assert answer["value"] == ["ferry.bookings.fare"], column
        (d,) = [u for u in answer["unresolved"] if u["reason"] != "duplicate model"]  # a_upper has one
        assert (d["file"], d["line"], d["model"], d["reason"]) == ("z_fix.sql", 2, "stg_fares", "unsupported")
        assert d["reference"].startswith("UPDATE of stg_fares is not traced")
    # the graph lacks what the UPDATE changes: the export says so in its exit code too
    assert cli("lineage", *args[:4], "--out", str(tmp_path / "g.dot"), "--json") == 11
    diagnostics = json.loads(capsys.readouterr().out)["diagnostics"]
    dup = [d for d in diagnostics if d["reason"] == "duplicate model"]
    assert [(d["file"], d["model"]) for d in dup] == [("extra/a_upper.sql", "a_upper")]
    assert "a_upper.sql:1" in dup[0]["reference"]


CATALOG_MODEL = """SELECT b.booking_id, b.fare * r.rate AS fare_eur, c.is_holiday
FROM ferry.bookings AS b
JOIN ref.rates AS r ON r.currency = 'GBP'
JOIN ref.calendar AS c ON c.day = CAST(b.booked_at AS DATE)
"""


@pytest.mark.parametrize("kind", ["sql", "yaml", "json", "sqlite", "duckdb", "postgresql"])
def test_catalogs_give_the_tables_no_mapping_declares(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], kind: str, request: pytest.FixtureRequest
) -> None:
    import sqlite3

    import duckdb

    models = tmp_path / "models"
    models.mkdir()
    (models / "fares_eur.sql").write_text(CATALOG_MODEL)
    ddl = [
        "CREATE TABLE ref.rates (currency VARCHAR, rate DECIMAL(10,4))",
        "CREATE TABLE ref.calendar (day DATE, is_holiday BOOLEAN)",
    ]
    schema = {
        "tables": {
            "ref.rates": {"currency": "text", "rate": "decimal(10,4)"},
            "ref.calendar": {"day": "date", "is_holiday": "boolean"},
        }
    }
    if kind == "sql":
        spec = tmp_path / "catalog.sql"
        spec.write_text(";\n".join(ddl) + ";\n")
    elif kind == "yaml":
        import yaml

        spec = tmp_path / "catalog.yaml"
        spec.write_text(yaml.safe_dump(schema))
    elif kind == "json":
        spec = tmp_path / "catalog.json"
        spec.write_text(json.dumps(schema))
    elif kind == "sqlite":  # no schemas in SQLite: an attached database's name is the prefix
        spec = tmp_path / "ref.db"
        con = sqlite3.connect(spec)
        con.execute('CREATE TABLE "ref.rates" (currency TEXT, rate NUMERIC)')
        con.execute('CREATE TABLE "ref.calendar" (day DATE, is_holiday BOOLEAN)')
        con.close()
    elif kind == "duckdb":
        spec = tmp_path / "warehouse.duckdb"
        dcon = duckdb.connect(str(spec))
        dcon.execute("CREATE SCHEMA ref")
        for statement in ddl:
            dcon.execute(statement)
        dcon.close()
    else:
        import psycopg

        url = request.getfixturevalue("pg_url")
        with psycopg.connect(url) as pcon:
            pcon.execute("CREATE SCHEMA ref")
            for statement in ddl:
                pcon.execute(statement)
        spec = url  # type: ignore[assignment]
    args = ["--models", str(models), "--mappings", str(MAPPINGS), "--json"]
    # without the catalog, the columns each model names with its table are inferred, and marked so
    assert cli("trace", *args, "fares_eur.fare_eur") == 0
    guessed = json.loads(capsys.readouterr().out)
    assert guessed["value"] == ["ferry.bookings.fare", "ref.rates.rate"]
    assert guessed["inferred"] == ["ref.calendar.day", "ref.rates.currency", "ref.rates.rate"]
    assert cli("trace", *args, "--catalog", str(spec), "fares_eur.fare_eur") == 0
    answer = json.loads(capsys.readouterr().out)
    assert answer["value"] == ["ferry.bookings.fare", "ref.rates.rate"] and answer["complete"]
    assert answer["inferred"] == []
    assert set(answer["influence"]) >= {"ref.rates.currency", "ref.calendar.day"}


def test_a_bad_catalog_file_is_a_usage_error_naming_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = tmp_path / "catalog.yaml"
    bad.write_text("tables:\n  ref.rates: [currency, rate]\n")
    models = tmp_path / "models"
    models.mkdir()
    (models / "m.sql").write_text("SELECT 1 AS x\n")
    assert (
        cli("trace", "--models", str(models), "--mappings", str(MAPPINGS), "--catalog", str(bad), "m.x") == 2
    )
    err = capsys.readouterr().err
    assert "catalog.yaml" in err and "tables.ref.rates" in err and "Traceback" not in err


def test_the_binding_check_finds_what_only_the_engine_sees(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """DuckDB as the oracle: dropping a column named in SELECT * EXCLUDE (...) breaks that model
    and the two built on it; retyping a text column to integer breaks a model that compares it
    with a text literal, when it runs. The graph sees the EXCLUDE list's name go missing (before,
    it saw neither break), not that the models built on it fail to bind, nor the retype's."""
    models = tmp_path / "models"
    models.mkdir()
    (models / "bookings_lean.sql").write_text("SELECT * EXCLUDE (seats) FROM ferry.bookings\n")
    (models / "lean_fares.sql").write_text("SELECT booking_id, fare FROM bookings_lean\n")
    (models / "lean_totals.sql").write_text("SELECT sum(fare) AS total FROM lean_fares\n")
    (models / "named.sql").write_text(
        "SELECT booking_id FROM ferry.bookings WHERE passenger = 'Ines Marrow'\n"
    )
    args = ["--models", str(models), "--mappings", str(MAPPINGS), "--json"]
    assert cli("impact", *args, "ferry.bookings.seats", "--drop") == 8
    r = json.loads(capsys.readouterr().out)
    assert r["value_dependents"] == []  # the graph sees no reader, but the EXCLUDE list's name
    assert [(b["model"], b["reason"], b["reference"]) for b in r["broken_models"]] == [
        ("bookings_lean", "not in schema", "seats")
    ]
    broken = {b["model"]: b["reason"] for b in r["binding"]["broken"]}
    assert set(broken) == {"bookings_lean", "lean_fares", "lean_totals"}
    assert 'Column "seats" in EXCLUDE list not found' in broken["bookings_lean"]
    assert broken["lean_totals"] == "it reads lean_fares, which the engine refuses"
    assert cli("impact", *args, "ferry.bookings.passenger", "--retype", "integer") == 8
    r = json.loads(capsys.readouterr().out)
    assert [b["model"] for b in r["binding"]["broken"]] == ["named"]
    assert "Ines Marrow" in r["binding"]["broken"][0]["reason"]
    assert cli("impact", *args, "ferry.bookings.fare", "--retype", "decimal(14,2)") == 0  # nothing refuses


def test_focus_follows_edge_direction_and_highlights_the_column(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--direction up reaches the dump column four hops up and pulls in no sibling mart;
    --direction down from a field reaches the marts; the focus is drawn highlighted; --level table
    draws one node per table."""
    import networkx as nx

    args = ["--models", str(MODELS), "--mappings", str(MAPPINGS)]
    out = tmp_path / "up.json"
    assert (
        cli(
            "lineage",
            *args,
            "--out",
            str(out),
            "--focus",
            "daily_revenue.total_fare",
            "--hops",
            "4",
            "--direction",
            "up",
        )
        == 0
    )
    ids = {n["id"] for n in json.loads(out.read_text())["nodes"]}
    # dump column -> field -> staging model -> mart: the dump column is three edges up
    assert {"raw:ferry.bookings.fare", "source:ferry.bookings.fare", "model:stg_bookings.fare"} <= ids
    assert not any(
        i.startswith(("model:tier_revenue.", "model:route_rankings.", "model:people.")) for i in ids
    )
    assert "model:daily_revenue.route" not in ids  # a sibling column of the same model is not upstream
    down = tmp_path / "down.json"
    assert (
        cli(
            "lineage",
            *args,
            "--out",
            str(down),
            "--focus",
            "ferry.bookings.fare",
            "--hops",
            "3",
            "--direction",
            "down",
        )
        == 0
    )
    names = {n["name"] for n in json.loads(down.read_text())["nodes"]}
    assert "daily_revenue.total_fare" in names and "ferry.bookings.seats" not in names
    dot = tmp_path / "f.dot"
    assert cli("lineage", *args, "--out", str(dot), "--focus", "daily_revenue.total_fare") == 0
    text = dot.read_text()
    assert text.count('fillcolor="#ffd54f"') == 1 and '"model daily_revenue.total_fare"' in text
    table = tmp_path / "t.graphml"
    assert cli("lineage", *args, "--out", str(table), "--level", "table") == 0
    g = nx.read_graphml(table)
    assert {d["table"] for _, d in g.nodes(data=True)} >= {"ferry.bookings", "stg_bookings", "daily_revenue"}
    assert all(d["column"] == "*" for _, d in g.nodes(data=True))
    capsys.readouterr()


def test_influence_is_grouped_by_kind_and_can_be_limited(capsys: pytest.CaptureFixture[str]) -> None:
    """Each influence source carries its kinds (join, filter, grouping, ...); --influence filter
    shows and follows filters alone; an unknown kind suggests the closest."""
    args = ["--models", str(MODELS), "--mappings", str(MAPPINGS), "--json"]
    assert cli("trace", *args, "daily_revenue.total_fare") == 0
    every = json.loads(capsys.readouterr().out)
    assert every["influence_kinds"] == {
        "ferry.bookings.booked_at": ["grouping"],
        "ferry.bookings.refunded": ["filter"],
        "ferry.bookings.sailing_ref": ["join"],
        "ferry.sailings.route": ["grouping"],
        "ferry.sailings.sailing_id": ["join"],
    }
    assert cli("trace", *args, "daily_revenue.total_fare", "--influence", "filter") == 0
    only = json.loads(capsys.readouterr().out)
    assert only["influence"] == ["ferry.bookings.refunded"] and only["value"] == every["value"]
    assert cli("trace", *args[:4], "daily_revenue.total_fare", "--influence", "fliter") == 7
    assert 'did you mean "filter"' in capsys.readouterr().err
    # none: value lineage alone; an empty list is refused (before: it meant every kind)
    assert cli("trace", *args, "daily_revenue.total_fare", "--influence", "none") == 0
    bare = json.loads(capsys.readouterr().out)
    assert bare["influence"] == [] and bare["value"] == every["value"]
    assert cli("trace", *args, "daily_revenue.total_fare", "--influence", "") == 2
    assert "--influence none" in capsys.readouterr().err


def test_rename_tells_the_dump_column_from_the_canonical_field(capsys: pytest.CaptureFixture[str]) -> None:
    """Renaming the dump column needs a mapping fix and breaks no model; renaming the canonical
    field breaks the models that read it (the graph's simulation and the engine agree)."""
    args = ["--models", str(MODELS), "--mappings", str(MAPPINGS), "--json"]
    assert cli("impact", *args, "ferry.bookings.pax_name", "--rename", "name_of_passenger") == 8
    dump = json.loads(capsys.readouterr().out)
    assert [m["fix"] for m in dump["broken_mappings"]] == ["set fields.passenger.from: name_of_passenger"]
    assert dump["broken_models"] == [] and dump["binding"]["broken"] == []
    assert cli("impact", *args, "ferry.bookings.fare", "--rename", "price") == 8
    field = json.loads(capsys.readouterr().out)
    assert field["broken_mappings"] == []
    assert [m["model"] for m in field["broken_models"]] == ["stg_bookings"]
    assert {m["model"] for m in field["binding"]["broken"]} >= {"stg_bookings", "daily_revenue"}
    # a rename to the column's own name is no edit: it answered "no breaks" and exit 0
    for column in ("ferry.bookings.fare", "stg_bookings.fare", "ferry.bookings.pax_name"):
        assert cli("impact", *args, column, "--rename", column.rsplit(".", 1)[1]) == 2
        assert "is the column's own name: nothing would change" in capsys.readouterr().err


def test_a_project_file_holds_the_settings_and_options_override_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """cdcnorm.toml (or [tool.cdcnorm] in pyproject.toml) gives models, mappings, catalog and
    dialect; no mappings at all is fine for lineage; a misspelt setting is suggested."""
    (tmp_path / "sql").mkdir()
    (tmp_path / "sql" / "fares_eur.sql").write_text(
        "SELECT r.currency, r.rate * 2 AS doubled FROM ref.rates AS r\n"
    )
    (tmp_path / "empty").mkdir()
    (tmp_path / "catalog.yaml").write_text('tables:\n  ref.rates: {currency: text, rate: "decimal(10,4)"}\n')
    (tmp_path / "cdcnorm.toml").write_text(
        'models = "sql"\nmappings = "empty"\ncatalog = ["catalog.yaml"]\ndialect = "duckdb"\n'
    )
    monkeypatch.chdir(tmp_path)
    assert cli("trace", "fares_eur.doubled", "--json") == 0
    assert json.loads(capsys.readouterr().out)["value"] == ["ref.rates.rate"]
    assert cli("trace", "fares_eur.doubled", "--models", str(tmp_path / "nowhere")) == 2  # the option wins
    capsys.readouterr()
    (tmp_path / "cdcnorm.toml").unlink()
    (tmp_path / "pyproject.toml").write_text('[tool.cdcnorm]\nmodel = "sql"\n')
    assert cli("trace", "fares_eur.doubled") == 2
    assert 'did you mean "models"' in capsys.readouterr().err


def test_a_mappings_folder_named_that_is_not_there_is_an_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """A --mappings folder that is not there (a typo, a link to nothing) was passed over: the answer
    came without the mappings' schemas, every source column "inferred", exit 0. It is a mapping
    error (exit 3), as for convert; a mapping file named is read; the default folder may be missing."""
    (tmp_path / "models").mkdir()
    (tmp_path / "models" / "m.sql").write_text("SELECT b.fare * 2 AS doubled FROM ferry.bookings AS b\n")
    monkeypatch.chdir(tmp_path)
    (tmp_path / "gone").symlink_to(tmp_path / "nowhere")
    for missing in ("mapings", "gone"):
        assert cli("trace", "m.doubled", "--mappings", missing) == 3
        assert f"{missing}: mappings folder does not exist" in capsys.readouterr().err
        assert cli("impact", "ferry.bookings.fare", "--mappings", missing) == 3
        capsys.readouterr()
    bookings = ROOT / "mappings" / "bookings.yaml"
    assert cli("trace", "m.doubled", "--json", "--mappings", str(bookings)) == 0
    answer = json.loads(capsys.readouterr().out)
    assert answer["value"] == ["ferry.bookings.fare"] and not answer.get("inferred")
    assert cli("trace", "m.doubled", "--json") == 0  # no mappings/ here: none, as before
    assert json.loads(capsys.readouterr().out)["inferred"] == ["ferry.bookings.fare"]


TRIPLEGS = """
table: Fleet.TripLegs
files: ["legs-*.csv"]
key: [LegId]
change:
  action:   {column: op, codes: {D: delete, I: insert, U: after}}
  position: {column: lsn, kind: integer}
fields:
  LegId: integer
  PickupAt: {type: timestamp, zone: "+00:00"}
  FareAmount: decimal(10,2)
"""


def test_mixed_case_names_from_a_mapping_are_kept_exactly(tmp_path: Path) -> None:
    """DuckDB (case-insensitive, keeps names as declared) and PostgreSQL (case-sensitive) as the
    oracles of what a reference matches and what a view's columns are called."""
    import duckdb

    (tmp_path / "mappings").mkdir()
    (tmp_path / "mappings" / "legs.yaml").write_text(TRIPLEGS)
    mappings = load_mappings(tmp_path / "mappings")
    sql = 'SELECT legid, pickupat, "FAREAMOUNT" * 2 AS DoubledFare FROM fleet.triplegs'
    (tmp_path / "models").mkdir()
    (tmp_path / "models" / "legs_x2.sql").write_text(sql)
    loaded = load_models(tmp_path / "models", "duckdb")
    project = build_project(None, mappings, "duckdb", loaded=loaded)
    assert project.diagnostics == []
    assert project.models["legs_x2"].columns == ["LegId", "PickupAt", "DoubledFare"]
    assert trace(project, "legs_x2.DoubledFare")["value"] == ["Fleet.TripLegs.FareAmount"]
    assert trace(project, "legs_x2.PickupAt")["raw"] == ["Fleet.TripLegs.PickupAt"]
    assert trace(project, "fleet.triplegs.pickupat")["column"] == "Fleet.TripLegs.PickupAt"
    # DuckDB names the view's columns the same way
    con = duckdb.connect()
    con.execute('CREATE SCHEMA "Fleet"')
    con.execute(
        'CREATE TABLE "Fleet"."TripLegs" ("LegId" BIGINT, "PickupAt" TIMESTAMPTZ, "FareAmount" DECIMAL(10,2))'
    )
    con.execute(f"CREATE VIEW legs_x2 AS {sql}")
    assert [r[0] for r in con.execute("DESCRIBE legs_x2").fetchall()] == project.models["legs_x2"].columns
    # PostgreSQL matches a quoted name exactly and folds an unquoted one to lower case
    (tmp_path / "models" / "legs_x2.sql").write_text(
        'SELECT "PickupAt", pickupat AS folded FROM "Fleet"."TripLegs";\n'
    )
    pg = build_project(None, mappings, "postgres", loaded=load_models(tmp_path / "models", "postgres"))
    assert pg.models["legs_x2"].columns == ["PickupAt", "folded"]
    assert trace(pg, "legs_x2.PickupAt")["value"] == ["Fleet.TripLegs.PickupAt"]
    miss = [d for d in pg.diagnostics if d.reason == "not in schema"]
    assert [(d.reference, d.candidates) for d in miss] == [("pickupat", ("PickupAt",))]


def test_lower_case_fields_match_unquoted_references_where_names_fold_to_upper_case(tmp_path: Path) -> None:
    # Snowflake folds unquoted names to upper case (sqlglot's dialect settings)
    project = project_from(tmp_path, {"m.sql": "SELECT Amount, ID FROM shop.orders"}, SCHEMA, "snowflake")
    assert project.diagnostics == []
    assert trace(project, "m.amount")["value"] == ["shop.orders.amount"]


def test_mixed_case_names_from_a_postgresql_catalog_match_as_postgresql_matches(
    tmp_path: Path, pg_url: str
) -> None:
    """PostgreSQL as the oracle: a catalog read from the server keeps "Fleet"."TripLegs"."PickupAt"
    exactly, a model in the PostgreSQL dialect resolves against it, and the columns the server
    gives the model's view are the columns lineage gives the model."""
    import psycopg

    from cdcnorm.lineage.catalogs import load_catalogs

    with psycopg.connect(pg_url, autocommit=True) as con:
        con.execute('CREATE SCHEMA "Fleet"')
        con.execute(
            'CREATE TABLE "Fleet"."TripLegs" ("LegId" BIGINT, "PickupAt" TIMESTAMPTZ, fare NUMERIC(10,2))'
        )
        sql = 'SELECT "LegId", "PickupAt" AS "Pickup", FARE * 2 AS DoubleFare FROM "Fleet"."TripLegs"'
        con.execute(f"CREATE VIEW legs_x2 AS {sql}")
        cur = con.execute(
            "SELECT column_name FROM information_schema.columns WHERE table_name = 'legs_x2' ORDER BY ordinal_position"
        )
        server_columns = [r[0] for r in cur.fetchall()]
    (tmp_path / "models").mkdir()
    (tmp_path / "models" / "legs_x2.sql").write_text(sql + "\n")
    tables = load_catalogs([pg_url], "postgres")  # the server's own view is in it too
    assert set(tables["Fleet.TripLegs"]) == {"LegId", "PickupAt", "fare"} and "legs_x2" in tables
    project = build_project(
        None, [], "postgres", loaded=load_models(tmp_path / "models", "postgres"), tables=tables
    )
    assert project.diagnostics == []
    assert project.models["legs_x2"].columns == server_columns == ["LegId", "Pickup", "doublefare"]
    assert trace(project, "legs_x2.Pickup")["value"] == ["Fleet.TripLegs.PickupAt"]
    assert trace(project, "legs_x2.doublefare")["value"] == ["Fleet.TripLegs.fare"]
    # the model defines legs_x2: the catalog's copy of the view is no second, source table
    assert not [n for n in project.graph.nodes if n[0] == "source" and n[1] == "legs_x2"]


SEAT_REPORT = """CREATE VIEW seat_report AS
SELECT sailing_ref, passenger,
  (SELECT max(fare) FROM ferry.bookings x WHERE x.sailing_ref = b.sailing_ref) AS top
FROM ferry.bookings b JOIN ferry.passengers p USING (passenger_ref)
GROUP BY ALL;
"""

FARE_BOARD = """CREATE TABLE fare_board (ref BIGINT, total DECIMAL(14,2), seats_sum BIGINT);
INSERT INTO fare_board SELECT sailing_ref, sum(fare), sum(seats) FROM ferry.bookings GROUP BY 1;
INSERT INTO fare_board (seats_sum, ref) SELECT sum(seats), sailing_ref FROM ferry.bookings GROUP BY 2;
"""


def _models(tmp_path: Path, files: dict[str, str]) -> tuple[str, ...]:
    """A models folder of these files, and the CLI options that read it with the demo mappings."""
    models = tmp_path / "models"
    models.mkdir()
    for name, sql in files.items():
        (models / name).write_text(sql)
    return ("--models", str(models), "--mappings", str(ROOT / "mappings"))


def test_a_model_whose_query_cannot_be_resolved_makes_every_answer_it_may_be_part_of_incomplete(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # ferry.passengers has no passenger_ref: the USING join cannot be resolved, so nothing of the
    # model is known. Before, `trace seat_report` printed nothing and exited 0 (a CI gate passed),
    # `trace seat_report.top` said there is no such column, and `impact` of a column the model
    # reads called its answer complete.
    names = "CREATE VIEW names AS SELECT passenger FROM ferry.bookings;\n"
    args = _models(tmp_path, {"seat_report.sql": SEAT_REPORT, "names.sql": names})
    capsys.readouterr()
    for target in ("seat_report", "seat_report.top"):
        assert cli("trace", *args, target, "--json") == 11
        answer = json.loads(capsys.readouterr().out)
        answer = answer[0] if isinstance(answer, list) else answer
        assert answer["complete"] is False and answer["value"] == []
        (d,) = answer["unresolved"]
        assert (d["file"], d["model"], d["reason"]) == ("seat_report.sql", "seat_report", "unsupported")
        assert d["reference"] == (
            "JOIN ... USING (passenger_ref): a table on one side of the join has no column passenger_ref"
        )
    # a column of a table the model reads: its dependents may include the model's
    assert cli("impact", *args, "ferry.bookings.passenger", "--json") == 11
    result = json.loads(capsys.readouterr().out)
    assert result["value_dependents"] == ["names.passenger"]
    assert [u["model"] for u in result["unresolved"]] == ["seat_report"]
    # a table the model does not read: the answer stays complete
    assert cli("impact", *args, "ferry.sailings.sailing_id", "--json") == 0
    assert json.loads(capsys.readouterr().out)["complete"] is True
    assert cli("lineage", *args, "--out", str(tmp_path / "g.dot")) == 11


def _bookings_in_duckdb() -> duckdb.DuckDBPyConnection:
    """The oracle for the names a query's columns get: DuckDB itself, over an empty table of the
    demo mapping's fields."""
    con = duckdb.connect()
    con.execute(
        "CREATE SCHEMA ferry; CREATE TABLE ferry.bookings (booking_id BIGINT, sailing_ref BIGINT, "
        "passenger_ref BIGINT, passenger TEXT, pax_phone TEXT, fare DECIMAL(12,2), "
        "booked_at TIMESTAMPTZ, seats BIGINT, refunded BOOLEAN)"
    )
    return con


def _traced_views(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    views: dict[str, str],
    con: duckdb.DuckDBPyConnection,
) -> tuple[dict[str, Any], list[str]]:
    """Each view as a model file, traced through the CLI: every column's answer, by column, and
    the CLI's arguments for the models. The views are also made in ``con``, and the columns
    traced must be DuckDB's, in its order, under its names (DESCRIBE)."""
    args = _models(tmp_path, {f"{n}.sql": f"CREATE VIEW {n} AS\n{sql};\n" for n, sql in views.items()})
    capsys.readouterr()
    answers: dict[str, Any] = {}
    for name, sql in views.items():
        con.execute(f"CREATE VIEW {name} AS {sql}")
        assert cli("trace", *args, name, "--json") == 0
        got = {a["column"]: a for a in json.loads(capsys.readouterr().out)}
        assert list(got) == [f"{name}.{r[0]}" for r in con.execute(f"DESCRIBE {name}").fetchall()]
        answers |= got
    return answers, args


PIVOTS = {
    "by_name": "SELECT * FROM (SELECT sailing_ref, passenger, fare FROM ferry.bookings)\n"
    "PIVOT (sum(fare) FOR passenger IN ('Ann', 'Bo'))",
    "two_sums": "SELECT * FROM (SELECT sailing_ref, passenger, fare, seats FROM ferry.bookings) b\n"
    "PIVOT (sum(fare) AS t, max(seats) AS m FOR passenger IN ('Ann', 'Bo')) p",
    "refunds": "SELECT * FROM (SELECT sailing_ref, refunded, fare FROM ferry.bookings)\n"
    "PIVOT (sum(fare) FOR refunded IN (true AS yes, false AS no))",
    "amounts": "SELECT booking_id, what, amount FROM ferry.bookings\nUNPIVOT (amount FOR what IN (fare, seats))",
}


def test_pivot_and_unpivot_columns_are_traced_under_the_engines_names(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: every PIVOT column was an "unknown table: _1.ann" and the answers incomplete; an
    # UNPIVOT's value column was "not in schema"
    answers, _ = _traced_views(tmp_path, capsys, PIVOTS, _bookings_in_duckdb())
    b = "ferry.bookings."

    def sets(column: str) -> tuple[list[str], dict[str, list[str]]]:
        return answers[column]["value"], answers[column]["influence_kinds"]

    # by hand: a PIVOT groups by the columns passing through; each made column aggregates its
    # value's rows, which the FOR column picks (a filter)
    assert sets("by_name.sailing_ref") == ([b + "sailing_ref"], {b + "sailing_ref": ["grouping"]})
    assert sets("by_name.Ann") == (
        [b + "fare"],
        {b + "passenger": ["filter"], b + "sailing_ref": ["grouping"]},
    )
    assert sets("two_sums.Bo_m") == (
        [b + "seats"],
        {b + "passenger": ["filter"], b + "sailing_ref": ["grouping"]},
    )
    assert sets("two_sums.Ann_t")[0] == [b + "fare"]
    assert sets("refunds.no")[0] == [b + "fare"] and b + "refunded" in sets("refunds.no")[1]
    # an UNPIVOT: the value column takes each listed column's values, the name column none; rows
    # whose value is NULL are left out (DuckDB's default), so the listed columns decide rows
    assert sets("amounts.amount") == (
        [b + "fare", b + "seats"],
        {b + "fare": ["filter"], b + "seats": ["filter"]},
    )
    assert sets("amounts.what")[0] == [] and sets("amounts.booking_id")[0] == [b + "booking_id"]


SELECTORS = {
    "pax": "SELECT booking_id, COLUMNS('^pa') FROM ferry.bookings",
    "lows": "SELECT min(COLUMNS(['seats', 'fare'])), sailing_ref FROM ferry.bookings b GROUP BY sailing_ref",
    "rest": "SELECT COLUMNS(* EXCLUDE (pax_phone, refunded)) FROM ferry.bookings",
}


def test_duckdb_columns_selectors_are_traced_as_the_columns_they_pick(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: COLUMNS('^pa') was one column "_col_0" with no lineage, and the answer was called
    # complete (exit 0): a gate asking what reads pax_phone heard "nothing"
    # DuckDB's DESCRIBE: which columns the selector picks, in its order, under its names
    answers, args = _traced_views(tmp_path, capsys, SELECTORS, _bookings_in_duckdb())
    b = "ferry.bookings."
    # by hand: each picked column copies its source column; an aggregate over one aggregates it
    assert answers["pax.pax_phone"]["value"] == [b + "pax_phone"]
    assert answers["pax.passenger"]["value"] == [b + "passenger"]
    assert answers["lows.fare"]["value"] == [b + "fare"]
    assert answers["lows.fare"]["influence_kinds"] == {b + "sailing_ref": ["grouping"]}
    assert "rest.pax_phone" not in answers and answers["rest.fare"]["value"] == [b + "fare"]
    # impact of pax_phone now finds the column that copies it
    assert cli("impact", *args, b + "pax_phone", "--json") == 0
    assert "pax.pax_phone" in capsys.readouterr().out


RENAMED = {
    "renamed": "SELECT t.ref, t.trip, passenger_ref FROM ferry.bookings AS t(ref, trip)",
    "joined": "SELECT b.ref, p.full_name FROM ferry.bookings AS b(ref, s, pax) "
    "JOIN ferry.passengers AS p ON p.passenger_id = b.pax",
}


def test_a_tables_alias_column_list_renames_its_first_columns(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: FROM ferry.bookings AS t(ref, trip) made every t.ref "not in schema" (incomplete)
    con = _bookings_in_duckdb()
    con.execute("CREATE TABLE ferry.passengers (passenger_id BIGINT, full_name TEXT)")
    answers, _ = _traced_views(tmp_path, capsys, RENAMED, con)
    b = "ferry.bookings."
    # DuckDB renames the table's first columns in its order: ref is booking_id, trip sailing_ref
    con.execute("INSERT INTO ferry.bookings (booking_id, sailing_ref, passenger_ref) VALUES (7, 501, 9)")
    con.execute("INSERT INTO ferry.passengers VALUES (9, 'Ines Marrow')")
    assert con.execute("SELECT * FROM renamed").fetchall() == [(7, 501, 9)]
    assert answers["renamed.ref"]["value"] == [b + "booking_id"]
    assert answers["renamed.trip"]["value"] == [b + "sailing_ref"]
    assert answers["renamed.passenger_ref"]["value"] == [b + "passenger_ref"]
    assert con.execute("SELECT * FROM joined").fetchall() == [(7, "Ines Marrow")]
    assert answers["joined.full_name"]["influence_kinds"] == {
        b + "passenger_ref": ["join"],
        "ferry.passengers.passenger_id": ["join"],
    }


@pytest.mark.parametrize(
    ("sql", "reason"),
    [
        ("SELECT COLUMNS('fare') AS x FROM ferry.bookings", "an alias of COLUMNS"),
        ("SELECT coalesce(*COLUMNS(['fare', 'seats'])) AS c FROM ferry.bookings", "*COLUMNS"),
        ("SELECT booking_id FROM ferry.bookings WHERE COLUMNS('^pa') IS NOT NULL", "outside a select list"),
        (
            "SELECT COLUMNS('id') FROM ferry.bookings JOIN ferry.bookings b2 USING (booking_id)",
            "share a column name",
        ),
        ("SELECT COLUMNS('^x') FROM raw_feed", "not known"),
    ],
)
def test_columns_selectors_that_cannot_be_written_out_make_the_answer_incomplete(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], sql: str, reason: str
) -> None:
    args = _models(tmp_path, {"sel.sql": f"CREATE VIEW sel AS\n{sql};\n"})
    capsys.readouterr()
    assert cli("trace", *args, "sel", "--json") == 11
    (answer,) = json.loads(capsys.readouterr().out)[-1:]
    assert reason in json.dumps(answer["unresolved"])


def test_a_pivot_whose_columns_get_no_name_is_incomplete_and_says_how_to_name_them(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # sqlglot derives no name for PIVOT ... IN (TRUE, FALSE) (DuckDB names them true, false)
    flags = (
        "CREATE VIEW flags AS SELECT * FROM ferry.bookings PIVOT (sum(fare) FOR refunded IN (true, false));\n"
    )
    args = _models(tmp_path, {"flags.sql": flags})
    capsys.readouterr()
    assert cli("trace", *args, "flags", "--json") == 11
    (answer,) = json.loads(capsys.readouterr().out)
    assert "IN (TRUE AS yes, FALSE AS no)" in answer["unresolved"][0]["reference"]


def test_the_binding_check_says_a_model_reads_a_refused_one_only_when_it_does(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: a refused model named "d" was blamed for every later refusal, since the letter d
    # appears in the engine's message ("...not found in FROM clause!")
    args = _models(
        tmp_path,
        {
            "d.sql": "CREATE VIEW d AS SELECT passenger FROM ferry.bookings;\n",
            "e.sql": "CREATE VIEW e AS SELECT upper(passenger) AS p FROM ferry.bookings;\n",
            "f.sql": "CREATE VIEW f AS SELECT passenger FROM d;\n",
        },
    )
    capsys.readouterr()
    assert cli("impact", *args, "ferry.bookings.passenger", "--drop", "--json") == 8
    broken = {b["model"]: b["reason"] for b in json.loads(capsys.readouterr().out)["binding"]["broken"]}
    assert broken["e"].startswith("the engine cannot bind it: ") and "passenger" in broken["e"]
    assert broken["f"] == "it reads d, which the engine refuses"


def test_an_insert_into_a_table_the_models_create_fills_its_columns_in_its_order(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: CREATE TABLE fare_board (ref, total) then INSERT INTO fare_board SELECT sailing_ref,
    # sum(fare) made a model of columns sailing_ref and _col_1; trace fare_board.total found none
    import duckdb

    sql = FARE_BOARD
    args = _models(tmp_path, {"fare_board.sql": sql})
    # the oracle for the columns: DuckDB, the same statements over a table of the mapping's fields
    con = duckdb.connect()
    con.execute(
        "CREATE SCHEMA ferry; CREATE TABLE ferry.bookings (sailing_ref BIGINT, fare DECIMAL(12,2), seats BIGINT)"
    )
    con.execute(sql)
    capsys.readouterr()
    assert cli("trace", *args, "fare_board", "--json") == 0
    answers = {a["column"]: a for a in json.loads(capsys.readouterr().out)}
    assert list(answers) == [f"fare_board.{r[0]}" for r in con.execute("DESCRIBE fare_board").fetchall()]
    b = "ferry.bookings."
    # by hand: total from fare (the first INSERT); seats_sum from seats (both, by position and by name)
    assert answers["fare_board.total"]["value"] == [b + "fare"]
    assert answers["fare_board.seats_sum"]["value"] == [b + "seats"]
    assert answers["fare_board.ref"]["value"] == [b + "sailing_ref"]


def test_names_with_brackets_are_printed_as_written(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The terminal's trees once read names as rich's markup: a column ``[bold]x`` lost its
    ``[bold]``, and ``fare[/]x`` ended in rich's MarkupError (a traceback)."""
    sql = 'CREATE VIEW odd AS SELECT fare AS "fare[/]x", seats AS "[bold]seats" FROM ferry.bookings;\n'
    args = _models(tmp_path, {"odd.sql": sql})
    capsys.readouterr()
    assert cli("trace", *args, "odd") == 0
    printed = capsys.readouterr().out
    assert "odd.fare[/]x" in printed and "odd.[bold]seats" in printed
    assert cli("impact", *args, "ferry.bookings.fare") == 0
    assert "odd.fare[/]x" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("option", "value", "said"),
    [
        (
            "--retype",
            "decimel(10,1)",
            "--retype 'decimel(10,1)' is not a SQL type of the duckdb dialect (did you mean \"decimal\"?)",
        ),
        ("--retype", "flaot", '(did you mean "float"?)'),
        ("--retype", "", "--retype '' is not a SQL type"),
        ("--rename", " ", "--rename needs the column's new name"),
    ],
)
def test_an_edit_that_is_not_one_is_a_usage_error(
    option: str, value: str, said: str, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: a misspelt type ended in the SQL parser's traceback, and an empty one (or an empty new
    # name) was taken as no edit at all, answering a plain impact with exit 0
    args = ("impact", "ferry.bookings.fare", "--models", str(MODELS), "--mappings", str(MAPPINGS))
    assert cli(*args, option, value) == 2
    err = capsys.readouterr().err
    assert said in err and "Traceback" not in err
    assert cli(*args, "--retype", "decimal(10,1)") == 0  # a real type still answers


@pytest.mark.parametrize(
    ("name", "text", "said"),
    [
        (
            "c.yaml",
            "tables:\n  shop.orders: {id: BIGINT}\n  shop.orders: {id: TEXT}\n",
            "c.yaml:3: the key tables.shop.orders is stated twice (lines 2 and 3)",
        ),
        (
            "c.json",
            '{"tables": {"shop.orders": {"id": "BIGINT", "id": "TEXT"}}}',
            "c.json: the key 'id' is stated twice in one object",
        ),
    ],
)
def test_a_catalog_that_states_a_key_twice_is_refused(
    name: str, text: str, said: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: the last one was kept without a word (RFC 7493 section 2.3 asks a JSON parser to refuse it)
    (tmp_path / "models").mkdir()
    (tmp_path / "models" / "m.sql").write_text("SELECT id FROM shop.orders")
    (tmp_path / name).write_text(text)
    args = ("--models", str(tmp_path / "models"), "--mappings", _empty(tmp_path / "none"))
    assert cli("trace", "m.id", *args, "--catalog", str(tmp_path / name)) == 2
    err = capsys.readouterr().err
    assert said in err and "Traceback" not in err


def test_an_edit_that_breaks_exits_8_even_when_the_answer_is_incomplete(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # a CI gate reads the exit code first: a break found is certain, so 8 wins over 11, and the
    # answer still says that more may break
    models = tmp_path / "models"
    models.mkdir()
    (models / "m1.sql").write_text("SELECT fare, not_a_column FROM ferry.bookings")
    (models / "m2.sql").write_text("SELECT fare * 2 AS fare2 FROM m1")
    args = ("--models", str(models), "--mappings", str(MAPPINGS))
    capsys.readouterr()
    assert cli("impact", *args, "ferry.bookings.fare", "--drop", "--json") == 8
    answer = json.loads(capsys.readouterr().out)
    assert answer["complete"] is False and answer["unresolved"][0]["reference"] == "not_a_column"
    assert [b["model"] for b in answer["broken_models"]] == ["m1"]
    assert cli("impact", *args, "ferry.bookings.fare") == 11  # no edit, nothing breaks: incomplete
