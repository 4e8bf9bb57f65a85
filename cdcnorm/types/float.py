from __future__ import annotations

from cdcnorm.types.base import FieldType
from cdcnorm.types.marks import expected as marks_expected
from cdcnorm.types.marks import guarded_cast, guarded_explain

PATTERN = r"'[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?'"


# The smallest normal double (IEEE 754 binary64): below it, a value keeps fewer significant bits.
MIN_NORMAL = "2.2250738585072014e-308"
NONZERO = r"'[+-]?0*[.]?0*[1-9].*'"


class FloatType(FieldType):
    """IEEE 754 double; NaN and infinities are rejected (JSON cannot carry them). A non-zero value
    that underflows (to zero, or to a subnormal double, which keeps fewer significant digits) is
    rejected too: its value would change without a word."""

    name = "float"
    sql_type = "DOUBLE"

    def expected(self) -> str:
        return marks_expected(self.spec, True, self.describe())

    def cast(self, x: str) -> str:
        return guarded_cast(x, self.spec, True, self._cast)

    def explain(self, x: str) -> str:
        return guarded_explain(x, self.spec, True, "a number", self._explain)

    def _cast(self, x: str) -> str:
        v = f"TRY_CAST({x} AS DOUBLE)"
        underflow = f"(abs({v}) < {MIN_NORMAL} AND regexp_full_match({x}, {NONZERO}))"
        return (
            f"CASE WHEN regexp_full_match({x}, {PATTERN}) AND NOT isinf({v}) AND NOT {underflow} THEN {v} END"
        )

    def _explain(self, x: str) -> str:
        return (
            f"CASE WHEN NOT regexp_full_match({x}, {PATTERN}) THEN 'not a number' "
            f"WHEN abs(TRY_CAST({x} AS DOUBLE)) < {MIN_NORMAL} THEN 'underflows: below the smallest normal double' "
            "ELSE 'outside the double range' END"
        )
