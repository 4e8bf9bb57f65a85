"""The one place where a name from a user's file becomes part of a path.

Table names become folder and file names in the output (``events/<table>/``).
A name that could escape its folder or that a file system refuses is never
used: a path separator, ``..`` or ``.`` alone, a leading dot (hidden) or dash,
a control or NUL character, a trailing dot or space, a name longer than 200
bytes, or a name some file systems reserve (CON, NUL, COM1, ...).
"""

from __future__ import annotations

import re

_RESERVED = {"CON", "PRN", "AUX", "NUL", *(f"COM{i}" for i in range(10)), *(f"LPT{i}" for i in range(10))}
_FORBIDDEN = re.compile(r'[/\\:*?"<>|\x00-\x1f\x7f]')


def problem(name: str) -> str | None:
    """Why ``name`` cannot be a file or folder name, or None when it can."""
    if not name:
        return "it is empty"
    bad = _FORBIDDEN.search(name)
    if bad:
        return f"it holds the character {bad.group()!r}, which a path cannot hold safely"
    if name in (".", ".."):
        return "it names a folder itself"
    if name.startswith((".", "-")):
        return "it starts with a dot or a dash"
    if name.endswith((".", " ")):
        return "it ends with a dot or a space"
    if len(name.encode("utf-8")) > 200:
        return "it is longer than 200 bytes"
    if name.split(".")[0].upper() in _RESERVED:
        return f"{name.split('.')[0]!r} is a name some file systems reserve"
    return None


def path_part(name: str) -> str:
    """``name`` as one path component; ValueError when it cannot be one."""
    why = problem(name)
    if why:
        raise ValueError(f"{name!r} cannot name a file or folder: {why}")
    return name
