"""Column lineage: golden cases per SQL construct, TPC-H queries, diagnostics, questions, export."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
import yaml

from cdcnorm.lineage.graph import Project, build_project
from cdcnorm.lineage.models import load_models
from cdcnorm.lineage.questions import trace

CASES = yaml.safe_load((Path(__file__).parent / "cases" / "lineage" / "constructs.yaml").read_text())


def project_from(
    tmp_path: Path, models: dict[str, str], schema: dict[str, dict[str, str]], dialect: str = "duckdb"
) -> Project:
    folder = tmp_path / "models"
    folder.mkdir(exist_ok=True)
    for name, sql in models.items():
        (folder / name).write_text(sql)
    return build_project(None, [], dialect, loaded=load_models(folder, dialect), tables=schema)


@pytest.mark.parametrize("case", CASES["cases"], ids=[c["name"] for c in CASES["cases"]])
def test_construct(case: dict[str, Any], tmp_path: Path) -> None:
    project = project_from(tmp_path, case["models"], CASES["schema"])
    assert [d.render() for d in project.diagnostics] == []
    for column, want in case["expect"].items():
        got = trace(project, column)
        assert got["value"] == sorted(want["value"]), (column, "value")
        assert got["influence"] == sorted(want["influence"]), (column, "influence")


def test_a_column_copied_on_one_line_and_filtered_on_another_shows_each_edge_at_its_line(
    tmp_path: Path,
) -> None:
    """The copy of a.id is on line 1 and its use in the WHERE on line 3: the value edge and the
    influence edge each point at their own line (the influence edge once pointed at line 1)."""
    project = project_from(
        tmp_path,
        {
            "a.sql": "SELECT id, amount FROM shop.orders",
            "b.sql": "SELECT a.id\nFROM a\nWHERE a.id > 10 AND a.amount > 0",
        },
        CASES["schema"],
    )
    edges = {
        (u[2], data["kind"]): data["line"]
        for u, v, data in project.graph.in_edges(("model", "b", "id"), data=True)
    }
    assert edges == {("id", "value"): 1, ("id", "influence"): 3, ("amount", "influence"): 3}


STAR_LISTS = [
    "SELECT * EXCLUDE (status) FROM shop.orders",
    "SELECT * EXCLUDE (staus) FROM shop.orders",
    "SELECT * EXCLUDE (STATUS) FROM shop.orders",
    'SELECT * EXCLUDE ("Status") FROM shop.orders',
    "SELECT o.* EXCLUDE (name) FROM shop.orders o JOIN shop.customers c ON c.id = o.customer_id",
    "SELECT * EXCLUDE (name) FROM shop.orders o JOIN shop.customers c ON c.id = o.customer_id",
    "SELECT * REPLACE (amount * 2 AS amount) FROM shop.orders",
    "SELECT o.* REPLACE (o.amount * 2 AS amout) FROM shop.orders o",
    "SELECT * RENAME (amount AS total) FROM shop.orders",
    "SELECT * RENAME (total AS amount) FROM shop.orders",
    "WITH x AS (SELECT id, amount FROM shop.orders) SELECT * EXCLUDE (status) FROM x",
    "SELECT * FROM (SELECT * EXCLUDE (id, sku) FROM shop.items) t",
    "SELECT count(*) AS n FROM shop.orders",
]
#: a misspelt name in each clause, and the same clauses spelt right (the engine binds those)
MISSPELT = [
    "SELECT id FROM shop.orders WHERE statsu = 'x'",
    "SELECT status, count(*) AS n FROM shop.orders GROUP BY statsu",
    "SELECT id FROM shop.orders ORDER BY placd_at",
    "SELECT id FROM shop.orders ORDER BY placd_at LIMIT 3",
    "SELECT sum(amount) OVER (PARTITION BY custmer_id) AS s FROM shop.orders",
    "SELECT id FROM shop.orders QUALIFY row_number() OVER (ORDER BY placd) = 1",
    "SELECT id FROM shop.orders HAVING count(amunt) > 1",
    "SELECT id FROM shop.orders o WHERE EXISTS (SELECT 1 FROM shop.refunds r WHERE r.order_id = o.idd)",
    "SELECT DISTINCT ON (custmer_id) id FROM shop.orders",
    "SELECT string_agg(status, ',' ORDER BY placd) AS t FROM shop.orders",
    "SELECT sum(amount) FILTER (WHERE stat = 'x') AS t FROM shop.orders",
    "SELECT * FROM shop.orders UNPIVOT (v FOR k IN (amont, status))",
    "SELECT order_id, unnest(tagz) AS t FROM shop.items",
    "SELECT amount * 2 AS dbl FROM shop.orders ORDER BY dbl",
    "SELECT amount * 2 AS dbl FROM shop.orders ORDER BY 1",
    "SELECT amount AS a FROM shop.orders o ORDER BY o.placed_at DESC NULLS LAST",
    "SELECT status FROM shop.orders GROUP BY status ORDER BY count(*)",
    "SELECT id FROM shop.orders UNION ALL SELECT order_id FROM shop.refunds ORDER BY id",
    # a LATERAL query: sqlglot qualifies a name no source in reach has with the LATERAL's own alias
    "SELECT o.id, x.amont FROM shop.orders o, LATERAL (SELECT amont FROM shop.refunds r WHERE r.order_id = o.id) x",
    "SELECT o.id, x.n FROM shop.orders o CROSS JOIN LATERAL (SELECT count(amont) AS n FROM shop.refunds) x",
    "SELECT o.id, x.amount FROM shop.orders o, LATERAL (SELECT amount FROM shop.refunds r WHERE r.order_id = o.id) x",
    "SELECT o.id, x.s FROM shop.orders o, LATERAL (SELECT status AS s FROM shop.refunds r WHERE r.order_id = id) x",
    # a LIMIT that is a query
    "SELECT id FROM shop.orders ORDER BY id LIMIT (SELECT count(ordr_id) FROM shop.refunds)",
    "SELECT id FROM shop.orders ORDER BY id LIMIT (SELECT count(order_id) FROM shop.refunds)",
    # a query read for its rows alone: the engine binds its columns all the same, but not those of
    # a CTE no query reads
    "SELECT count(*) AS n FROM (SELECT idd FROM shop.orders)",
    "WITH a AS (SELECT id FROM shop.orders), b AS (SELECT idd FROM a) SELECT 1 AS one FROM b",
    "WITH u AS (SELECT typo FROM shop.orders) SELECT id FROM shop.orders",
]


def _cases_schema_in_duckdb() -> Any:
    """A DuckDB database holding the golden cases' schema (empty tables), the oracle's."""
    import duckdb

    con = duckdb.connect()
    for name, cols in CASES["schema"].items():
        schema, table = name.split(".")
        con.execute(f"CREATE SCHEMA IF NOT EXISTS {schema}")
        con.execute(f"CREATE TABLE {schema}.{table} ({', '.join(f'{c} {t}' for c, t in cols.items())})")
    return con


def _refused_by_duckdb(queries: list[str]) -> set[str]:
    """The oracle: the models m0, m1, ... (one per query) DuckDB refuses to create over the cases'
    schema, for a name it cannot bind."""
    import duckdb

    con = _cases_schema_in_duckdb()
    refused = set()
    for i, sql in enumerate(queries):
        try:
            con.execute(f"CREATE VIEW m{i} AS {sql}")
        except duckdb.BinderException:
            refused.add(f"m{i}")
    return refused


def test_a_star_list_naming_a_column_its_sources_lack_is_reported_where_the_engine_refuses_it(
    tmp_path: Path,
) -> None:
    """DuckDB as the oracle: a model whose EXCLUDE or REPLACE list names a column the star does not
    cover cannot be created, and lineage reports exactly those models as not in schema
    (before, qualification dropped the name and every answer was complete)."""
    refused = _refused_by_duckdb(STAR_LISTS)
    # the oracle's answer, not ours: a RENAME of a column the star lacks is passed over (m9)
    assert refused == {"m1", "m4", "m7", "m10", "m11"}
    project = project_from(tmp_path, {f"m{i}.sql": sql for i, sql in enumerate(STAR_LISTS)}, CASES["schema"])
    reported = {d.model for d in project.diagnostics if d.reason == "not in schema"}
    assert reported == refused
    assert [d.render() for d in project.diagnostics if d.model == "m1"] == [
        "m1.sql:1: m1: not in schema: staus (in none of orders; candidates: status)"
    ]


def test_a_misspelt_name_in_any_clause_is_reported_where_the_engine_refuses_it(tmp_path: Path) -> None:
    """DuckDB as the oracle: each model it refuses to create for a name its tables lack is
    reported as not in schema, and each it creates is complete; an ORDER BY without LIMIT decides
    no rows, but a misspelt name in it was passed over (the model was traced as complete)."""
    refused = _refused_by_duckdb(MISSPELT)
    assert len(refused) == 18  # the oracle refuses every misspelt one
    project = project_from(tmp_path, {f"m{i}.sql": sql for i, sql in enumerate(MISSPELT)}, CASES["schema"])
    assert {d.model for d in project.diagnostics if d.reason == "not in schema"} == refused
    assert {d.model for d in project.diagnostics} == refused


#: what only the engine's binding sees: struct members, a function's arguments (each refused one
#: next to the same query written right)
ENGINE_ONLY = [
    "SELECT s.b AS b FROM (SELECT {'a': id} AS s FROM shop.orders) t",
    "SELECT s.a AS a FROM (SELECT {'a': id} AS s FROM shop.orders) t",
    "SELECT t.s.amout AS x FROM (SELECT {'amount': amount, 'id': id} AS s FROM shop.orders) t",
    "SELECT t.s.amount AS x FROM (SELECT {'amount': amount, 'id': id} AS s FROM shop.orders) t",
    "SELECT struct_extract(s, 'idd') AS x FROM (SELECT {'id': id} AS s FROM shop.orders) t",
    "SELECT struct_extract(s, 'id') AS x FROM (SELECT {'id': id} AS s FROM shop.orders) t",
    "SELECT round(amount, 'x', 3) AS r FROM shop.orders",
    "SELECT round(amount, 1) AS r FROM shop.orders",
]


def test_what_only_the_engine_refuses_makes_the_answer_incomplete(tmp_path: Path) -> None:
    """DuckDB as the oracle: a model it refuses to bind for what the graph does not follow (a
    struct's members, a function's arguments) is reported, and a trace through it is incomplete.
    Before, a misspelt struct member was traced as complete."""
    refused = _refused_by_duckdb(ENGINE_ONLY)
    assert refused == {"m0", "m2", "m4", "m6"}  # the oracle refuses every misspelt one
    project = project_from(tmp_path, {f"m{i}.sql": sql for i, sql in enumerate(ENGINE_ONLY)}, CASES["schema"])
    assert {d.model for d in project.diagnostics} == refused
    assert {d.reason for d in project.diagnostics} == {"refused by the engine"}
    (m2,) = [d for d in project.diagnostics if d.model == "m2"]
    assert 'Could not find key "amout" in struct' in m2.reference
    assert not trace(project, "m2.x")["complete"]
    assert trace(project, "m3.x")["complete"]


#: columns without an alias that are no plain column: the engine names them by their text as it
#: prints the expression, which no rule of thumb gives (CAST(... AS INTEGER) for ::INT, count() OVER () for count(*) OVER ())
UNALIASED = (
    "SELECT o.id, CAST(o.amount AS INT), o.amount::TEXT, o.amount + 1, upper(o.status), "
    "count(*) OVER (), sum(o.amount) OVER (PARTITION BY o.customer_id), o.status IS NULL, "
    "coalesce(o.customer_id, 0), -o.id FROM shop.orders o"
)


def test_columns_without_an_alias_are_named_as_the_engine_names_them(tmp_path: Path) -> None:
    """DuckDB as the oracle: the columns of a view over expressions without an alias get the
    engine's names, and a model reading one by that name resolves; before, they had sqlglot's
    (amount for amount::TEXT, _col_3 for amount + 1), so a model reading the engine's name was
    reported not in schema, and one reading amount was traced though the engine refuses it."""
    con = _cases_schema_in_duckdb()
    con.execute(f"CREATE VIEW wide AS {UNALIASED}")
    described = [r[0] for r in con.execute("DESCRIBE wide").fetchall()]
    assert described[1:4] == ["CAST(o.amount AS INTEGER)", "CAST(o.amount AS TEXT)", "(o.amount + 1)"]
    reader = 'SELECT w."CAST(o.amount AS INTEGER)" AS whole, w."count() OVER ()" AS n FROM wide w'
    wrong = "SELECT w.amount AS a FROM wide w"
    con.execute(f"CREATE VIEW reader AS {reader}")
    with pytest.raises(Exception, match="amount"):
        con.execute(f"CREATE VIEW wrong AS {wrong}")
    project = project_from(
        tmp_path, {"wide.sql": f"CREATE VIEW wide AS {UNALIASED}", "reader.sql": reader, "wrong.sql": wrong},
        CASES["schema"],
    )  # fmt: skip
    assert project.models["wide"].columns == described
    assert [d.model for d in project.diagnostics] == ["wrong"]
    whole = trace(project, "reader.whole")
    assert whole["complete"] and whole["value"] == ["shop.orders.amount"]


#: expressions sqlglot writes otherwise than the file does, where the engine's name (or its
#: answer) follows the text: len -> length, ** -> power, string_agg -> listagg, and an arrow
#: lambda, which DuckDB 2 refuses and sqlglot rewrites into the lambda keyword
AS_WRITTEN = (
    "SELECT o.id, len(o.status), o.amount ** 2, string_agg(o.status, ',') OVER (), "
    "date_trunc('month', DATE '2026-03-01') FROM shop.orders o"
)
ARROW = "SELECT list_transform([o.id], x -> x + 1) AS ids FROM shop.orders o"


@pytest.mark.parametrize("size", ["here", "process"])
def test_a_duckdb_model_is_bound_as_its_file_writes_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, size: str
) -> None:
    """DuckDB as the oracle, given the files' own text: the engine names a model's unaliased
    columns from the text as written, and refuses what it refuses in it. Before, it was given
    sqlglot's writing of the parsed query: len(o.status) was named length(o.status), so a reader of
    the engine's name was "not in schema", and an arrow lambda, which DuckDB 2 refuses, was traced
    as complete. The same in the build's process and in a process of its own."""
    import duckdb

    from cdcnorm.lineage import binding

    con = _cases_schema_in_duckdb()
    con.execute(f"CREATE VIEW written AS {AS_WRITTEN}")
    described = [r[0] for r in con.execute("DESCRIBE written").fetchall()]
    assert described[1:3] == ["len(o.status)", "(o.amount ** 2)"]
    with pytest.raises(duckdb.BinderException, match="lambda"):
        con.execute(f"CREATE VIEW arrow AS {ARROW}")
    reader = 'SELECT w."len(o.status)" AS n FROM written w'
    if size == "process":
        monkeypatch.setattr(binding, "PROCESS_MODELS", 0)
    project = project_from(
        tmp_path,
        {"written.sql": f"CREATE VIEW written AS {AS_WRITTEN};", "arrow.sql": ARROW, "reader.sql": reader},
        CASES["schema"],
    )
    assert project.models["written"].columns == described
    assert [(d.model, d.reason) for d in project.diagnostics] == [("arrow", "refused by the engine")]
    assert trace(project, "reader.n")["complete"] and not trace(project, "arrow.ids")["complete"]


