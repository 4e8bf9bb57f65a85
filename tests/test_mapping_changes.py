"""A mapping edited between runs of one landing area.

What runs remember (identities emitted, before-images waiting) is stored with the fields it was
written under, by name: a field reordered, added, removed or retyped in the mapping never puts
one field's value into another. What cannot be had is said: waiting images lacking a field stop
the run (exit 4) until they are settled; a repeat of a row emitted before the fields were
reordered is compared in their old order, and one emitted under other fields is a conflict that
says its content could not be compared.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import ROOT, cli, last_run

DUMPS = ROOT / "examples" / "dumps"
NEXT_DAY = ROOT / "examples" / "next-day"
PASSENGER = "  passenger: {from: pax_name, type: text, max_length: 60}\n"
PHONE = "  pax_phone: text\n"


def _mappings(folder: Path, edit: tuple[str, str] | None = None) -> Path:
    shutil.copytree(ROOT / "mappings", folder)
    if edit:
        p = folder / "bookings.yaml"
        text = p.read_text()
        assert edit[0] in text
        text = text.replace(edit[0], edit[1])
        if "export_batch:" in edit[1]:  # a column mapped now is no longer left out on purpose
            text = text.replace("unused: [export_batch]\n", "")
        p.write_text(text)
    return folder


def _convert(inputs: Path, mappings: Path, out: Path) -> int:
    return cli("convert", str(inputs), "--mappings", str(mappings), "--out", str(out), "--quiet")


def _lines(folder: Path) -> list[dict[str, Any]]:
    return [json.loads(x) for p in sorted(folder.glob("*.jsonl")) for x in p.read_text().splitlines()]


def _next_day_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], edit: tuple[str, str], settled: bool = True
) -> tuple[Path, Path, str]:
    """The demo converted under the shipped mappings (its waiting images settled), then the next
    day under the edited ones, which must stop with exit 4: (old mappings, area, the error)."""
    old = _mappings(tmp_path / "old")
    edited = _mappings(tmp_path / "new", edit)
    out = tmp_path / "o"
    assert _convert(DUMPS, old, out) == 0
    if settled:
        assert cli("settle", str(out), "--all", "--mappings", str(old), "--quiet") == 0
    capsys.readouterr()
    assert _convert(NEXT_DAY, edited, out) == 4
    return old, out, capsys.readouterr().err


def _update_of_1007(out: Path) -> dict[str, Any]:
    (event,) = [
        e
        for e in _lines(out / "events" / "ferry.bookings")
        if e["key"] == {"booking_id": 1007} and e["prior"] is not None
    ]
    return event


def test_reordered_fields_keep_each_waiting_value_in_its_field(tmp_path: Path) -> None:
    # The demo leaves booking 1007's before-image waiting; the next day brings its after-image.
    # The reference is the same two runs with the mapping unedited.
    same = _mappings(tmp_path / "same")
    assert _convert(DUMPS, same, tmp_path / "a") == 0 and _convert(NEXT_DAY, same, tmp_path / "a") == 0
    expected = _update_of_1007(tmp_path / "a")
    assert expected["changed"] == ["fare", "seats"]

    assert _convert(DUMPS, same, tmp_path / "b") == 0
    swapped = _mappings(tmp_path / "swapped", (PASSENGER + PHONE, PHONE + PASSENGER))
    assert _convert(NEXT_DAY, swapped, tmp_path / "b") == 0
    event = _update_of_1007(tmp_path / "b")
    names = list(expected["prior"])
    assert list(event["prior"]) == [*names[:3], "pax_phone", "passenger", *names[5:]]  # the new order
    assert event["prior"] == expected["prior"] and event["values"] == expected["values"]  # by name
    assert event["changed"] == ["fare", "seats"]  # before: pax_phone and passenger swapped, "changed"

    # booking 1001's snapshot row, repeated the next day, is a duplicate of run 1 as with the
    # mapping unedited: its digest is compared in the field order run 1 wrote (cdcnorm_fields)
    ledgers = [last_run(tmp_path / x)["ledger"]["tables"]["ferry.bookings"] for x in ("a", "b")]
    assert ledgers[0] == ledgers[1] and ledgers[1]["total"]["duplicate"] == 1


def test_a_repeat_of_a_row_emitted_under_other_fields_says_it_cannot_be_compared(tmp_path: Path) -> None:
    # a field removed since run 1: booking 1001's repeated snapshot row cannot be compared with
    # the content run 1 stored (it digested the removed field too): a conflict that says so
    old = _mappings(tmp_path / "old")
    fewer = _mappings(tmp_path / "new", (PHONE, ""))
    out = tmp_path / "o"
    assert _convert(DUMPS, old, out) == 0 and _convert(NEXT_DAY, fewer, out) == 0
    (q,) = [x for x in _lines(out / "quarantine" / "ferry.bookings") if x["op"] == "R"]
    assert q["booking_id"] == "1001"
    reason = q["_cdcnorm"]["reasons"][0]
    assert reason["found"] == "content under other fields"
    assert "whose fields differ from the mapping's now" in reason["reason"]


def test_waiting_images_lacking_an_added_field_stop_the_run_until_settled(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    old = _mappings(tmp_path / "old")
    added = _mappings(tmp_path / "new", ("  seats: integer\n", "  seats: integer\n  export_batch: text\n"))
    out = tmp_path / "o"
    assert _convert(DUMPS, old, out) == 0
    capsys.readouterr()
    assert _convert(NEXT_DAY, added, out) == 4
    err = capsys.readouterr().err
    assert "before-images waiting for their after-images were stored under other fields" in err
    assert "fields it lacks: export_batch" in err and "cdcnorm settle" in err
    assert len(list((out / "runs").glob("*.json"))) == 1  # nothing committed
    assert cli("settle", str(out), "--all", "--mappings", str(old), "--quiet") == 0
    assert _convert(NEXT_DAY, added, out) == 0
    events = _lines(out / "events" / "ferry.bookings")
    assert events[-1]["values"]["export_batch"] == "live-19"


def test_a_retyped_key_field_stops_the_run(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    _, _, err = _next_day_refused(tmp_path, capsys, ("  booking_id: integer\n", "  booking_id: text\n"))
    assert "identities emitted by earlier runs were stored under other fields" in err
    assert "booking_id (BIGINT then, VARCHAR now)" in err


def test_a_key_grown_by_a_field_stops_the_run(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # the identities stored hold only the key fields of their day: a key field added since cannot
    # be compared (before, the engine's binder error); a key that shrank still can
    edit = ("key: [booking_id]\n", "key: [booking_id, sailing_ref]\n")
    old, out, err = _next_day_refused(tmp_path, capsys, edit)
    assert "hold another key of ferry.bookings than the mapping's now" in err
    assert "identities keyed by (booking_id): no sailing_ref" in err
    assert _convert(NEXT_DAY, old, out) == 0  # the area is intact


@pytest.mark.parametrize(
    ("edit", "part"),
    [
        (("kind: hex-pair", "kind: text"), "position"),
        (("{column: seq, kind: integer}", "{column: seq, kind: text}"), "sequence"),
    ],
)
@pytest.mark.parametrize("settled", [True, False])
def test_another_kind_of_position_or_sequence_stops_the_run(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], edit: tuple[str, str], part: str, settled: bool
) -> None:
    # stored keys are the position's and sequence's keys of their kind: under another kind the
    # identities would be other positions and booking 1001's repeated snapshot row, a duplicate,
    # would be emitted again without a word (the sequence) or the engine's binder error (the position)
    old, out, err = _next_day_refused(tmp_path, capsys, edit, settled)
    what = "identities emitted by earlier runs" if settled else "before-images waiting"
    assert what in err and f"were stored under another {part} of ferry.bookings" in err
    assert _convert(NEXT_DAY, old, out) == 0


def test_apply_after_a_field_was_added_names_the_column_and_the_remedy(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # SQLite (the real database) says which column its table lacks; once it is added as the hint
    # says, the same apply loads the new field
    import sqlite3

    old = _mappings(tmp_path / "old")
    added = _mappings(tmp_path / "new", ("  seats: integer\n", "  seats: integer\n  export_batch: text\n"))
    out, db = tmp_path / "o", tmp_path / "w.db"
    target = f"sqlite:///{db}"
    assert _convert(DUMPS, old, out) == 0
    assert cli("apply", str(out), "--mappings", str(old), "--target", target, "--json") == 0
    assert cli("settle", str(out), "--all", "--mappings", str(old), "--quiet") == 0
    assert _convert(NEXT_DAY, added, out) == 0
    capsys.readouterr()
    assert cli("apply", str(out), "--mappings", str(added), "--target", target, "--json") == 10
    err = capsys.readouterr().err
    assert 'table "ferry.bookings" has no column export_batch' in err
    statement = 'ALTER TABLE "ferry.bookings" ADD COLUMN "export_batch" TEXT'
    assert statement in err  # the statement that adds it, run as given
    with sqlite3.connect(db) as con:
        con.execute(statement)
    assert cli("apply", str(out), "--mappings", str(added), "--target", target, "--json") == 0
    with sqlite3.connect(db) as con:
        rows = dict(con.execute('SELECT booking_id, export_batch FROM "ferry.bookings"').fetchall())
    assert rows[1008] == "live-19" and rows[1001] is None  # 1001 was loaded before the field was mapped


# Reading events back (snapshot, apply) after the mapping was edited: each run's record states the
# fields its events were written under, and the events are read by them.

ADD_BATCH = ("  seats: integer\n", "  seats: integer\n  export_batch: text\n")


def _two_days(tmp_path: Path, edit: tuple[str, str], fmt: str = "jsonl") -> tuple[Path, Path]:
    """The demo under the shipped mappings (waiting images settled), the next day under the edited
    ones, both written as ``fmt``: (the edited mappings, the area)."""
    old = _mappings(tmp_path / "old")
    edited = _mappings(tmp_path / "new", edit)
    out = tmp_path / "o"
    assert (
        cli("convert", str(DUMPS), "--mappings", str(old), "--out", str(out), "--format", fmt, "--quiet") == 0
    )
    assert cli("settle", str(out), "--all", "--mappings", str(old), "--quiet") == 0
    assert (
        cli(
            "convert", str(NEXT_DAY), "--mappings", str(edited), "--out", str(out), "--format", fmt, "--quiet"
        )
        == 0
    )
    return edited, out


def _state(
    tmp_path: Path, mappings: Path, out: Path, capsys: pytest.CaptureFixture[str]
) -> tuple[dict[int, dict[str, Any]], list[str], str]:
    """Booking rows of the latest state by key, the snapshot's notes (--json) and its stderr."""
    capsys.readouterr()
    folder = tmp_path / "state"
    args = ("snapshot", str(out), "--mappings", str(mappings), "--out", str(folder), "--format", "jsonl")
    assert cli(*args, "--table", "ferry.bookings", "--json") == 0
    (row,) = json.loads(capsys.readouterr().out)["tables"]
    assert cli(*args, "--table", "ferry.bookings") == 0
    err = capsys.readouterr().err
    rows = [json.loads(x) for x in (folder / "ferry.bookings.jsonl").read_text().splitlines()]
    return {r["booking_id"]: r for r in rows}, row["notes"], err


