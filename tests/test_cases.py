"""Golden case files per stage: tests/cases/<stage>/<case>/.

Each case holds ``mapping.yaml``, ``dumps/`` and ``expected/`` (the events,
quarantine and ledger that ``convert`` must write, byte for byte). The
expected files were derived by hand from the semantics in the stage module's
docstring and checked line by line; ``CDCNORM_UPDATE_GOLDEN=1`` rewrites them
from the current output for review when a case is added.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, run

CASES = Path(__file__).parent / "cases"
ALL = sorted(p for p in CASES.glob("*/*") if (p / "mapping.yaml").exists())


def _files(folder: Path) -> dict[str, bytes]:
    return {
        p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()
    }


@pytest.mark.parametrize("case", ALL, ids=[f"{p.parent.name}/{p.name}" for p in ALL])
def test_case(case: Path, tmp_path: Path) -> None:
    out = tmp_path / "out"
    dumps = sorted((case / "dumps").iterdir())
    run(load_mappings(case / "mapping.yaml"), dumps, Options(out=out))
    expected = case / "expected"
    if os.environ.get("CDCNORM_UPDATE_GOLDEN"):
        shutil.rmtree(expected, ignore_errors=True)
        shutil.copytree(out, expected)
    assert _files(out) == _files(expected)
