"""Load and validate the mapping files of a folder.

Errors name the file, the line of the offending key, what was expected and
what was found, and suggest the closest valid key or type.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml
from pydantic import BaseModel, ValidationError

from cdcnorm import types
from cdcnorm.errors import MappingError, closest, did_you_mean
from cdcnorm.mapping.model import FieldSpec, Located, Mapping
from cdcnorm.types.base import FieldType


@dataclass(frozen=True)
class LoadedMapping:
    mapping: Mapping
    path: Path
    field_types: dict[str, FieldType]
    field_lines: dict[str, int] = field(default_factory=dict)  # field -> line in the mapping file

    @property
    def table(self) -> str:
        return self.mapping.table

    def name_taken(self, field: str, message: str, expected: str) -> MappingError:
        """The error for a field whose name a column cdcnorm adds to an output needs (apply's
        tables, the state files): file and line, and the rename that keeps its raw column."""
        source = self.mapping.fields[field].from_ or field
        return MappingError(
            message,
            file=str(self.path),
            line=self.field_lines.get(field),
            field=field,
            expected=expected,
            found=field,
            hint=f"rename the field, keeping its raw column with from: (e.g. {field}_1: {{from: {json.dumps(source)}}})",
        )


def _lines(node: yaml.Node, path: tuple[Any, ...], out: dict[tuple[Any, ...], int]) -> None:
    out[path] = node.start_mark.line + 1
    if isinstance(node, yaml.MappingNode):
        for k, v in node.value:
            key = k.value
            out[(*path, key)] = k.start_mark.line + 1
            _lines(v, (*path, key), out)
    elif isinstance(node, yaml.SequenceNode):
        for i, v in enumerate(node.value):
            _lines(v, (*path, i), out)


def repeated_key(node: yaml.Node, path: tuple[Any, ...] = ()) -> tuple[tuple[Any, ...], int, int] | None:
    """The first key a YAML mapping in ``node`` states twice: (its path, the line of its first
    and of its second statement). YAML requires a mapping's keys to be unique (YAML 1.2, section
    3.2.1.1, from memory), but the loader keeps the last value without a word."""
    if isinstance(node, yaml.MappingNode):
        first: dict[Any, int] = {}
        for k, v in node.value:
            if not isinstance(k, yaml.ScalarNode) or k.tag == "tag:yaml.org,2002:merge":
                continue
            line = k.start_mark.line + 1
            if k.value in first:
                return (*path, k.value), first[k.value], line
            first[k.value] = line
            found = repeated_key(v, (*path, k.value))
            if found:
                return found
    elif isinstance(node, yaml.SequenceNode):
        for i, v in enumerate(node.value):
            found = repeated_key(v, (*path, i))
            if found:
                return found
    return None


def _model_keys(model: type[BaseModel]) -> list[str]:
    return [f.alias or name for name, f in model.model_fields.items()]


def _submodel(loc: tuple[Any, ...]) -> type[BaseModel] | None:
    """The pydantic model that owns the keys at ``loc`` (for did-you-mean suggestions)."""
    from cdcnorm.mapping import model as m

    current: type[BaseModel] | None = Mapping
    i = 0
    while current is not None and i < len(loc):
        part = loc[i]
        if current is Mapping and part == "fields":
            if i + 1 < len(loc):
                i += 2
                current = FieldSpec
                continue
            return None
        field = current.model_fields.get(str(part))
        if field is None:
            return current
        ann = field.annotation
        nxt = None
        for cand in (
            m.ChangeSpec,
            m.ActionSpec,
            m.PositionSpec,
            m.SequenceSpec,
            m.CommittedAtSpec,
            m.CsvOptions,
        ):
            if ann is cand or (hasattr(ann, "__args__") and cand in getattr(ann, "__args__", ())):
                nxt = cand
        if nxt is None:
            return current
        current = nxt
        i += 1
    return current


def _clean_loc(loc: tuple[Any, ...]) -> tuple[Any, ...]:
    # pydantic puts the model's name into locations inside the fields mapping
    return tuple(p for p in loc if p != "FieldSpec")


#: YAML's safe loader, libyaml's when PyYAML has it (the same documents, about 10x faster than
#: the pure-Python one, which cost 20 ms a mapping file)
_LOADER: Any = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


def parse_yaml(text: str) -> tuple[yaml.Node | None, Any]:
    """One parse of a YAML document: its nodes (for line numbers and repeated keys) and the data
    built from them. yaml.YAMLError where it is not YAML."""
    loader = _LOADER(text)
    try:
        node = loader.get_single_node()
        return node, (loader.construct_document(node) if node is not None else None)
    finally:
        loader.dispose()


def load_mapping(path: Path) -> LoadedMapping:
    text_name = str(path)
    try:
        raw_text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as e:
        raise MappingError(f"cannot read mapping file: {e}", file=text_name) from None
    try:
        node, data = parse_yaml(raw_text)
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        raise MappingError(
            f"not valid YAML: {getattr(e, 'problem', e)}",
            file=text_name,
            line=(mark.line + 1) if mark else None,
        ) from None
    if not isinstance(data, dict):
        raise MappingError(
            "a mapping file must be a YAML mapping with keys table, files, key, change, fields",
            file=text_name,
            line=1,
            found=type(data).__name__,
        )
    lines: dict[tuple[Any, ...], int] = {}
    if node is not None:
        _lines(node, (), lines)
        repeated = repeated_key(node)
        if repeated is not None:
            where, first, second = repeated
            key = ".".join(map(str, where))
            raise MappingError(
                f"the key {key} is stated twice (lines {first} and {second}): which one is meant is unclear",
                file=text_name,
                line=second,
                field=key,
                hint="keep one of them",
            )
    try:
        mapping = Mapping.model_validate(data)
    except ValidationError as e:
        errors = e.errors()
        # a misspelt key is both an unknown key and a missing one: report the unknown key
        err = next((x for x in errors if x["type"] == "extra_forbidden"), errors[0])
        loc = _clean_loc(tuple(err["loc"]))
        cause = err.get("ctx", {}).get("error")
        if isinstance(cause, Located):  # a whole-mapping check about one key: that key and its line
            loc = (*loc, *cause.loc)
        line = None
        for n in range(len(loc), -1, -1):
            if loc[:n] in lines:
                line = lines[loc[:n]]
                break
        key = ".".join(str(p) for p in loc) or "(top level)"
        hint = None
        if err["type"] == "extra_forbidden" and loc:
            owner = _submodel(loc[:-1])
            if owner is not None:
                hint = f"valid keys here: {', '.join(_model_keys(owner))}{did_you_mean(str(loc[-1]), _model_keys(owner))}"
            if str(loc[-1]).endswith(")"):
                hint = (
                    'inside {...} a comma splits keys: quote a type with a comma, e.g. type: "decimal(12,2)"'
                )
        elif err["type"] == "missing":
            hint = f"add the key {loc[-1]!r}"
        found = err.get("input")
        message = err["msg"]
        # our own checks' words, without pydantic's "Value error, " before them
        if err["type"] == "value_error" and cause is not None:
            message = str(cause)
        if isinstance(cause, Located):  # its own words and value, not the whole mapping's
            message, found, hint = str(cause), cause.found, cause.hint
        if err["type"] == "literal_error" and isinstance(found, str):
            # one of a few words (a position's kind, an action): the nearest of them
            guess = closest(found, re.findall(r"'([^']*)'", str(err.get("ctx", {}).get("expected", ""))))
            hint = f'did you mean "{guess}"?' if guess else None
        raise MappingError(
            f"invalid key {key}: {message}",
            file=text_name,
            line=line,
            field=key,
            found=None if err["type"] in ("missing",) or found is None else repr(found)[:200],
            hint=hint,
        ) from None
    seen: dict[str, str] = {}
    for name in mapping.fields:
        other = seen.setdefault(name.lower(), name)
        if other != name:
            raise MappingError(
                f"fields {other} and {name} differ only in case",
                file=text_name,
                line=lines.get(("fields", name)),
                field=f"fields.{name}",
                expected="field names that differ in more than case: the envelope's Parquet structs, "
                "DuckDB and SQLite take such names as one",
                found=name,
                hint=f"rename one of them, keeping its raw column with from: (e.g. {name}_2: {{from: {name}}})",
            )
    field_types: dict[str, FieldType] = {}
    for name, spec in mapping.fields.items():
        try:
            field_types[name] = types.resolve(spec)
        except ValueError as e:
            raise MappingError(
                str(e),
                file=text_name,
                line=lines.get(("fields", name, "type"), lines.get(("fields", name))),
                field=f"fields.{name}",
                expected=", ".join(types.TYPES),
                found=spec.type,
            ) from None
        if spec.encoding and field_types[name].name != "bytes":
            raise MappingError(
                "encoding applies to bytes fields only",
                file=text_name,
                line=lines.get(("fields", name, "encoding")),
                field=f"fields.{name}.encoding",
            )
        if spec.zone and field_types[name].name != "timestamp":
            raise MappingError(
                "zone applies to timestamp fields only",
                file=text_name,
                line=lines.get(("fields", name, "zone")),
                field=f"fields.{name}.zone",
            )
    field_lines = {name: lines.get(("fields", name), 0) for name in mapping.fields}
    return LoadedMapping(mapping=mapping, path=path, field_types=field_types, field_lines=field_lines)


def load_mappings(folder: Path) -> list[LoadedMapping]:
    """Every ``*.yaml``/``*.yml`` mapping in ``folder`` (or one file), sorted by table name."""
    if folder.is_file():
        paths = [folder]
    elif folder.is_dir():
        paths = sorted([*folder.glob("*.yaml"), *folder.glob("*.yml")])
    else:
        raise MappingError("mappings folder does not exist", file=str(folder))
    if not paths:
        raise MappingError("no mapping files (*.yaml) in this folder", file=str(folder))
    loaded = [load_mapping(p) for p in paths]
    seen: dict[str, LoadedMapping] = {}
    for lm in loaded:
        other = seen.get(lm.table.lower())
        if other is not None and other.table == lm.table:
            raise MappingError(
                f"table {lm.table} is declared twice (also in {other.path})", file=str(lm.path), line=1
            )
        if other is not None:
            raise MappingError(
                f"tables {other.table} ({other.path}) and {lm.table} differ only in case",
                file=str(lm.path),
                line=1,
                expected="table names that differ in more than case: the landing area's folders (on "
                "file systems that ignore case), DuckDB and SQLite take such names as one",
                found=lm.table,
            )
        seen[lm.table.lower()] = lm
    return sorted(loaded, key=lambda m: m.table)
