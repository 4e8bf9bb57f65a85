from __future__ import annotations

from cdcnorm.types.base import FieldType

# RFC 4648 section 8 (base16, either case) and section 4 (base64 with padding);
# section 3.3: characters outside the alphabet are rejected.
HEX = "'([0-9A-Fa-f]{2})*'"
BASE64 = "'([A-Za-z0-9+/]{4})*([A-Za-z0-9+/]{2}==|[A-Za-z0-9+/]{3}=)?'"


def hex_digits(x: str) -> str:
    """SQL: the hex digits of ``x`` without a prefix: PostgreSQL's text form of bytea (what its
    COPY writes) starts with ``\\x``; SQL Server's tools write a varbinary as a binary constant,
    ``0x`` then the digits (from memory of its documentation). Neither prefix is hex, so taking it
    off changes no valid text's meaning."""
    prefixed = f"starts_with({x}, '\\x') OR starts_with({x}, '0x') OR starts_with({x}, '0X')"
    return f"CASE WHEN {prefixed} THEN substr({x}, 3) ELSE {x} END"


class BytesType(FieldType):
    """Binary data written as hex or base64 text; emitted as base64."""

    name = "bytes"
    sql_type = "BLOB"

    @property
    def encoding(self) -> str:
        return self.spec.encoding or "hex"

    def describe(self) -> str:
        return f"bytes ({self.encoding})"

    def value_type(self) -> str:
        return "bytes"

    def cast(self, x: str) -> str:
        if self.encoding == "hex":
            digits = hex_digits(x)
            return f"CASE WHEN regexp_full_match({digits}, {HEX}) THEN unhex({digits}) END"
        return f"CASE WHEN regexp_full_match({x}, {BASE64}) THEN from_base64({x}) END"

    def explain(self, x: str) -> str:
        if self.encoding == "hex":
            digits = hex_digits(x)
            others = f"regexp_replace({digits}, '[0-9A-Fa-f]', '', 'g')"
            return (
                f"CASE WHEN {others} <> '' THEN 'not hex: the characters ' || to_json({others}) || ' are not hex digits' "
                "ELSE 'an odd number of hex digits' END"
            )
        return "'not padded base64 (RFC 4648 section 4)'"

    def render(self, v: str) -> str:
        return f"to_base64({v})"

    def canonical(self, v: str) -> str:
        # an empty value's base64 is empty: ``=`` (no base64 text) keeps it apart from NULL
        return f"CASE WHEN octet_length({v}) = 0 THEN '=' ELSE to_base64({v}) END"

    form_type = "VARCHAR"

    def unrender(self, v: str) -> str:
        return f"from_base64({v})"
