"""The SQL type of every model column, from sqlglot's type annotation (never from names).

Models are typed upstream first: the source tables carry the mappings' and catalogs' types (with a
simulated retype applied), each model's output types join the schema that types the next. A CASE of
string literals stays text whatever its conditions read; ``x * 2`` follows ``x``. A table a model
file creates with typed columns (``CREATE TABLE t (a DECIMAL(14,2))``) and fills by INSERT keeps
the declared types: the engine casts what is inserted.
"""

from __future__ import annotations

from typing import Any

import networkx as nx
from sqlglot import exp
from sqlglot.errors import OptimizeError, SchemaError
from sqlglot.optimizer.annotate_types import annotate_types
from sqlglot.optimizer.qualify import qualify

from cdcnorm.lineage.graph import Project, mapping_catalog
from cdcnorm.lineage.resolve import Node, declared_table

UNKNOWN = "UNKNOWN"


def _root_types(query: exp.Expr, catalog: Any, dialect: str) -> list[str] | None:
    schema = catalog.schema(dialect, query)
    try:
        qualified = qualify(query.copy(), schema=schema, dialect=dialect, validate_qualify_columns=False)
        typed = annotate_types(qualified, schema=schema, dialect=dialect)
    except (OptimizeError, SchemaError, ValueError, KeyError):  # what the resolver reported already
        return None
    if not isinstance(typed, exp.Query):
        return None
    out = []
    for proj in typed.selects:
        t = proj.type
        out.append(
            t.sql(dialect=dialect) if isinstance(t, exp.DataType) and not t.is_type("unknown") else UNKNOWN
        )
    return out


def type_models(
    project: Project,
    edits: dict[Node, Any] | None = None,
    only: set[str] | None = None,
) -> dict[Node, str]:
    """Each model column's type (``UNKNOWN`` where sqlglot cannot tell), with ``edits`` applied
    to the source tables first (a retype changes what every reader computes), and a model column's
    retype to that column, which its readers then read. ``only`` types
    those models and the models they read, upstream first, and no other."""
    if only is not None:
        wanted = set(only)
        for name in only:
            if name in project.readers:
                wanted |= nx.ancestors(project.readers, name)
        only = wanted
    dialect = project.dialect
    catalog = mapping_catalog(list(project.sources.values()), dialect, edits, project.tables)
    types: dict[Node, str] = {}
    for name in project.order:
        info = project.models.get(name)
        if info is None or (only is not None and name not in only):
            continue
        found: dict[str, str] = {}
        for st in project.statements.get(name, []):
            if st.query is None:
                continue  # a MERGE: types are the target's
            got = _root_types(st.query, catalog, dialect)
            if got is None:
                continue
            names = st.columns if st.columns is not None else None
            for i, t in enumerate(got):
                col = names[i] if names is not None and i < len(names) else None
                col = col or (info.columns[i] if i < len(info.columns) else None)
                if col is not None and col not in found:
                    found[col] = t
        # rows inserted into a table created with typed columns take the declared types
        sts = project.statements.get(name) or []
        for st in sts:
            if st.kind == "insert":
                found.update(project.declared.get(st.target, {}))
        for col in info.columns:
            edit = (edits or {}).get(("model", name, col))
            if edit is not None and edit[0] == "retype":  # the model's column retyped (its query edited)
                found[col] = exp.DataType.build(edit[1], dialect=dialect).sql(dialect=dialect)
            types[("model", name, col)] = found.get(col, UNKNOWN)
        parts = sts[0].target if sts else (name,)
        catalog.add(declared_table("model", name, parts, list(info.columns), dialect, found, "model"))
    return types
