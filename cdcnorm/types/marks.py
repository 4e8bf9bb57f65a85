"""Numbers written with other marks than a point (``decimal_mark``, ``group_mark`` on integer,
decimal and float fields): ``1.234,56`` as many European exports write it, ``1,234.56`` and
``1 234,56`` as reports do.

The text must be a number written with exactly those marks, a group mark only between groups of
three digits (``1.234.567``, or no grouping at all: ``1234567``); it is then written with a point
and no group marks, and read by the type as any other text. Anything else is quarantined, never
guessed: ``1,5`` where the decimal mark is a point, ``12.34`` where a point groups digits."""

from __future__ import annotations

from collections.abc import Callable

from cdcnorm.mapping.model import FieldSpec
from cdcnorm.sql import lit

#: how a mark is named in a reason
NAMES = {
    ".": '"."',
    ",": '","',
    " ": "a space",
    "\u00a0": "a no-break space",
    "\u202f": "a narrow no-break space",
    "'": "an apostrophe",
}


def marked(spec: FieldSpec) -> bool:
    return spec.decimal_mark is not None or spec.group_mark is not None


def _pattern(decimal: str, group: str | None, fraction: bool) -> str:
    d, g = f"[{decimal}]", f"[{group}]" if group else None  # a mark alone in a class: itself
    whole = f"([0-9]{{1,3}}({g}[0-9]{{3}})+|[0-9]+)" if g else "[0-9]+"
    if not fraction:
        return f"[+-]?{whole}"
    return f"[+-]?({whole}({d}[0-9]*)?|{d}[0-9]+)([eE][+-]?[0-9]+)?"


def plain(x: str, spec: FieldSpec, fraction: bool) -> str:
    """SQL: text ``x`` written with the field's marks, as a point and no group marks; NULL when
    it is no number written with them."""
    decimal, group = spec.decimal_mark or ".", spec.group_mark
    text = f"replace({x}, {lit(group)}, '')" if group else x
    if decimal != ".":
        text = f"replace({text}, {lit(decimal)}, '.')"
    return f"CASE WHEN regexp_full_match({x}, {lit(_pattern(decimal, group, fraction))}) THEN {text} END"


def described(spec: FieldSpec, fraction: bool) -> str:
    """The marks, as a reason says them: '"," as its decimal mark and "." between groups ...'."""
    decimal, group = spec.decimal_mark or ".", spec.group_mark
    said = [f"{NAMES[decimal]} as its decimal mark"] if fraction else []
    if group:
        said.append(f"{NAMES[group]} between groups of three digits")
    return " and ".join(said)


def expected(spec: FieldSpec, fraction: bool, plain_expected: str) -> str:
    """What a quarantine reason says a value must be: the type, and its marks where it has any."""
    return f"{plain_expected} written with {described(spec, fraction)}" if marked(spec) else plain_expected


def guarded_cast(x: str, spec: FieldSpec, fraction: bool, cast: Callable[[str], str]) -> str:
    return cast(plain(x, spec, fraction)) if marked(spec) else cast(x)


def guarded_explain(x: str, spec: FieldSpec, fraction: bool, kind: str, explain: Callable[[str], str]) -> str:
    if not marked(spec):
        return explain(x)
    decimal, group = spec.decimal_mark or ".", spec.group_mark
    pattern = lit(_pattern(decimal, group, fraction))
    return (
        f"CASE WHEN NOT regexp_full_match({x}, {pattern}) "
        f"THEN {lit(f'not {kind} written with {described(spec, fraction)}')} ELSE {explain(plain(x, spec, fraction))} END"
    )
