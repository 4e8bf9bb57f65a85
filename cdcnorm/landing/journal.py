"""The commit journal: the list of moves that publish a run, replayed until it is done.

A run's files are complete in its staging folder before the journal is written
(atomically: temporary name, fsync, rename). From then on the run is committed:
the moves are made in order, the run record last, and the journal is removed.
If the process dies in between, the next opening of the area replays the
remaining moves (a move whose source is gone is already done).

A run that replaces the area's contents (``convert --replace``) names the folders it clears:
every file in them that is not one of the run's own is removed before the moves. Replayed
again, the clearing keeps the files already moved in, so it too can stop anywhere and resume.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

from cdcnorm.errors import InputError

NAME = "journal.json"


def _fsync_dir(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write(meta: Path, staging: Path, moves: list[tuple[str, str]], clear: tuple[str, ...] = ()) -> None:
    """Record the moves (paths relative to the area) that publish ``staging``, and the folders
    whose other files the run replaces (``clear``)."""
    tmp = meta / (NAME + ".tmp")
    try:
        with open(tmp, "w", encoding="utf-8") as f:
            json.dump({"staging": staging.name, "moves": moves, "clear": list(clear)}, f)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, meta / NAME)
    except BaseException:  # not committed: no half-written journal is left behind
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(meta)


def _inside(name: object) -> str:
    """A path the journal names, relative and inside the area (a damaged journal could name any)."""
    if not isinstance(name, str):
        raise TypeError(f"{name!r} is not a path")
    parts = Path(name).parts
    if not parts or Path(name).is_absolute() or ".." in parts:
        raise ValueError(f"{name!r} is not a path inside the landing area")
    return name


def replay(root: Path, meta: Path) -> bool:
    """Finish a committed publish; True when there was one."""
    path = meta / NAME
    if not path.exists():
        return False
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        staging = meta / _inside(data["staging"])
        if not staging.name.startswith("staging-"):
            raise ValueError(f"{data['staging']!r} is no staging folder")
        moves = [(_inside(src), _inside(dst)) for src, dst in data["moves"]]
        folders = data.get("clear", [])
        if not isinstance(folders, list):
            raise TypeError(f"{folders!r} is no list of folders")
        clear = [_inside(folder) for folder in folders]
    except (UnicodeDecodeError, ValueError, KeyError, TypeError) as e:  # JSONDecodeError is a ValueError
        raise InputError(
            "the commit journal of the landing area is damaged: the run it was committing cannot be finished",
            file=str(path),
            expected='the journal convert writes atomically: {"staging": ..., "moves": [[from, to], ...]}',
            found=f"{type(e).__name__}: {e}",
            hint=f"remove {path} and any {meta}/staging-* folder: the run it named is then not committed "
            "(its files in place are ignored, and its inputs are converted again)",
        ) from None
    if clear:
        _clear(root, clear, {dst for _, dst in moves})
    for src, dst in moves:
        source, target = staging / src, root / dst
        if source.exists():
            target.parent.mkdir(parents=True, exist_ok=True)
            os.replace(source, target)
    _fsync_dir(root)
    path.unlink()
    shutil.rmtree(staging, ignore_errors=True)
    return True


def _clear(root: Path, folders: list[str], keep: set[str]) -> None:
    """Remove every file under ``folders`` but those ``keep`` names (the run's own, moved in or
    still to be), then the folders left empty."""
    for name in folders:
        folder = root / name
        if not folder.is_dir():
            continue
        for path in sorted(folder.rglob("*"), reverse=True):  # a folder's files before the folder
            if path.is_dir():
                if not any(path.iterdir()):
                    path.rmdir()
            elif path.relative_to(root).as_posix() not in keep:
                path.unlink()
