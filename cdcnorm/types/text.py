from __future__ import annotations

from cdcnorm.types.base import FieldType


class TextType(FieldType):
    """Text as read; ``max_length`` (or ``text(n)``) rejects longer values instead of cutting them."""

    name = "text"
    free_text = True

    @classmethod
    def parse_params(cls, params: list[int]) -> list[int]:
        if len(params) > 1 or any(p < 1 for p in params):
            raise ValueError("text takes at most one positive parameter, its maximum length: text(40)")
        return params

    @property
    def max_length(self) -> int | None:
        return self.spec.max_length or (self.params[0] if self.params else None)

    def describe(self) -> str:
        return f"text({self.max_length})" if self.max_length else "text"

    def cast(self, x: str) -> str:
        if self.max_length:
            return f"CASE WHEN length({x}) <= {self.max_length} THEN {x} END"
        return x

    @property
    def accepts_any(self) -> bool:
        return not self.max_length

    def explain(self, x: str) -> str:
        return f"'longer than {self.max_length} characters'"
