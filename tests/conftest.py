"""Helpers shared by the tests: run conversions on small files written to a temporary folder."""

from __future__ import annotations

import json
import os
import signal
import sys
import textwrap
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

from cdcnorm.cli import main

ROOT = Path(__file__).resolve().parent.parent

# A test run started in the background by a non-interactive shell (a CI job) inherits SIGINT
# ignored, and so does every process it starts: Python then installs no KeyboardInterrupt handler,
# and the Ctrl-C tests would wait for the end or test nothing. The tests run as from a terminal.
if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
    signal.signal(signal.SIGINT, signal.default_int_handler)


def bench_dump(tmp_path: Path, rows: int) -> tuple[Path, Path]:
    """The benchmark's realistic dump of ``rows`` rows (``tests/bench/dumpgen.py``): its mappings
    folder and its dumps folder, under ``tmp_path``."""
    sys.path.insert(0, str(ROOT / "tests" / "bench"))
    import dumpgen

    mdir = dumpgen.write_mapping(tmp_path / "m").parent
    (tmp_path / "d").mkdir()
    dumpgen.generate(rows, tmp_path / "d")
    return mdir, tmp_path / "d"


@dataclass
class Converted:
    out: Path
    code: int = 0  # the CLI's exit code

    def events(self, table: str) -> list[dict[str, Any]]:
        """Every run's events of the table, run by run."""
        return _lines(sorted((self.out / "events" / table).glob("*.jsonl")))

    def quarantine(self, table: str) -> list[dict[str, Any]]:
        return _lines(sorted((self.out / "quarantine" / table).glob("*.jsonl")))

    def ledger(self) -> dict[str, Any]:
        """The ledger of the last run."""
        return last_run(self.out)["ledger"]


def _lines(paths: list[Path]) -> list[dict[str, Any]]:
    return [json.loads(line) for p in paths for line in p.read_text(encoding="utf-8").splitlines()]


def last_run(landing: Path) -> dict[str, Any]:
    """The record of the landing area's last run."""
    data: dict[str, Any] = json.loads(sorted((landing / "runs").glob("*.json"))[-1].read_text())
    return data


def run_files(landing: Path, folder: str, table: str) -> list[Path]:
    return sorted((landing / folder / table).glob("*.*"))


