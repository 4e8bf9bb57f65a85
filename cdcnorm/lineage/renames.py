"""Write out a table's alias column list: ``FROM ferry.bookings AS t(ref, amount)``.

The engine renames the table's first columns, in the table's order, to the listed
names (the others keep theirs). sqlglot's qualification knows such lists for
derived tables and CTEs, not for a table, so every reference to ``t.ref`` was
"not in schema" and the answer incomplete. Here the table becomes a derived
table that renames them (``(SELECT booking_id AS ref, fare AS amount, ... FROM
ferry.bookings) AS t``), whose lineage the resolver follows as any other. A
table whose columns are not known, or a list longer than its columns, is left as
written (the reference is then reported, as before).
"""

from __future__ import annotations

from sqlglot import exp
from sqlglot.errors import SchemaError
from sqlglot.schema import MappingSchema


def expand_renames(query: exp.Expr, schema: MappingSchema, dialect: str) -> exp.Expr:
    """A copy of ``query`` in which every table with an alias column list is a derived table
    that renames the columns; the query itself where none has one."""
    if not any(_listed(t) for t in query.find_all(exp.Table)):
        return query
    query = query.copy()
    # a CTE of that name shadows the table (left to qualification, which knows CTEs)
    ctes = {c.alias_or_name for c in query.find_all(exp.CTE)}
    for table in [t for t in query.find_all(exp.Table) if _listed(t) and not (t.name in ctes and not t.db)]:
        alias = table.args["alias"]
        try:
            columns = schema.column_names(table, dialect=dialect)
        except SchemaError:
            continue
        names = list(alias.columns)
        if not columns or len(names) > len(columns):
            continue
        bare = table.copy()
        bare.set("alias", None)
        items: list[exp.Expr] = [
            exp.alias_(exp.column(exp.to_identifier(c, quoted=True)), name.copy())
            for c, name in zip(columns, names, strict=False)
        ]
        items += [exp.column(exp.to_identifier(c, quoted=True)) for c in columns[len(names) :]]
        derived = exp.select(*items).from_(bare).subquery(alias.this.copy())
        derived.meta.update(table.meta)
        table.replace(derived)
    return query


def name_unnest_columns(query: exp.Expr, dialect: str) -> exp.Expr:
    """A copy of ``query`` in which ``UNNEST(x) AS t`` (one array, no column list) is written
    ``UNNEST(x) AS t(t)``: the engine names its one column after the alias (DuckDB, PostgreSQL), so
    ``SELECT * FROM items, unnest(tags) t`` has a column t. sqlglot's qualification knew no column
    of t, and the star was "over unknown sources": the answer incomplete. Dialects whose unnest
    alias names the column itself (BigQuery) need nothing."""
    import sqlglot

    if sqlglot.Dialect.get_or_raise(dialect).UNNEST_COLUMN_ONLY:
        return query
    bare = [u for u in query.find_all(exp.Unnest) if _unnamed(u)]
    if not bare:
        return query
    query = query.copy()
    for u in query.find_all(exp.Unnest):
        if _unnamed(u):
            alias = u.args["alias"]
            alias.set("columns", [alias.this.copy()])
    return query


def _unnamed(u: exp.Unnest) -> bool:
    alias = u.args.get("alias")
    return (
        isinstance(alias, exp.TableAlias)
        and bool(alias.name)
        and not alias.columns
        and len(u.expressions) == 1
        and not u.args.get("offset")
        and isinstance(u.parent, (exp.From, exp.Join))
    )


def _listed(table: exp.Table) -> bool:
    alias = table.args.get("alias")
    return isinstance(alias, exp.TableAlias) and bool(alias.columns) and bool(table.name)
