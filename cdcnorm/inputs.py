"""Routing inputs: which files a run reads, and which mapping reads each of them."""

from __future__ import annotations

import fnmatch
import hashlib
import os
from collections import Counter
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path

from cdcnorm.errors import InputError, closest
from cdcnorm.mapping.load import LoadedMapping
from cdcnorm.readers import streams


def _matches(path: Path, pattern: str) -> bool:
    """A mapping's file pattern matches the name, or the name without a compression suffix."""
    return fnmatch.fnmatchcase(path.name, pattern) or fnmatch.fnmatchcase(streams.base_name(path), pattern)


def _readers(path: Path, mappings: Sequence[LoadedMapping]) -> list[LoadedMapping]:
    """The mappings that would read ``path``: by their file globs, or, for a JSON Lines file named
    ``<table>.jsonl`` or in a folder named ``<table>`` (as the quarantine files are:
    quarantine/<table>/<run>.jsonl), that table's."""
    matches = [m for m in mappings if any(_matches(path, g) for g in m.mapping.files)]
    if not matches:
        base = streams.base_name(path)
        if ".jsonl" in base:
            names = {base.split(".jsonl")[0], path.parent.name}
            matches = [m for m in mappings if m.table in names]
    return matches


def set_aside_markers(
    files: list[Path], mappings: Sequence[LoadedMapping], inputs: Iterable[str | Path]
) -> tuple[list[Path], list[Path]]:
    """(the files to read, the marker files left out): a file found in a folder whose name starts
    with an underscore and that no mapping would read is a writer's marker or metadata file by
    common practice (``_SUCCESS``, ``_committed_<id>``, as data lake writers leave beside their
    output), left out and named to the user. A file named on the command line is never one."""
    given = {Path(i) for i in inputs if not Path(i).is_dir()}
    markers = [f for f in files if f.name.startswith("_") and f not in given and not _readers(f, mappings)]
    return [f for f in files if f not in markers], markers


def route(files: Iterable[Path], mappings: Sequence[LoadedMapping]) -> dict[str, list[Path]]:
    """Which mapping reads each file (``_readers``); a file none or several would read stops the run."""
    by_table: dict[str, list[Path]] = {m.table: [] for m in mappings}
    for path in files:
        matches = _readers(path, mappings)
        if not matches:
            globs = [g for m in mappings for g in m.mapping.files]
            near = closest(path.name, globs + [m.table for m in mappings])
            if streams.tar_named(path):
                hint = f"its name says it is a tar archive: unpack it first (tar -xf {path.name}) and pass the files"
            elif near:
                hint = f"closest mapping pattern: {near}"
            else:
                hint = "add its pattern to a mapping's files list"
            raise InputError(
                "this file matches no mapping",
                file=str(path),
                expected="a file name matching one of " + ", ".join(globs),
                found=path.name,
                hint=hint,
            )
        if len(matches) > 1:
            raise InputError(
                "this file matches more than one mapping: " + ", ".join(m.table for m in matches),
                file=str(path),
                hint="make the mappings' files patterns disjoint",
            )
        by_table[matches[0].table].append(path)
    return by_table


def text_path(path: Path, what: str) -> Path:
    """``path``, refused when its name is not text: a name of bytes that are not UTF-8 (which the
    system hands over as lone surrogates) cannot be given to the engine, whose SQL is text."""
    try:
        str(path).encode("utf-8")
    except UnicodeEncodeError:
        shown = os.fsencode(path).decode("utf-8", "backslashreplace")
        raise InputError(
            f"the {what}'s name is not UTF-8 text",
            file=shown,
            expected="a path of UTF-8 text",
            found=shown,
            hint="rename it (the bytes that are not UTF-8 are shown as \\x escapes)",
        ) from None
    return path


def expand_inputs(inputs: Iterable[str | Path], *, recursive: bool = False) -> list[Path]:
    """Files as given; a folder stands for the dump files directly inside it (and, with
    ``recursive``, in its sub-folders). A folder's sub-folders are never skipped silently:
    without ``recursive`` they are an error that says so. Hidden files and folders are left out."""
    return gather_inputs(inputs, recursive=recursive)[0]


def _files_in(folder: Path, folders: list[Path] | None = None) -> Iterator[Path]:
    """The files directly in ``folder``, and its links to nothing (its sub-folders go to
    ``folders``, when given). A folder that cannot be listed stops the run: its files would be
    left out."""
    try:
        children = list(folder.iterdir())
    except OSError as e:
        raise InputError(
            f"cannot list the folder: {e.strerror or e}", file=str(folder), hint="check its permissions"
        ) from None
    for c in children:
        if c.is_file():
            yield c
        elif c.is_dir():
            if folders is not None:
                folders.append(c)
        elif c.is_symlink() and not c.exists():
            yield c


def _dangling(link: Path) -> InputError:
    return InputError(
        f"a link to nothing: it points to {os.readlink(link)}, which does not exist",
        file=str(link),
        hint="restore what it points to, or remove the link",
    )


def _walk(root: Path) -> Iterator[Path]:
    """The files under ``root``, in its sub-folders too, following links to folders (before,
    a linked folder was left out without a word); a folder reached twice, as through a link back
    up, is walked once."""
    seen: set[Path] = set()
    todo = [root]
    while todo:
        folder = todo.pop()
        real = folder.resolve()
        if real in seen:
            continue
        seen.add(real)
        yield from _files_in(folder, todo)


def gather_inputs(
    inputs: Iterable[str | Path], *, recursive: bool = False
) -> tuple[list[Path], list[Path], list[Path]]:
    """``expand_inputs``'s files; the hidden files (a name starting with a dot, or inside a hidden
    folder) the given folders hold and it leaves out: partial copies by common practice (a copy in
    progress under a dotted temporary name), said to the user rather than read or dropped silently;
    and the files named again (a file given twice, or in a folder given too): read once, and said.
    One walk of each folder gives them all."""
    out: list[Path] = []
    hidden: list[Path] = []
    for raw in inputs:
        p = Path(raw)
        if p.is_dir():
            if not recursive:
                subs = sorted(c.name for c in p.iterdir() if c.is_dir() and not c.name.startswith("."))
                if subs:
                    raise InputError(
                        f"this folder has sub-folders ({', '.join(subs[:5])}{', ...' if len(subs) > 5 else ''})",
                        file=str(p),
                        hint="add --recursive to read their files too, or name the files to read",
                    )
            found = sorted(_walk(p) if recursive else _files_in(p))
            for c in found:
                dotted = any(part.startswith(".") for part in c.relative_to(p).parts)
                if not dotted and c.is_symlink() and not c.exists():  # the file it stood for is missing
                    raise _dangling(c)
                (hidden if dotted else out).append(c)
        elif p.exists():
            out.append(p)
        elif p.is_symlink():
            raise _dangling(p)
        else:
            raise InputError("no such file", file=str(p))
    seen: set[Path] = set()
    unique = []
    again = []
    for p in out:
        text_path(p, "dump file")
        r = p.resolve()
        if r not in seen:
            seen.add(r)
            unique.append(p)
        elif p not in again:
            again.append(p)
    return unique, hidden, again


def display_names(files: list[Path]) -> dict[Path, str]:
    """A file's name, or its path where two files share the name (counted once: thousands of files)."""
    counts = Counter(f.name for f in files)
    return {f: (f.name if counts[f.name] == 1 else f.as_posix()) for f in files}


def checksum(path: Path) -> str:
    """The file's SHA-256 (hex), streamed."""
    with open(path, "rb") as f:
        return hashlib.file_digest(f, "sha256").hexdigest()
