"""Run records (``runs/<run>.json``): what each run read, with which options, and its ledger."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

RUNS = "runs"


def records(root: Path) -> list[dict[str, Any]]:
    """The committed runs, in run order."""
    folder = root / RUNS
    if not folder.is_dir():
        return []
    out = []
    for path in sorted(folder.glob("*.json")):
        data: dict[str, Any] = json.loads(path.read_text(encoding="utf-8"))
        out.append(data)
    return out


def committed(root: Path) -> set[str]:
    folder = root / RUNS
    return {p.stem for p in folder.glob("*.json")} if folder.is_dir() else set()


def checksums(root: Path) -> dict[str, str]:
    """sha256 -> the run that converted an input with it."""
    seen: dict[str, str] = {}
    for rec in records(root):
        for item in rec.get("inputs", []):
            seen.setdefault(item["sha256"], rec["run"])
    return seen


def summary(rec: dict[str, Any]) -> dict[str, Any]:
    total = rec["ledger"]["total"]
    return {
        "run": rec["run"],
        "finished": rec["finished"],
        "inputs": len(rec["inputs"]),
        "skipped": len(rec.get("skipped", [])),
        "settle": rec.get("options", {}).get("settle"),
        **{
            k: total[k]
            for k in ("read", "pending_in", "emitted", "merged", "duplicate", "quarantined", "pending")
        },
        "waiting": rec.get("waiting", total["pending"]),  # images waiting in the whole area afterwards
    }
