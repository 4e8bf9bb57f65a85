from __future__ import annotations

from cdcnorm.types.base import FieldType
from cdcnorm.types.formats import Layout, format_cast, format_expected, format_explain, parse_layout

PATTERN = "'[0-9]{4}-[0-9]{2}-[0-9]{2}'"


class DateType(FieldType):
    """Calendar date YYYY-MM-DD (RFC 3339 full-date); impossible dates are rejected."""

    name = "date"
    sql_type = "DATE"

    @property
    def _layout(self) -> Layout | None:
        return parse_layout(self.spec.layout, "date") if self.spec.layout else None

    def expected(self) -> str:
        return format_expected(self._layout, "date") if self._layout else self.describe()

    def cast(self, x: str) -> str:
        if self._layout:
            return format_cast(x, self._layout, "date", "+00:00")
        return f"CASE WHEN regexp_full_match({x}, {PATTERN}) THEN TRY_CAST({x} AS DATE) END"

    def explain(self, x: str) -> str:
        if self._layout:
            return format_explain(x, self._layout, "date", "+00:00")
        return (
            f"CASE WHEN NOT regexp_full_match({x}, {PATTERN}) THEN 'not a YYYY-MM-DD date' "
            "ELSE 'no such calendar date' END"
        )

    def render(self, v: str) -> str:
        return f"strftime({v}, '%Y-%m-%d')"
