"""A field read from a column the source renamed: ``from: [new_name, old_name]`` reads, in each
file, the first of the names the file has. A file with none of them, or with more than one, is
schema drift (which one holds the values is unknown): never a value read from the wrong column or
left behind without a word. Python's csv module reading the dumps is the oracle for the values."""

from __future__ import annotations

import csv
import io
import json
import shutil
from pathlib import Path

import pytest

from tests.conftest import ROOT, cli, last_run

CASE = ROOT / "tests" / "cases" / "source" / "renamed-columns"


def _area(tmp_path: Path) -> tuple[Path, Path]:
    mappings, dumps = tmp_path / "m", tmp_path / "d"
    mappings.mkdir()
    shutil.copy(CASE / "mapping.yaml", mappings / "members.yaml")
    shutil.copytree(CASE / "dumps", dumps)
    return mappings, dumps


def test_each_file_reads_the_name_it_has(tmp_path: Path) -> None:
    mappings, dumps = _area(tmp_path)
    out = tmp_path / "area"
    assert cli("convert", str(dumps), "--mappings", str(mappings), "--out", str(out), "--quiet") == 0
    events = [
        json.loads(x)
        for f in sorted((out / "events" / "club.members").iterdir())
        for x in f.read_text().splitlines()
    ]
    got = {(e["origin"]["file"], e["origin"]["row"]): e["values"]["phone"] for e in events}
    # the oracle: each CSV file's own column, under whichever name it has
    for name, column in (("members-2025.csv", "phone"), ("members-2026.csv", "mobile_phone")):
        rows = list(csv.DictReader(io.StringIO((dumps / name).read_text())))
        for row_number, row in enumerate(rows, start=1):
            if (name, row_number) in got:
                assert got[(name, row_number)] == row[column]
    assert len(got) == 3 and last_run(out)["ledger"]["balanced"]


@pytest.mark.parametrize(
    ("header", "said"),
    [
        (
            "op,pos,id,mobile_phone,phone,joined_on",
            "reads one of raw columns 'mobile_phone', 'phone' (its from's alternatives), and the file has each of them",
        ),
        (
            "op,pos,id,tel,joined_on",
            "reads any of raw columns 'mobile_phone', 'phone', which the file does not have",
        ),
    ],
    ids=["both names", "neither name"],
)
def test_a_file_with_both_names_or_neither_is_drift(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], header: str, said: str
) -> None:
    mappings, dumps = _area(tmp_path)
    n = header.count(",") + 1
    (dumps / "members-odd.csv").write_text(header + "\n" + ",".join(["I", "9", "9"] + ["x"] * (n - 3)) + "\n")
    capsys.readouterr()
    out = tmp_path / "area"
    assert cli("convert", str(dumps), "--mappings", str(mappings), "--out", str(out), "--quiet") == 4
    err = capsys.readouterr().err
    assert "members-odd.csv: schema drift: the mapping's field phone " + said in err
    assert not (out / "events").exists()  # nothing converted
    assert cli("check", str(dumps), "--mappings", str(mappings)) == 4
    assert "members-odd.csv: field phone of club.members " + said in capsys.readouterr().out


@pytest.mark.parametrize(
    ("spelt", "said"), [("[]", "from lists no column"), ("[tel, tel]", "from names 'tel' twice")]
)
def test_an_empty_or_repeating_list_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], spelt: str, said: str
) -> None:
    mappings, dumps = _area(tmp_path)
    m = mappings / "members.yaml"
    m.write_text(m.read_text().replace("from: [mobile_phone, phone]", f"from: {spelt}"))
    capsys.readouterr()
    assert cli("check", str(dumps), "--mappings", str(mappings)) == 3
    assert said in capsys.readouterr().err


def test_lineage_names_both_dump_columns_and_a_rename_keeps_the_list(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    mappings, _ = _area(tmp_path)
    models = tmp_path / "models"
    models.mkdir()
    (models / "reach.sql").write_text("CREATE VIEW reach AS SELECT id, phone FROM club.members")
    args = ("--models", str(models), "--mappings", str(mappings), "--json")
    capsys.readouterr()
    assert cli("trace", "reach.phone", *args) == 0
    assert json.loads(capsys.readouterr().out)["raw"] == ["club.members.mobile_phone", "club.members.phone"]
    # the old name dropped from the dumps: the field still reads the new one, nothing breaks
    assert cli("impact", "dump:club.members.phone", "--drop", *args) == 0
    assert json.loads(capsys.readouterr().out)["broken_mappings"] == []
    # the new name renamed again: the mapping's list needs it, the model keeps its field
    assert cli("impact", "dump:club.members.mobile_phone", "--rename", "cell", *args) == 8
    answer = json.loads(capsys.readouterr().out)
    (broken,) = answer["broken_mappings"]
    assert broken["fix"] == 'set fields.phone.from: ["cell", "phone"]' and answer["broken_models"] == []
