from __future__ import annotations

from cdcnorm.types.base import FieldType


class JsonType(FieldType):
    """A JSON text (RFC 8259), parsed and embedded in the envelope as JSON, minified."""

    name = "json"
    sql_type = "JSON"

    def cast(self, x: str) -> str:
        return f"CASE WHEN json_valid({x}) THEN json({x}) END"

    def explain(self, x: str) -> str:
        return "'not valid JSON (RFC 8259)'"
