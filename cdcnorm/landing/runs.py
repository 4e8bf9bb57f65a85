"""Run records (``runs/<run>.json``): what each run read, with which options, and its ledger."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from cdcnorm.errors import InputError

RUNS = "runs"


def records(root: Path) -> list[dict[str, Any]]:
    """The committed runs, in run order."""
    folder = root / RUNS
    if not folder.is_dir():
        return []
    out = []
    for path in sorted(folder.glob("*.json")):
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as e:
            line = e.lineno if isinstance(e, json.JSONDecodeError) else None
            raise _damaged(path, f"not JSON ({e})", line) from None
        if not isinstance(data, dict) or data.get("run") != path.stem:
            raise _damaged(path, f'not the record of run {path.stem} (its "run" member names another)', None)
        lacking = [k for k, kind in (("inputs", list), ("ledger", dict)) if not isinstance(data.get(k), kind)]
        if lacking or "total" not in data["ledger"]:
            raise _damaged(path, f"a record without {' and '.join(lacking or ['its ledger total'])}", None)
        out.append(data)
    return out


def _damaged(path: Path, found: str, line: int | None) -> InputError:
    run = path.stem
    return InputError(
        f"the run record of {run} is damaged or cut short",
        file=str(path),
        line=line,
        expected="the record convert writes last when it commits a run (JSON)",
        found=found,
        hint=f"restore it from a copy; or undo the run: remove its record and every file named {run}.* "
        "under events/, quarantine/ and index/ (its inputs are then converted again); or start the "
        "area anew: convert every dump with --replace (the area stays as it is unless that run commits)",
    )


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