@pytest.mark.parametrize("case", CASES["cases"], ids=[c["name"] for c in CASES["cases"]])
def test_model_columns_are_named_as_duckdb_names_the_views_columns(
    case: dict[str, Any], tmp_path: Path
) -> None:
    """DuckDB as the oracle: each golden case's models, created in a real database over the case's
    schema, get the very column names lineage gives them (duplicates, stars, aliases, case)."""

    project = project_from(tmp_path, case["models"], CASES["schema"])
    loaded = load_models(tmp_path / "models", "duckdb")
    con = _cases_schema_in_duckdb()
    checked = 0
    for model in project.order:
        sts = [s for s in loaded.statements if s.name == model]
        if not sts or any(s.kind not in ("create", "select") for s in sts):
            continue  # INSERT and MERGE change a table: nothing to describe
        st = sts[0]
        sql = st.text or st.statement.sql("duckdb")  # the file's own text, as the engine would run it
        con.execute(sql if st.kind == "create" else f'CREATE VIEW "{model}" AS {sql}')
        described = [r[0] for r in con.execute(f'DESCRIBE "{model}"').fetchall()]
        assert described == project.models[model].columns, model
        checked += 1
    assert checked or any(s.kind in ("insert", "merge") for s in loaded.statements)


def test_where_case_matters_a_name_that_differs_only_in_case_is_the_candidate(tmp_path: Path) -> None:
    """PostgreSQL keeps quoted names exactly (the SQL standard folds only unquoted ones): "ID" is
    not id, and shop."ORDERS" is not shop.orders. Before, "ID" offered no candidate (difflib
    compares case) and shop."ORDERS" was taken for a table without a schema, its column inferred,
    the answer complete."""
    project = project_from(
        tmp_path,
        {"a.sql": 'SELECT o."ID" FROM shop.orders o', "b.sql": 'SELECT id FROM shop."ORDERS"'},
        CASES["schema"],
        dialect="postgres",
    )
    assert [d.render() for d in project.diagnostics] == [
        "a.sql:1: a: not in schema: shop.orders.ID (candidates: id)",
        "b.sql:1: b: unknown table: shop.ORDERS (candidates: shop.orders)",
        "b.sql:1: b: inferred: shop.ORDERS.id",
    ]