def landing_outputs(landing: Path) -> dict[str, bytes]:
    """Events and quarantine per table, every run's file in run order, keyed like
    ``events/<table>.jsonl``: what a comparison of two landing areas should look at."""
    out: dict[str, bytes] = {}
    for folder in ("events", "quarantine"):
        for table_dir in sorted((landing / folder).glob("*")):
            files = sorted(table_dir.iterdir())
            out[f"{folder}/{table_dir.name}{''.join(files[0].suffixes)}"] = b"".join(
                f.read_bytes() for f in files
            )
    return out


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
def convert(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> ConvertFn:
    """convert(mapping_yaml, {file name: content}, *extra CLI options) -> Converted: the files are
    converted through the command line (``cdcnorm convert``), as a user runs it; the run must exit 0
    and print no traceback."""
    counter = {"n": 0}

    def _convert(mapping: str | dict[str, str], files: dict[str, str | bytes], *extra: str) -> Converted:
        counter["n"] += 1
        base = tmp_path / f"run{counter['n']}"
        mdir = base / "mappings"
        mdir.mkdir(parents=True)
        mappings = mapping if isinstance(mapping, dict) else {"table.yaml": mapping}
        for name, text in mappings.items():
            (mdir / name).write_text(textwrap.dedent(text))
        paths = write_files(base / "dumps", files)
        out = base / "out"
        code = main(
            ["convert", *map(str, paths), "--mappings", str(mdir), "--out", str(out), "--quiet", *extra]
        )
        printed = capsys.readouterr()
        assert "Traceback" not in printed.err
        assert code == 0, printed.err
        return Converted(out, code)

    return _convert


def insert_only_mapping(folder: Path) -> Path:
    """A mappings folder with table ``t`` over files ``t-*``: inserts at integer positions, fields
    ``id`` and ``name`` (raw columns op, pos, id, name)."""
    folder.mkdir(parents=True)
    (folder / "t.yaml").write_text(
        'table: t\nfiles: ["t-*"]\nkey: [id]\nchange:\n  action: {column: op, codes: {I: insert}}\n'
        "  position: {column: pos, kind: integer}\nfields:\n  id: integer\n  name: text\n"
    )
    return folder


def cli(*args: str) -> int:
    return main(list(args))


#: A PostgreSQL server for the tests (``.ci/run`` starts a throw-away one and sets this), e.g.
#: postgresql://loader@127.0.0.1:55432/postgres. Without it the PostgreSQL tests are skipped,
#: unless CDCNORM_REQUIRE_PG is set (as in CI): then they fail.
PG_ENV = "CDCNORM_TEST_PG"


def _pg_base() -> str:
    base = os.environ.get(PG_ENV)
    if not base:
        if os.environ.get("CDCNORM_REQUIRE_PG"):
            pytest.fail(f"{PG_ENV} is not set, and CDCNORM_REQUIRE_PG says a PostgreSQL server is required")
        pytest.skip(f"no PostgreSQL server: set {PG_ENV} (see .ci/run)")
    return base


@pytest.fixture
def pg_url() -> Iterator[str]:
    """A fresh, empty database on the test server, dropped afterwards."""
    import uuid

    import psycopg
    import sqlalchemy as sa

    base = _pg_base()
    name = f"cdcnorm_{uuid.uuid4().hex[:12]}"
    url = sa.engine.make_url(base)
    with psycopg.connect(url.set(drivername="postgresql").render_as_string(False), autocommit=True) as c:
        c.execute(f'CREATE DATABASE "{name}"')
    try:
        yield url.set(database=name).render_as_string(hide_password=False)
    finally:
        with psycopg.connect(url.set(drivername="postgresql").render_as_string(False), autocommit=True) as c:
            c.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


#: A MariaDB (or MySQL) server for the tests of their dumps (``.ci/run`` starts a throw-away one and
#: sets this), e.g. mysql://root@127.0.0.1:33061. Its ``secure_file_priv`` folder must be one this
#: process can read and write: the server writes the dumps there, and reads the tests' files from
#: there. Without it those tests are skipped, unless CDCNORM_REQUIRE_MYSQL is set (as in CI).
MYSQL_ENV = "CDCNORM_TEST_MYSQL"


@dataclass
class MySQL:
    """A connection to a fresh database on the test server, and the folder it reads and writes."""

    cursor: Any
    files: Path


@pytest.fixture
def mysql() -> Iterator[MySQL]:
    import uuid
    from urllib.parse import urlsplit

    base = os.environ.get(MYSQL_ENV)
    if not base:
        if os.environ.get("CDCNORM_REQUIRE_MYSQL"):
            pytest.fail(
                f"{MYSQL_ENV} is not set, and CDCNORM_REQUIRE_MYSQL says a MariaDB server is required"
            )
        pytest.skip(f"no MariaDB server: set {MYSQL_ENV} (see .ci/run)")
    import pymysql

    url = urlsplit(base)
    con = pymysql.connect(
        host=url.hostname,
        port=url.port or 3306,
        user=url.username or "root",
        password=url.password or "",
        autocommit=True,
        charset="utf8mb4",
    )
    name = f"cdcnorm_{uuid.uuid4().hex[:12]}"
    cur = con.cursor()
    cur.execute(f"CREATE DATABASE {name} CHARACTER SET utf8mb4")
    cur.execute(f"USE {name}")
    cur.execute("SELECT @@secure_file_priv")
    folder = cur.fetchone()[0]
    if not folder:
        pytest.fail("the MariaDB server has no secure_file_priv folder: start it with --secure-file-priv")
    files = Path(folder) / name
    files.mkdir()
    files.chmod(0o777)  # the server's user writes here
    try:
        yield MySQL(cur, files)
    finally:
        cur.execute(f"DROP DATABASE {name}")
        con.close()
        import shutil

        shutil.rmtree(files, ignore_errors=True)
