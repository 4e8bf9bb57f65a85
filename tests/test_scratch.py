"""The run's temporary space: its own folder, swept when its run is gone, and a full disk or a
spill limit reported as such (never as a memory problem, never as a bug)."""

from __future__ import annotations

import errno
import json
import os
import subprocess
import sys
from pathlib import Path

import duckdb
import pytest

from cdcnorm.engines.duckdb import disk_full
from cdcnorm.errors import EXIT_DISK
from cdcnorm.scratch import OWNER, PREFIX, scratch_folder, sweep
from tests.conftest import bench_dump, cli


def test_a_run_uses_its_own_scratch_folder_and_removes_it(tmp_path: Path) -> None:
    base = tmp_path / "scratch"
    base.mkdir()
    with scratch_folder(base) as folder:
        assert folder.parent == base and folder.name.startswith(PREFIX)
        assert (folder / OWNER).exists()
        assert sweep(base) == []  # its owner is alive: never swept
        assert folder.exists()
    assert not folder.exists()


def test_a_killed_runs_folder_is_swept_by_the_next_run(tmp_path: Path) -> None:
    base = tmp_path / "scratch"
    base.mkdir()
    # a real process takes a scratch folder and is killed inside it: it cannot clean up
    code = (
        "import os, sys, signal\n"
        "from pathlib import Path\n"
        "from cdcnorm.scratch import scratch_folder\n"
        "with scratch_folder(Path(sys.argv[1])) as f:\n"
        "    (f / 'spill.tmp').write_bytes(b'x' * 1000)\n"
        "    print(f, flush=True)\n"
        "    os.kill(os.getpid(), signal.SIGKILL)\n"
    )
    done = subprocess.run([sys.executable, "-c", code, str(base)], capture_output=True, text=True)
    assert done.returncode == -9
    left = Path(done.stdout.strip())
    assert left.exists() and (left / "spill.tmp").exists()
    foreign = base / f"{PREFIX}not-ours"  # no owner file: another user's or an older version's
    foreign.mkdir()
    with scratch_folder(base) as mine:
        assert not left.exists()
        assert foreign.exists() and mine.exists()


