"""The row ledger: every row read has exactly one fate.

Per table and per file: ``read`` = ``emitted`` + ``merged`` (a before-image
folded into its upsert) + ``duplicate`` + ``quarantined``, plus the events
written (``upserts``, ``deletes``) and ``unpaired_after`` (after-images with no
before-image, emitted as upserts). ``convert`` checks the balance and says so.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from cdcnorm.plan import Plan

FATES = ("emitted", "merged", "duplicate", "quarantined")
COUNTS = ("read", *FATES, "upserts", "deletes", "unpaired_after")


@dataclass
class FileCounts:
    read: int = 0
    emitted: int = 0
    merged: int = 0
    duplicate: int = 0
    quarantined: int = 0
    upserts: int = 0
    deletes: int = 0
    unpaired_after: int = 0

    @property
    def balanced(self) -> bool:
        return self.read == self.emitted + self.merged + self.duplicate + self.quarantined

    def add(self, other: FileCounts) -> None:
        for name in COUNTS:
            setattr(self, name, getattr(self, name) + getattr(other, name))

    def as_dict(self) -> dict[str, int]:
        return {name: getattr(self, name) for name in COUNTS}


@dataclass
class TableLedger:
    table: str
    files: dict[str, FileCounts] = field(default_factory=dict)
    reasons: dict[str, int] = field(default_factory=dict)

    @property
    def total(self) -> FileCounts:
        t = FileCounts()
        for c in self.files.values():
            t.add(c)
        return t

    @property
    def balanced(self) -> bool:
        return all(c.balanced for c in self.files.values()) and self.total.balanced


@dataclass
class Ledger:
    tables: dict[str, TableLedger] = field(default_factory=dict)

    @property
    def balanced(self) -> bool:
        return all(t.balanced for t in self.tables.values())

    @property
    def total(self) -> FileCounts:
        t = FileCounts()
        for tl in self.tables.values():
            t.add(tl.total)
        return t

    def as_dict(self) -> dict[str, Any]:
        return {
            "balanced": self.balanced,
            "rule": "read = emitted + merged + duplicate + quarantined",
            "total": self.total.as_dict(),
            "tables": {
                name: {
                    "total": t.total.as_dict(),
                    "balanced": t.balanced,
                    "reasons": dict(sorted(t.reasons.items())),
                    "files": {f: c.as_dict() for f, c in sorted(t.files.items())},
                }
                for name, t in sorted(self.tables.items())
            },
        }


def fate_counts(plan: Plan) -> str:
    """SQL: (__file, fate, n) over every row that reached the type stage."""
    return (
        "SELECT __file, fate, count(*) AS n FROM ("
        f"SELECT __file, 'quarantined' AS fate FROM {plan.rel('typed')} WHERE NOT __ok UNION ALL "
        f"SELECT __file, CASE WHEN __fate = 'duplicate' THEN 'duplicate' ELSE 'quarantined' END FROM {plan.rel('deduped')} "
        "WHERE __fate <> 'keep' UNION ALL "
        "SELECT __file, CASE __role WHEN 'merged' THEN 'merged' WHEN 'unpaired_before' THEN 'quarantined' "
        f"ELSE 'emitted' END FROM {plan.rel('paired')} UNION ALL "
        f"SELECT __file, 'unpaired_after' FROM {plan.rel('paired')} WHERE __unpaired_after UNION ALL "
        f"SELECT __file, CASE __action WHEN 'upsert' THEN 'upserts' ELSE 'deletes' END FROM {plan.rel('events')}"
        ") GROUP BY __file, fate"
    )


def reason_counts(rejected_relation: str) -> str:
    return (
        f"SELECT r.reason, count(*) FROM (SELECT unnest(reasons) AS r FROM {rejected_relation}) GROUP BY r.reason"
    )
