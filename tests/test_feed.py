"""Following a feed: runs into one landing area add up to one run over everything.

The SQLite trigger oracle's change log is cut into daily deliveries that
overlap, split updates across delivery boundaries and deliver some rows a day
late; converting them one run at a time must give the same changes as one run
over all of them, and replaying the events in position order must give
SQLite's final table. Crash safety: a run killed at any point leaves the
visible landing area as it was (or, past its commit point, complete), and the
next run succeeds.
"""

from __future__ import annotations

import json
import os
import random
import signal
import sqlite3
import subprocess
import sys
import time
from decimal import Decimal
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, run
from tests.conftest import ROOT, cli, landing_outputs, last_run
from tests.test_oracle_sqlite import MAPPING, SCHEMA, final_table, workload
from tests.test_properties import MAPPING as MOORINGS
from tests.test_properties import SETTINGS, _csv, _log, ops


def _events(landing: Path, table: str) -> list[dict[str, Any]]:
    out = []
    for p in sorted((landing / "events" / table).glob("*.jsonl")):
        out += [json.loads(x) for x in p.read_text(encoding="utf-8").splitlines()]
    return out


def _changes(landing: Path, table: str) -> set[tuple[str, str, str, str]]:
    """(action, key, position, values) of every event of every run: what runs must agree on."""
    return {
        (
            e["action"],
            json.dumps(e["key"], sort_keys=True),
            e["position"],
            json.dumps(e["values"], sort_keys=True),
        )
        for e in _events(landing, table)
    }


def _replay(landing: Path, table: str, key: str) -> dict[Any, Any]:
    """Fold every run's events in position order (byte order of ``position``)."""
    state: dict[Any, Any] = {}
    for e in sorted(_events(landing, table), key=lambda e: e["position"].encode()):
        if e["action"] == "upsert":
            state[e["key"][key]] = e["values"]
        else:
            state.pop(e["key"][key], None)
    return state


def _totals(landing: Path) -> list[dict[str, int]]:
    return [json.loads(p.read_text())["ledger"]["total"] for p in sorted((landing / "runs").glob("*.json"))]


def _deliveries(db: sqlite3.Connection, folder: Path, rng: random.Random, days: int) -> list[Path]:
    """The change log cut at random points into daily deliveries: each also repeats the tail of
    the day before (overlap), a few rows arrive a day late, and each file is shuffled."""
    from tests.state_oracle import deliveries

    cols = [d[1] for d in db.execute("PRAGMA table_info(changes)")]
    rows = [["" if v is None else v for v in r] for r in db.execute("SELECT * FROM changes ORDER BY rowid")]
    return deliveries(cols, rows, folder, "berths", rng, days)


@pytest.mark.parametrize("seed", [4, 5, 6])
def test_daily_runs_add_up_to_one_run_and_replay_to_sqlite(tmp_path: Path, seed: int) -> None:
    rng = random.Random(seed)
    db = sqlite3.connect(":memory:")
    db.executescript(SCHEMA)
    workload(db, rng, 500)  # inserts, updates, key changes, no-op updates, deletes, re-used keys
    db.execute("UPDATE changes SET note = NULL WHERE note = ''")
    db.execute("UPDATE berths SET note = NULL WHERE note = ''")
    days = _deliveries(db, tmp_path / "deliveries", rng, days=7)
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "berths.yaml").write_text(MAPPING)
    mappings = load_mappings(tmp_path / "m")
    daily, once = tmp_path / "daily", tmp_path / "once"
    for day in days:
        run(mappings, [day], Options(out=daily))
    run(mappings, days, Options(out=once))

    table = "harbour.berths"
    assert _changes(daily, table) == _changes(once, table)
    assert _replay(daily, table, "berth_id") == final_table(db)  # sqlite3 as the oracle
    runs = _totals(daily)
    (whole,) = _totals(once)
    assert len(runs) == 7
    for name in ("read", "emitted", "merged", "duplicate", "quarantined", "upserts", "deletes"):
        assert sum(r[name] for r in runs) == whole[name], name
    # images waiting at the end of one run are carried into the next: the flows chain
    assert [r["pending_in"] for r in runs[1:]] == [r["pending"] for r in runs[:-1]]
    assert runs[-1]["pending"] == whole["pending"] == 0
    n_changes = db.execute("SELECT count(*) FROM changes").fetchone()[0]
    assert whole["read"] - whole["duplicate"] == n_changes and whole["quarantined"] == 0


