"""End to end through the command line, on the demo files and on broken input."""

from __future__ import annotations

import base64
import csv
import datetime as dt
import itertools
import json
import re
import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlglot

from cdcnorm import pipeline
from tests.conftest import ROOT, cli, insert_only_mapping, last_run, run_files

DUMPS = ROOT / "examples" / "dumps"
MAPPINGS = ROOT / "mappings"


def test_demo_runs_and_balances(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert cli("demo", "--root", str(ROOT), "--out", str(tmp_path)) == 0
    text = capsys.readouterr().out
    assert "ledger balanced: 37 rows read" in text
    # how long it took and the rate, what a nightly job's window is sized by
    assert re.search(r"every row accounted for \([0-9.,]+ s, [0-9,]+ rows/s\)\n", text), text
    assert "; 12 quarantined rows in " in text and "; 1 before-image waits for its after-image (" in text
    record = last_run(tmp_path)
    ledger = record["ledger"]
    assert ledger["balanced"] and ledger["total"]["read"] == 37
    assert sorted(p.name for p in (tmp_path / "events").iterdir()) == [
        "ferry.bookings",
        "ferry.passengers",
        "ferry.sailings",
    ]
    assert [p.name for p in (tmp_path / "events" / "ferry.bookings").iterdir()] == [f"{record['run']}.jsonl"]
    assert not list(tmp_path.rglob("*.tmp-*"))  # atomic writes leave no temporary files
    assert (
        not list((tmp_path / ".cdcnorm").glob("staging-*"))
        and not (tmp_path / ".cdcnorm" / "journal.json").exists()
    )
    # the demo replaces its landing area: run again, one run
    assert cli("demo", "--root", str(ROOT), "--out", str(tmp_path)) == 0
    assert len(list((tmp_path / "runs").iterdir())) == 1


def test_convert_json_output_and_parquet_types(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "pq"
    assert (
        cli(
            "convert",
            "--mappings",
            str(MAPPINGS),
            str(DUMPS),
            "--out",
            str(out),
            "--format",
            "parquet",
            "--json",
        )
        == 0
    )
    report = json.loads(capsys.readouterr().out)
    assert report["ledger"]["balanced"]
    (events,) = run_files(out, "events", "ferry.bookings")
    table = pq.read_table(events)
    values = table.schema.field("values").type
    assert values.field("fare").type == pa.decimal128(12, 2)
    assert values.field("booked_at").type == pa.timestamp("us", tz="UTC")
    assert table.schema.field("committed_at").type == pa.timestamp("us", tz="UTC")
    # the same events as the JSON Lines output, in the same order
    jl = tmp_path / "jl"
    assert cli("convert", "--mappings", str(MAPPINGS), str(DUMPS), "--out", str(jl), "--quiet") == 0
    (jl_events,) = run_files(jl, "events", "ferry.bookings")
    lines = [json.loads(x) for x in jl_events.read_text().splitlines()]
    assert table.column("position").to_pylist() == [e["position"] for e in lines]
    fares = [None if v is None else str(v["fare"]) for v in table.column("values").to_pylist()]
    assert fares == [None if e["values"] is None else e["values"]["fare"] for e in lines]


def test_parquet_files_of_every_run_share_one_schema(tmp_path: Path) -> None:
    """The engine's Parquet writer marked a column required when this run's data held no NULL in it:
    committed_at was required in a run whose rows all had a commit time and optional in the next,
    and pyarrow's concat_tables (the oracle: it refuses tables whose schemas differ) could not
    join the two runs' events, nor two days' snapshots. Every column is now optional."""
    mdir = tmp_path / "m"
    mdir.mkdir()
    (mdir / "t.yaml").write_text(
        'table: t\nfiles: ["t-*"]\nkey: [id]\nchange:\n  action: {column: op, codes: {I: insert}}\n'
        "  position: {column: pos, kind: integer}\n  committed_at: {column: at}\nfields:\n  id: integer\n"
        "  name: text\n"
    )
    days = {
        "t-1.csv": "op,pos,at,id,name\nI,1,2026-03-01T10:00:00Z,1,a\n",
        "t-2.csv": "op,pos,at,id,name\nI,2,,2,\n",
    }
    landing = tmp_path / "area"
    events, states = [], []
    for day, (name, text) in enumerate(days.items()):
        (tmp_path / name).write_text(text)
        args = ["--mappings", str(mdir), "--quiet"]
        assert cli("convert", str(tmp_path / name), "--out", str(landing), "--format", "parquet", *args) == 0
        assert cli("snapshot", str(landing), "--out", str(tmp_path / f"state{day}"), *args) == 0
        states.append(pq.read_table(tmp_path / f"state{day}" / "t.parquet"))
    events = [pq.read_table(f) for f in run_files(landing, "events", "t")]
    assert len(events) == 2 and events[0].column("committed_at").null_count == 0
    assert pa.concat_tables(events).column("committed_at").null_count == 1
    assert pa.concat_tables(states).column("name").to_pylist() == ["a", "a", None]
    assert all(f.nullable for t in events + states for f in t.schema)


def test_output_is_byte_identical_whatever_the_input_order(tmp_path: Path) -> None:
    files = sorted(str(p) for p in DUMPS.iterdir())
    assert cli("convert", "--quiet", "--mappings", str(MAPPINGS), *files, "--out", str(tmp_path / "a")) == 0
    assert (
        cli("convert", "--quiet", "--mappings", str(MAPPINGS), *reversed(files), "--out", str(tmp_path / "b"))
        == 0
    )
    for folder in ("events", "quarantine"):
        for table in ("ferry.bookings", "ferry.passengers", "ferry.sailings"):
            a = [f.read_bytes() for f in run_files(tmp_path / "a", folder, table)]
            b = [f.read_bytes() for f in run_files(tmp_path / "b", folder, table)]
            assert a and a == b, (folder, table)
    assert last_run(tmp_path / "a")["ledger"] == last_run(tmp_path / "b")["ledger"]


def test_convert_notes_raw_columns_no_field_reads_unless_unused_lists_them(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: a column the source added since the mapping was written (gate_code here) was left
    # out of every event without a word; only check showed it
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    live = (DUMPS / "bookings-live.csv").read_text().splitlines()
    lines = [live[0] + ",gate_code", *(line + ",G7" for line in live[1:])]
    (dumps / "bookings-live.csv").write_text("\n".join(lines) + "\n")
    out = tmp_path / "area"
    assert cli("convert", "--mappings", str(MAPPINGS), str(dumps), "--out", str(out)) == 0
    printed = capsys.readouterr().out
    # the demo mapping lists export_batch under unused: only the new column is noted
    assert "raw column gate_code read by no field of ferry.bookings: its values are in no event" in printed
    assert "export_batch" not in printed
    (note,) = last_run(out)["notes"]
    assert (note["file"], note["table"]) == ("bookings-live.csv", "ferry.bookings")
    assert note["note"].startswith("raw column gate_code read by no field")
    # listed under unused, it is left out on purpose: no note
    mappings = tmp_path / "mappings"
    shutil.copytree(MAPPINGS, mappings)
    p = mappings / "bookings.yaml"
    p.write_text(p.read_text().replace("unused: [export_batch]", "unused: [export_batch, gate_code]"))
    assert cli("convert", "--mappings", str(mappings), str(dumps), "--out", str(tmp_path / "b")) == 0
    assert "read by no field" not in capsys.readouterr().out  # (the other tables have no input: noted)
    assert last_run(tmp_path / "b")["notes"] == []


def test_hidden_files_in_a_folder_are_left_out_and_named(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: a file such as .passengers.csv.part (a copy in progress) was left out without a word
    dumps = tmp_path / "dumps"
    (dumps / ".partial").mkdir(parents=True)
    shutil.copy(DUMPS / "passengers.csv", dumps / "passengers.csv")
    shutil.copy(DUMPS / "passengers.csv", dumps / ".passengers-2.csv")
    shutil.copy(DUMPS / "passengers.csv", dumps / ".partial" / "passengers-3.csv")
    out = tmp_path / "area"
    assert cli("convert", "--mappings", str(MAPPINGS), str(dumps), "--out", str(out)) == 0
    printed = capsys.readouterr().out
    assert "note: left out 1 hidden file" in printed and ".passengers-2.csv" in printed
    assert [i["name"] for i in last_run(out)["inputs"]] == ["passengers.csv"]
    assert [Path(h).name for h in last_run(out)["hidden"]] == [".passengers-2.csv"]  # in the run record too
    assert cli("check", "--mappings", str(MAPPINGS), str(dumps), "--recursive", "--json") == 0
    hidden = json.loads(capsys.readouterr().out)["hidden"]
    assert [Path(h).name for h in hidden] == ["passengers-3.csv", ".passengers-2.csv"]  # by path


def _folder_of(tmp_path: Path, *names: str) -> Path:
    """A folder ``dumps`` holding copies of the demo's dump files ``names``."""
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    for name in names:
        shutil.copy(DUMPS / name, dumps / name)
    return dumps


def test_an_input_named_twice_is_read_once_and_named(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: a file given again, or in a folder given too (overlapping globs), was read once
    # without a word
    dumps = _folder_of(tmp_path, "passengers.csv")
    again = str(dumps / "passengers.csv")
    out = tmp_path / "area"
    assert cli("convert", "--mappings", str(MAPPINGS), str(dumps), again, again, "--out", str(out)) == 0
    printed = capsys.readouterr().out
    assert (
        f"note: 1 input named more than once (given again, or in a folder given too), read once: {again}"
        in printed
    )
    run = last_run(out)
    assert [i["name"] for i in run["inputs"]] == ["passengers.csv"] and run["repeated"] == [again]
    with open(DUMPS / "passengers.csv", newline="") as f:  # its records, by Python's csv module
        records = len(list(csv.reader(f))) - 1
    assert run["ledger"]["total"]["read"] == records  # the file's rows, once
    assert cli("check", "--mappings", str(MAPPINGS), again, again, "--json") == 0
    assert json.loads(capsys.readouterr().out)["repeated"] == [again]


def test_a_mapping_no_input_is_for_is_named(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # before: a delivery that did not come (no passengers or sailings file tonight) passed without a word
    out = tmp_path / "area"
    assert (
        cli("convert", "--mappings", str(MAPPINGS), str(DUMPS / "bookings-live.csv"), "--out", str(out)) == 0
    )
    said = "note: no input for 2 tables (no file given matches its mapping's files patterns): "
    assert said + "ferry.passengers, ferry.sailings" in capsys.readouterr().out
    assert last_run(out)["no_input"] == ["ferry.passengers", "ferry.sailings"]
    assert cli("convert", "--mappings", str(MAPPINGS), str(DUMPS), "--out", str(tmp_path / "all")) == 0
    assert "no input" not in capsys.readouterr().out and last_run(tmp_path / "all")["no_input"] == []


def test_marker_files_in_a_folder_are_left_out_and_named(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: a feed folder a data lake writer filled (its files and _SUCCESS, _committed_<id>: common
    # practice) stopped the run, "_SUCCESS: this file matches no mapping" (exit 4)
    dumps = _folder_of(tmp_path, "passengers.csv")
    shutil.copy(
        DUMPS / "passengers.csv", dumps / "_passengers-2.csv"
    )  # a mapping's pattern would not take it
    (dumps / "_SUCCESS").write_bytes(b"")
    (dumps / "_committed_8213").write_text('{"added": ["passengers.csv"]}\n')
    out = tmp_path / "area"
    assert cli("convert", "--mappings", str(MAPPINGS), str(dumps), "--out", str(out)) == 0
    printed = " ".join(capsys.readouterr().out.split())
    assert "note: left out 3 marker files" in printed and "_SUCCESS" in printed
    assert [i["name"] for i in last_run(out)["inputs"]] == ["passengers.csv"]
    assert sorted(Path(m).name for m in last_run(out)["markers"]) == [
        "_SUCCESS",
        "_committed_8213",
        "_passengers-2.csv",
    ]
    assert cli("check", "--mappings", str(MAPPINGS), str(dumps), "--json") == 0
    assert len(json.loads(capsys.readouterr().out)["markers"]) == 3
    # a marker a mapping's pattern matches is read; a file named on the command line is never a marker
    shutil.copy(DUMPS / "passengers.csv", dumps / "_passengers.csv")
    mine = tmp_path / "mappings"
    shutil.copytree(MAPPINGS, mine)
    text = (mine / "passengers.yaml").read_text()
    (mine / "passengers.yaml").write_text(
        text.replace('files: ["passengers*.csv"]', 'files: ["passengers*.csv", "_passengers.csv"]')
    )
    assert cli("check", "--mappings", str(mine), str(dumps), "--json") == 0
    report = json.loads(capsys.readouterr().out)
    assert "_passengers.csv" in {f["file"] for f in report["files"]} and len(report["markers"]) == 3
    assert cli("check", "--mappings", str(MAPPINGS), str(dumps / "_SUCCESS")) == 4
    assert "matches no mapping" in capsys.readouterr().err


def test_check_reports_unmapped_columns_and_rejects(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli("check", "--mappings", str(MAPPINGS), str(DUMPS), "--json") == 0
    report = json.loads(capsys.readouterr().out)
    by_file = {f["file"]: f for f in report["files"]}
    assert by_file["bookings-live.csv"]["unmapped_columns"] == ["export_batch"]
    # the mapping lists it under unused: read by no field on purpose, so not one to look at
    assert by_file["bookings-live.csv"]["unread_columns"] == []
    assert report["tables"]["ferry.bookings"]["reasons"]["conflict"] == 2
    assert report["drift"] == []
    assert cli("check", "--mappings", str(MAPPINGS), str(DUMPS)) == 0
    assert "export_batch" not in capsys.readouterr().out


def test_check_folds_many_files_whose_only_spare_column_is_unused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """30 files of a table whose dumps carry a column the mapping lists under unused: one row for
    them all (before: each file a row, as if each had a column to look at)."""
    dumps = tmp_path / "d"
    dumps.mkdir()
    header = (DUMPS / "bookings-live.csv").read_text(encoding="utf-8").splitlines()[0]
    for i in range(30):
        row = f"R,16/B374D8{i:02d},0,2026-03-01T07:59:00Z,{1000 + i},501,9001,Ines,,42.50,2026-02-20T10:15:00Z,2,false,b{i}"
        (dumps / f"bookings-{i:02d}.csv").write_text(f"{header}\n{row}\n", encoding="utf-8")
    assert cli("check", "--mappings", str(MAPPINGS), str(dumps)) == 0
    printed = " ".join(capsys.readouterr().out.split())
    assert "export_batch" not in printed and "bookings-07.csv" not in printed
    assert "30 files" in printed and "a table of more than 20 files" in printed


def test_drift_names_field_and_column(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    dumps = tmp_path / "d"
    dumps.mkdir()
    text = (DUMPS / "bookings-live.csv").read_text().replace("pax_name", "passenger_name", 1)
    (dumps / "bookings-live.csv").write_text(text)
    assert cli("convert", "--mappings", str(MAPPINGS), str(dumps), "--out", str(tmp_path / "o")) == 4
    err = capsys.readouterr().err
    assert "field passenger reads raw column 'pax_name'" in err and 'did you mean "passenger_name"' in err
    assert (
        not (tmp_path / "o" / "runs").exists() and not (tmp_path / "o" / "events").exists()
    )  # nothing written
    assert cli("check", "--mappings", str(MAPPINGS), str(dumps)) == 4
    assert "drift" in capsys.readouterr().out


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_a_file_with_no_rows_still_states_its_columns(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], fmt: str
) -> None:
    # a night with no changes exports a header (CSV) or a schema (Parquet) and no rows: a renamed
    # column there is drift as much as in a file with rows, a night before the rows show it
    dumps = tmp_path / "d"
    dumps.mkdir()
    mapping = tmp_path / "bookings.yaml"
    mapping.write_text(
        (MAPPINGS / "bookings.yaml").read_text().replace('["bookings-*.csv"]', '["bookings-*"]')
    )
    header = (DUMPS / "bookings-live.csv").read_text().splitlines()[0].replace("pax_name", "passenger_name")
    if fmt == "csv":
        (dumps / "bookings-quiet.csv").write_text(header + "\n")
    else:
        schema = pa.schema([(c, pa.string()) for c in header.split(",")])
        pq.write_table(schema.empty_table(), dumps / "bookings-quiet.parquet")
    assert cli("convert", "--mappings", str(mapping), str(dumps), "--out", str(tmp_path / "o")) == 4
    assert "field passenger reads raw column 'pax_name'" in capsys.readouterr().err
    assert not (tmp_path / "o" / "runs").exists()


def test_an_empty_file_is_noted_not_passed_over(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    dumps = tmp_path / "d"
    dumps.mkdir()
    shutil.copy(DUMPS / "bookings-live.csv", dumps)
    (dumps / "bookings-cut.csv").write_bytes(b"")  # a transfer that wrote nothing
    assert cli("convert", "--mappings", str(MAPPINGS), str(dumps), "--out", str(tmp_path / "o")) == 0
    printed = capsys.readouterr().out
    assert "note: bookings-cut.csv (ferry.bookings): the file is empty" in printed
    assert (
        cli("convert", "--mappings", str(MAPPINGS), str(dumps), "--out", str(tmp_path / "o2"), "--json") == 0
    )
    notes = json.loads(capsys.readouterr().out)["notes"]
    assert notes == [{"table": "ferry.bookings", "file": "bookings-cut.csv", "note": "the file is empty"}]
    assert last_run(tmp_path / "o2")["notes"] == notes  # the run's record keeps them
    assert cli("check", "--mappings", str(MAPPINGS), str(dumps)) == 0
    assert "note: bookings-cut.csv (ferry.bookings): the file is empty" in capsys.readouterr().out


def test_file_matching_no_mapping(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    p = tmp_path / "booking-extra.csv"
    p.write_text("op\n")
    assert cli("convert", "--mappings", str(MAPPINGS), str(p), "--out", str(tmp_path / "o")) == 4
    err = capsys.readouterr().err
    assert "matches no mapping" in err and "bookings-*.csv" in err


def test_mapping_error_exit_code(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    m = tmp_path / "m"
    m.mkdir()
    (m / "x.yaml").write_text("table: a\nfiles: [a]\nkey: [id]\nchange: {}\nfields: {id: integr}\n")
    assert cli("convert", "--mappings", str(m), str(DUMPS), "--out", str(tmp_path / "o")) == 3
    assert "x.yaml" in capsys.readouterr().err


def test_max_rejects_exits_5_but_writes_everything(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code = cli(
        "convert", "--mappings", str(MAPPINGS), str(DUMPS), "--out", str(tmp_path), "--max-rejects", "5"
    )
    assert code == 5
    assert "12 rows were quarantined" in capsys.readouterr().err
    assert last_run(tmp_path)["ledger"]["total"]["quarantined"] == 12
    assert len(list((tmp_path / "quarantine").iterdir())) == 3


def test_an_output_folder_inside_a_landing_area_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    area = tmp_path / "area"
    args = ["convert", "--quiet", "--mappings", str(MAPPINGS), str(DUMPS)]
    assert cli(*args, "--out", str(area)) == 0
    before = sorted(p.relative_to(area) for p in area.rglob("*"))
    for inside in (area / "events", area / "events" / "new", area / "runs"):
        assert cli(*args, "--out", str(inside)) == 2
        err = capsys.readouterr().err
        assert f"inside the landing area {area}" in err and "Traceback" not in err
    assert sorted(p.relative_to(area) for p in area.rglob("*")) == before  # nothing written there
    assert cli(*args, "--out", str(area)) == 0  # the area itself takes the next run


def test_show_plan_prints_parseable_sql(capsys: pytest.CaptureFixture[str]) -> None:
    assert (
        cli("convert", "--mappings", str(MAPPINGS), str(DUMPS), "--show-plan", "--table", "ferry.bookings")
        == 0
    )
    text = capsys.readouterr().out
    statements = [s for s in sqlglot.parse(text, read="duckdb") if s is not None]
    assert len(statements) >= 8
    assert "-- stage dedupe" in text and "-- stage envelope" in text
    # what the engine runs: tables of the run's own database, which both of its connections see
    assert 'CREATE OR REPLACE TABLE "ferry_bookings__typed" AS' in text
    assert "TEMPORARY" not in text


def test_show_plan_spark_prints_spark_sql_and_refuses_json_by_name(
    capsys: pytest.CaptureFixture[str],
) -> None:
    args = ("convert", "--mappings", str(MAPPINGS), str(DUMPS), "--show-plan", "spark", "--table")
    assert cli(*args, "ferry.bookings") == 0
    text = capsys.readouterr().out
    statements = [s for s in sqlglot.parse(text, read="spark") if s is not None]
    assert len(statements) >= 8
    assert "CREATE TEMPORARY VIEW `ferry_bookings__typed`" in text  # Spark's quoting
    assert "REGEXP_FULL_MATCH" not in text and " RLIKE '^(?:" in text
    assert "UNHEX(LPAD(" in "".join(text.split())  # the hex position key, as 16 bytes
    assert cli(*args, "ferry.sailings") == 1  # a json field: refused, not mistranslated
    err = capsys.readouterr().err
    assert "cannot run json_valid" in err and "DuckDB engine" in err


@pytest.mark.parametrize("stage", ["read", "type", "order", "dedupe", "pair", "envelope"])
def test_stop_after_each_stage(stage: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert (
        cli(
            "convert",
            "--mappings",
            str(MAPPINGS),
            str(DUMPS),
            "--stop-after",
            stage,
            "--table",
            "ferry.sailings",
            "--json",
        )
        == 0
    )
    report = json.loads(capsys.readouterr().out)
    assert report["stage"] == stage and report["rows"]
    rows = report["rows"]
    # every column by a name a user knows: no internal one (__versions, __has_prior, v3)
    assert not [k for k in rows[0] if k.startswith("__") or re.fullmatch(r"[cvpa][0-9]+", k)], rows[0]
    if stage == "type":  # the typed rows, good and bad (before: the rejects alone)
        assert {r["ok"] for r in rows} == {True, False}
        assert [r["record"] for r in rows] == sorted(r["record"] for r in rows)
    if stage == "order":  # in change order, the same rows whatever --limit cuts
        keys = [r["position"] for r in rows]  # fixed-width text: its order is the change order
        assert keys == sorted(keys)


def test_stop_after_json_writes_values_as_the_envelope_does(capsys: pytest.CaptureFixture[str]) -> None:
    # before: Python's own text of each value (b'foobar', 2026-03-01 08:00:00+00:00)
    args = ["convert", "--mappings", str(MAPPINGS), str(DUMPS), "--stop-after", "type", "--json"]
    assert cli(*args, "--table", "ferry.passengers") == 0
    rows = json.loads(capsys.readouterr().out)["rows"]
    with (DUMPS / "passengers.csv").open(newline="", encoding="utf-8") as f:
        token = {n: r["card_token"] for n, r in enumerate(csv.DictReader(f), start=1)}
    # bytes as base64 (RFC 4648 section 4): the dump's own base64 text where it was canonical
    for r in rows:
        if r["card_token"] is not None:
            assert base64.b64decode(r["card_token"]) == base64.b64decode(token[r["record"]]), r
    assert cli(*args, "--table", "ferry.bookings") == 0
    rows = json.loads(capsys.readouterr().out)["rows"]
    # timestamps as RFC 3339 in UTC (section 5.6: a T, the offset Z), read back by datetime
    stamps = [r["booked_at"] for r in rows if r["booked_at"]]
    assert stamps and all(re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?Z", t) for t in stamps), stamps
    assert all(dt.datetime.fromisoformat(t).utcoffset() == dt.timedelta(0) for t in stamps)
    # the table shows the same forms (before: b'foobar' and 2026-03-01 08:00:00+00:00 there)
    assert cli(*args[:-1], "--table", "ferry.passengers", "--limit", "1") == 0
    shown = capsys.readouterr().out
    assert "b'" not in shown and "Zm9vYmFy" in shown  # RFC 4648 section 10: BASE64("foobar")
    assert cli(*args[:-1], "--table", "ferry.bookings") == 0
    shown = capsys.readouterr().out
    assert stamps[0] in shown and "+00:00" not in shown


def test_stop_after_shows_positions_as_the_envelope_writes_them(capsys: pytest.CaptureFixture[str]) -> None:
    # a hex log position as its normalised text (20 upper-case digits, no 0x), as in the envelope's
    # position, not as the number of its 128-bit key (before: 180449927952 for 0x2A03A76310)
    args = ["convert", "--mappings", str(MAPPINGS), str(DUMPS), "--stop-after", "order"]
    assert cli(*args, "--table", "ferry.passengers", "--json") == 0
    rows = json.loads(capsys.readouterr().out)["rows"]
    # the reference: the dump's own text, read by Python's csv module (RFC 4180)
    with (DUMPS / "passengers.csv").open(newline="", encoding="utf-8") as f:
        lsn = {n: r["lsn"] for n, r in enumerate(csv.DictReader(f), start=1)}
    assert rows and all(r["file"] == "passengers.csv" for r in rows)
    for r in rows:
        assert r["position"] == lsn[r["record"]].removeprefix("0x").upper().rjust(20, "0"), r
        assert re.fullmatch(r"[0-9]{20}", r["sequence"]), r  # an integer sequence, zero-padded


def test_a_fixed_quarantine_file_feeds_back_as_its_own_run(tmp_path: Path) -> None:
    out = tmp_path / "o"
    assert cli("convert", "--quiet", "--mappings", str(MAPPINGS), str(DUMPS), "--out", str(out)) == 0
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and ".cdcnorm" not in p.parts}
    (q,) = run_files(out, "quarantine", "ferry.bookings")
    lines = [json.loads(x) for x in q.read_text().splitlines()]
    fixable = [x for x in lines if x.get("fare") == "12.345"]
    assert len(fixable) == 1
    fixable[0]["fare"] = "12.35"
    fixed = tmp_path / "fixes" / "ferry.bookings" / "fixed.jsonl"  # a folder named after the table routes it
    fixed.parent.mkdir(parents=True)
    fixed.write_text(json.dumps(fixable[0]) + "\n")
    assert cli("convert", "--quiet", "--mappings", str(MAPPINGS), str(fixed), "--out", str(out)) == 0
    after = {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and ".cdcnorm" not in p.parts}
    assert all(after[p] == b for p, b in before.items())  # nothing earlier changes
    assert len(list((out / "runs").iterdir())) == 2
    new_events = run_files(out, "events", "ferry.bookings")[-1]
    (event,) = [json.loads(x) for x in new_events.read_text().splitlines()]
    assert event["key"] == {"booking_id": 1004} and event["values"]["fare"] == "12.35"
    assert event["position"].startswith("00000017/00000020")


def test_empty_inputs_and_unknown_format(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    d = tmp_path / "d"
    d.mkdir()
    shutil.copy(MAPPINGS / "bookings.yaml", tmp_path / "bookings.yaml")
    (d / "bookings-empty.csv").write_text("")
    assert (
        cli(
            "convert",
            "--quiet",
            "--mappings",
            str(tmp_path / "bookings.yaml"),
            str(d),
            "--out",
            str(tmp_path / "o"),
        )
        == 0
    )
    ledger = last_run(tmp_path / "o")["ledger"]
    assert ledger["total"]["read"] == 0
    (d / "bookings-x.xlsx").write_text("?")
    (d / "bookings-empty.csv").unlink()
    m = tmp_path / "m2.yaml"
    m.write_text((MAPPINGS / "bookings.yaml").read_text().replace('["bookings-*.csv"]', '["bookings-*"]'))
    assert cli("convert", "--mappings", str(m), str(d), "--out", str(tmp_path / "o2")) == 4
    assert "cannot tell this file's format" in capsys.readouterr().err


def test_demo_runs_from_any_folder(tmp_path: Path) -> None:
    """The demo's mappings and dumps ship with the package: `cdcnorm demo` needs no project folder."""
    import subprocess
    import sys

    proc = subprocess.run(
        [sys.executable, "-m", "cdcnorm", "demo"], cwd=tmp_path, capture_output=True, text=True
    )
    assert proc.returncode == 0, proc.stderr
    assert "ledger balanced: 37 rows read" in proc.stdout
    assert last_run(tmp_path / "build" / "demo")["ledger"]["balanced"]


def _reader_gone(argv: list[str], cwd: Path) -> tuple[int, str]:
    """Run the command with a reader that goes away before it writes anything: its exit code and
    standard error."""
    import subprocess
    import sys

    with subprocess.Popen(
        [sys.executable, "-m", "cdcnorm", *argv],
        cwd=cwd,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    ) as proc:
        assert proc.stdout is not None and proc.stderr is not None
        proc.stdout.close()
        error = proc.stderr.read()
        return proc.wait(), error


def test_a_reader_that_goes_away_drops_the_output_not_the_run(tmp_path: Path) -> None:
    """`cdcnorm demo | head -1`: the reader closes the pipe before the ledger is printed. The run
    still commits, the rest of the output is dropped with a note, and the exit code is 141, as a shell
    reports a process a broken pipe (SIGPIPE, 13) ended (common practice). Before, the console library
    ended the process with exit 1 and no word."""
    landing = tmp_path / "area"
    code, error = _reader_gone(["demo", "--out", str(landing)], tmp_path)
    assert code == 141, error
    assert "the output's reader closed before its end" in error and "Traceback" not in error
    assert last_run(landing)["ledger"]["balanced"]
    # an error keeps its own exit code, the note added; a --json answer cut short is the same case
    args = ["trace", "--models", str(ROOT / "examples" / "models"), "--mappings", str(MAPPINGS)]
    for column, expected in (("ferry.bookings.nope", 7), ("ferry.bookings.fare", 141)):
        code, error = _reader_gone([*args, column, "--json"], tmp_path)
        assert code == expected, error
        assert f"(its own exit code: {expected % 141})" in error and "Traceback" not in error


def test_names_are_printed_as_they_are_spelt(capsys: pytest.CaptureFixture[str]) -> None:
    """A name holding an emoji code (":x:") was printed as the emoji (rich's default): the message
    named a column that does not exist."""
    args = ["--models", str(ROOT / "examples" / "models"), "--mappings", str(MAPPINGS)]
    assert cli("trace", *args, "ferry.bookings.:x:") == 7
    assert "no column ferry.bookings.:x: in" in capsys.readouterr().err


def test_a_log_gets_plain_progress_lines_on_a_long_run_and_none_on_a_short_one(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    from cdcnorm import cli as cli_mod

    args = ["convert", str(DUMPS), "--mappings", str(MAPPINGS)]
    # a short run (under LOG_EVERY seconds) to a log prints no progress line
    assert cli(*args, "--out", str(tmp_path / "a")) == 0
    assert "cdcnorm: " not in capsys.readouterr().err
    # a run as long as a nightly job's, seen through a line at every step: where it is and its rates
    monkeypatch.setattr(cli_mod, "LOG_EVERY", 0.0)
    # every step as if it took a second, as a large table's do: the lines then carry their rates
    clock = itertools.count()
    monkeypatch.setattr(pipeline.time, "perf_counter", lambda: float(next(clock)))
    assert cli(*args, "--out", str(tmp_path / "b")) == 0
    lines = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("cdcnorm: ")]
    assert any(re.search(r": read 37 rows, [0-9,]+ rows/s$", ln) for ln in lines), lines
    assert any(re.search(r": read ferry.passengers: 1 csv file(, [0-9,]+ rows/s)?$", ln) for ln in lines)
    assert any(": type (typed), " in ln for ln in lines) and any(ln.endswith(": account") for ln in lines)
    # the writes say how much they write: the longest steps of a large table
    assert any(ln.endswith("ferry.bookings: write 5 quarantined rows and the index") for ln in lines), lines
    assert any(re.search(r"ferry.bookings: sort and write [0-9]+ events$", ln) for ln in lines), lines
    # a plan step's line says which step of how many, and at what rate the step before it ran
    assert any(re.search(r": type \(typed\), step 2 of [0-9]+, 19 rows$", ln) for ln in lines), lines
    assert any(re.search(r", step 3 of [0-9]+, 19 rows; typed ran at [0-9,]+ rows/s$", ln) for ln in lines), (
        lines
    )
    # --quiet prints none however long the run
    assert cli(*args, "--out", str(tmp_path / "c"), "--quiet") == 0
    assert "cdcnorm: " not in capsys.readouterr().err


def test_the_ledger_of_a_table_of_many_files_shows_the_files_to_look_at_and_sums_the_others(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """One row a file made 3,000 two-row files' ledger a 3,000-line screen that took longer to lay
    out than the run took. Beyond 20 files, the rows shown still add up to the table's total."""
    insert_only_mapping(tmp_path / "m")
    dumps = tmp_path / "d"
    dumps.mkdir()
    for i in range(25):
        op = "X" if i in (3, 17) else "I"  # an unknown action code: quarantined
        (dumps / f"t-{i:02}.csv").write_text(
            f"op,pos,id,name\nI,{2 * i},{2 * i},a\n{op},{2 * i + 1},{2 * i + 1},b\n"
        )
    common = ["--mappings", str(tmp_path / "m"), str(dumps)]
    monkeypatch.setenv("COLUMNS", "250")  # the table's rows unwrapped

    def shown(printed: str) -> list[list[str]]:
        return [
            [c.strip() for c in line.split("│")[2:-1]]
            for line in printed.splitlines()
            if line.startswith("│ t ")
        ]

    assert cli("convert", *common, "--out", str(tmp_path / "l")) == 0
    printed = capsys.readouterr().out
    rows = shown(printed)
    assert [r[0] for r in rows] == ["t-03.csv", "t-17.csv", "23 other files"]
    # read, carried in, emitted, merged, duplicate, quarantined: the others' sums (23 files of 2 rows)
    assert rows[2][1:7] == ["46", "0", "46", "0", "0", "0"]
    assert "every file's counts: --json, or cdcnorm runs" in printed
    assert cli("check", *common) == 0
    rows = shown(capsys.readouterr().out)
    assert rows == [
        ["t-03.csv", "2", "1", "1", "-"],
        ["t-17.csv", "2", "1", "1", "-"],
        ["23 other files", "46", "46", "0", "-"],
    ]
    assert cli("convert", *common, "--out", str(tmp_path / "l2"), "--json") == 0
    assert len(json.loads(capsys.readouterr().out)["ledger"]["tables"]["t"]["files"]) == 25


def test_names_with_brackets_are_printed_as_written(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The console once read file and column names as rich's markup: ``t[x].csv`` was shown as
    ``t.csv``, and a column ``nam[/]e`` ended in rich's MarkupError (a traceback)."""
    mdir = insert_only_mapping(tmp_path / "m")
    (mdir / "t.yaml").write_text(
        (mdir / "t.yaml").read_text().replace("name: text", 'name: {type: text, from: "nam[/]e"}')
    )
    dumps = tmp_path / "d"
    dumps.mkdir()
    (dumps / "t-[x].csv").write_text("op,pos,id,nam[/]e\nI,1,1,a\n")
    (dumps / "t-[bold]y.csv").write_text("op,pos,id,name\nI,2,2,b\n")  # drift: no nam[/]e
    monkeypatch.setenv("COLUMNS", "250")
    assert cli("check", "--mappings", str(mdir), str(dumps)) == 4
    printed = capsys.readouterr().out
    assert "│ t-[x].csv " in printed and "│ t-[bold]y.csv " in printed
    assert "drift t-[bold]y.csv: field name of t reads raw column 'nam[/]e'" in printed
    (dumps / "t-[bold]y.csv").unlink()
    assert cli("convert", "--mappings", str(mdir), str(dumps), "--out", str(tmp_path / "l")) == 0
    assert "│ t     │ t-[x].csv " in capsys.readouterr().out


@pytest.mark.parametrize(
    ("args", "said", "hint"),
    [
        (["convrt"], "invalid choice: 'convrt'", 'did you mean "convert"? see cdcnorm --help'),
        (["convert", "x", "--format", "parquett"], "invalid choice: 'parquett'", 'did you mean "parquet"?'),
        (
            ["convert", "x", "--mapings", "m"],
            "unrecognized arguments: --mapings m",
            'did you mean "--mappings"?',
        ),
        (
            ["check", "x", "--memory-limt=1GB"],
            "unrecognized arguments: --memory-limt=1GB",
            '"--memory-limit"',
        ),
        (["trace", "--modls", "m", "t.c"], "unrecognized arguments: --modls", 'did you mean "--models"?'),
        (["convert", "x", "--zzzzzz"], "unrecognized arguments: --zzzzzz", "see cdcnorm convert --help"),
        # compared without the dashes every option has: --quiet is not near --out
        (["demo", "--quiet"], "unrecognized arguments: --quiet", "see cdcnorm demo --help"),
    ],
)
def test_a_misspelt_command_or_option_names_the_closest(
    args: list[str], said: str, hint: str, capsys: pytest.CaptureFixture[str]
) -> None:
    """Exit 2 before anything is read; the hint names the nearest command, choice or option of the
    command given (argparse itself only says the word is unknown)."""
    assert cli(*args) == 2
    err = capsys.readouterr().err
    assert said in err and hint in err, err
    if args[-1] in ("--zzzzzz", "--quiet"):
        assert "did you mean" not in err


def test_every_option_of_every_command_says_what_it_does() -> None:
    # before, settle's --wait, --json and --quiet, snapshot's --format and --json and apply's --json
    # showed in --help with no word, and settle took a --format it never used (it writes no events)
    import argparse

    from cdcnorm.cli import build_parser

    parser = build_parser()
    (commands,) = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
    silent = [
        (name, a.option_strings or a.dest)
        for name, sub in commands.choices.items()
        for a in sub._actions
        if not a.help and not isinstance(a, argparse._HelpAction)
    ]
    assert silent == []
    assert "--format" not in commands.choices["settle"].format_help()


@pytest.fixture(scope="module")
def demo_landing(tmp_path_factory: pytest.TempPathFactory) -> Path:
    landing = tmp_path_factory.mktemp("landing") / "area"
    assert cli("convert", str(DUMPS), "--mappings", str(MAPPINGS), "--out", str(landing), "--quiet") == 0
    return landing


@pytest.mark.parametrize(
    ("args", "code", "said"),
    [
        # before: a traceback (FileExistsError) once the state was computed
        (["snapshot", "{landing}", "--out", "{file}"], 4, "the output folder is a file"),
        # before: sqlite:/// opened a database in memory, applied into it and exited 0
        (["apply", "{landing}", "--target", "sqlite:///"], 2, "names a database in memory"),
        (["apply", "{landing}", "--target", "duckdb:///:memory:"], 2, "names a database in memory"),
        # before: exit 10 with the driver's "unable to open database file" and a hint about columns
        (
            ["apply", "{landing}", "--target", "sqlite:///{out}/w.db"],
            2,
            "out does not exist (apply makes the database file, not its folder)",
        ),
        (
            ["apply", "{landing}", "--target", "duckdb:///{out}/w.duckdb"],
            2,
            "out does not exist (apply makes the database file, not its folder)",
        ),
        (["apply", "{landing}", "--target", "sqlite:///{landing}"], 2, "names a folder, not a database file"),
        # before: a traceback (ValueError: Unknown dialect)
        (
            ["trace", "people.person_id", "--models", "{models}", "--dialect", "postgress"],
            2,
            "unknown SQL dialect 'postgress' (did you mean \"postgres\"?)",
        ),
        # before: exit 0, the models read as sqlglot's generic SQL (its dialect named "")
        (
            ["impact", "people.person_id", "--models", "{models}", "--dialect", ""],
            2,
            "unknown SQL dialect ''",
        ),
        # before: 100,000 engine threads ran for minutes on the demo before they were all started
        (["convert", "{dumps}", "--out", "{out}", "--threads", "100000"], 2, "threads are too many: at most"),
    ],
    ids=[
        "snapshot-out-file",
        "sqlite-memory",
        "duckdb-memory",
        "sqlite-no-folder",
        "duckdb-no-folder",
        "sqlite-folder",
        "dialect",
        "empty-dialect",
        "threads",
    ],
)
def test_odd_arguments_get_a_message_not_a_traceback(
    args: list[str],
    code: int,
    said: str,
    demo_landing: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    (tmp_path / "a-file").write_text("x")
    values = {
        "landing": str(demo_landing),
        "file": str(tmp_path / "a-file"),
        "models": str(ROOT / "examples" / "models"),
        "dumps": str(DUMPS),
        "out": str(tmp_path / "out"),
    }
    capsys.readouterr()
    assert cli(*(a.format(**values) for a in args), "--mappings", str(MAPPINGS)) == code
    err = capsys.readouterr().err
    assert said in err and "Traceback" not in err


def test_the_library_names_the_closest_table_for_a_misspelt_one() -> None:
    # before: a bare KeyError from the run's dictionary of tables
    from cdcnorm.errors import UsageError
    from cdcnorm.mapping import load_mappings
    from cdcnorm.pipeline import Options, run

    result = run(load_mappings(MAPPINGS), [str(DUMPS)], Options(out=None, write=False))
    assert result.events("ferry.bookings").num_rows > 0
    with pytest.raises(UsageError) as e:
        result.events("ferry.bookingz")
    assert e.value.message == "no table 'ferry.bookingz' in this run (did you mean \"ferry.bookings\"?)"
    with pytest.raises(UsageError, match="did you mean"):
        result.stage_output("ferry.passenger", "type")
