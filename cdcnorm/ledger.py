"""The row ledger: every row read has exactly one fate, in one run and across runs.

Per table and per file, a flow: ``read`` + ``pending_in`` (before-images that
earlier runs left waiting, carried into this one) = ``emitted`` + ``merged`` (a
before-image folded into its upsert) + ``duplicate`` + ``quarantined`` +
``pending`` (before-images this run leaves waiting for their after-image);
plus the events written (``upserts``, ``deletes``) and ``unpaired_after``
(after-images with no before-image, emitted as upserts). A waiting image
paired in a later run counts there as emitted (the delete of a key change) or
merged, so the runs' counts add up to one run's. ``convert`` checks the
balance and says so.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from cdcnorm.plan import Plan

FATES = ("emitted", "merged", "duplicate", "quarantined", "pending")
COUNTS = ("read", "pending_in", *FATES, "upserts", "deletes", "unpaired_after")
RULE = "read + pending_in = emitted + merged + duplicate + quarantined + pending"


@dataclass
class FileCounts:
    read: int = 0
    pending_in: int = 0
    emitted: int = 0
    merged: int = 0
    duplicate: int = 0
    quarantined: int = 0
    pending: int = 0
    upserts: int = 0
    deletes: int = 0
    unpaired_after: int = 0

    @property
    def balanced(self) -> bool:
        return (
            self.read + self.pending_in
            == self.emitted + self.merged + self.duplicate + self.quarantined + self.pending
        )

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
            "rule": RULE,
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
    rows are duplicates, conflicts (quarantined) or kept; kept before-images
    (this run's and those carried in) are merged (paired, same key), emitted
    (paired, key changed: a delete), pending, or settled (quarantined); every
    other kept row is emitted as one event. With ``change.images`` a record
    holds both images: an update's row is emitted once, and a key change gives
    it a delete event too.
    """
    change = plan.mapping.mapping.change
    one_record = change.images is not None  # a record holding both images pairs with itself
    paired_mode = change.updates == "paired" and not one_record

    def fc(file_id: int) -> FileCounts:
        return ledger.files.setdefault(ids[file_id], FileCounts())

    kept: dict[tuple[int, str], int] = {}
    for file_id, act, ok, n in rows(
        f"SELECT __file, __act, __ok, count(*) FROM {plan.rel('typed')} GROUP BY ALL"
    ):
        if ok:
            kept[(file_id, act)] = kept.get((file_id, act), 0) + int(n)
        else:
            fc(file_id).quarantined += int(n)
    for file_id, act, fate, n in rows(
        f"SELECT __file, __act, __fate, count(*) FROM {plan.rel('fates')} GROUP BY ALL"
    ):
        kept[(file_id, act)] -= int(n)
        if fate == "duplicate":
            fc(file_id).duplicate += int(n)
        else:
            fc(file_id).quarantined += int(n)
    for file_id, n in rows(f"SELECT __file, count(*) FROM {plan.rel('carried')} GROUP BY ALL"):
        fc(file_id).pending_in += int(n)
        kept[(file_id, "before")] = kept.get((file_id, "before"), 0) + int(n)
    for file_id, act, n in rows(f"SELECT __file, __act, count(*) FROM {plan.rel('unpairable')} GROUP BY ALL"):
        kept[(file_id, act)] -= int(n)  # an ambiguous pairing: quarantined
        fc(file_id).quarantined += int(n)
    merged: dict[int, int] = {}
    rekeyed: dict[int, int] = {}
    for file_id, same_key, n in rows(f"SELECT bf, same_key, count(*) FROM {plan.rel('pairs')} GROUP BY ALL"):
        (merged if same_key else rekeyed)[file_id] = int(n)
    after_paired = dict(rows(f"SELECT af, count(*) FROM {plan.rel('pairs')} WHERE NOT ghost GROUP BY ALL"))
    waiting: dict[tuple[int, bool], int] = {
        (int(f), bool(s)): int(n)
        for f, s, n in rows(f"SELECT __file, __settled, count(*) FROM {plan.rel('waiting')} GROUP BY ALL")
    }
    for file_id in {f for f, _ in kept} | set(merged) | set(rekeyed):
        c = fc(file_id)

        def k(act: str, file_id: int = file_id) -> int:
            return kept.get((file_id, act), 0)

        # with images, a key change is one row (emitted) that gives two events: no before row of
        # its own is merged or emitted
        rows_of_befores = 0 if one_record else 1
        c.merged += merged.get(file_id, 0) * rows_of_befores
        c.pending += waiting.get((file_id, False), 0)
        c.quarantined += waiting.get((file_id, True), 0)
        c.emitted += (
            k("insert") + k("snapshot") + k("after") + k("delete") + rekeyed.get(file_id, 0) * rows_of_befores
        )
        c.upserts += k("insert") + k("snapshot") + k("after")
        c.deletes += k("delete") + rekeyed.get(file_id, 0)
        if paired_mode or one_record:
            c.unpaired_after += k("after") - int(after_paired.get(file_id, 0))


def reason_counts(rejected_relation: str) -> str:
    return f"SELECT r.reason, count(*) FROM (SELECT unnest(reasons) AS r FROM {rejected_relation}) GROUP BY r.reason"