@SETTINGS
@given(ops, st.randoms(use_true_random=False), st.integers(1, 5))
def test_runs_one_at_a_time_equal_one_run(
    operations: list[tuple[str, int, Any]], rnd: random.Random, n: int
) -> None:
    import tempfile

    log, state = _log(operations)
    cuts = sorted(rnd.randint(0, len(log)) for _ in range(n - 1))
    parts = []
    for a, b in zip([0, *cuts], [*cuts, len(log)], strict=True):
        part = log[max(0, a - rnd.randint(0, 3)) : b]
        rnd.shuffle(part)
        parts.append(part)
    with tempfile.TemporaryDirectory() as d:
        base = Path(d)
        (base / "maps").mkdir()
        (base / "maps" / "m.yaml").write_text(MOORINGS)
        mappings = load_mappings(base / "maps")
        files = []
        for i, part in enumerate(parts):
            p = base / f"m-{i}.csv"
            p.write_text(_csv(part), encoding="utf-8")
            files.append(p)
        for f in files:
            run(mappings, [f], Options(out=base / "daily"))
        run(mappings, files, Options(out=base / "once"))
        assert _changes(base / "daily", "t.moorings") == _changes(base / "once", "t.moorings")
        replayed = {k: v["fee"] for k, v in _replay(base / "daily", "t.moorings", "id").items()}
        assert replayed == {k: str(Decimal(v).quantize(Decimal("0.01"))) for k, v in state.items()}
        runs, (whole,) = _totals(base / "daily"), _totals(base / "once")
        # a delivery identical to an earlier one (same SHA-256) is skipped, not read: in one run
        # its rows are duplicates
        texts = [f.read_bytes() for f in files]
        skipped = sum(len(part) for i, part in enumerate(parts) if texts[i] in texts[:i])
        assert sum(r["read"] for r in runs) + skipped == whole["read"]
        assert sum(r["duplicate"] for r in runs) + skipped == whole["duplicate"]
        for name in ("emitted", "merged", "quarantined"):
            assert sum(r[name] for r in runs) == whole[name], name
        assert runs[-1]["pending"] == whole["pending"]


PAIRS = """
table: t.cabins
files: ["c*.csv"]
key: [cabin]
change:
  action: {column: op, codes: {I: insert, B: before, A: after, D: delete}}
  position: {column: pos, kind: integer}
fields:
  cabin: text
  deck: integer
"""


def _landing_cli(tmp_path: Path, files: dict[str, str]) -> tuple[Path, Path, dict[str, Path]]:
    (tmp_path / "m").mkdir(exist_ok=True)
    (tmp_path / "m" / "t.yaml").write_text(PAIRS)
    paths = {}
    for name, text in files.items():
        p = tmp_path / "in" / name
        p.parent.mkdir(exist_ok=True)
        p.write_text("op,pos,cabin,deck\n" + text)
        paths[name] = p
    return tmp_path / "m", tmp_path / "landing", paths


