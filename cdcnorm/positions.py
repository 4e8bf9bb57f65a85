"""Log position kinds: raw text -> a fixed-width string whose byte order is the log order.

Comparing raw position text is wrong: ``16/B374D85`` is a lower position than
``16/B374D848`` but sorts higher as text. Each kind normalises to one case and
one width so plain byte-wise comparison is the change order.
"""

from __future__ import annotations

from cdcnorm.mapping.model import PositionSpec, SequenceSpec
from cdcnorm.types.timestamp import timestamp_cast

INTEGER_WIDTH = 20  # 2**64 - 1 has 20 digits


def integer_position(x: str) -> str:
    return (
        f"CASE WHEN regexp_full_match({x}, '[0-9]{{1,{INTEGER_WIDTH}}}') AND TRY_CAST({x} AS UBIGINT) IS NOT NULL "
        f"THEN lpad(CAST(TRY_CAST({x} AS UBIGINT) AS VARCHAR), {INTEGER_WIDTH}, '0') END"
    )


def hex_position(x: str, width: int) -> str:
    digits = f"ltrim(upper(regexp_replace({x}, '^0[xX]', '')), '0')"
    return (
        f"CASE WHEN regexp_full_match({x}, '(0[xX])?[0-9A-Fa-f]+') AND length({digits}) <= {width} "
        f"THEN lpad({digits}, {width}, '0') END"
    )


def hex_pair_position(x: str) -> str:
    # Two hex numbers of up to 8 digits around a slash: (hi << 32) | lo.
    hi = f"split_part({x}, '/', 1)"
    lo = f"split_part({x}, '/', 2)"
    return (
        f"CASE WHEN regexp_full_match({x}, '[0-9A-Fa-f]{{1,8}}/[0-9A-Fa-f]{{1,8}}') "
        f"THEN lpad(upper({hi}), 8, '0') || '/' || lpad(upper({lo}), 8, '0') END"
    )


def timestamp_position(x: str, zone: str) -> str:
    return f"strftime({timestamp_cast(x, zone)}, '%Y-%m-%dT%H:%M:%S.%fZ')"


def text_position(x: str) -> str:
    return f"CASE WHEN length({x}) > 0 THEN {x} END"


def normalise(spec: PositionSpec, x: str) -> str:
    """SQL: the normalised position of raw text ``x``, NULL when malformed."""
    return normalise_kind(spec.kind, x, width=spec.width, zone=spec.zone)


def normalise_kind(kind: str, x: str, *, width: int = 32, zone: str = "+00:00") -> str:
    if kind == "integer":
        return integer_position(x)
    if kind == "hex":
        return hex_position(x, width)
    if kind == "hex-pair":
        return hex_pair_position(x)
    if kind == "timestamp":
        return timestamp_position(x, zone)
    return text_position(x)


def sequence_width(spec: SequenceSpec, position: PositionSpec) -> int:
    """Digits a hex sequence is padded to: its own width, else the position's (hex), else 32."""
    if spec.width:
        return spec.width
    return position.width if position.kind == "hex" else 32


def sequence_value(spec: SequenceSpec, position: PositionSpec, x: str) -> str:
    """SQL: the sequence of raw text ``x`` as a value whose order is the change order (NULL when
    malformed): an unsigned integer for ``integer``, a fixed-width text for the other kinds."""
    if spec.kind == "integer":
        return f"CASE WHEN regexp_full_match({x}, '[0-9]{{1,{INTEGER_WIDTH}}}') THEN TRY_CAST({x} AS UBIGINT) END"
    return normalise_kind(spec.kind, x, width=sequence_width(spec, position))


def sequence_text(spec: SequenceSpec, v: str) -> str:
    """SQL: the sequence value ``v`` as the fixed-width text that goes into ``position``."""
    if spec.kind == "integer":
        return f"lpad(CAST({v} AS VARCHAR), {INTEGER_WIDTH}, '0')"
    return v


def expected(spec: PositionSpec) -> str:
    return expected_kind(spec.kind, spec.width)


def expected_kind(kind: str, width: int) -> str:
    return {
        "integer": "a non-negative integer below 2**64",
        "hex": f"hex digits (optional 0x), at most {width} significant",
        "hex-pair": "two hex numbers of up to 8 digits around a slash, e.g. 16/B374D848",
        "timestamp": "an RFC 3339 timestamp",
        "text": "a non-empty text",
    }[kind]
