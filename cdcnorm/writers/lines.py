"""Write a column of text lines to a file, atomically, without a Python loop over the lines."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc


def _concat(arr: pa.Array) -> bytes:
    """The bytes of all strings of an array, back to back."""
    arr = arr.cast(pa.large_string())
    offsets = arr.buffers()[1]
    data = arr.buffers()[2]
    if data is None or offsets is None:
        return b""
    off = np.frombuffer(offsets, dtype=np.int64)[arr.offset : arr.offset + len(arr) + 1]
    return bytes(memoryview(data)[off[0] : off[-1]])


def write_lines(lines: pa.ChunkedArray, path: Path) -> None:
    """Each line followed by a newline; temporary name, then rename."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
    try:
        with open(tmp, "wb") as f:
            for chunk in lines.chunks:
                if len(chunk):
                    f.write(_concat(pc.binary_join_element_wise(chunk, pa.scalar("\n"), pa.scalar(""))))
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