@pytest.mark.parametrize("fmt", ["jsonl", "parquet"])
def test_state_of_events_written_before_a_field_was_added_says_it_is_null_there(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], fmt: str
) -> None:
    import csv

    added, out = _two_days(tmp_path, ADD_BATCH, fmt)
    state, notes, err = _state(tmp_path, added, out, capsys)
    # the reference: the next day's dump itself, read with Python's csv module (RFC 4180)
    with (NEXT_DAY / "bookings-2026-03-02.csv").open(newline="") as f:
        dumped = {int(r["booking_id"]): r["export_batch"] for r in csv.DictReader(f)}
    assert state[1008]["export_batch"] == dumped[1008]
    assert state[1001]["export_batch"] is None  # its last change came in run 1, before the field
    (note,) = notes
    first = sorted((out / "runs").glob("*.json"))[0].stem
    assert note == (
        f"the events of run {first} were written before field export_batch joined the mapping: "
        "it is NULL in them"
    )
    assert f"note: ferry.bookings: {note}" in err


def test_state_leaves_out_a_field_removed_from_the_mapping_and_says_so(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    fewer, out = _two_days(tmp_path, (PHONE, ""))
    state, notes, _ = _state(tmp_path, fewer, out, capsys)
    assert all("pax_phone" not in r for r in state.values()) and state[1001]["passenger"] == "Ines Marrow"
    assert notes == [
        f"the events of run {sorted((out / 'runs').glob('*.json'))[0].stem} hold field pax_phone, "
        "which the mapping no longer has: left out"
    ]


@pytest.mark.parametrize("fmt", ["jsonl", "parquet"])
@pytest.mark.parametrize("new_type", ["decimal(14,3)", "text"])
def test_a_retyped_field_reads_earlier_events_through_its_new_type_exactly(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], fmt: str, new_type: str
) -> None:
    from decimal import Decimal

    retyped, out = _two_days(tmp_path, ("fare: decimal(12,2)", f"fare: {new_type}"), fmt)
    state, notes, _ = _state(tmp_path, retyped, out, capsys)
    # the reference: Python's decimal, the dumped 47.50 at the new scale (or its text as dumped)
    want = str(Decimal("47.50").quantize(Decimal("0.001"))) if new_type != "text" else "47.50"
    assert state[1001]["fare"] == want
    assert notes[0].endswith(
        f"hold fare as decimal(12,2): read as {new_type}, each value through that type's cast"
    )


