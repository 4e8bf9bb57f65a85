"""The dumps of one table's changes in every form a database writes (``tests/bench/bench_forms.py``:
PostgreSQL's COPY text format, MySQL's ``INTO OUTFILE ... ENCLOSED BY``, plain text as a bulk-copy
export writes it) convert to the same events as the same values written as RFC 4180 CSV, over the
benchmark's realistic dump (quotes, commas, LF and CRLF in values, Unicode, NULLs and empty texts,
dirty values, overlap and late rows). Each form is written by its own rules, not by cdcnorm."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from tests.conftest import ROOT, bench_dump, cli, last_run

sys.path.insert(0, str(ROOT / "tests" / "bench"))
import bench_forms


@pytest.fixture(scope="module")
def forms(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[Path, Path]]:
    work = tmp_path_factory.mktemp("forms")
    _, dumps = bench_dump(work, 20_000)
    (work / "mappings").mkdir()
    (work / "mappings" / "deliveries.yaml").write_text(bench_forms.dumpgen.MAPPING)
    for dump in dumps.iterdir():
        dump.rename(work / dump.name)
    return bench_forms.write_forms(sorted(work.glob("*.csv")), work)


def _convert(folder: Path, out: Path, pattern: str) -> dict[str, object]:
    files = sorted(str(p) for p in folder.glob(pattern))
    assert (
        files
        and cli(
            "convert",
            *files,
            "--mappings",
            str(folder / "mappings"),
            "--out",
            str(out),
            "--quiet",
            "--format",
            "parquet",
        )
        == 0
    )
    run: dict[str, object] = last_run(out)
    return run


@pytest.mark.parametrize("form", bench_forms.FORMS)
def test_a_form_converts_to_the_events_of_its_csv_twin(
    forms: dict[str, tuple[Path, Path]], form: str, tmp_path: Path
) -> None:
    folder, twin = forms[form]
    run = _convert(folder, tmp_path / "form", "deliveries-*")
    twin_run = _convert(twin, tmp_path / "twin", "deliveries-*.csv")
    assert bench_forms.same_events(tmp_path / "form", tmp_path / "twin")
    ledger, twin_ledger = run["ledger"], twin_run["ledger"]
    assert isinstance(ledger, dict) and isinstance(twin_ledger, dict)
    assert ledger["balanced"] and ledger["total"]["read"] == twin_ledger["total"]["read"]
    assert ledger["total"]["quarantined"] == twin_ledger["total"]["quarantined"] > 0  # its dirty values
    assert not run["notes"], json.dumps(run["notes"])  # the engine's reader read every file
