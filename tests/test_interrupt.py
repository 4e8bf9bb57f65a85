"""Ctrl-C through the command line: a conversion interrupted while the engine works exits 130 and
commits nothing; one interrupted while its run is committed finishes the commit."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.conftest import bench_dump, cli

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "cdcnorm" / "demo"


def _convert(mdir: Path, dumps: Path, landing: Path) -> list[str]:
    return [
        sys.executable,
        "-m",
        "cdcnorm",
        "convert",
        "--mappings",
        str(mdir),
        str(dumps),
        "--out",
        str(landing),
    ]


def test_ctrl_c_while_the_engine_works_on_a_large_table_exits_130_and_commits_nothing(tmp_path: Path) -> None:
    """A table too large to share the engine runs its steps on the main thread, where DuckDB's
    client raises an interrupted query as a plain RuntimeError whenever another thread runs too:
    before, that ended in a traceback and exit 1. Interrupted at 35% and 60% of a run's
    time (the quicker of two runs), while the engine reads, types, pairs and writes the rows; the
    commit comes at the very end."""
    mdir, dumps = bench_dump(tmp_path, 400_000)
    times = []
    for i in range(2):
        started = time.monotonic()
        subprocess.run(_convert(mdir, dumps, tmp_path / f"timing{i}"), check=True, capture_output=True)
        times.append(time.monotonic() - started)
    took = min(times)
    for share, extra in ((0.35, []), (0.6, ["--json"])):
        landing = tmp_path / f"landing-{share:.2f}"
        proc = subprocess.Popen(
            _convert(mdir, dumps, landing) + extra, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
        )
        time.sleep(took * share)
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=120)
        assert proc.returncode == 130, err
        assert "error: interrupted: nothing was committed" in err and "Traceback" not in err, err
        if extra:  # the JSON of an error, as every error prints it under --json (RFC 8259)
            said = json.loads(out)
            assert said["error"] == "InterruptedRun" and said["exit_code"] == 130, out
        assert not list(landing.glob("runs/*.json")) and not list(landing.glob("events/**/*.*"))
        assert [p.name for p in (landing / ".cdcnorm").iterdir()] == [
            "lock"
        ]  # no staging, journal or temporary file


def test_ctrl_c_while_a_run_is_committed_finishes_the_commit(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Once the journal is written the run is committed: an interrupt arriving while its files move
    into place must neither stop the moves nor be reported as "nothing was committed". The
    interrupt is a real SIGINT to this process, sent as the first file moves."""
    landing = tmp_path / "landing"
    real_replace = os.replace
    sent: list[str] = []

    def replace(src: str | Path, dst: str | Path) -> None:
        if "staging-" in str(src) and "staging-" not in str(dst) and not sent:
            sent.append(str(src))
            os.kill(os.getpid(), signal.SIGINT)
        real_replace(src, dst)

    monkeypatch.setattr(os, "replace", replace)
    handler = signal.getsignal(signal.SIGINT)  # Python's own, or one an earlier test's library set
    code = cli(
        "convert",
        "--mappings",
        str(DEMO / "mappings"),
        str(DEMO / "examples" / "dumps"),
        "--out",
        str(landing),
    )
    err = capsys.readouterr().err
    assert sent and code == 0 and "interrupted" not in err, err
    assert len(list(landing.glob("runs/*.json"))) == 1
    assert not (landing / ".cdcnorm" / "journal.json").exists()
    assert len(list(landing.glob("events/*/*.jsonl"))) == 3
    assert signal.getsignal(signal.SIGINT) is handler  # as it was before the commit


_STOP_WHILE_IMPORTING = """
import sys

class Interrupt:  # Ctrl-C as Python imports the mapping models, half-way through the CLI's imports
    def find_spec(self, name, path=None, target=None):
        if name == "cdcnorm.mapping.model":
            raise KeyboardInterrupt
        return None

sys.meta_path.insert(0, Interrupt())
sys.argv[0] = "cdcnorm"
from cdcnorm.entry import main
raise SystemExit(main(sys.argv[1:]))
"""