def test_a_split_update_waits_then_pairs(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    m, landing, p = _landing_cli(
        tmp_path, {"c1.csv": "I,1,A1,1\nB,2,A1,1\n", "c2.csv": "A,2,B7,2\nI,3,C3,3\n"}
    )
    assert cli("convert", "--mappings", str(m), str(p["c1.csv"]), "--out", str(landing), "--json") == 0
    first = json.loads(capsys.readouterr().out)
    assert first["pending"] == 1 and first["ledger"]["total"]["pending"] == 1
    assert cli("convert", "--mappings", str(m), str(p["c2.csv"]), "--out", str(landing), "--json") == 0
    second = json.loads(capsys.readouterr().out)["ledger"]["total"]
    # the carried before-image pairs with its after: the key changed, so the old key is deleted
    assert second["pending_in"] == 1 and second["pending"] == 0 and second["deletes"] == 1
    events = [(e["action"], e["key"]["cabin"], e["position"]) for e in _events(landing, "t.cabins")]
    assert events == [
        ("upsert", "A1", "00000000000000000001.0"),
        ("delete", "A1", "00000000000000000002.1"),
        ("upsert", "B7", "00000000000000000002.2"),
        ("upsert", "C3", "00000000000000000003.0"),
    ]
    delete = _events(landing, "t.cabins")[1]
    assert delete["origin"] == {"file": "c1.csv", "row": 2} and delete["prior"] == {"cabin": "A1", "deck": 1}


def test_a_late_before_image_emits_only_what_is_missing(tmp_path: Path) -> None:
    m, landing, p = _landing_cli(
        tmp_path, {"c1.csv": "I,1,A1,1\nA,2,B7,2\nA,3,B7,3\n", "c2.csv": "B,2,A1,1\nB,3,B7,2\n"}
    )
    for name in ("c1.csv", "c2.csv"):
        assert cli("convert", "--quiet", "--mappings", str(m), str(p[name]), "--out", str(landing)) == 0
    runs = _totals(landing)
    # run 1: two after-images emitted unpaired; run 2: the late before of the key change emits the
    # delete of the old key, the late before of the same-key update is merged
    assert runs[0]["unpaired_after"] == 2
    assert (runs[1]["emitted"], runs[1]["merged"], runs[1]["deletes"], runs[1]["pending"]) == (1, 1, 1, 0)
    (delete,) = [e for e in _events(landing, "t.cabins") if e["action"] == "delete"]
    assert delete["key"] == {"cabin": "A1"} and delete["position"] == "00000000000000000002.1"
    assert _replay(landing, "t.cabins", "cabin") == {"B7": {"cabin": "B7", "deck": 3}}


def test_settle_ends_the_wait(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    m, landing, p = _landing_cli(tmp_path, {"c1.csv": "B,5,A1,1\nB,9,A2,2\nI,10,C1,1\n"})
    assert cli("convert", "--quiet", "--mappings", str(m), str(p["c1.csv"]), "--out", str(landing)) == 0
    assert last_run(landing)["pending"] == 2
    assert cli("settle", str(landing), "--mappings", str(m), "--before", "7", "--json") == 0
    report = json.loads(capsys.readouterr().out)
    assert report["pending"] == 1 and report["ledger"]["total"]["pending_in"] == 2
    assert report["ledger"]["total"]["quarantined"] == 1
    # a settle that ends no wait adds no run (before: an empty run, 1 carried in and 1 left waiting)
    runs = sorted((landing / "runs").glob("*.json"))
    assert cli("settle", str(landing), "--mappings", str(m), "--before", "7") == 0
    said = " ".join(capsys.readouterr().out.split())
    assert (
        "nothing to settle: no before-image waits below --before 7 (1 before-image waits at or above it)"
        in said
    )
    assert sorted((landing / "runs").glob("*.json")) == runs
    (q,) = [
        json.loads(x)
        for x in sorted((landing / "quarantine" / "t.cabins").glob("*"))[-1].read_text().splitlines()
    ]
    assert q["cabin"] == "A1" and q["pos"] == "5"  # the raw row, as it was read a run earlier
    assert "settled" in q["_cdcnorm"]["reasons"][0]["reason"] and q["_cdcnorm"]["file"] == "c1.csv"
    assert cli("settle", str(landing), "--mappings", str(m), "--all", "--quiet") == 0
    assert last_run(landing)["pending"] == 0
    capsys.readouterr()
    assert cli("settle", str(landing), "--mappings", str(m), "--all") == 0
    assert "nothing to settle: no before-image waits; no run was added" in capsys.readouterr().out
    assert cli("settle", str(landing), "--mappings", str(m), "--before", "x", "--quiet") == 2


def test_a_converted_input_is_skipped_and_reported(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    m, landing, p = _landing_cli(tmp_path, {"c1.csv": "I,1,A1,1\n"})
    assert cli("convert", "--quiet", "--mappings", str(m), str(p["c1.csv"]), "--out", str(landing)) == 0
    copy = tmp_path / "again" / "c1-copy.csv"
    copy.parent.mkdir()
    copy.write_bytes(p["c1.csv"].read_bytes())
    assert cli("convert", "--mappings", str(m), str(copy), "--out", str(landing)) == 0
    text = capsys.readouterr().out
    assert "skipped, converted before: c1-copy.csv" in text and "nothing new" in text
    assert len(list((landing / "runs").iterdir())) == 1
    assert cli("runs", str(landing), "--json") == 0
    (rec,) = json.loads(capsys.readouterr().out)
    import hashlib

    assert rec["inputs"][0]["sha256"] == hashlib.sha256(p["c1.csv"].read_bytes()).hexdigest()  # FIPS 180-4


def test_a_conflict_with_an_earlier_run_is_quarantined_with_its_run(tmp_path: Path) -> None:
    m, landing, p = _landing_cli(tmp_path, {"c1.csv": "I,1,A1,1\n", "c2.csv": "I,1,A1,2\nI,1,A1,1\n"})
    for name in ("c1.csv", "c2.csv"):
        assert cli("convert", "--quiet", "--mappings", str(m), str(p[name]), "--out", str(landing)) == 0
    first, second = _totals(landing)
    assert first["emitted"] == 1
    assert second["duplicate"] == 1 and second["quarantined"] == 1 and second["emitted"] == 0
    run1 = json.loads(sorted((landing / "runs").glob("*.json"))[0].read_text())["run"]
    (q,) = [
        json.loads(x) for x in next((landing / "quarantine" / "t.cabins").glob("*")).read_text().splitlines()
    ]
    assert q["deck"] == "2" and q["_cdcnorm"]["reasons"][0]["reason"] == f"conflict with run {run1}"


def _quarantined(landing: Path, run: str) -> list[dict[str, Any]]:
    path = landing / "quarantine" / "t.cabins" / f"{run}.jsonl"
    return [json.loads(x) for x in path.read_text(encoding="utf-8").splitlines()]


def _run_into(landing: Path, m: Path, *paths: Path) -> str:
    """Convert into the landing area (exit 0); the run's name."""
    assert cli("convert", "--quiet", "--mappings", str(m), *map(str, paths), "--out", str(landing)) == 0
    return str(last_run(landing)["run"])


def test_a_conflict_stays_one_until_a_version_is_fed_back(tmp_path: Path) -> None:
    # run 1: two exports disagree on cabin A1 at position 1, so both versions are quarantined;
    # a later delivery of either version alone must not settle it without a word
    m, landing, p = _landing_cli(
        tmp_path,
        {
            "c-live.csv": "I,1,A1,1\nI,2,B2,1\n",
            "c-archive.csv": "I,1,A1,2\nI,2,B2,1\n",
            "c-again.csv": "I,1,A1,2\nI,3,C3,1\n",
            "c-later.csv": "I,1,A1,1\nI,1,A1,2\nI,4,D4,1\n",
        },
    )

    run1 = _run_into(landing, m, p["c-live.csv"], p["c-archive.csv"])
    assert _totals(landing)[-1]["quarantined"] == 2 and {
        e["key"]["cabin"] for e in _events(landing, "t.cabins")
    } == {"B2"}
    run2 = _run_into(landing, m, p["c-again.csv"])
    (q,) = _quarantined(landing, run2)
    assert q["cabin"] == "A1" and q["deck"] == "2"
    reason = q["_cdcnorm"]["reasons"][0]
    assert reason["reason"] == (
        f"conflict with run {run1}, which quarantined versions of this change that differ: none is chosen "
        "until one is fed back from its quarantine file"
    )
    assert reason["expected"] == f"a version fed back from the quarantine of run {run1}"
    assert [e["key"]["cabin"] for e in _events(landing, "t.cabins")] == ["B2", "C3"]
    # the user chooses deck 1: that line of run 1's quarantine, fed back as it is, settles it
    chosen = [
        x
        for x in (landing / "quarantine" / "t.cabins" / f"{run1}.jsonl").read_text().splitlines()
        if '"deck":"1"' in x
    ]
    fix = tmp_path / "fix" / "t.cabins" / "chosen.jsonl"
    fix.parent.mkdir(parents=True)
    fix.write_text(chosen[0] + "\n")
    run3 = _run_into(landing, m, fix)
    settled = [e for e in _events(landing, "t.cabins") if e["key"]["cabin"] == "A1"]
    assert [(e["values"]["deck"], e["origin"]["file"]) for e in settled] == [(1, "chosen.jsonl")]
    # from then on a delivery is compared with what was emitted: the same version is a duplicate,
    # the other a conflict with the run that emitted it
    _run_into(landing, m, p["c-later.csv"])
    total = _totals(landing)[-1]
    assert total["duplicate"] == 1 and total["quarantined"] == 1 and total["emitted"] == 1
    (q,) = _quarantined(landing, str(last_run(landing)["run"]))
    assert q["deck"] == "2" and q["_cdcnorm"]["reasons"][0]["reason"] == f"conflict with run {run3}"


def test_both_versions_fed_back_stay_a_conflict(tmp_path: Path) -> None:
    m, landing, p = _landing_cli(tmp_path, {"c-live.csv": "I,1,A1,1\n", "c-archive.csv": "I,1,A1,2\n"})
    run1 = _run_into(landing, m, p["c-live.csv"], p["c-archive.csv"])
    fix = tmp_path / "fix" / "t.cabins" / "both.jsonl"
    fix.parent.mkdir(parents=True)
    fix.write_bytes((landing / "quarantine" / "t.cabins" / f"{run1}.jsonl").read_bytes())
    run2 = _run_into(landing, m, fix)
    assert _totals(landing)[-1]["quarantined"] == 2 and not _events(landing, "t.cabins")
    assert [q["_cdcnorm"]["reasons"][0]["reason"] for q in _quarantined(landing, run2)] == ["conflict"] * 2
    # remembered again: a later delivery of one version is still held
    (again := tmp_path / "in" / "c-again.csv").write_text("op,pos,cabin,deck\nI,1,A1,1\nI,2,B2,1\n")
    _run_into(landing, m, again)
    assert _totals(landing)[-1]["quarantined"] == 1
    assert [e["key"]["cabin"] for e in _events(landing, "t.cabins")] == ["B2"]


def _visible(landing: Path) -> dict[str, bytes]:
    return {
        p.relative_to(landing).as_posix(): p.read_bytes()
        for p in sorted(landing.rglob("*"))
        if p.is_file() and ".cdcnorm" not in p.relative_to(landing).parts
    }


def _convert_cmd(m: Path, files: list[Path], landing: Path, *extra: str) -> list[str]:
    return [
        sys.executable,
        "-m",
        "cdcnorm",
        "convert",
        "--quiet",
        "--mappings",
        str(m),
        *map(str, files),
        "--out",
        str(landing),
        "--format",
        "parquet",
        *extra,
    ]


@pytest.fixture
def deliveries(tmp_path: Path) -> tuple[Path, list[Path]]:
    sys.path.insert(0, str(ROOT / "tests" / "bench"))
    import dumpgen

    mdir = dumpgen.write_mapping(tmp_path / "m").parent
    days = []
    for i in range(3):
        folder = tmp_path / f"day{i}"
        folder.mkdir()
        days.append(folder)
        for f in dumpgen._chunk(60_000, folder, 20 + i, first_change=40_000 * i, part=i):
            f.rename(folder / f.name)
    return mdir, days


def test_a_killed_run_leaves_the_area_as_it_was(tmp_path: Path, deliveries: tuple[Path, list[Path]]) -> None:
    mdir, days = deliveries
    landing = tmp_path / "landing"
    assert subprocess.run(_convert_cmd(mdir, [days[0]], landing), check=False).returncode == 0
    rng = random.Random(7)
    started = time.monotonic()
    subprocess.run(_convert_cmd(mdir, [days[1]], tmp_path / "timing"), check=True)
    took = time.monotonic() - started
    outcomes = set()
    for attempt in range(8):
        before = _visible(landing)
        runs = len(list((landing / "runs").iterdir()))
        proc = subprocess.Popen(_convert_cmd(mdir, [days[1]], landing))
        # until a kill has landed before the commit point, kill early in the run (a run that went
        # quicker than the timed one can commit before a kill late in it); then anywhere in it
        time.sleep(rng.uniform(0.05, took * (1.1 if "as before" in outcomes else 0.3)))
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        committed = (landing / ".cdcnorm" / "journal.json").exists() or _visible(landing) != before
        if not committed:
            outcomes.add("as before")
            assert _visible(landing) == before, attempt  # the same files, byte for byte
            continue
        outcomes.add("committed")
        # past its commit point the run is complete once the next opening finishes the publish
        from cdcnorm.landing import open_landing

        with open_landing(landing, wait=5):
            pass
        assert len(list((landing / "runs").iterdir())) == runs + 1
        if "as before" in outcomes:
            break
    # the next run succeeds and leaves no leftovers
    assert subprocess.run(_convert_cmd(mdir, [days[2]], landing), check=False).returncode == 0
    assert not list((landing / ".cdcnorm").glob("staging-*")) and not list(landing.rglob("*.tmp-*"))
    assert all(json.loads(p.read_text())["ledger"]["balanced"] for p in (landing / "runs").iterdir())
    assert "as before" in outcomes


def test_two_runs_at_once(tmp_path: Path, deliveries: tuple[Path, list[Path]]) -> None:
    mdir, days = deliveries
    landing = tmp_path / "landing"
    procs = [subprocess.Popen(_convert_cmd(mdir, [d], landing)) for d in days[:2]]
    assert [p.wait() for p in procs] == [0, 0]  # the second waited for the first's lock
    records = [json.loads(p.read_text()) for p in sorted((landing / "runs").glob("*.json"))]
    assert len(records) == 2 and {r["inputs"][0]["path"].split(os.sep)[-2] for r in records} == {
        "day0",
        "day1",
    }
    # with no time to wait, a run started while another holds the lock is refused with a clear message
    first = subprocess.Popen(_convert_cmd(mdir, [days[2]], landing))
    import fcntl

    deadline = time.monotonic() + 20
    held = False
    while time.monotonic() < deadline and first.poll() is None and not held:
        fd = os.open(landing / ".cdcnorm" / "lock", os.O_RDWR)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            fcntl.flock(fd, fcntl.LOCK_UN)
        except BlockingIOError:
            held = True
        finally:
            os.close(fd)
        time.sleep(0.01)
    if held:
        refused = subprocess.run(
            _convert_cmd(mdir, [days[0]], landing, "--wait", "0"), capture_output=True, text=True, check=False
        )
        assert refused.returncode == 9 and "another run is writing" in refused.stderr
        assert "Traceback" not in refused.stderr
    assert first.wait() == 0
    assert len(list((landing / "runs").iterdir())) == 3


def test_runs_starting_at_once_on_a_new_landing_area_do_not_trip_over_each_other(tmp_path: Path) -> None:
    """The writability check of --out leaves nothing another run could remove under it (each
    writer's probe has its own name): 8 threads x 50 checks of one new folder, no error."""
    from concurrent.futures import ThreadPoolExecutor

    from cdcnorm.landing.area import _check_folder

    root = tmp_path / "new-landing"
    with ThreadPoolExecutor(8) as pool:
        list(pool.map(lambda _: [_check_folder(root) for _ in range(50)], range(8)))
    assert root.is_dir() and list(root.iterdir()) == []


def test_a_landing_area_in_an_input_folder_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: --out the dumps folder itself was accepted; the next run stopped on its sub-folders
    # and suggested --recursive, which would have read the quarantine files as rows to convert again
    m, landing, p = _landing_cli(tmp_path, {"c1.csv": "I,1,A1,1\n"})
    dumps = p["c1.csv"].parent
    for out in (dumps, dumps / "landing"):
        for extra in ((), ("--recursive",)):
            assert cli("convert", "--mappings", str(m), str(dumps), "--out", str(out), *extra) == 2
            err = " ".join(capsys.readouterr().err.split())
            assert "the next run would find the landing area among the dumps" in err, err
    assert sorted(q.name for q in dumps.iterdir()) == ["c1.csv"]  # nothing was written there
    # a landing area beside the folder is fine
    assert cli("convert", "--quiet", "--mappings", str(m), str(dumps), "--out", str(landing)) == 0


@pytest.mark.parametrize("replace", [False, True])
def test_a_folder_that_is_no_landing_area_but_holds_its_folder_names_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], replace: bool
) -> None:
    """A project folder with its own runs/ (or index/, events/): before, convert mixed its files in
    (a JSON file in runs/ read as a run record) and --replace removed them without a word."""
    out = tmp_path / "project"
    (out / "runs").mkdir(parents=True)
    (out / "runs" / "notes.txt").write_text("the team's own notes")
    (out / "index").mkdir()  # an empty folder of those names is harmless
    args = ["convert", str(ROOT / "examples" / "dumps"), "--mappings", str(ROOT / "mappings")]
    capsys.readouterr()
    assert cli(*args, "--out", str(out), *(["--replace"] if replace else [])) == 2
    err = capsys.readouterr().err
    assert "is no landing area (it has no .cdcnorm folder), but it holds runs/" in err, err
    assert (out / "runs" / "notes.txt").read_text() == "the team's own notes"
    assert not (out / ".cdcnorm").exists() and not (out / "events").exists()
    # a landing area itself, --replace empties as before
    area = tmp_path / "area"
    assert cli(*args, "--out", str(area), "--quiet") == 0
    assert cli(*args, "--out", str(area), "--replace", "--quiet") == 0
    assert len(list((area / "runs").glob("*.json"))) == 1


def _replace_args(area: Path, *inputs: Path) -> list[str]:
    return ["convert", *map(str, inputs), "--mappings", str(ROOT / "mappings"), "--out", str(area), "--quiet"]


def test_replace_takes_effect_only_when_its_run_commits(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--replace emptied the landing area before the run: a run that then failed (schema drift,
    exit 4) left an empty area, every earlier run's events, identities and quarantine gone. The
    earlier files now go as the replacing run commits, and not before."""
    dumps, nextday = ROOT / "examples" / "dumps", ROOT / "examples" / "next-day"
    area = tmp_path / "area"
    assert cli(*_replace_args(area, dumps)) == 0
    assert cli(*_replace_args(area, nextday)) == 0
    before = _visible(area)
    assert len([f for f in before if f.startswith("runs/")]) == 2
    drifted = tmp_path / "drifted" / "bookings-2026-03-03.csv"
    drifted.parent.mkdir()
    drifted.write_text("op,log_pos\n2,0/1\n")
    capsys.readouterr()
    assert cli(*_replace_args(area, drifted), "--replace") == 4
    assert "schema drift" in capsys.readouterr().err
    assert _visible(area) == before  # every file as it was, byte for byte
    assert not list((area / ".cdcnorm").glob("staging-*"))

    # a replacing run that commits reads the area as empty (the inputs converted before are not
    # skipped) and leaves its own files only: the same events as a run into a new area
    assert cli(*_replace_args(area, dumps), "--replace") == 0
    fresh = tmp_path / "fresh"
    assert cli(*_replace_args(fresh, dumps)) == 0
    record = last_run(area)
    assert record["skipped"] == [] and record["options"]["replace"] is True
    assert [p.name for p in (area / "runs").iterdir()] == [f"{record['run']}.json"]
    assert all(Path(f).name.startswith(record["run"]) for f in _visible(area)), sorted(_visible(area))
    assert landing_outputs(area) == landing_outputs(fresh)
    assert record["ledger"] == last_run(fresh)["ledger"]


@pytest.mark.parametrize("where", ["clearing", "moving"])
def test_a_replacing_run_stopped_in_its_commit_is_finished_by_the_next_opening(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str], where: str
) -> None:
    """Committed, a replacing run's journal names the folders it clears: the next opening of the
    area finishes both the clearing and the moves, whichever was under way when it stopped."""
    from cdcnorm.landing import journal, open_landing

    dumps, nextday = ROOT / "examples" / "dumps", ROOT / "examples" / "next-day"
    area, fresh = tmp_path / "area", tmp_path / "fresh"
    assert cli(*_replace_args(area, dumps)) == 0
    assert cli(*_replace_args(fresh, nextday)) == 0
    meta = area / ".cdcnorm"
    done: list[Path] = []
    real_replace, real_unlink = os.replace, Path.unlink

    def committing(target: Any) -> bool:  # a step of the publish, once the journal is written
        return (meta / journal.NAME).exists() and Path(target).parent != meta

    def replace(src: Any, dst: Any) -> None:
        if where == "moving" and committing(dst):
            done.append(Path(dst))
            if len(done) == 2:  # one file moved in, the next move fails
                raise OSError(5, "Input/output error")
        real_replace(src, dst)

    def unlink(path: Path, missing_ok: bool = False) -> None:
        if where == "clearing" and committing(path):
            done.append(path)
            if len(done) == 2:  # one earlier file removed, the next removal fails
                raise OSError(5, "Input/output error")
        real_unlink(path, missing_ok=missing_ok)

    monkeypatch.setattr(journal.os, "replace", replace)
    monkeypatch.setattr(Path, "unlink", unlink)
    capsys.readouterr()
    assert cli(*_replace_args(area, nextday), "--replace") != 0
    assert "is committed, but moving its files into place stopped" in capsys.readouterr().err
    monkeypatch.undo()
    assert len(done) == 2 and (meta / journal.NAME).exists()
    with open_landing(area, wait=5):
        pass
    assert not (meta / journal.NAME).exists() and not list(meta.glob("staging-*"))
    run = last_run(area)["run"]
    assert [p.name for p in (area / "runs").iterdir()] == [f"{run}.json"]
    assert all(Path(f).name.startswith(run) for f in _visible(area)), sorted(_visible(area))
    assert landing_outputs(area) == landing_outputs(fresh)


def test_a_landing_area_whose_cdcnorm_folder_was_removed_is_still_one(tmp_path: Path) -> None:
    """.cdcnorm/ holds no data (lock, journal, staging): removed, the area's run records still say
    what it is, and the next run adds to it."""
    area = tmp_path / "area"
    args = ["convert", str(ROOT / "examples" / "dumps"), "--mappings", str(ROOT / "mappings"), "--quiet"]
    assert cli(*args, "--out", str(area)) == 0
    import shutil

    shutil.rmtree(area / ".cdcnorm")
    nextday = ["convert", str(ROOT / "examples" / "next-day"), "--mappings", str(ROOT / "mappings")]
    assert cli(*nextday, "--out", str(area), "--quiet") == 0
    assert len(list((area / "runs").glob("*.json"))) == 2


def test_settle_by_position_one_table_at_a_time_when_their_positions_differ_in_kind(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Bookings (hex-pair positions) and passengers (hex) both have an image waiting: no one
    --before is a position of both. Before, the only way out was --all; --table now settles one
    table by a position of its kind, and the other's image keeps waiting."""
    area = tmp_path / "area"
    mappings = str(ROOT / "mappings")
    assert (
        cli(
            "convert", str(ROOT / "examples" / "dumps"), "--mappings", mappings, "--out", str(area), "--quiet"
        )
        == 0
    )
    (tmp_path / "more").mkdir()
    header = (ROOT / "examples" / "dumps" / "passengers.csv").read_text().splitlines()[0]
    (tmp_path / "more" / "passengers-late.csv").write_text(
        header + "\nB,0x0000002A000001F90001,1,9001,Ines Marrow,ines@example.org,gold,2019-04-01,Zm9vYmFy,"
        "5DF41881-3AED-3515-88A7-2F4A814CF09E\n"
    )
    assert cli("convert", str(tmp_path / "more"), "--mappings", mappings, "--out", str(area), "--quiet") == 0
    assert last_run(area)["waiting"] == 2
    capsys.readouterr()
    settle = ["settle", str(area), "--mappings", mappings, "--quiet"]
    assert cli(*settle, "--before", "0x0000002A000001FA0000") == 2  # not a position of ferry.bookings
    assert "with --table" in capsys.readouterr().err
    assert cli(*settle, "--before", "0x0000002A000001FA0000", "--table", "ferry.passengers") == 0
    record = last_run(area)
    assert record["waiting_by_table"] == {"ferry.bookings": 1, "ferry.passengers": 0, "ferry.sailings": 0}
    assert record["ledger"]["total"]["quarantined"] == 1