def test_scratch_must_be_a_folder(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    mdir, dumps = bench_dump(tmp_path, 100)
    code = cli(
        "convert",
        "--mappings",
        str(mdir),
        str(dumps),
        "--out",
        str(tmp_path / "o"),
        "--scratch",
        str(tmp_path / "nowhere"),
    )
    assert code == 2
    err = capsys.readouterr().err
    assert "nowhere does not exist" in err and "Traceback" not in err


def test_spill_files_over_the_spill_limit_are_a_disk_error_and_commit_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A real spill: the engine's limit is far below the input and the spill space is capped."""
    mdir, dumps = bench_dump(tmp_path, 50_000)
    out = tmp_path / "out"
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    args = ["convert", "--mappings", str(mdir), str(dumps), "--out", str(out), "--format", "parquet"]
    tight = ["--memory-limit", "40MB", "--threads", "1", "--scratch", str(scratch)]
    assert cli(*args, *tight, "--spill-limit", "1MB") == EXIT_DISK == 13
    err = capsys.readouterr().err
    assert "spill files reached the temporary-space limit" in err and "--spill-limit" in err
    assert str(scratch) in err  # where the spill files were
    assert "out of memory" not in err and "Traceback" not in err and "bug in cdcnorm" not in err
    assert not (out / "events").exists()
    assert list(scratch.iterdir()) == []  # the run's scratch folder is gone
    # the same run with room to spill converts
    assert cli(*args, *tight, "--quiet") == 0


def test_a_full_disk_is_named_as_such() -> None:
    # Linux's /dev/full answers every write with ENOSPC (errno 28, "No space left on device")
    if not Path("/dev/full").exists():
        pytest.skip("no /dev/full on this system")
    con = duckdb.connect()
    with pytest.raises(duckdb.IOException) as engine_error:
        con.execute("COPY (SELECT range AS i FROM range(100000)) TO '/dev/full' (FORMAT CSV)")
    found = disk_full(engine_error.value, "events/t/000001.parquet")
    assert found is not None and found.exit_code == EXIT_DISK
    assert "the disk is full while writing events/t/000001.parquet" in found.render()
    with pytest.raises(OSError) as system_error, open("/dev/full", "wb") as f:
        f.write(b"x" * 100_000)
        f.flush()
        os.fsync(f.fileno())
    assert disk_full(system_error.value) is not None
    assert disk_full(duckdb.IOException("IO Error: Cannot open file: permission denied")) is None
    assert disk_full(OSError(13, "Permission denied")) is None


def test_snapshot_spills_under_scratch_and_leaves_it_empty(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    demo = Path(__file__).resolve().parent.parent / "cdcnorm" / "demo"
    landing = tmp_path / "landing"
    mappings = str(demo / "mappings")
    assert (
        cli(
            "convert",
            "--quiet",
            "--mappings",
            mappings,
            str(demo / "examples" / "dumps"),
            "--out",
            str(landing),
        )
        == 0
    )
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    snap = ["snapshot", str(landing), "--mappings", mappings, "--out", str(tmp_path / "state")]
    assert cli(*snap, "--scratch", str(scratch)) == 0
    assert list(scratch.iterdir()) == [] and list((tmp_path / "state").iterdir())
    capsys.readouterr()
    assert cli(*snap, "--scratch", str(tmp_path / "nowhere")) == 2
    assert "nowhere does not exist" in capsys.readouterr().err
    (tmp_path / "a-file").write_text("x")
    assert cli(*snap, "--scratch", str(tmp_path / "a-file")) == 2
    assert "a-file is not a folder" in capsys.readouterr().err


def test_a_full_disk_while_publishing_says_the_run_is_committed_and_the_next_run_finishes_it(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The disk fills after the journal is written, while the run's files move into place (the
    fault is injected into the first move; the rest is the real landing area)."""
    demo = Path(__file__).resolve().parent.parent / "cdcnorm" / "demo"
    landing = tmp_path / "landing"
    args = [
        "convert",
        "--mappings",
        str(demo / "mappings"),
        str(demo / "examples" / "dumps"),
        "--out",
        str(landing),
    ]
    real_replace = os.replace
    failed: list[str] = []

    def replace(src: str | Path, dst: str | Path) -> None:
        if "staging-" in str(src) and "staging-" not in str(dst) and not failed:
            failed.append(str(src))
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        real_replace(src, dst)

    monkeypatch.setattr(os, "replace", replace)
    assert cli(*args) == EXIT_DISK
    err = capsys.readouterr().err
    assert "is committed, but moving its files into place stopped" in err and "Traceback" not in err
    assert "nothing was committed" not in err
    assert failed and not list((landing / "runs").glob("*.json"))  # the run record moves last
    monkeypatch.setattr(os, "replace", real_replace)
    assert cli(*args, "--quiet") == 0  # opening the area finishes the move; the dumps are now known
    (record,) = sorted((landing / "runs").glob("*.json"))
    assert json.loads(record.read_text())["ledger"]["total"]["read"] == 37
    assert list((landing / "events").rglob("*.jsonl"))


def test_snapshot_and_apply_take_the_same_engine_options(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A real spill in snapshot over --spill-limit is exit 13; a size that is not one is refused
    when the arguments are read (exit 2), not by the engine with a traceback."""
    mdir, dumps = bench_dump(tmp_path, 200_000)
    landing = tmp_path / "landing"
    args = ["convert", "--quiet", "--mappings", str(mdir), str(dumps), "--out", str(landing)]
    assert cli(*args, "--format", "parquet") == 0
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    snap = ["snapshot", str(landing), "--mappings", str(mdir), "--out", str(tmp_path / "state")]
    tight = ["--memory-limit", "40MB", "--threads", "1", "--scratch", str(scratch)]
    capsys.readouterr()
    assert cli(*snap, *tight, "--spill-limit", "1MB") == EXIT_DISK
    err = capsys.readouterr().err
    assert "spill files reached the temporary-space limit" in err and str(scratch) in err
    assert "Traceback" not in err and list(scratch.iterdir()) == []
    assert not (tmp_path / "state").exists() or not list((tmp_path / "state").iterdir())
    assert cli(*snap, *tight) == 0  # with room to spill
    for command in (snap, ["apply", str(landing), "--mappings", str(mdir), "--target", "sqlite:///x.db"]):
        for option in ("--memory-limit", "--spill-limit"):
            assert cli(*command, option, "banana") == 2
            err = capsys.readouterr().err
            assert "'banana' is not a memory size" in err and "Traceback" not in err
        assert cli(*command, "--threads", "0") == 2
        assert "is not a whole number of at least 1" in capsys.readouterr().err
    apply = ["apply", str(landing), "--mappings", str(mdir), "--target", "sqlite:///x.db"]
    for wait in ("-1", "nan"):
        assert cli(*apply, "--wait", wait) == 2
        assert "is not a number of seconds (0 or more)" in capsys.readouterr().err


def test_a_small_limit_runs_fewer_threads_unless_told() -> None:
    """Without --threads, the engine runs as many threads as its memory feeds (THREAD_MEMORY
    each, at least one); --threads is taken as given."""
    import os

    from cdcnorm.engines.duckdb import THREAD_MEMORY, DuckDBEngine

    def threads(engine: DuckDBEngine) -> int:
        return int(engine.rows("SELECT current_setting('threads')")[0][0])

    cores = os.cpu_count() or 1
    assert threads(DuckDBEngine(memory_limit="300MB")) == 1  # 214.5 MiB for the engine
    assert threads(DuckDBEngine(memory_limit="300MB", threads=2)) == 2
    big = DuckDBEngine(memory_limit="16GB")
    assert threads(big) == min(cores, max(1, (int(16e9) - (256 << 20)) // THREAD_MEMORY))


@pytest.mark.parametrize("fmt", ["json", "lines"])
def test_a_write_of_lines_keeps_the_querys_rows_and_order_and_leaves_the_engine_as_it_was(
    tmp_path: Path, fmt: str
) -> None:
    """A write of lines (streamed from the engine, several batches here) keeps the query's rows and
    their order (Python's json module reads them back); the engine's thread count is untouched and
    no table is left over."""
    from cdcnorm.engines.duckdb import DuckDBEngine

    engine = DuckDBEngine(memory_limit="1GB", threads=2)
    query = "SELECT i AS n, 'r' || i AS t FROM range(200000) r(i) ORDER BY i DESC"
    if fmt == "lines":
        query = f"SELECT CAST(to_json(q) AS VARCHAR) AS line FROM ({query}) q"
    assert engine.copy(query, tmp_path / "out.jsonl", fmt) == 200000
    lines = (tmp_path / "out.jsonl").read_text().splitlines()
    assert [json.loads(x) for x in lines[:2]] == [
        {"n": 199999, "t": "r199999"},
        {"n": 199998, "t": "r199998"},
    ]
    assert [json.loads(x)["n"] for x in lines] == list(range(199999, -1, -1))
    assert engine.threads() == 2
    assert engine.rows("SELECT count(*) FROM duckdb_tables()") == [(0,)]
    assert not list(tmp_path.glob("*.tmp-*"))


def test_an_error_of_the_engine_while_lines_stream_is_its_error_and_leaves_no_file(tmp_path: Path) -> None:
    """An error the engine raises while lines stream to the file (Arrow passes it on as an OSError
    with the engine's words) is the engine's error again: a statement's refusal of its input is an
    input error (exit 4), not a traceback, and no file, whole or partial, is left."""
    from cdcnorm.engines.duckdb import DuckDBEngine, refusal
    from cdcnorm.errors import InputError

    engine = DuckDBEngine(memory_limit="1GB", threads=2)
    query = f"SELECT CASE WHEN i = 150000 THEN {refusal(chr(39) + 'row 150000 is wrong' + chr(39))} ELSE i END AS n FROM range(200000) r(i)"
    with pytest.raises(InputError, match="row 150000 is wrong"):
        engine.copy(query, tmp_path / "out.jsonl", "json")
    assert list(tmp_path.iterdir()) == []


#: the query of the byte for byte test: every kind of value a line of the envelope holds
_EDGE_ROWS = (
    "SELECT i AS n, CASE WHEN i % 3 = 0 THEN NULL ELSE 'r' || i END AS \"a name\", "
    "chr(1) || chr(10) || chr(13) || chr(9) || '\"\\/é€😀' || chr(8232) || i AS escapes, "
    "{'s': CASE WHEN i % 2 = 0 THEN NULL ELSE i END, 'l': [i, NULL, -i]} AS nested, "
    "CAST(i AS DOUBLE) / 7 AS x, CAST(-0.0 AS DOUBLE) AS z, CAST(1e300 AS DOUBLE) AS big, "
    "CAST(i AS DECIMAL(18,3)) / 8 AS d, i % 2 = 0 AS b, "
    "TIMESTAMPTZ '2026-03-01 12:00:00+00' + i * INTERVAL 1 SECOND AS ts, DATE '2026-01-02' AS day, "
    "CAST(NULL AS INTEGER) AS nothing, [] AS empty "
    "FROM range(150000) r(i) ORDER BY i DESC"
)


@pytest.mark.parametrize("fmt", ["json", "lines"])
def test_a_write_of_lines_writes_the_bytes_of_the_engines_own_writers(tmp_path: Path, fmt: str) -> None:
    """The streamed lines are byte for byte what the engine's own writers write for the same rows
    (the oracle: DuckDB's COPY ... FORMAT JSON, and its CSV writer with no quoting for a column of
    texts): names and their order, NULL members, nested structs and lists, text escapes (RFC 8259
    section 7: quotes, backslashes, control characters; U+2028 and non-ASCII as they are),
    numbers, decimals, timestamps; a NULL text is an empty line."""
    import duckdb

    from cdcnorm.engines.duckdb import DuckDBEngine

    query = _EDGE_ROWS
    options = "FORMAT JSON"
    if fmt == "lines":
        query = f"SELECT CASE WHEN q.n % 5 = 0 THEN NULL ELSE CAST(to_json(q) AS VARCHAR) END AS line FROM ({query}) q"
        options = "FORMAT CSV, HEADER false, QUOTE '', ESCAPE '', DELIMITER '\x01'"
    engine = DuckDBEngine(memory_limit="1GB", threads=2)
    assert engine.copy(query, tmp_path / "written.jsonl", fmt) == 150000
    oracle = duckdb.connect(config={"threads": 1})
    oracle.execute("SET TimeZone = 'UTC'")
    oracle.execute(f"COPY ({query}) TO '{tmp_path / 'oracle.jsonl'}' ({options})")
    written = (tmp_path / "written.jsonl").read_bytes()
    assert written == (tmp_path / "oracle.jsonl").read_bytes()
    lines = written.decode("utf-8").split("\n")
    assert lines[-1] == ""  # every line ends with a line feed, the last one too
    if fmt == "lines":
        assert lines[4] == ""  # n = 149995: a NULL text
    first = json.loads(lines[0])  # n = 149999
    assert list(first) == [
        "n",
        "a name",
        "escapes",
        "nested",
        "x",
        "z",
        "big",
        "d",
        "b",
        "ts",
        "day",
        "nothing",
        "empty",
    ]
    assert first["escapes"] == '\x01\n\r\t"\\/é€😀\u2028149999'
