"""Diagnostics: references that cannot be resolved are reported, never guessed or dropped."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

REASONS = (
    "ambiguous",
    "unknown table",
    "not in schema",
    "star over unknown sources",
    "parse error",
    "unsupported",
    "cycle",
    "duplicate model",
    "inferred",
)
#: Reasons that are notes, not gaps: the answer is complete, with an assumption it names.
NOTES = ("inferred",)


@dataclass(frozen=True)
class Diagnostic:
    file: str
    line: int | None
    model: str
    reason: str
    reference: str
    candidates: tuple[str, ...] = field(default_factory=tuple)

    @property
    def unresolved(self) -> bool:
        return self.reason not in NOTES

    def render(self) -> str:
        where = f"{self.file}:{self.line}" if self.line else self.file
        cand = f" (candidates: {', '.join(self.candidates)})" if self.candidates else ""
        return f"{where}: {self.model}: {self.reason}: {self.reference}{cand}"

    def as_dict(self) -> dict[str, Any]:
        return {
            "file": self.file,
            "line": self.line,
            "model": self.model,
            "reason": self.reason,
            "reference": self.reference,
            "candidates": list(self.candidates),
        }
