"""What a field type provides to the plan.

A type turns a raw text expression into a typed one with a *guarded* cast: the
cast yields NULL whenever the text is not a valid value of the type, so
``raw IS NOT NULL AND typed IS NULL`` is exactly the set of bad values, and
nothing is ever rounded, truncated or wrapped silently. ``explain`` is only
evaluated for bad values and says what is wrong with one.
"""

from __future__ import annotations

from typing import ClassVar

from cdcnorm.mapping.model import FieldSpec


class FieldType:
    name: ClassVar[str]
    #: DuckDB type of the typed value (the native Parquet/Arrow type follows it).
    sql_type: str = "VARCHAR"
    #: Whether the canonical text may hold any character (text, json): the content digest then
    #: frames it by its length; any other type's never holds a ``;``.
    free_text: ClassVar[bool] = False

    def __init__(self, spec: FieldSpec, params: list[int]) -> None:
        self.spec = spec
        self.params = params

    @classmethod
    def parse_params(cls, params: list[int]) -> list[int]:
        """Validate the type's parameters; raise ValueError with a readable message."""
        if params:
            raise ValueError(f"type {cls.name} takes no parameters")
        return params

    def describe(self) -> str:
        return self.name

    def expected(self) -> str:
        """What a raw text must be, as a quarantine reason's ``expected`` says it."""
        return self.describe()

    def value_type(self) -> str:
        """The spelling of the values' type alone, which ``types.resolve`` reads back: what a
        run record states of each field, to read events written under another mapping. Options
        that only say how raw text is read (a zone, an encoding) are not part of it."""
        return self.describe()

    def cast(self, x: str) -> str:
        """SQL: the typed value of raw text ``x``, NULL when invalid."""
        raise NotImplementedError

    @property
    def accepts_any(self) -> bool:
        """Whether every text is a valid value (``cast`` is ``x`` itself): no check is planned."""
        return False

    def explain(self, x: str) -> str:
        """SQL: why raw text ``x`` is not a valid value (only evaluated when it is not)."""
        return "'not a valid " + self.describe() + "'"

    def fine(self, x: str) -> str | None:
        """SQL: raw text ``x`` (valid) had digits below the microsecond that ``sub_microsecond``
        rounded or cut, which convert notes; None when the type reads none so."""
        return None

    def render(self, v: str) -> str:
        """SQL: the JSON form of typed value ``v`` (a string, number, boolean or JSON value)."""
        return v

    def canonical(self, v: str) -> str:
        """SQL: the text of non-NULL typed value ``v`` in the content digest (``Plan.content``): its
        JSON form as text. Landing areas store the digest: a change here needs a new index format."""
        return f"CAST({self.render(v)} AS VARCHAR)"

    @property
    def form_type(self) -> str:
        """The engine type a JSON reader is told to read the rendered form as (events read back)."""
        return self.sql_type

    def unrender(self, v: str) -> str:
        """SQL: the typed value of ``v``, the rendered form read as ``form_type``: ``render``'s inverse."""
        return v


#: An offset out of range, the last part a value of the right shape can have wrong.
OFFSET_OUT_OF_RANGE = "'offset out of range (-23:59 to +23:59)'"


def out_of_range(x: str, shaped: str, checks: list[tuple[int, str, str, str]]) -> str:
    """SQL: CASE branches naming the part out of range of a time or timestamp text ``x`` of the
    right shape (``shaped``, SQL): for each check (position, part, test, why), the two characters
    at that position failing the test give ``<part> <value><why>``; then the offset."""
    branches = "".join(
        f"WHEN {shaped} AND substr({x}, {at}, 2) {test} THEN '{part} ' || substr({x}, {at}, 2) || '{why}' "
        for at, part, test, why in checks
    )
    return f"{branches}WHEN {shaped} THEN {OFFSET_OUT_OF_RANGE} "
