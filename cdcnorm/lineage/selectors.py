"""Write out DuckDB's ``COLUMNS(...)`` select items as the columns they select.

``SELECT COLUMNS('^pax') FROM t`` (a regular expression), ``COLUMNS(*)``,
``COLUMNS(['a', 'b'])`` and an expression over one of them (``min(COLUMNS(*))``)
stand for one output column per column of the SELECT's sources that they pick.
sqlglot keeps them as one unnamed item, so without this pass such a model had one
column ``_col_0`` with no lineage, called complete.

Which columns an item picks and how the engine names its outputs are DuckDB's
rules (a regular expression matches anywhere in the name; a list picks in the
table's order). They are not restated here: the columns the SELECT's star
stands for (sqlglot's star expansion from the schema) become an empty DuckDB
table, the item is run over it, and the engine's result names the picked columns
and the outputs. Every other use (an alias, ``*COLUMNS``, a lambda the engine
refuses, ``COLUMNS`` outside a select list, sources whose columns are unknown or
repeat a name) is refused with the reason, so the answer is marked incomplete.
"""

from __future__ import annotations

import duckdb
from sqlglot import exp
from sqlglot.errors import OptimizeError, SchemaError
from sqlglot.optimizer.qualify import qualify
from sqlglot.schema import MappingSchema

from cdcnorm.sql import ident

#: aliases that mark where the probe's star stands among the SELECT's items
_FROM, _TO = "__cdcnorm_columns_from", "__cdcnorm_columns_to"


class Refused(Exception):
    """A ``COLUMNS(...)`` use this pass cannot write out; the message says why."""


def expand_columns(query: exp.Expr, schema: MappingSchema, dialect: str) -> exp.Expr:
    """A copy of ``query`` with every ``COLUMNS(...)`` select item written out; raises
    ``Refused`` where one cannot be."""
    query = query.copy()
    for _ in range(100):
        node = query.find(exp.Columns)
        if node is None:
            return query
        _expand_one(query, node, schema, dialect)
    raise Refused("too many COLUMNS(...) items")


def _item_of(node: exp.Expr) -> tuple[exp.Expr, exp.Select] | None:
    """The select item that holds ``node``, and its SELECT (None outside a select list)."""
    item, parent = node, node.parent
    while parent is not None:
        if isinstance(parent, exp.Select) and item.arg_key == "expressions":
            return item, parent
        if isinstance(parent, (exp.Select, exp.Subquery)):
            return None
        item, parent = parent, parent.parent
    return None


def _expand_one(query: exp.Expr, node: exp.Columns, schema: MappingSchema, dialect: str) -> None:
    shown = node.sql(dialect="duckdb")
    if dialect != "duckdb":
        raise Refused(f"{shown}: COLUMNS(...) is DuckDB's; it is read with --dialect duckdb only")
    found = _item_of(node)
    if found is None:
        raise Refused(f"{shown} outside a select list is not written out: list the columns")
    item, sel = found
    if node.args.get("unpack"):
        raise Refused(f"*{shown} is not written out: list the columns")
    if isinstance(item, exp.Alias):
        raise Refused(
            f"{item.sql(dialect='duckdb')}: an alias of COLUMNS(...) is not written out: list the columns"
        )
    if len(list(item.find_all(exp.Columns))) > 1:
        raise Refused(
            f"{item.sql(dialect='duckdb')}: more than one COLUMNS(...) in one item is not written out"
        )
    columns = _star_of(query, sel, item, schema, dialect)
    picked, names = _picked(columns, node, item)
    by_name = {c.alias_or_name: c for c in columns}
    own = _source_names(sel)
    written: list[exp.Expr] = []
    for name, output in zip(picked, names, strict=True):
        column = by_name[name]
        qualifier = (column.this if isinstance(column, exp.Alias) else column).text("table")
        # the qualifier where the query names that source itself (else the name alone, which is
        # one of the SELECT's own columns: the names are distinct)
        table = qualifier if qualifier in own else None
        ref = exp.column(exp.to_identifier(name, quoted=True), table=table)
        ref.meta.update(node.meta)
        new = item.copy()
        inner = new.find(exp.Columns)
        if inner is new or inner is None:
            new = ref
        else:
            inner.replace(ref)
        written.append(exp.alias_(new, exp.to_identifier(output, quoted=True)))
    at = next(i for i, e in enumerate(sel.expressions) if e is item)
    sel.set("expressions", [*sel.expressions[:at], *written, *sel.expressions[at + 1 :]])