def test_a_table_function_in_from_names_the_source_its_columns_are_inferred_in(tmp_path: Path) -> None:
    """FROM read_parquet('trips.parquet') has no name parts: its columns were inferred into a table
    named "" (source column ".a"). The call now names the source."""
    project = project_from(
        tmp_path,
        {"raw_trips.sql": "SELECT a, b FROM read_parquet('trips.parquet') WHERE c > 0"},
        CASES["schema"],
    )
    got = trace(project, "raw_trips.a")
    assert got["value"] == ["read_parquet('trips.parquet').a"]
    assert got["influence"] == ["read_parquet('trips.parquet').c"]
    assert got["inferred"] == ["read_parquet('trips.parquet').a", "read_parquet('trips.parquet').c"]


def test_a_natural_join_that_shares_no_column_is_reported_as_the_engine_refuses_it(tmp_path: Path) -> None:
    """DuckDB (the oracle) refuses a NATURAL JOIN of tables that share no column; lineage traced
    such a model as complete. Tables whose columns are unknown are no reason to report it."""
    import duckdb

    queries = {
        "none.sql": "SELECT * FROM shop.orders NATURAL JOIN (SELECT order_id AS idd FROM shop.refunds) r",
        "some.sql": "SELECT * FROM shop.orders NATURAL JOIN (SELECT order_id AS id FROM shop.refunds) r",
        "unknown.sql": "SELECT * FROM shop.orders NATURAL JOIN elsewhere.things",
    }
    con = _cases_schema_in_duckdb()
    with pytest.raises(duckdb.BinderException, match="No columns found to join on"):
        con.execute(f"CREATE VIEW v AS {queries['none.sql']}")
    con.execute(f"CREATE VIEW w AS {queries['some.sql']}")
    project = project_from(tmp_path, queries, CASES["schema"])
    assert [(d.model, d.reason) for d in project.diagnostics if d.model != "unknown"] == [
        ("none", "unsupported")
    ]
    assert not any(d.reason == "unsupported" for d in project.diagnostics if d.model == "unknown")


