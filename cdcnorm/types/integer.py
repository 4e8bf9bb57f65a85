from __future__ import annotations

from cdcnorm.types.base import FieldType
from cdcnorm.types.marks import expected as marks_expected
from cdcnorm.types.marks import guarded_cast, guarded_explain

PATTERN = "'[+-]?[0-9]+'"


class IntegerType(FieldType):
    """64-bit signed integer; values outside [-2**63, 2**63-1] are rejected, never wrapped."""

    name = "integer"
    sql_type = "BIGINT"

    def expected(self) -> str:
        return marks_expected(self.spec, False, self.describe())

    def cast(self, x: str) -> str:
        return guarded_cast(x, self.spec, False, self._cast)

    def explain(self, x: str) -> str:
        return guarded_explain(x, self.spec, False, "an integer", self._explain)

    def _cast(self, x: str) -> str:
        return f"CASE WHEN regexp_full_match({x}, {PATTERN}) THEN TRY_CAST({x} AS BIGINT) END"

    def _explain(self, x: str) -> str:
        return (
            f"CASE WHEN NOT regexp_full_match({x}, {PATTERN}) THEN 'not an integer' "
            "ELSE 'outside the 64-bit integer range' END"
        )
