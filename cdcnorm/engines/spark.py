"""The Spark adapter: the same plans, rendered in Spark SQL and run on a Spark session.

A plan is written once (sqlglot expressions in the plan dialect, see ``sql.py``);
sqlglot's transpiler turns most of it into Spark SQL. What it cannot know is
here, as rewrites of the expression tree before rendering:

- the plan's own functions (``positions.HEX_KEY``, ``positions.HEX_DIGITS``): a
  128-bit key is 16 bytes on Spark (``unhex`` of the 32 digits; binary order is
  the number's order), and its digits are the last ones of its ``hex``;
- DuckDB's functions without a Spark spelling in sqlglot: ``regexp_full_match``
  (an anchored ``RLIKE``), ``md5_number`` (the 16 bytes of ``md5``),
  ``epoch_us`` (``unix_micros``), ``isinf``, and ``strftime`` (``date_format``, its text
  between codes quoted: sqlglot leaves the ``T`` of RFC 3339 bare);
- DuckDB's unsigned types: ``DECIMAL(20, 0)`` holds every 64-bit value; a
  128-bit one is the hex key's ``BINARY``.

What Spark has no counterpart for is refused by name (``UnsupportedByEngine``),
never rendered into SQL that means something else: a ``json`` field, whose
checks read DuckDB's JSON tree, a ``time`` field (Spark has no time-of-day type), and a
``layout`` of a date or timestamp (Spark's datetime patterns parse differently).

pyspark is an optional dependency (``pip install 'cdcnorm[spark]'``); this
module imports it only when a session is made.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import pyarrow as pa
import sqlglot
from sqlglot import exp

from cdcnorm.errors import CdcnormError
from cdcnorm.positions import HEX_DIGITS, HEX_KEY, NUMERIC_HEX_DIGITS
from cdcnorm.sql import PLAN_DIALECT

if TYPE_CHECKING:
    from pyspark.sql import DataFrame, SparkSession

#: DuckDB's JSON functions, which Spark has nothing that means the same for (the json field
#: type's checks): by name where sqlglot does not know them, by class where it does.
REFUSED = {"JSON_TREE", "JSON_VALID"}
REFUSED_NODES = (exp.JSONType, exp.JSONExtract, exp.JSONExtractScalar)


class UnsupportedByEngine(CdcnormError):
    """A plan uses something this engine cannot run."""


def _name(node: exp.Expr) -> str:
    return node.name.upper() if isinstance(node, exp.Anonymous) else ""


def _anchored(pattern: exp.Expr) -> exp.Expr:
    """A full-match pattern as a search pattern: anchored at both ends."""
    if isinstance(pattern, exp.Literal) and pattern.is_string:
        return exp.Literal.string(f"^(?:{pattern.this})$")
    return exp.func("concat", exp.Literal.string("^(?:"), pattern, exp.Literal.string(")$"))


#: strftime codes the plan uses, as Spark's datetime pattern letters.
_PATTERN = {"%Y": "yyyy", "%m": "MM", "%d": "dd", "%H": "HH", "%M": "mm", "%S": "ss", "%f": "SSSSSS"}


def _datetime_pattern(fmt: str) -> str:
    """A strftime format as a Spark datetime pattern, every other character quoted as text."""
    out: list[str] = []
    text = ""
    i = 0
    while i < len(fmt):
        code = fmt[i : i + 2]
        if code in _PATTERN:
            out.append(f"'{text}'" if text else "")
            out.append(_PATTERN[code])
            text = ""
            i += 2
            continue
        if fmt[i] == "%":
            raise UnsupportedByEngine(f"the Spark adapter has no pattern for the strftime code {code!r}")
        text += "''" if fmt[i] == "'" else fmt[i]
        i += 1
    out.append(f"'{text}'" if text else "")
    return "".join(out)


def _inner(node: exp.Expr) -> exp.Expr:
    """The operand of a rewritten node, rewritten itself: the transform does not visit what a
    rewrite returns (a hex key of an md5 of a timestamp's epoch_us, say)."""
    return node.transform(_rewrite)


def _rewrite(node: exp.Expr) -> exp.Expr:
    name = _name(node)
    args = [_inner(a) for a in node.expressions] if isinstance(node, exp.Anonymous) else []
    if name == HEX_KEY.upper():
        # lpad cuts a longer text: leading zeros beyond 32 digits go first (the plan allows them)
        trimmed = exp.func("ltrim", args[0], exp.Literal.string("0"))
        digits = exp.func("lpad", trimmed, exp.Literal.number(NUMERIC_HEX_DIGITS), exp.Literal.string("0"))
        return exp.Unhex(this=digits)
    if name == HEX_DIGITS.upper():  # the hex of 16 bytes has every one of its 32 digits
        return exp.func("right", exp.Hex(this=args[0]), args[1])
    if isinstance(node, exp.TimeToStr) and isinstance(node.args.get("format"), exp.Literal):
        pattern = exp.Literal.string(_datetime_pattern(node.args["format"].this))
        return exp.Anonymous(this="date_format", expressions=[_inner(node.this), pattern])
    if isinstance(node, exp.IsInf):  # Spark has no isinf: both infinities compare equal as abs
        infinity = exp.cast(exp.Literal.string("Infinity"), exp.DataType.build("DOUBLE"))
        return exp.EQ(this=exp.Abs(this=_inner(node.this)), expression=infinity)
    if isinstance(node, exp.RegexpFullMatch):
        return exp.RegexpLike(this=_inner(node.this), expression=_anchored(_inner(node.expression)))
    if name == "MD5_NUMBER":
        return exp.Unhex(this=exp.MD5(this=args[0]))
    if name == "EPOCH_US":
        return exp.Anonymous(this="unix_micros", expressions=args)
    if name == "TRY_STRPTIME":
        raise UnsupportedByEngine(
            "the Spark engine cannot run a field's layout: Spark's datetime patterns parse differently "
            "(month names in one case only, other digit counts), so no rendering is known to read the same",
            hint="convert tables with layout fields on the DuckDB engine",
        )
    if isinstance(node, exp.DataType) and node.is_type(exp.DataType.Type.TIME):
        raise UnsupportedByEngine(
            "the Spark engine cannot run a time field: Spark has no time-of-day type (TIME is refused there)",
            hint="convert tables with time fields on the DuckDB engine, or map the column as text",
        )
    json_type = isinstance(node, exp.DataType) and node.is_type(exp.DataType.Type.JSON)
    if name in REFUSED or json_type or isinstance(node, REFUSED_NODES):
        what = name.lower() if name else "the JSON type" if json_type else node.sql(dialect=PLAN_DIALECT)
        raise UnsupportedByEngine(
            f"the Spark engine cannot run {what}: DuckDB's JSON functions have no Spark counterpart that "
            "means the same",
            hint="convert tables with json fields on the DuckDB engine",
        )
    if isinstance(node, exp.DataType) and node.this in (exp.DataType.Type.UBIGINT, exp.DataType.Type.UINT):
        return exp.DataType.build("DECIMAL(20, 0)")
    if isinstance(node, exp.DataType) and node.this == exp.DataType.Type.UINT128:
        return exp.DataType.build("BINARY")  # the hex key's type here
    return node


def render(expression: exp.Expr, *, pretty: bool = False) -> str:
    """A plan expression as Spark SQL."""
    return expression.copy().transform(_rewrite).sql(dialect="spark", pretty=pretty)


def session(threads: int | None = None) -> SparkSession:
    """A local Spark session for the plans: UTC, no UI, quiet logs."""
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        raise CdcnormError(
            "the Spark engine needs pyspark", hint="pip install 'cdcnorm[spark]' (and a Java runtime)"
        ) from None
    spark = (
        SparkSession.builder.master(f"local[{threads or '*'}]")
        .appName("cdcnorm")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.ansi.enabled", "false")
        .config("spark.sql.shuffle.partitions", "4")
        .getOrCreate()
    )
    spark.sparkContext.setLogLevel("ERROR")
    return spark


class SparkEngine:
    """Runs plan steps on a Spark session, each step checkpointed locally and named as a temporary
    view. Every step is checkpointed, views too: with the views under it inlined, Spark 4.3's
    optimiser fails on the pairing step with an internal error (``key not found: __pos#...``,
    correlated subqueries over a union read twice); cut at each step, it runs."""

    name = "spark"
    dialect = "spark"
    #: plan steps are the session's temporary views (``--show-plan spark`` says so)
    TEMPORARY = True

    def __init__(self, spark: SparkSession | None = None, *, threads: int | None = None) -> None:
        self.spark = spark or session(threads)

    @staticmethod
    def pretty(expression: exp.Expr) -> str:
        """A plan step as Spark SQL for people (``--show-plan spark``)."""
        return render(expression, pretty=True)

    def render(self, expression: exp.Expr | str) -> str:
        """Plan SQL (an expression, or text in the plan dialect) as Spark SQL."""
        return render(_parsed(expression))

    def register(self, name: str, table: pa.Table) -> None:
        """An Arrow table as a relation (the raw rows, the landing area's memory)."""
        frame = self.spark.createDataFrame(table) if table.num_rows else self._empty(table.schema)
        frame.createOrReplaceTempView(ident_spark(name))

    def _empty(self, schema: pa.Schema) -> DataFrame:
        from pyspark.sql.pandas.types import from_arrow_schema

        return self.spark.createDataFrame([], from_arrow_schema(schema))

    def view(self, name: str, expression: exp.Expr | str) -> None:
        self.materialize(name, expression)

    def materialize(self, name: str, expression: exp.Expr | str) -> None:
        frame = self._sql(name, expression).localCheckpoint()
        frame.createOrReplaceTempView(ident_spark(name))

    def _sql(self, name: str, expression: exp.Expr | str) -> DataFrame:
        text = self.render(expression)
        try:
            return self.spark.sql(text)
        except Exception as e:  # pyspark's AnalysisException and parse errors share no base here
            first = str(e).strip().splitlines()[0] if str(e).strip() else type(e).__name__
            raise CdcnormError(
                f"Spark could not run plan step {name}: {first}",
                hint="this is a bug in cdcnorm's Spark adapter; `cdcnorm convert --show-plan` prints the plan",
            ) from None

    def arrow(self, expression: exp.Expr | str) -> pa.Table:
        """A query's rows as Arrow; a string is plan SQL (the plan dialect), rendered first."""
        table: pa.Table = self.spark.sql(self.render(expression)).toArrow()
        return table

    def rows(self, expression: exp.Expr | str) -> list[tuple[Any, ...]]:
        """A query's rows as tuples (what the ledger's counts read)."""
        return [tuple(r) for r in self.spark.sql(self.render(expression)).collect()]


def _parsed(expression: exp.Expr | str) -> exp.Expr:
    return sqlglot.parse_one(expression, read=PLAN_DIALECT) if isinstance(expression, str) else expression


def ident_spark(name: str) -> str:
    """A relation name as Spark's temporary views take it (quoted as the plan quotes it)."""
    return exp.to_identifier(name, quoted=True).sql("spark") if not name.isidentifier() else name


__all__ = ["REFUSED", "REFUSED_NODES", "SparkEngine", "UnsupportedByEngine", "render", "session"]


#: what engines/__init__.py looks up by the name "spark"
ENGINE = SparkEngine
