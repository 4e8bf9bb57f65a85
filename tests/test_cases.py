"""Golden case files per stage: tests/cases/<stage>/<case>/.

Each case holds ``mapping.yaml``, ``dumps/`` and ``expected/`` (the events,
quarantine and ledger that one ``convert`` run must write, byte for byte; the
run's files are named ``events/<table>.jsonl``, ``quarantine/<table>.jsonl``
and ``ledger.json`` here, whatever the run is called). The
expected files were derived by hand from the semantics in the stage module's
docstring and checked line by line; ``CDCNORM_UPDATE_GOLDEN=1`` rewrites them
from the current output for review when a case is added.
"""

from __future__ import annotations

import json
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


def _one_run(landing: Path, into: Path) -> None:
    """The run's files under names that do not depend on the run's id."""
    (record,) = [json.loads(p.read_text()) for p in (landing / "runs").glob("*.json")]
    for folder in ("events", "quarantine"):
        for table_dir in sorted((landing / folder).glob("*")):
            (run_file,) = table_dir.iterdir()
            target = into / folder / f"{table_dir.name}{''.join(run_file.suffixes)}"
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(run_file.read_bytes())
    (into / "ledger.json").write_text(json.dumps(record["ledger"], indent=2) + "\n")


@pytest.mark.parametrize("case", ALL, ids=[f"{p.parent.name}/{p.name}" for p in ALL])
def test_case(case: Path, tmp_path: Path) -> None:
    landing = tmp_path / "landing"
    dumps = sorted((case / "dumps").iterdir())
    run(load_mappings(case / "mapping.yaml"), dumps, Options(out=landing))
    out = tmp_path / "out"
    _one_run(landing, out)
    expected = case / "expected"
    if os.environ.get("CDCNORM_UPDATE_GOLDEN"):
        shutil.rmtree(expected, ignore_errors=True)
        shutil.copytree(out, expected)
    assert _files(out) == _files(expected)
