from __future__ import annotations

from cdcnorm.types.base import FieldType
from cdcnorm.types.marks import expected as marks_expected
from cdcnorm.types.marks import guarded_cast, guarded_explain

PATTERN = r"'[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?'"


def _mantissa(x: str) -> str:
    """SQL: the digits and point of a decimal text before its exponent, without the sign."""
    return f"regexp_extract({x}, '^[+-]?([0-9]*[.]?[0-9]*)', 1)"


def _whole(x: str) -> str:
    """SQL: the digits of a decimal text before its point, without the sign."""
    return f"regexp_extract({x}, '^[+-]?([0-9]*)', 1)"


def _digits(x: str) -> str:
    """SQL: the mantissa's digits, without its point."""
    return f"replace({_mantissa(x)}, '.', '')"


def _exponent(x: str) -> str:
    """SQL: the exponent of a text in exponent notation, as a number."""
    return f"TRY_CAST(regexp_extract({x}, '[eE]([+-]?[0-9]+)$', 1) AS BIGINT)"


class DecimalType(FieldType):
    """Exact decimal(p,s): a value needing rounding or more than p-s integer digits is rejected.

    DuckDB's own cast rounds ``12.345`` to ``12.35`` without a word, so the
    value is compared with a wider exact cast: they differ exactly when the
    narrow cast rounded.
    """

    name = "decimal"

    @classmethod
    def parse_params(cls, params: list[int]) -> list[int]:
        if len(params) != 2:
            raise ValueError("decimal needs precision and scale, e.g. decimal(12,2)")
        p, s = params
        if not 1 <= p <= 38:
            raise ValueError(f"decimal precision must be 1..38, found {p}")
        if not 0 <= s <= p:
            raise ValueError(f"decimal scale must be 0..precision ({p}), found {s}")
        return params

    @property
    def sql_type(self) -> str:  # type: ignore[override]
        p, s = self.params
        return f"DECIMAL({p},{s})"

    def describe(self) -> str:
        p, s = self.params
        return f"decimal({p},{s})"

    def _int_digits(self, x: str) -> str:
        return f"length(ltrim({_whole(x)}, '0'))"

    def _frac_digits(self, x: str) -> str:
        return rf"length(rtrim(regexp_extract({x}, '\.([0-9]*)', 1), '0'))"

    def _exact_in_scale(self, x: str) -> str:
        """SQL for exponent notation: no non-zero digit lies beyond the scale. The value is
        digits D times 10^(e - len(fraction)); its last non-zero digit needs
        -(e - len(fraction) + trailing zeros of D) fractional places."""
        s = self.params[1]
        digits = _digits(x)
        frac = f"length(regexp_extract({_mantissa(x)}, '[.]([0-9]*)', 1))"
        zeros = f"(length({digits}) - length(rtrim({digits}, '0')))"
        exp = _exponent(x)
        return f"(rtrim({digits}, '0') = '' OR -({exp} - {frac} + {zeros}) <= {s})"

    def _normalised(self, x: str) -> str:
        """SQL: exponent notation written as 0.<digits>E<exponent>, the digits without the zeros
        before and after them (zero as 0). The engine's cast reads the digits before the exponent
        at the target scale first: 10000E-1 (1000.0) and 0.00001E6 (10) did not fit decimal(38,34)
        on the way, and were refused."""
        whole = _whole(x)
        digits = _digits(x)
        lead = f"(length({digits}) - length(ltrim({digits}, '0')))"
        body = f"rtrim(ltrim({digits}, '0'), '0')"
        exp = _exponent(x)
        sign = f"CASE WHEN substr({x}, 1, 1) = '-' THEN '-' ELSE '' END"
        shifted = f"CAST({exp} + length({whole}) - {lead} AS VARCHAR)"
        return f"CASE WHEN {body} = '' THEN '0' ELSE {sign} || '0.' || {body} || 'E' || {shifted} END"

    def expected(self) -> str:
        return marks_expected(self.spec, True, self.describe())

    def cast(self, x: str) -> str:
        return guarded_cast(x, self.spec, True, self._cast)

    def explain(self, x: str) -> str:
        return guarded_explain(x, self.spec, True, "a decimal number", self._explain)

    def _cast(self, x: str) -> str:
        p, s = self.params
        wide = f"DECIMAL(38,{38 - (p - s)})"  # every value with p-s integer digits, exactly
        narrow = self.sql_type
        # Equal to its wide exact cast means no digit was rounded away. The wide cast itself is
        # exact only up to 38-(p-s) fractional digits, so longer fractions are counted first.
        fits = f"TRY_CAST({x} AS {wide}) = TRY_CAST({x} AS {narrow})"
        # Its fraction's zeros at the end round nothing away: counted without them where the text
        # is longer (only there: the count costs a regular expression). Without that, a decimal of
        # precision 38 took no zero beyond its scale: 1.250 was refused by decimal(38,2)
        short = (
            f"(strpos({x}, '.') = 0 OR length({x}) - strpos({x}, '.') <= {38 - (p - s)} "
            f"OR {self._frac_digits(x)} <= {38 - (p - s)})"
        )
        return (
            f"CASE WHEN NOT regexp_full_match({x}, {PATTERN}) THEN NULL "
            f"WHEN NOT contains(lower({x}), 'e') THEN CASE WHEN {short} AND {fits} THEN TRY_CAST({x} AS {narrow}) END "
            # exponent notation: no digit beyond the scale, so the engine's exact cast at scale s
            # rounds nothing; narrowing at the same scale only fails (too many integer digits)
            f"WHEN length({x}) <= 60 AND {self._exact_in_scale(x)} "
            f"THEN TRY_CAST(TRY_CAST({self._normalised(x)} AS DECIMAL(38,{s})) AS {narrow}) END"
        )

    def _explain(self, x: str) -> str:
        p, s = self.params
        return (
            f"CASE WHEN NOT regexp_full_match({x}, {PATTERN}) THEN 'not a decimal number' "
            f"WHEN NOT contains(lower({x}), 'e') AND {self._frac_digits(x)} > {s} "
            f"THEN 'more than {s} fractional digits (would round)' "
            f"WHEN NOT contains(lower({x}), 'e') THEN 'more than {p - s} integer digits' "
            f"WHEN NOT coalesce({self._exact_in_scale(x)}, FALSE) THEN 'non-zero digits beyond {s} fractional places (would round)' "
            f"ELSE 'does not fit decimal({p},{s}) exactly' END"
        )

    def render(self, v: str) -> str:
        # DuckDB prints a decimal with exactly its declared scale: 12.30, 7.00; but one whose scale
        # is its precision, decimal(p,p), without its integer digit: .50, -.05. A decimal's text
        # has at least one digit before the point (the SQL standard's exact numeric literal allows
        # none, but Python's decimal, PostgreSQL and RFC 8259 numbers write the 0): 0.50, -0.05
        p, s = self.params
        text = f"CAST({v} AS VARCHAR)"
        if p != s:
            return text
        # only where the text lacks it: an engine that writes the 0 (Spark) keeps its text
        return (
            f"CASE WHEN substr({text}, 1, 1) = '.' THEN '0' || {text} "
            f"WHEN substr({text}, 1, 2) = '-.' THEN '-0' || substr({text}, 2) ELSE {text} END"
        )

    def canonical(self, v: str) -> str:
        # the engine's own text, as the digests stored in landing areas were made (.50 included):
        # a change here needs a new index format
        return f"CAST({v} AS VARCHAR)"
