"""TPC-H Q3, Q5 and Q10 over the TPC-H schema, with lineage derived by hand.

Schema and query texts: the TPC-H benchmark specification (Transaction
Processing Performance Council), clause 1.4 (tables) and clause 2.4 (queries
3, 5 and 10, with the validation substitution parameters). Value and
influence sets below follow from SQL semantics, column by column; where
sqlglot's own ``lineage()`` can answer (value lineage of a projection), it is
asserted to agree.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlglot.lineage import lineage as sqlglot_lineage

from cdcnorm.lineage.questions import trace
from tests.test_lineage import project_from

# TPC-H specification clause 1.4.1 (column names and types)
SCHEMA = {
    "region": {"r_regionkey": "INT", "r_name": "CHAR(25)", "r_comment": "VARCHAR(152)"},
    "nation": {"n_nationkey": "INT", "n_name": "CHAR(25)", "n_regionkey": "INT", "n_comment": "VARCHAR(152)"},
    "supplier": {
        "s_suppkey": "INT",
        "s_name": "CHAR(25)",
        "s_address": "VARCHAR(40)",
        "s_nationkey": "INT",
        "s_phone": "CHAR(15)",
        "s_acctbal": "DECIMAL(15,2)",
        "s_comment": "VARCHAR(101)",
    },
    "customer": {
        "c_custkey": "INT",
        "c_name": "VARCHAR(25)",
        "c_address": "VARCHAR(40)",
        "c_nationkey": "INT",
        "c_phone": "CHAR(15)",
        "c_acctbal": "DECIMAL(15,2)",
        "c_mktsegment": "CHAR(10)",
        "c_comment": "VARCHAR(117)",
    },
    "orders": {
        "o_orderkey": "INT",
        "o_custkey": "INT",
        "o_orderstatus": "CHAR(1)",
        "o_totalprice": "DECIMAL(15,2)",
        "o_orderdate": "DATE",
        "o_orderpriority": "CHAR(15)",
        "o_clerk": "CHAR(15)",
        "o_shippriority": "INT",
        "o_comment": "VARCHAR(79)",
    },
    "lineitem": {
        "l_orderkey": "INT",
        "l_partkey": "INT",
        "l_suppkey": "INT",
        "l_linenumber": "INT",
        "l_quantity": "DECIMAL(15,2)",
        "l_extendedprice": "DECIMAL(15,2)",
        "l_discount": "DECIMAL(15,2)",
        "l_tax": "DECIMAL(15,2)",
        "l_returnflag": "CHAR(1)",
        "l_linestatus": "CHAR(1)",
        "l_shipdate": "DATE",
        "l_commitdate": "DATE",
        "l_receiptdate": "DATE",
        "l_shipinstruct": "CHAR(25)",
        "l_shipmode": "CHAR(10)",
        "l_comment": "VARCHAR(44)",
    },
}

Q3 = """
select l_orderkey, sum(l_extendedprice * (1 - l_discount)) as revenue, o_orderdate, o_shippriority
from customer, orders, lineitem
where c_mktsegment = 'BUILDING' and c_custkey = o_custkey and l_orderkey = o_orderkey
  and o_orderdate < date '1995-03-15' and l_shipdate > date '1995-03-15'
group by l_orderkey, o_orderdate, o_shippriority
order by revenue desc, o_orderdate
limit 10
"""

Q5 = """
select n_name, sum(l_extendedprice * (1 - l_discount)) as revenue
from customer, orders, lineitem, supplier, nation, region
where c_custkey = o_custkey and l_orderkey = o_orderkey and l_suppkey = s_suppkey
  and c_nationkey = s_nationkey and s_nationkey = n_nationkey and n_regionkey = r_regionkey
  and r_name = 'ASIA' and o_orderdate >= date '1994-01-01'
  and o_orderdate < date '1994-01-01' + interval '1' year
group by n_name
order by revenue desc
"""

Q10 = """
select c_custkey, c_name, sum(l_extendedprice * (1 - l_discount)) as revenue, c_acctbal, n_name,
       c_address, c_phone, c_comment
