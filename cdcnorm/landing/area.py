"""Opening a landing area: lock it, finish or clear what an earlier run left, and find its files."""

from __future__ import annotations

import errno
import os
import re
import secrets
import shutil
import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from cdcnorm.errors import CdcnormError, DiskSpaceError, InputError, UsageError
from cdcnorm.landing import journal, lock, runs
from cdcnorm.names import path_part

META = ".cdcnorm"
RUN_RECORD = re.compile(r"[0-9]{6}-[0-9]{8}T[0-9]{6}Z\.json")
DATA = ("events", "quarantine", "index", runs.RUNS)


@dataclass
class Landing:
    root: Path
    #: the run replaces the area's contents (``convert --replace``): it reads the area as empty,
    #: and its commit removes the earlier runs' files; until then they stay as they were
    replacing: bool = False

    @property
    def meta(self) -> Path:
        return self.root / META

    def recover(self) -> None:
        """Finish a publish the journal names; remove unfinished runs' staging folders and any
        temporary file an interrupted write left."""
        journal.replay(self.root, self.meta)
        (self.meta / (journal.NAME + ".tmp")).unlink(missing_ok=True)  # a journal never written
        for staging in self.meta.glob("staging-*"):
            shutil.rmtree(staging, ignore_errors=True)
        for folder in DATA:
            for tmp in (self.root / folder).rglob("*.tmp-*"):
                tmp.unlink()

    def next_run(self) -> str:
        done = self.committed()
        number = 1 + max((int(r.split("-")[0]) for r in done), default=0)
        return f"{number:06d}-{datetime.now(UTC):%Y%m%dT%H%M%SZ}"

    @contextmanager
    def staged(self, run: str) -> Iterator[Path]:
        """The run's staging folder. If the block stops before a written journal commits the run
        (an error, Ctrl-C), the folder is removed; once committed, the next opening of the area
        finishes the moves."""
        folder = self.meta / f"staging-{run}"
        folder.mkdir(parents=True)
        try:
            yield folder
        except BaseException:
            if not (self.meta / journal.NAME).exists():
                shutil.rmtree(folder, ignore_errors=True)
            raise

    def publish(self, staging: Path, run: str) -> None:
        """Commit a run: the journal names every move (the run record last), then they are made.

        Ctrl-C is held back until they are: once the journal is written the run is committed,
        and an interrupt there would be reported as "nothing was committed" while the next
        opening of the area finishes the publish. The command then ends as a committed run does."""
        record = f"{runs.RUNS}/{run}.json"
        files = sorted(p.relative_to(staging).as_posix() for p in staging.rglob("*") if p.is_file())
        moves = [(f, f) for f in files if f != record] + [(record, record)]
        with _ctrl_c_held():
            journal.write(self.meta, staging, moves, DATA if self.replacing else ())
            try:
                journal.replay(self.root, self.meta)
            except OSError as e:  # committed: the journal is written, only the moves are left
                message = (
                    f"run {run} is committed, but moving its files into place stopped ({e.strerror}); "
                    "the next convert into this landing area finishes the move"
                )
                kind = DiskSpaceError if e.errno == errno.ENOSPC else CdcnormError
                raise kind(
                    message,
                    file=str(self.root),
                    hint="free disk space, then run convert again (with the same or new dumps)",
                ) from None

    def committed(self) -> set[str]:
        """The runs committed before this one (none when it replaces them)."""
        return set() if self.replacing else runs.committed(self.root)

    def emitted_files(self, table: str) -> list[Path]:
        return self._index_files("emitted", table)

    def conflicted_files(self, table: str) -> list[Path]:
        """The identities runs quarantined as conflicts, with each version's digest."""
        return self._index_files("conflicted", table)

    def _index_files(self, kind: str, table: str) -> list[Path]:
        folder = self.root / "index" / kind / path_part(table)
        done = self.committed()
        return sorted(p for p in folder.glob("*.parquet") if p.stem in done) if folder.is_dir() else []

    def waiting_count(self, table: str) -> int:
        """How many before-images of the table wait (rows of its latest pending file, from the
        Parquet footer)."""
        import pyarrow.parquet as pq

        path = self.pending_file(table)
        return 0 if path is None else int(pq.ParquetFile(path).metadata.num_rows)

    def waiting(self, table: str) -> bool:
        return self.waiting_count(table) > 0

    def pending_file(self, table: str) -> Path | None:
        """The pending images as the latest committed run that touched the table left them."""
        folder = self.root / "index" / "pending" / path_part(table)
        done = self.committed()
        found = sorted(p for p in folder.glob("*.parquet") if p.stem in done) if folder.is_dir() else []
        return found[-1] if found else None


@contextmanager
def _ctrl_c_held() -> Iterator[None]:
    """SIGINT ignored inside (only the main thread may set a handler; elsewhere nothing changes)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def writable_folder(root: Path) -> None:
    """``root`` as a folder this process can write to, made if missing; an error naming it (exit 4)
    when it is a file or cannot be made or written to, before any work is done."""
    if root.exists() and not root.is_dir():
        raise InputError("the output folder is a file", file=str(root), hint="name a folder for --out")
    try:
        root.mkdir(parents=True, exist_ok=True)
        # a name of this process's own: two runs starting at once must not remove each other's
        probe = root / f"{META}-write-probe-{os.getpid()}-{secrets.token_hex(4)}"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as e:
        raise InputError(
            f"cannot write to the output folder: {e.strerror or e}",
            file=str(root),
            hint="choose a writable --out",
        ) from None


def _check_folder(root: Path) -> None:
    for parent in root.absolute().parents:
        if (parent / META).is_dir():  # a landing area's own folder: its runs would land among its files
            raise UsageError(
                f"the output folder is inside the landing area {parent}",
                file=str(root),
                expected="a folder of its own for a landing area",
                hint=f"give --out a folder outside {parent}, or {parent} itself to add a run to it",
            )
    if not (root / META).is_dir() and not _run_records_only(root / runs.RUNS):
        # not (yet) a landing area: folders of its names with files in them are someone else's,
        # which a run would mix with its own (and --replace would remove); a landing area whose
        # .cdcnorm/ was removed (it holds no data) still has its run records
        taken = [f"{f}/" for f in DATA if (root / f).exists() and not _empty_folder(root / f)]
        if taken:
            raise UsageError(
                f"{root} is no landing area (it has no {META} folder), but it holds {', '.join(taken)}",
                file=str(root),
                expected=f"a new or empty folder, or a landing area (made by convert: {META}/ beside "
                f"{', '.join(f + '/' for f in DATA)})",
                found=f"files in {', '.join(taken)} that convert did not write",
                hint="give --out a folder of its own: a run would mix its files with these, and "
                "--replace would remove them",
            )
    writable_folder(root)


def _empty_folder(path: Path) -> bool:
    return path.is_dir() and not any(path.iterdir())


def _run_records_only(folder: Path) -> bool:
    """Whether ``folder`` holds run records and nothing else (``000003-20261202T071328Z.json``)."""
    if not folder.is_dir():
        return False
    names = [p.name for p in folder.iterdir()]
    return bool(names) and all(RUN_RECORD.fullmatch(n) for n in names)


@contextmanager
def open_landing(root: Path, wait: float) -> Iterator[Landing]:
    """The landing area at ``root``, locked for this process, recovered, ready for a run."""
    _check_folder(root)
    area = Landing(root)
    with lock.hold(area.meta, wait):
        area.recover()
        yield area
