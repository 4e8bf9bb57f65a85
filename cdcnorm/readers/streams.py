"""Opening dump files as byte streams: compression by suffix, errors that name the file."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pyarrow as pa

from cdcnorm.errors import InputError

#: Compression suffixes read transparently, and the codec of each.
COMPRESSIONS = {".gz": "gzip", ".zst": "zstd", ".bz2": "bz2"}
#: The ones the engine's own readers decompress while reading; the others are decompressed
#: to a temporary file first (streamed, in bounded memory).
ENGINE_READS = {".gz", ".zst"}
BLOCK = 16 << 20
#: How many times its size a compressed dump (or a Parquet file) is counted when a run's memory
#: is planned: change dumps compress 4-10x (the benchmark's CSV: 4.7x with gzip, 4.5x with zstd).
COMPRESSED_SIZE_FACTOR = 5


def compression(path: Path) -> str | None:
    return COMPRESSIONS.get(path.suffix.lower())


def base_name(path: Path) -> str:
    """The file name without a compression suffix: ``a.csv.gz`` -> ``a.csv``."""
    name = path.name
    return name[: -len(path.suffix)] if compression(path) else name


def _fail(path: Path, e: Exception) -> InputError:
    kind = compression(path)
    what = f"truncated or corrupt {kind} archive" if kind else "unreadable file"
    first = str(e).splitlines()[0] if str(e) else type(e).__name__
    return InputError(f"cannot read this file: {what} ({first})", file=str(path))


def blocks(path: Path, size: int = BLOCK) -> Iterator[bytes]:
    """The file's bytes, decompressed, in blocks; a corrupt archive is an InputError naming it."""
    codec = compression(path)
    try:
        if codec is None:  # the plain file: a tenth of the cost of a stream per call, for many small files
            with open(path, "rb") as plain:
                while block := plain.read(size):
                    yield block
            return
        with pa.input_stream(str(path), compression=codec) as stream:
            while True:
                block = stream.read(size)
                if not block:
                    return
                yield block
    except (OSError, pa.ArrowException, EOFError, ValueError) as e:
        raise _fail(path, e) from None


def planned_size(path: Path, fmt: str | None = None) -> int:
    """The bytes ``path`` holds as text, estimated from its size (0 when it cannot be read);
    ``fmt``: the format the file is read as, where a mapping or the command line names it."""
    from cdcnorm.readers.parquet import FORMAT as PARQUET
    from cdcnorm.readers.parquet import SUFFIXES as COLUMNAR  # the names the Parquet reader takes

    try:
        size = path.stat().st_size
    except OSError:
        return 0
    columnar = fmt == PARQUET if fmt else base_name(path).lower().endswith(COLUMNAR)
    packed = compression(path) is not None or columnar
    return size * COMPRESSED_SIZE_FACTOR if packed else size


def head(path: Path, size: int = 1 << 20) -> bytes:
    """The first ``size`` bytes (decompressed), for headers and sniffing."""
    for block in blocks(path, size):
        return block
    return b""


def engine_readable(path: Path, scratch: Path) -> Path:
    """A path the engine's readers can open: the file itself, or a decompressed copy in ``scratch``."""
    if compression(path) is None or path.suffix.lower() in ENGINE_READS:
        return path
    scratch.mkdir(parents=True, exist_ok=True)
    target = scratch / f"{len(list(scratch.iterdir()))}-{base_name(path)}"
    with open(target, "wb") as out:
        for block in blocks(path):
            out.write(block)
    return target
