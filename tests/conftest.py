"""Helpers shared by the tests: run conversions on small files written to a temporary folder."""

from __future__ import annotations

import json
import textwrap
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

from cdcnorm.cli import main
from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, Result, run

ROOT = Path(__file__).resolve().parent.parent


@dataclass
class Converted:
    result: Result
    out: Path

    def events(self, table: str) -> list[dict[str, Any]]:
        path = self.out / "events" / f"{table}.jsonl"
        return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]

    def quarantine(self, table: str) -> list[dict[str, Any]]:
        path = self.out / "quarantine" / f"{table}.jsonl"
        if not path.exists():
            return []
        return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]

    def ledger(self) -> dict[str, Any]:
        data: dict[str, Any] = json.loads((self.out / "ledger.json").read_text())
        return data


def write_files(folder: Path, files: dict[str, str | bytes]) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, content in files.items():
        p = folder / name
        if isinstance(content, bytes):
            p.write_bytes(content)
        else:
            p.write_bytes(content.encode("utf-8"))
        paths.append(p)
    return paths


ConvertFn = Callable[..., Converted]


@pytest.fixture
def convert(tmp_path: Path) -> ConvertFn:
    """convert(mapping_yaml, {file name: content}, **options) -> Converted."""
    counter = {"n": 0}

    def _convert(mapping: str | dict[str, str], files: dict[str, str | bytes], **opts: Any) -> Converted:
        counter["n"] += 1
        base = tmp_path / f"run{counter['n']}"
        mdir = base / "mappings"
        mdir.mkdir(parents=True)
        mappings = mapping if isinstance(mapping, dict) else {"table.yaml": mapping}
        for name, text in mappings.items():
            (mdir / name).write_text(textwrap.dedent(text))
        paths = write_files(base / "dumps", files)
        out = base / "out"
        options = Options(out=out, **opts)
        result = run(load_mappings(mdir), paths, options)
        return Converted(result, out)

    return _convert


def cli(*args: str) -> int:
    return main(list(args))
