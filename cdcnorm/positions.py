"""Log positions and sequences: raw text -> a fixed-width sort key -> the ``position`` text.

Comparing raw position text is wrong: ``16/B374D85`` is a lower position than
``16/B374D848`` but sorts higher as text. Each kind is parsed once into a
fixed-width *key* whose order is the log order: an exact number (integer:
``DECIMAL(20, 0)``), a 128-bit key (hex up to 32 digits, hex-pair), a
timestamp, or (text, hex wider than 32 digits) a text whose byte order is the
order. The plan groups, joins and sorts on keys; only the writers turn a key
into its normalised text (one case, one width; a text kind as the hex of its
UTF-8 bytes), so plain byte-wise comparison of ``position`` is the change order
too.

The SQL here is engine-neutral but for two plan functions each engine adapter
defines (``engines/``): ``plan_hex_key(digits)`` (at most 32 hex digits -> a
128-bit key whose order is the number's: an unsigned 128-bit integer on DuckDB,
16 bytes on Spark) and ``plan_hex_digits(key, width)`` (the last ``width`` of the
key's 32 upper-case hex digits, leading zeros kept).
"""

from __future__ import annotations

from cdcnorm.mapping.model import PositionSpec, SequenceSpec
from cdcnorm.types.timestamp import timestamp_cast

INTEGER_WIDTH = 20  # 2**64 - 1 has 20 digits
INTEGER_MAX = str((1 << 64) - 1)
#: An integer key: exact, and every unsigned 64-bit value fits.
INTEGER_KEY_TYPE = f"DECIMAL({INTEGER_WIDTH}, 0)"
#: The plan function each engine adapter defines: hex digits -> a 128-bit key.
HEX_KEY = "plan_hex_key"
#: ... and its inverse: a 128-bit key -> its last ``width`` hex digits (upper case, zero-padded).
HEX_DIGITS = "plan_hex_digits"
#: The sequence key of a table without a sequence: one constant, of the integer key's type.
NO_SEQUENCE = f"CAST(0 AS {INTEGER_KEY_TYPE})"
HEX = "'(0[xX])?[0-9A-Fa-f]+'"
NUMERIC_HEX_DIGITS = 32  # a hex key of up to 32 digits fits UHUGEINT


def _strip0x(x: str) -> str:
    return f"CASE WHEN starts_with({x}, '0x') OR starts_with({x}, '0X') THEN substr({x}, 3) ELSE {x} END"


def integer_key(x: str) -> str:
    # 20 digits compare as text as they do as numbers: the bound needs no wider type
    return (
        f"CASE WHEN regexp_full_match({x}, '[0-9]{{1,{INTEGER_WIDTH}}}') AND (length({x}) < {INTEGER_WIDTH} "
        f"OR {x} <= '{INTEGER_MAX}') THEN CAST({x} AS {INTEGER_KEY_TYPE}) END"
    )


def integer_text(k: str) -> str:
    return f"lpad(CAST({k} AS VARCHAR), {INTEGER_WIDTH}, '0')"


def _fixed_hex(k: str, width: int) -> str:
    """SQL: the last ``width`` of the 32 hex digits of a 128-bit key (upper case)."""
    return f"{HEX_DIGITS}({k}, {width})"


def hex_key(x: str, width: int) -> str:
    """Up to 32 digits: the 128-bit key (the regex keeps out what a cast might also take, such
    as ``_``); wider: the upper-case digits without leading zeros, left-padded to ``width``.
    Leading zeros never count towards the width: ``0*`` takes them before the digits are counted."""
    digits = _strip0x(x)
    if width <= NUMERIC_HEX_DIGITS:
        # one pattern checks the digits and the width (no trimming and measuring of every value)
        return f"CASE WHEN regexp_full_match({x}, '(0[xX])?0*[0-9A-Fa-f]{{1,{width}}}') THEN {HEX_KEY}({digits}) END"
    trimmed = f"ltrim(upper({digits}), '0')"
    valid = f"regexp_full_match({x}, {HEX}) AND length({trimmed}) <= {width}"
    return f"CASE WHEN {valid} THEN lpad({trimmed}, {width}, '0') END"


def hex_text(k: str, width: int) -> str:
    if width <= NUMERIC_HEX_DIGITS:
        return _fixed_hex(k, width)
    return k


def hex_pair_key(x: str) -> str:
    # Two hex numbers of up to 8 digits around a slash: 16 digits, the high part first.
    hi = f"lpad(split_part({x}, '/', 1), 8, '0')"
    lo = f"lpad(split_part({x}, '/', 2), 8, '0')"
    return f"CASE WHEN regexp_full_match({x}, '[0-9A-Fa-f]{{1,8}}/[0-9A-Fa-f]{{1,8}}') THEN {HEX_KEY}({hi} || {lo}) END"


def hex_pair_text(k: str) -> str:
    digits = _fixed_hex(k, 16)
    return f"left({digits}, 8) || '/' || right({digits}, 8)"


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
    """DuckDB's type of a key of this kind (what the landing area's files are read back as)."""
    if kind == "integer":
        return INTEGER_KEY_TYPE
    if kind == "hex-pair" or (kind == "hex" and width <= NUMERIC_HEX_DIGITS):
        return "UHUGEINT"
    if kind == "hex":
        return "VARCHAR"
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
