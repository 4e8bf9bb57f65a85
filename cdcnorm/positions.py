"""Log positions and sequences: raw text -> a fixed-width sort key -> the ``position`` text.

Comparing raw position text is wrong: ``16/B374D85`` is a lower position than
``16/B374D848`` but sorts higher as text. Each kind is parsed once into a
fixed-width *key* whose order is the log order: an unsigned integer (integer,
hex up to 32 digits, hex-pair), a timestamp, or (text, hex wider than 32
digits) a text whose byte order is the order. The plan groups, joins and sorts
on keys; only the writers turn a key into its normalised text (one case, one
width; a text kind as the hex of its UTF-8 bytes), so plain byte-wise
comparison of ``position`` is the change order too.
"""

from __future__ import annotations

from cdcnorm.mapping.model import PositionSpec, SequenceSpec
from cdcnorm.types.timestamp import timestamp_cast

INTEGER_WIDTH = 20  # 2**64 - 1 has 20 digits
HEX = "'(0[xX])?[0-9A-Fa-f]+'"
NUMERIC_HEX_DIGITS = 32  # a hex key of up to 32 digits fits UHUGEINT


def _strip0x(x: str) -> str:
    return f"CASE WHEN starts_with({x}, '0x') OR starts_with({x}, '0X') THEN substr({x}, 3) ELSE {x} END"


def integer_key(x: str) -> str:
    return f"CASE WHEN regexp_full_match({x}, '[0-9]{{1,{INTEGER_WIDTH}}}') THEN TRY_CAST({x} AS UBIGINT) END"


def integer_text(k: str) -> str:
    return f"lpad(CAST({k} AS VARCHAR), {INTEGER_WIDTH}, '0')"


def hex_key(x: str, width: int) -> str:
    """Up to 32 digits: UHUGEINT (the regex keeps out what the cast would also take, such as ``_``);
    wider: the upper-case digits without leading zeros, left-padded to ``width``."""
    digits = _strip0x(x)
    if width <= NUMERIC_HEX_DIGITS:
        cast = f"TRY_CAST('0x' || {digits} AS UHUGEINT)"
        bound = f" AND {cast} < CAST('{1 << (4 * width)}' AS UHUGEINT)" if width < NUMERIC_HEX_DIGITS else ""
        return f"CASE WHEN regexp_full_match({x}, {HEX}){bound} THEN {cast} END"
    trimmed = f"ltrim(upper({digits}), '0')"
    return (
        f"CASE WHEN regexp_full_match({x}, {HEX}) AND length({trimmed}) <= {width} "
        f"THEN lpad({trimmed}, {width}, '0') END"
    )


def hex_text(k: str, width: int) -> str:
    if width <= NUMERIC_HEX_DIGITS:
        return f"lpad(hex({k}), {width}, '0')"
    return k


def hex_pair_key(x: str) -> str:
    # Two hex numbers of up to 8 digits around a slash: (hi << 32) | lo.
    hi = f"TRY_CAST('0x' || split_part({x}, '/', 1) AS UBIGINT)"
    lo = f"TRY_CAST('0x' || split_part({x}, '/', 2) AS UBIGINT)"
    return f"CASE WHEN regexp_full_match({x}, '[0-9A-Fa-f]{{1,8}}/[0-9A-Fa-f]{{1,8}}') THEN ({hi} << 32) | {lo} END"


def hex_pair_text(k: str) -> str:
    return f"lpad(hex({k} >> 32), 8, '0') || '/' || lpad(hex({k} & 4294967295), 8, '0')"


def timestamp_text(k: str) -> str:
    return f"strftime({k}, '%Y-%m-%dT%H:%M:%S.%fZ')"


def text_key(x: str) -> str:
    return f"CASE WHEN length({x}) > 0 THEN {x} END"


def key(kind: str, x: str, *, width: int = 32, zone: str = "+00:00") -> str:
    """SQL: the sort key of raw text ``x`` (NULL when malformed)."""
    if kind == "integer":
        return integer_key(x)
    if kind == "hex":
        return hex_key(x, width)
    if kind == "hex-pair":
        return hex_pair_key(x)
    if kind == "timestamp":
        return timestamp_cast(x, zone)
    return text_key(x)


def text(kind: str, k: str, *, width: int = 32) -> str:
    """SQL: the normalised fixed-width text of key ``k``."""
    if kind == "integer":
        return integer_text(k)
    if kind == "hex":
        return hex_text(k, width)
    if kind == "hex-pair":
        return hex_pair_text(k)
    if kind == "timestamp":
        return timestamp_text(k)
    # A text has no fixed width: "a" is a prefix of "a-", and '.' sorts above '-', so joined
    # parts would compare backwards. Its UTF-8 bytes in hex keep byte (and code point) order,
    # and every hex digit sorts above the '.' between parts.
    return f"hex({k})"


def position_key(spec: PositionSpec, x: str) -> str:
    return key(spec.kind, x, width=spec.width, zone=spec.zone)


def position_text(spec: PositionSpec, k: str) -> str:
    return text(spec.kind, k, width=spec.width)


def sequence_width(spec: SequenceSpec, position: PositionSpec) -> int:
    """Digits a hex sequence is padded to: its own width, else the position's (hex), else 32."""
    if spec.width:
        return spec.width
    return position.width if position.kind == "hex" else 32


def sequence_key(spec: SequenceSpec, position: PositionSpec, x: str) -> str:
    return key(spec.kind, x, width=sequence_width(spec, position))


def sequence_text(spec: SequenceSpec, position: PositionSpec, k: str) -> str:
    return text(spec.kind, k, width=sequence_width(spec, position))


def key_type(kind: str, width: int = 32) -> str:
    """The engine type of a key of this kind."""
    if kind in ("integer", "hex-pair"):
        return "UBIGINT"
    if kind == "hex":
        return "UHUGEINT" if width <= NUMERIC_HEX_DIGITS else "VARCHAR"
    if kind == "timestamp":
        return "TIMESTAMPTZ"
    return "VARCHAR"


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
