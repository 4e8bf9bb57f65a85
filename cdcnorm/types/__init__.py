"""Field types, one file each, looked up by name (see DEVELOPERS.md, "Adding a type")."""

from __future__ import annotations

import re

from cdcnorm.errors import did_you_mean
from cdcnorm.mapping.model import FieldSpec
from cdcnorm.types.base import FieldType
from cdcnorm.types.boolean import BooleanType
from cdcnorm.types.bytes import BytesType
from cdcnorm.types.date import DateType
from cdcnorm.types.decimal import DecimalType
from cdcnorm.types.float import FloatType
from cdcnorm.types.integer import IntegerType
from cdcnorm.types.json import JsonType
from cdcnorm.types.text import TextType
from cdcnorm.types.time import TimeType
from cdcnorm.types.timestamp import TimestampType
from cdcnorm.types.uuid import UuidType

TYPES: dict[str, type[FieldType]] = {
    t.name: t
    for t in (
        IntegerType,
        DecimalType,
        FloatType,
        BooleanType,
        DateType,
        TimeType,
        TimestampType,
        TextType,
        BytesType,
        UuidType,
        JsonType,
    )
}

_SPELLING = re.compile(r"^\s*([A-Za-z_][A-Za-z0-9_-]*)\s*(?:\(\s*([0-9 ,]*)\s*\))?\s*$")


def resolve(spec: FieldSpec) -> FieldType:
    """The type object for a field spec; ValueError with a readable message otherwise."""
    m = _SPELLING.match(spec.type)
    if not m:
        raise ValueError(f'"{spec.type}" is not a type; write e.g. integer, text, decimal(12,2)')
    name = m.group(1).lower()
    if name not in TYPES:
        raise ValueError(
            f'unknown type "{m.group(1)}"{did_you_mean(name, TYPES)}; types are {", ".join(TYPES)}'
        )
    raw = m.group(2)
    try:
        params = [int(p) for p in raw.split(",")] if raw and raw.strip() else []
    except ValueError:
        raise ValueError(f'"{spec.type}": parameters must be whole numbers') from None
    cls = TYPES[name]
    return cls(spec, cls.parse_params(params))


__all__ = ["TYPES", "FieldType", "resolve"]
