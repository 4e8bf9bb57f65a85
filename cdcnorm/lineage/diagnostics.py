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
    "refused by the engine",
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
    #: the tables (or CTEs, derived tables) a column without a table name was looked for in
    searched: tuple[str, ...] = field(default_factory=tuple)

    @property
    def unresolved(self) -> bool:
        return self.reason not in NOTES

    def render(self) -> str:
        return rendered(self.as_dict())

    def as_dict(self) -> dict[str, Any]:
        return {
            "file": self.file,
            "line": self.line,
            "model": self.model,
            "reason": self.reason,
            "reference": self.reference,
            "candidates": list(self.candidates),
            "searched": list(self.searched),
        }


def rendered(d: dict[str, Any]) -> str:
    """One diagnostic (``as_dict``'s form) as a line: where, the model, the reason, the reference,
    and, where known, the tables searched and the closest names."""
    where = f"{d['file']}:{d['line']}" if d["line"] else d["file"]
    notes = [f"in none of {', '.join(d['searched'])}"] if d.get("searched") else []
    notes += [f"candidates: {', '.join(d['candidates'])}"] if d.get("candidates") else []
    more = f" ({'; '.join(notes)})" if notes else ""
    return f"{where}: {d['model']}: {d['reason']}: {d['reference']}{more}"