from customer, orders, lineitem, nation
where c_custkey = o_custkey and l_orderkey = o_orderkey and o_orderdate >= date '1993-10-01'
  and o_orderdate < date '1993-10-01' + interval '3' month and l_returnflag = 'R'
  and c_nationkey = n_nationkey
group by c_custkey, c_name, c_acctbal, c_phone, n_name, c_address, c_comment
order by revenue desc
limit 20
"""

REVENUE = ["lineitem.l_discount", "lineitem.l_extendedprice"]

# Q3: the WHERE joins and filters, the GROUP BY keys, and the ORDER BY keys under LIMIT 10
# (revenue, o_orderdate) decide which rows appear.
Q3_INFLUENCE = sorted(
    [
        "customer.c_mktsegment",
        "customer.c_custkey",
        "orders.o_custkey",
        "lineitem.l_orderkey",
        "orders.o_orderkey",
        "orders.o_orderdate",
        "lineitem.l_shipdate",
        "orders.o_shippriority",
        *REVENUE,
    ]
)
# Q5: no LIMIT, so ORDER BY decides nothing about the rows
Q5_INFLUENCE = sorted(
    [
        "customer.c_custkey",
        "orders.o_custkey",
        "lineitem.l_orderkey",
        "orders.o_orderkey",
        "lineitem.l_suppkey",
        "supplier.s_suppkey",
        "customer.c_nationkey",
        "supplier.s_nationkey",
        "nation.n_nationkey",
        "nation.n_regionkey",
        "region.r_regionkey",
        "region.r_name",
        "orders.o_orderdate",
        "nation.n_name",
    ]
)
Q10_INFLUENCE = sorted(
    [
        "customer.c_custkey",
        "orders.o_custkey",
        "lineitem.l_orderkey",
        "orders.o_orderkey",
        "orders.o_orderdate",
        "lineitem.l_returnflag",
        "customer.c_nationkey",
        "nation.n_nationkey",
        "customer.c_name",
        "customer.c_acctbal",
        "customer.c_phone",
        "nation.n_name",
        "customer.c_address",
        "customer.c_comment",
        *REVENUE,
    ]
)

EXPECTED = {
    "q3": (
        Q3,
        Q3_INFLUENCE,
        {
            "l_orderkey": ["lineitem.l_orderkey"],
            "revenue": REVENUE,
            "o_orderdate": ["orders.o_orderdate"],
            "o_shippriority": ["orders.o_shippriority"],
        },
    ),
    "q5": (Q5, Q5_INFLUENCE, {"n_name": ["nation.n_name"], "revenue": REVENUE}),
    "q10": (
        Q10,
        Q10_INFLUENCE,
        {
            "c_custkey": ["customer.c_custkey"],
            "c_name": ["customer.c_name"],
            "revenue": REVENUE,
            "c_acctbal": ["customer.c_acctbal"],
            "n_name": ["nation.n_name"],
            "c_address": ["customer.c_address"],
            "c_phone": ["customer.c_phone"],
            "c_comment": ["customer.c_comment"],
        },
    ),
}


@pytest.mark.parametrize("query", sorted(EXPECTED))
def test_tpch_query_lineage(query: str, tmp_path: Path) -> None:
    sql, influence, values = EXPECTED[query]
    project = project_from(tmp_path, {f"{query}.sql": sql}, SCHEMA)
    assert project.diagnostics == []
    assert project.models[query].columns == list(values)
    for column, value in values.items():
        got = trace(project, f"{query}.{column}")
        assert got["value"] == sorted(value), column
        assert got["influence"] == influence, column
        # sqlglot's lineage() over the same schema: the leaves of a projection are its value lineage
        node = sqlglot_lineage(column, sql, schema=SCHEMA, dialect="duckdb")
        leaves = sorted({f"{n.source.name}.{n.name.split('.')[-1]}" for n in node.walk() if not n.downstream})
        assert leaves == sorted(value), column