def test_the_engine_check_in_a_process_of_its_own_gives_the_same_answers(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A large project's binder runs in a process beside the resolver: the same refusals, the same
    names, as when it runs in the build's own process (forced here for a small project)."""
    from cdcnorm.lineage import binding

    models = {f"m{i}.sql": sql for i, sql in enumerate(ENGINE_ONLY)}
    models["wide.sql"] = f"CREATE VIEW wide AS {UNALIASED}"
    models["reader.sql"] = 'SELECT w."CAST(o.amount AS INTEGER)" AS whole FROM wide w'

    def answers(folder: str) -> tuple[list[str], list[str], bool]:
        project = project_from(tmp_path / folder, models, CASES["schema"])
        return (
            sorted(d.render() for d in project.diagnostics),
            project.models["wide"].columns,
            trace(project, "reader.whole")["complete"],
        )

    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    here = answers("a")
    monkeypatch.setattr(binding, "PROCESS_MODELS", 0)
    assert answers("b") == here
    assert len(here[0]) == 4 and here[1][1] == "CAST(o.amount AS INTEGER)" and here[2]


def test_the_query_of_a_statement_is_read_from_its_own_text() -> None:
    """What the binder gives DuckDB of a statement's text: all of a query; the part after a
    CREATE's own AS (not one inside a column list, a CTE or a quoted name); nothing for a statement
    that is no model's, or, parsed again, for the text of another model than the one named."""
    from cdcnorm.lineage.binding import _query_text
    from cdcnorm.lineage.models import statement_query

    text = 'CREATE OR REPLACE VIEW mart."as" (a, b) AS WITH x AS (SELECT 1 AS a, 2 AS b) SELECT * FROM x;'
    assert _query_text(text, "duckdb") == "WITH x AS (SELECT 1 AS a, 2 AS b) SELECT * FROM x"
    assert _query_text("SELECT 1 AS a -- why\n, 2 AS b ;", "duckdb") == "SELECT 1 AS a -- why\n, 2 AS b"
    assert _query_text("FROM t SELECT a", "duckdb") == "FROM t SELECT a"
    assert _query_text("SELECT 1", "postgres") is None  # another dialect: sqlglot writes DuckDB's
    assert _query_text("INSERT INTO t SELECT 1", "duckdb") is None
    got = statement_query(text, "duckdb", ("mart", "as"))
    assert got is not None and got.sql("duckdb") == "WITH x AS (SELECT 1 AS a, 2 AS b) SELECT * FROM x"
    assert statement_query(text, "duckdb", ("mart", "other")) is None
    assert statement_query("SELECT 1 AS a; SELECT 2 AS b", "duckdb", ("m",)) is None
