"""Every error cdcnorm raises on purpose, under one root.

Each error says where (file, line or row, field), what was expected and what
was found, and, for a misspelt name, the closest valid one. Each class carries
the process exit code the CLI uses for it; the codes are documented in the
README ("Exit codes").
"""

from __future__ import annotations

import difflib
import json
import time
from collections.abc import Iterable, Sequence

EXIT_OK = 0
EXIT_USAGE = 2
EXIT_MAPPING = 3
EXIT_INPUT = 4
EXIT_REJECTS = 5
EXIT_LEDGER = 6
EXIT_LINEAGE = 7
EXIT_BREAKS = 8
EXIT_BUSY = 9
EXIT_TARGET = 10
EXIT_INCOMPLETE = 11
EXIT_MEMORY = 12
EXIT_DISK = 13
#: ``apply --recheck``: the target differed from its events (repaired, unless --dry-run)
EXIT_DIFFERS = 14
#: 128 + SIGINT: what a shell reports for a process Ctrl-C stopped (common practice)
EXIT_INTERRUPTED = 130
#: the reader of the output went away (``| head``): 128 + SIGPIPE, as a shell reports a process that
#: signal ended (common practice)
EXIT_OUTPUT_CUT = 141


def closest(name: str, candidates: Iterable[str]) -> str | None:
    """The closest valid name to a misspelt one, or None when nothing is near."""
    pool = list(candidates)
    found = difflib.get_close_matches(name, pool, n=1, cutoff=0.6)
    if not found:
        lowered = {c.lower(): c for c in pool}
        found = difflib.get_close_matches(name.lower(), list(lowered), n=1, cutoff=0.6)
        return lowered[found[0]] if found else None
    return found[0]


def counted(n: int, noun: str) -> str:
    """``1 quarantined row``, ``1,234 quarantined rows``: a count for a message, the noun in the
    singular for one."""
    return f"{n:,} {noun}{'' if n == 1 else 's'}"


def per_second(n: int, since: float, noun: str = "row") -> str:
    """``1,234 rows/s`` since ``since`` (a ``time.perf_counter()``), for a progress line; empty
    until there is something to measure."""
    spent = time.perf_counter() - since
    return f"{n / spent:,.0f} {noun}s/s" if n and spent > 0.05 else ""


def first_of(names: Sequence[str], n: int = 5) -> str:
    """The first ``n`` of ``names``, comma-separated, and how many more: ``a, b and 3 more``."""
    return ", ".join(names[:n]) + (f" and {len(names) - n} more" if len(names) > n else "")


def name_list(names: Iterable[str]) -> str:
    """Names from a user's file, comma-separated for a message: each as it is, or in JSON quotes
    where it could not be told apart in the list (empty, spaces at an end, a comma, a quote or
    a control character)."""

    def shown(name: str) -> str:
        plain = name and name == name.strip() and not any(c in name for c in ",\"'") and name.isprintable()
        return name if plain else json.dumps(name, ensure_ascii=False)

    return ", ".join(map(shown, names))


def did_you_mean(name: str, candidates: Iterable[str]) -> str:
    guess = closest(name, candidates)
    return f' (did you mean "{guess}"?)' if guess else ""


class CdcnormError(Exception):
    """Root of every error cdcnorm raises on purpose."""

    exit_code = 1

    def __init__(
        self,
        message: str,
        *,
        file: str | None = None,
        line: int | None = None,
        field: str | None = None,
        expected: str | None = None,
        found: str | None = None,
        hint: str | None = None,
        details: dict[str, object] | None = None,
    ) -> None:
        self.message = message
        self.details = details or {}
        self.file = file
        self.line = line
        self.field = field
        self.expected = expected
        self.found = found
        self.hint = hint
        super().__init__(self.render())

    def render(self) -> str:
        where = ""
        if self.file:
            where = self.file + (f":{self.line}" if self.line else "")
        parts = [f"{where}: {self.message}" if where else self.message]
        if self.field:
            parts.append(f"  field: {self.field}")
        if self.expected is not None:
            parts.append(f"  expected: {self.expected}")
        if self.found is not None:
            parts.append(f"  found: {self.found}")
        if self.hint:
            parts.append(f"  hint: {self.hint}")
        return "\n".join(parts)

    def as_dict(self) -> dict[str, object]:
        return {
            "error": type(self).__name__,
            "message": self.message,
            "file": self.file,
            "line": self.line,
            "field": self.field,
            "expected": self.expected,
            "found": self.found,
            "hint": self.hint,
            "exit_code": self.exit_code,
            **self.details,
        }


class UsageError(CdcnormError):
    """The command line itself is wrong."""

    exit_code = EXIT_USAGE


class MappingError(CdcnormError):
    """A mapping file is invalid: bad YAML, an unknown key or type, a bad value."""

    exit_code = EXIT_MAPPING


class InputError(CdcnormError):
    """An input file cannot be used at all: unreadable, matches no mapping, unknown format."""

    exit_code = EXIT_INPUT


class DriftError(InputError):
    """A dump's columns no longer match its mapping (a mapped raw column is missing)."""


class RejectLimitError(CdcnormError):
    """More rows were quarantined than --max-rejects allows (outputs are still written)."""

    exit_code = EXIT_REJECTS


class LedgerError(CdcnormError):
    """Rows read do not equal the sum of their fates: a bug, never expected."""

    exit_code = EXIT_LEDGER


class LineageError(CdcnormError):
    """A lineage question cannot be answered: unknown column or model."""

    exit_code = EXIT_LINEAGE


class LandingBusyError(CdcnormError):
    """Another run holds the landing area's lock longer than --wait."""

    exit_code = EXIT_BUSY


class GraphvizMissing(CdcnormError):
    """The Graphviz `dot` program is needed for SVG/PNG but is not installed."""

    exit_code = EXIT_USAGE


class EngineMemoryError(CdcnormError):
    """The engine cannot do a step within the memory limit, even spilling to disk."""

    exit_code = EXIT_MEMORY


class DiskSpaceError(CdcnormError):
    """The disk is full, or the engine's spill files reached --spill-limit (nothing is committed)."""

    exit_code = EXIT_DISK


class InterruptedRun(CdcnormError):
    """Ctrl-C: the message says what the command leaves (``cli.INTERRUPTED``)."""

    exit_code = EXIT_INTERRUPTED


class TargetError(CdcnormError):
    """The target database cannot be reached or refuses a statement (never shows a password)."""

    exit_code = EXIT_TARGET
