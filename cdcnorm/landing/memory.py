"""What runs remember: identities emitted earlier, and before-images still waiting.

Both are Parquet files in the landing area, read and written by the engine,
never loaded into Python. Positions and sequences are stored as their
normalised text (fixed width, so text order is key order; Parquet has no
128-bit integers) and parsed back into keys on reading. Identity files are
sorted by position, so reading only the positions a run can meet skips most
of a long history.

- ``index/emitted/<table>/<run>.parquet``: ``__pos``, ``__seq``, ``__act``,
  the key fields, ``__hash`` (128-bit digest of the content, hex), ``__run``,
  ``__unpaired`` (an after-image emitted without its before-image).
- ``index/pending/<table>/<run>.parquet``: every before-image waiting after
  that run (carried ones included): origin ``__name`` and ``__row``, the typed
  row, ``__run`` (the run that read it) and ``__raw`` (its raw columns as a JSON
  object, for the quarantine if it is ever settled).
"""

from __future__ import annotations

from pathlib import Path

from cdcnorm import positions
from cdcnorm.engines.duckdb import DuckDBEngine
from cdcnorm.plan import Plan
from cdcnorm.sql import ident, lit


def _kinds(plan: Plan) -> tuple[tuple[str, int], tuple[str, int] | None]:
    change = plan.mapping.mapping.change
    pos = (change.position.kind, change.position.width)
    seq = change.sequence
    return pos, ((seq.kind, positions.sequence_width(seq, change.position)) if seq else None)


def _store(plan: Plan, col: str, which: str) -> str:
    """SQL: a position (``which`` = "__pos") or sequence key as stored (its normalised text)."""
    pos, seq = _kinds(plan)
    kind = pos if which == "__pos" else seq
    if kind is None or kind[0] == "text":  # a text key is stored as itself
        return col
    return positions.text(kind[0], col, width=kind[1])


def _restore(plan: Plan, col: str, name: str) -> str:
    pos, seq = _kinds(plan)
    kind = pos if name == "__pos" else seq
    if kind is None:
        return f"CAST({col} AS {positions.key_type('integer')})"
    if kind[0] == "text":
        return col
    return positions.key(kind[0], col, width=kind[1])


def empty_relation(columns: dict[str, str]) -> str:
    return (
        "SELECT " + ", ".join(f"CAST(NULL AS {t}) AS {ident(c)}" for c, t in columns.items()) + " WHERE FALSE"
    )


def carried_columns(plan: Plan) -> dict[str, str]:
    types = plan.types()
    cols = {"__file": "INTEGER", "__row": "BIGINT", "__pos": types["__pos"], "__seq": types["__seq"]}
    cols["__cat"] = "TIMESTAMPTZ"
    cols.update({f"v{i}": types[f"v{i}"] for i in range(len(plan.fields))})
    cols.update({"__run": "VARCHAR", "__raw": "VARCHAR"})
    return cols


def earlier_columns(plan: Plan) -> dict[str, str]:
    types = plan.types()
    cols = {"__pos": types["__pos"], "__seq": types["__seq"], "__act": "VARCHAR"}
    cols.update({f"v{i}": types[f"v{i}"] for i in plan.key_index})
    cols.update({"__hash": "UHUGEINT", "__run": "VARCHAR", "__unpaired": "BOOLEAN"})
    return cols


def load_carried(engine: DuckDBEngine, plan: Plan, path: Path | None, first_id: int) -> list[tuple[int, str]]:
    """Create ``<table>__carried`` from the pending file (or empty); the file names it refers to
    get ids from ``first_id`` on, returned as (id, name) for the files relation."""
    rel = plan.rel("carried")
    if path is None:
        engine.execute(f"CREATE OR REPLACE TEMP TABLE {rel} AS {empty_relation(carried_columns(plan))}")
        return []
    src = f"read_parquet({lit(str(path))})"
    names = [str(r[0]) for r in engine.rows(f"SELECT DISTINCT __name FROM {src} ORDER BY 1")]
    ids = [(first_id + i, n) for i, n in enumerate(names)]
    values = "(VALUES " + ", ".join(f"({i}, {lit(n)})" for i, n in ids) + ") f(id, name)" if ids else None
    types = carried_columns(plan)
    cols = [
        "CAST(f.id AS INTEGER) AS __file",
        "CAST(p.__row AS BIGINT) AS __row",
        f"{_restore(plan, 'p.__pos', '__pos')} AS __pos",
        f"{_restore(plan, 'p.__seq', '__seq')} AS __seq",
        "CAST(p.__cat AS TIMESTAMPTZ) AS __cat",
        *(f"CAST(p.v{i} AS {types[f'v{i}']}) AS v{i}" for i in range(len(plan.fields))),
        "p.__run",
        "p.__raw",
    ]
    if values is None:
        engine.execute(f"CREATE OR REPLACE TEMP TABLE {rel} AS {empty_relation(types)}")
    else:
        engine.execute(
            f"CREATE OR REPLACE TEMP TABLE {rel} AS SELECT {', '.join(cols)} FROM {src} p JOIN {values} ON p.__name = f.name"
        )
    return ids