@pytest.mark.parametrize("command", ["snapshot", "apply"])
def test_a_retyped_field_whose_earlier_values_do_not_fit_stops_naming_the_event(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], command: str
) -> None:
    # before: the engine's JSON transform error, reported as a bug in cdcnorm (exit 1)
    retyped, out = _two_days(tmp_path, ("  pax_phone: text\n", "  pax_phone: integer\n"))
    capsys.readouterr()
    where = (
        ["--out", str(tmp_path / "state")]
        if command == "snapshot"
        else ["--target", f"sqlite:///{tmp_path / 'w.db'}"]
    )
    assert cli(command, str(out), "--mappings", str(retyped), *where) == 4
    err = capsys.readouterr().err
    first = sorted((out / "events" / "ferry.bookings").glob("*.jsonl"))[0]
    assert err.startswith(f"error: {first}: an event written before field pax_phone was retyped")
    assert "field: pax_phone" in err and "expected: integer, as the mapping states it now" in err
    assert "(not an integer), in the event at position 0000" in err and "wrote it as text" in err
    assert "bug" not in err and "Traceback" not in err


def test_events_of_runs_whose_record_states_no_fields_are_read_as_the_mapping_states(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # records written before runs stated their fields: nothing to go by, so no note (as before)
    added, out = _two_days(tmp_path, ADD_BATCH)
    for path in (out / "runs").glob("*.json"):
        record = json.loads(path.read_text())
        for table in record["tables"].values():
            table.pop("fields")
        path.write_text(json.dumps(record))
    state, notes, _ = _state(tmp_path, added, out, capsys)
    assert notes == [] and state[1001]["export_batch"] is None and state[1008]["export_batch"] == "live-19"


def test_events_written_under_another_key_are_refused_not_compacted_by_nulls(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # a key field renamed in the mapping: run 1's events lack it; compacted, every key would be NULL
    old = _mappings(tmp_path / "old")
    renamed = _mappings(
        tmp_path / "new",
        ("key: [booking_id]\n", "key: [booking_no]\n"),
    )
    text = (renamed / "bookings.yaml").read_text()
    (renamed / "bookings.yaml").write_text(
        text.replace("  booking_id: integer\n", "  booking_no: {from: booking_id, type: integer}\n")
    )
    out = tmp_path / "o"
    assert _convert(DUMPS, old, out) == 0
    capsys.readouterr()
    args = ("--mappings", str(renamed), "--out", str(tmp_path / "s"), "--table", "ferry.bookings")
    assert cli("snapshot", str(out), *args) == 4
    err = capsys.readouterr().err
    assert "were written under another key of ferry.bookings: they lack booking_no" in err


def test_a_repeat_of_a_row_emitted_before_a_field_was_added_is_compared_on_the_fields_then(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the next day repeats booking 1001's snapshot row: with the mapping unedited a duplicate; with
    # a field added since, compared on the fields run 1 digested, still a duplicate, said in a note
    # (before: a conflict "whose fields differ", quarantined every night the archive overlaps)
    old = _mappings(tmp_path / "old")
    added = _mappings(tmp_path / "new", ADD_BATCH)
    ledgers = []
    for mappings, out in ((old, tmp_path / "a"), (added, tmp_path / "b")):
        assert _convert(DUMPS, old, out) == 0
        assert cli("settle", str(out), "--all", "--mappings", str(old), "--quiet") == 0
        capsys.readouterr()
        assert cli("convert", str(NEXT_DAY), "--mappings", str(mappings), "--out", str(out)) == 0
        ledgers.append(last_run(out)["ledger"]["tables"]["ferry.bookings"]["total"])
    assert ledgers[0] == ledgers[1] and ledgers[1]["duplicate"] == 1 and ledgers[1]["quarantined"] == 0
    (note,) = last_run(tmp_path / "b")["notes"]
    assert note["note"] == (
        "1 row repeats a row emitted before export_batch joined the mapping: compared on the fields "
        "emitted then, it is a duplicate, and export_batch of that change is in no event"
    )
    assert f"note: bookings-2026-03-02.csv (ferry.bookings): {note['note']}" in capsys.readouterr().out

    # a repeat whose content differs in a field run 1 wrote is still a conflict with run 1
    day = tmp_path / "day"
    day.mkdir()
    text = (NEXT_DAY / "bookings-2026-03-02.csv").read_text()
    assert ',"+44 7700 900101",42.5,' in text
    (day / "bookings-2026-03-02.csv").write_text(
        text.replace(',"+44 7700 900101",42.5,', ',"+44 7700 900101",43.5,')
    )
    out = tmp_path / "c"
    assert _convert(DUMPS, old, out) == 0
    assert cli("settle", str(out), "--all", "--mappings", str(old), "--quiet") == 0
    assert _convert(day, added, out) == 0
    (q,) = [x for x in _lines(out / "quarantine" / "ferry.bookings") if x["op"] == "R"]
    assert q["_cdcnorm"]["reasons"][0]["reason"].startswith("conflict with run ")
    assert q["_cdcnorm"]["reasons"][0]["found"] == "other content"


def test_parquet_events_without_run_records_are_read_by_their_own_schema(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # a bare events folder (copied without runs/): Parquet files state their fields in their schema
    added, out = _two_days(tmp_path, ADD_BATCH, "parquet")
    bare = tmp_path / "bare"
    shutil.copytree(out / "events", bare / "events")
    state, notes, _ = _state(tmp_path, added, bare, capsys)
    assert state[1001]["export_batch"] is None and state[1008]["export_batch"] == "live-19"
    first = sorted((out / "runs").glob("*.json"))[0].stem
    assert notes == [
        f"the events of run {first} were written before field export_batch joined the mapping: it is NULL in them"
    ]
