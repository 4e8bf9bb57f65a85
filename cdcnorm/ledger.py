"""The row ledger: every row read has exactly one fate.

Per table and per file: ``read`` = ``emitted`` + ``merged`` (a before-image
folded into its upsert) + ``duplicate`` + ``quarantined``, plus the events
written (``upserts``, ``deletes``) and ``unpaired_after`` (after-images with no
before-image, emitted as upserts). ``convert`` checks the balance and says so.
"""

from __future__ import annotations

from collections.abc import Callable
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


def count_fates(
    plan: Plan, rows: Callable[[str], list[tuple[Any, ...]]], ledger: TableLedger, ids: dict[int, str]
) -> None:
    """Fill each file's fates from small aggregates of the plan's materialised steps.

    Rows that reach the type stage are either bad (quarantined) or good; good
    rows are duplicates, conflicts (quarantined) or kept; kept before-images are
    merged (paired, same key), emitted (paired, key changed: a delete) or
    unpaired (quarantined); every other kept row is emitted as one event.
    """
    paired_mode = plan.mapping.mapping.change.updates == "paired"
    kept: dict[tuple[int, str], int] = {}
    for file_id, act, ok, n in rows(
        f"SELECT __file, __act, __ok, count(*) FROM {plan.rel('typed')} GROUP BY ALL"
    ):
        fc = ledger.files[ids[file_id]]
        if ok:
            kept[(file_id, act)] = kept.get((file_id, act), 0) + int(n)
        else:
            fc.quarantined += int(n)
    for file_id, act, fate, n in rows(
        f"SELECT __file, __act, __fate, count(*) FROM {plan.rel('repeat_fates')} WHERE __fate <> 'keep' GROUP BY ALL"
    ):
        fc = ledger.files[ids[file_id]]
        kept[(file_id, act)] -= int(n)
        if fate == "duplicate":
            fc.duplicate += int(n)
        else:
            fc.quarantined += int(n)
    merged: dict[int, int] = {}
    rekeyed: dict[int, int] = {}
    for file_id, same_key, n in rows(f"SELECT bf, same_key, count(*) FROM {plan.rel('pairs')} GROUP BY ALL"):
        (merged if same_key else rekeyed)[file_id] = int(n)
    after_paired = dict(rows(f"SELECT af, count(*) FROM {plan.rel('pairs')} GROUP BY ALL"))
    for file_id, name in ids.items():
        fc = ledger.files[name]

        def k(act: str, file_id: int = file_id) -> int:
            return kept.get((file_id, act), 0)

        befores = k("before")
        lonely = befores - merged.get(file_id, 0) - rekeyed.get(file_id, 0)
        fc.merged += merged.get(file_id, 0)
        fc.quarantined += lonely
        fc.emitted += k("insert") + k("snapshot") + k("after") + k("delete") + rekeyed.get(file_id, 0)
        fc.upserts += k("insert") + k("snapshot") + k("after")
        fc.deletes += k("delete") + rekeyed.get(file_id, 0)
        if paired_mode:
            fc.unpaired_after += k("after") - int(after_paired.get(file_id, 0))


def reason_counts(rejected_relation: str) -> str:
    return f"SELECT r.reason, count(*) FROM (SELECT unnest(reasons) AS r FROM {rejected_relation}) GROUP BY r.reason"