def _source_names(sel: exp.Select) -> set[str]:
    """The names the SELECT's own sources go by (aliases, table names)."""
    out = set()
    for holder in [sel.args.get("from_"), *(sel.args.get("joins") or [])]:
        s = holder.this if holder else None
        if isinstance(s, exp.Expr):
            out.add(s.alias_or_name)
    return out


def _star_of(
    query: exp.Expr, sel: exp.Select, item: exp.Expr, schema: MappingSchema, dialect: str
) -> list[exp.Expr]:
    """The columns a ``*`` in place of ``item`` stands for (sqlglot's star expansion)."""
    index = next(i for i, s in enumerate(query.find_all(exp.Select)) if s is sel)
    at = next(i for i, e in enumerate(sel.expressions) if e is item)
    probe = query.copy()
    psel = list(probe.find_all(exp.Select))[index]
    marks = [exp.alias_(exp.Literal.number(1), _FROM), exp.Star(), exp.alias_(exp.Literal.number(1), _TO)]
    psel.set("expressions", [*psel.expressions[:at], *marks, *psel.expressions[at + 1 :]])
    try:
        done = qualify(
            probe, schema=schema, dialect=dialect, validate_qualify_columns=False, quote_identifiers=False
        )
    except (OptimizeError, SchemaError) as e:
        raise Refused(f"{item.sql(dialect='duckdb')}: the columns of its sources are not known ({e})") from e
    for s in done.find_all(exp.Select):
        aliases = [p.alias for p in s.expressions]
        if _FROM in aliases and _TO in aliases:
            columns = s.expressions[aliases.index(_FROM) + 1 : aliases.index(_TO)]
            break
    else:  # pragma: no cover - qualify keeps the marks' aliases
        raise Refused(f"{item.sql(dialect='duckdb')}: the columns of its sources are not known")
    if any(isinstance(c, exp.Star) or isinstance(c.this, exp.Star) for c in columns):
        raise Refused(
            f"{item.sql(dialect='duckdb')}: the columns of its sources are not known (a table no mapping, catalog or model declares)"
        )
    return columns


def _picked(columns: list[exp.Expr], node: exp.Columns, item: exp.Expr) -> tuple[list[str], list[str]]:
    """The names of the columns ``node`` picks, and the names of ``item``'s outputs, as DuckDB
    gives them over a table of ``columns``."""
    names = [c.alias_or_name for c in columns]
    if len({n.lower() for n in names}) < len(names):
        raise Refused(f"{item.sql(dialect='duckdb')}: its sources share a column name; list the columns")
    con = duckdb.connect(":memory:")
    try:
        failure = ""
        for sql_type in ("INTEGER", "VARCHAR"):
            table = f"t_{sql_type.lower()}"
            cols = ", ".join(f"{ident(n)} {sql_type}" for n in names)
            con.execute(f"CREATE TABLE {table} ({cols})")
            try:
                picked = _names(con, f"SELECT {node.sql(dialect='duckdb')} FROM {table}")
                shown = _names(con, f"SELECT {item.sql(dialect='duckdb')} FROM {table}")
            except duckdb.Error as e:
                failure = str(e).splitlines()[0]
                continue
            if len(picked) != len(shown):
                raise Refused(f"{item.sql(dialect='duckdb')}: its outputs do not follow the columns it picks")
            return picked, shown
        raise Refused(f"{item.sql(dialect='duckdb')}: the engine does not run it ({failure})")
    finally:
        con.close()


def _names(con: duckdb.DuckDBPyConnection, sql: str) -> list[str]:
    return [str(d[0]) for d in con.execute(f"{sql} LIMIT 0").description or []]
