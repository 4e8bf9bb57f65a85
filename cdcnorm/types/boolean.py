from __future__ import annotations

from cdcnorm.types.base import FieldType

TRUE = "('true', 't', '1', 'yes')"
FALSE = "('false', 'f', '0', 'no')"


class BooleanType(FieldType):
    """true/false/t/f/1/0/yes/no in any case."""

    name = "boolean"
    sql_type = "BOOLEAN"

    def cast(self, x: str) -> str:
        return f"CASE WHEN lower({x}) IN {TRUE} THEN TRUE WHEN lower({x}) IN {FALSE} THEN FALSE END"

    def explain(self, x: str) -> str:
        return "'not one of true/false/t/f/1/0/yes/no'"
