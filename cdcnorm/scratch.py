"""A run's scratch folder: the engine's spill files and the readers' temporary copies.

Each run makes its own ``cdcnorm-*`` folder (in the system's temporary folder,
or under ``--scratch``) and removes it when it ends. A run that is killed
cannot remove it, so every run first sweeps its siblings: a folder whose
owner file is no longer locked belongs to a run that is gone. The operating
system releases the lock when a process ends, however it ends, so a live
run's folder is never taken, whatever its age.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

from cdcnorm.errors import UsageError

PREFIX = "cdcnorm-"
#: Locked for the life of the run; created locked under a temporary name and renamed, so a
#: sweeping run never sees it unlocked while its owner lives.
OWNER = ".owner"


def sweep(base: Path) -> list[Path]:
    """Remove the scratch folders under ``base`` left by runs that are gone; the removed ones.
    Folders without an owner file (another user's, or being set up) are left alone."""
    removed = []
    for folder in sorted(base.glob(PREFIX + "*")):
        if folder.is_symlink() or not folder.is_dir():
            continue
        try:
            fd = os.open(folder / OWNER, os.O_RDWR)
        except OSError:
            continue
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            continue  # its run is alive
        else:
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
        finally:
            os.close(fd)
    return removed


@contextlib.contextmanager
def scratch_folder(parent: Path | None = None) -> Iterator[Path]:
    """A new scratch folder under ``parent`` (default: the system's temporary folder), owned by
    this process until the block ends, then removed."""
    base = Path(parent) if parent is not None else Path(tempfile.gettempdir())
    if not base.is_dir():
        raise UsageError(
            f"the scratch folder {base} " + ("is not a folder" if base.exists() else "does not exist"),
            expected="an existing folder for temporary files",
            found=str(base),
        )
    sweep(base)
    try:
        folder = Path(tempfile.mkdtemp(prefix=PREFIX, dir=base))
    except OSError as e:
        raise UsageError(
            f"cannot make a temporary folder in {base}: {e.strerror}",
            hint="give --scratch a folder you can write to",
        ) from None
    fd = os.open(folder / f"{OWNER}.new", os.O_RDWR | os.O_CREAT, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        os.rename(folder / f"{OWNER}.new", folder / OWNER)
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)
        os.close(fd)