@pytest.mark.parametrize("extra", [[], ["--json"]])
def test_ctrl_c_while_the_command_starts_exits_130_without_a_traceback(
    tmp_path: Path, extra: list[str]
) -> None:
    """The first half second of a command is Python loading the CLI: Ctrl-C there printed Python's
    traceback. The interrupt is raised where the import of the mapping models would start."""
    args = [
        "convert",
        "--mappings",
        str(DEMO / "mappings"),
        str(DEMO / "examples"),
        "--out",
        str(tmp_path / "l"),
    ]
    done = subprocess.run(
        [sys.executable, "-c", _STOP_WHILE_IMPORTING, *args, *extra],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 130, done.stderr
    assert done.stderr == "error: interrupted while starting: nothing was read or written\n"
    assert not (tmp_path / "l").exists()
    if extra:  # the JSON of an error, as every error prints it under --json (RFC 8259)
        assert json.loads(done.stdout)["error"] == "InterruptedRun"
    else:
        assert done.stdout == ""


def test_the_command_and_python_m_start_through_the_guarded_entry_point() -> None:
    import tomllib

    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"]
    assert scripts == {"cdcnorm": "cdcnorm.entry:main"}
    assert (ROOT / "cdcnorm" / "__main__.py").read_text().startswith("from cdcnorm.entry import main\n")


def test_ctrl_c_while_json_lines_are_read_is_an_interrupt_not_the_engines_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """The JSON Lines reader's batches are made by Python code that the engine's scan calls: Ctrl-C
    there reached the user as DuckDB's "Invalid Input Error" with a Python traceback inside."""
    from cdcnorm import cli as cli_mod
    from cdcnorm.readers import jsonl

    def interrupted(*args: object) -> object:
        raise KeyboardInterrupt
        yield  # a generator, as the reader's is

    monkeypatch.setattr(jsonl, "_batches", interrupted)
    dumps = DEMO / "examples" / "dumps"
    code = cli_mod.main(
        ["convert", "--mappings", str(DEMO / "mappings"), str(dumps), "--out", str(tmp_path / "l")]
    )
    err = capsys.readouterr().err
    assert code == 130, err
    assert "error: interrupted: nothing was committed" in err and "Invalid Input" not in err


def test_ctrl_c_while_the_arguments_are_read_says_nothing_was_done(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    from cdcnorm import cli as cli_mod

    def interrupted() -> object:
        raise KeyboardInterrupt

    monkeypatch.setattr(cli_mod, "build_parser", interrupted)
    assert cli_mod.main(["demo"]) == 130
    assert "error: interrupted: nothing was read or written" in capsys.readouterr().err


def test_every_command_says_what_ctrl_c_left() -> None:
    """A command without its own words printed a bare "interrupted", which tells a user nothing
    about the files it writes."""
    import argparse

    from cdcnorm import cli as cli_mod

    parser = cli_mod.build_parser()
    commands = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices
    assert set(commands) <= set(cli_mod.INTERRUPTED), set(commands) - set(cli_mod.INTERRUPTED)


def test_ctrl_c_while_a_diagram_is_written_leaves_no_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """The export is interrupted after it wrote part of the GraphML: neither the diagram nor its
    temporary file is left, and an older diagram of the same name is left as it was."""
    import networkx as nx

    from cdcnorm import cli as cli_mod

    out = tmp_path / "g.graphml"
    out.write_text("the older diagram\n")

    def interrupted(g: object, path: Path) -> None:
        Path(path).write_text("<graphml half-written")
        raise KeyboardInterrupt

    monkeypatch.setattr(nx, "write_graphml", interrupted)
    demo_models, demo_mappings = ROOT / "examples" / "models", ROOT / "mappings"
    code = cli_mod.main(
        ["lineage", "--models", str(demo_models), "--mappings", str(demo_mappings), "--out", str(out)]
    )
    err = capsys.readouterr().err
    assert code == 130, err
    assert "error: interrupted: no diagram was left half-written" in err
    assert out.read_text() == "the older diagram\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["g.graphml"]