def load_earlier(engine: DuckDBEngine, plan: Plan, files: list[Path]) -> None:
    """Create ``<table>__earlier``: the identities earlier runs emitted, at the positions this
    run's rows can meet (between the lowest and highest position of the run's good rows)."""
    rel = plan.rel("earlier")
    if not files:
        engine.execute(f"CREATE OR REPLACE TEMP TABLE {rel} AS {empty_relation(earlier_columns(plan))}")
        return
    lo, hi = engine.rows(
        f"SELECT {_store(plan, 'min(__pos)', '__pos')}, {_store(plan, 'max(__pos)', '__pos')} FROM {plan.rel('typed')} WHERE __ok"
    )[0]
    if lo is None:
        engine.execute(f"CREATE OR REPLACE TEMP TABLE {rel} AS {empty_relation(earlier_columns(plan))}")
        return
    types = earlier_columns(plan)
    cols = [
        f"{_restore(plan, '__pos', '__pos')} AS __pos",
        f"{_restore(plan, '__seq', '__seq')} AS __seq",
        "__act",
        *(f"CAST(v{i} AS {types[f'v{i}']}) AS v{i}" for i in plan.key_index),
        f"{positions.HEX_KEY}(__hash) AS __hash",
        "__run",
        "__unpaired",
    ]
    src = f"read_parquet([{', '.join(lit(str(f)) for f in files)}])"
    engine.execute(
        f"CREATE OR REPLACE TEMP TABLE {rel} AS SELECT {', '.join(cols)} FROM {src} "
        f"WHERE __pos BETWEEN {lit(str(lo))} AND {lit(str(hi))}"
    )


def write_emitted(engine: DuckDBEngine, plan: Plan, path: Path, run: str) -> None:
    """The identities this run settled for good: every kept row (carried ones included) except the
    before-images left waiting; an after-image emitted without its before-image is marked."""
    paired = plan.mapping.mapping.change.updates == "paired"
    kept, waiting, pairs = plan.rel("kept"), plan.rel("waiting"), plan.rel("pairs")
    keys = "".join(f", k.v{i}" for i in plan.key_index)
    unpaired = (
        f"(k.__act = 'after' AND NOT EXISTS (SELECT 1 FROM {pairs} q WHERE NOT q.ghost AND q.af = k.__file "
        "AND q.ar = k.__row))"
        if paired
        else "FALSE"
    )
    sql = (
        f"SELECT {_store(plan, 'k.__pos', '__pos')} AS __pos, {_store(plan, 'k.__seq', '__seq')} AS __seq, k.__act{keys}, "
        f"lpad(hex({plan.content('k.')}), 32, '0') AS __hash, {lit(run)} AS __run, {unpaired} AS __unpaired "
        f"FROM {kept} k WHERE NOT EXISTS (SELECT 1 FROM {waiting} w WHERE NOT w.__settled "
        # sorted on the keys: their order is the stored texts' order, and cheaper to sort
        "AND w.__file = k.__file AND w.__row = k.__row) ORDER BY k.__pos, k.__seq"
    )
    path.parent.mkdir(parents=True, exist_ok=True)
    engine.execute(f"COPY ({sql}) TO {lit(str(path))} (FORMAT PARQUET)")


def write_pending(engine: DuckDBEngine, plan: Plan, path: Path, run: str, raw_rows: str) -> int:
    """The before-images still waiting after this run; ``raw_rows`` is SQL of (__file, __row,
    raw) giving this run's rows' raw columns as JSON. Returns how many."""
    values = "".join(f", w.v{i}" for i in range(len(plan.fields)))
    sql = (
        f"SELECT f.name AS __name, w.__row, {_store(plan, 'w.__pos', '__pos')} AS __pos, {_store(plan, 'w.__seq', '__seq')} AS __seq, "
        f"w.__cat{values}, coalesce(c.__run, {lit(run)}) AS __run, coalesce(c.__raw, r.raw) AS __raw "
        f"FROM {plan.rel('waiting')} w JOIN __files f ON f.id = w.__file "
        f"LEFT JOIN {plan.rel('carried')} c ON c.__file = w.__file AND c.__row = w.__row "
        f"LEFT JOIN ({raw_rows}) r ON r.__file = w.__file AND r.__row = w.__row "
        "WHERE NOT w.__settled ORDER BY __pos, __seq"
    )
    path.parent.mkdir(parents=True, exist_ok=True)
    engine.execute(f"COPY ({sql}) TO {lit(str(path))} (FORMAT PARQUET)")
    return int(engine.rows(f"SELECT count(*) FROM {plan.rel('waiting')} WHERE NOT __settled")[0][0])
