"""Opening dump files as byte streams: compression by suffix, errors that name the file."""

from __future__ import annotations

import codecs
import io
import lzma
import tarfile
import zipfile
from collections.abc import Collection, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import BinaryIO

import pyarrow as pa

from cdcnorm.errors import InputError, first_of

#: Compression suffixes read transparently, and the codec of each (pyarrow's names; ``xz`` is
#: Python's lzma module, which pyarrow's streams do not read; ``zip`` is Python's zipfile module,
#: for an archive of one file).
COMPRESSIONS = {".gz": "gzip", ".zst": "zstd", ".bz2": "bz2", ".xz": "xz", ".lz4": "lz4", ".zip": "zip"}
#: The ones the engine's own readers decompress while reading; the others are decompressed
#: to a temporary file first (streamed, in bounded memory).
ENGINE_READS = {".gz", ".zst"}
BLOCK = 16 << 20
#: How many times its size a compressed dump (or a Parquet file) is counted when a run's memory
#: is planned: change dumps compress 4-10x (the benchmark's CSV: 4.7x with gzip, 4.5x with zstd).
COMPRESSED_SIZE_FACTOR = 5


#: The first bytes of each archive a dump may arrive in, and the suffix that names it: gzip's ID1
#: ID2 (RFC 1952, 2.3.1), Zstandard's frame magic 0xFD2FB528 little-endian (RFC 8878, 3.1.1), the
#: xz file format's header magic (its specification, 2.1.1.1), the LZ4 frame's magic 0x184D2204
#: little-endian (the LZ4 frame format), bzip2's "BZh", a block size digit and the block magic
#: 0x314159265359 (from memory), a ZIP local file header "PK\3\4" (APPNOTE 4.3.7).
ARCHIVE_MAGIC = (
    (b"\x1f\x8b", ".gz"),
    (b"\x28\xb5\x2f\xfd", ".zst"),
    (b"\xfd7zXZ\x00", ".xz"),
    (b"\x04\x22\x4d\x18", ".lz4"),
    (b"PK\x03\x04", ".zip"),
)
_BZIP2_BLOCK = b"\x31\x41\x59\x26\x53\x59"


def archive_in(start: bytes) -> str | None:
    """The suffix of the archive whose bytes ``start`` begins with, if it is one."""
    for magic, suffix in ARCHIVE_MAGIC:
        if start.startswith(magic):
            return suffix
    if start[:3] == b"BZh" and start[3:4].isdigit() and start[4:10] == _BZIP2_BLOCK:
        return ".bz2"
    return None


def misnamed_archive(path: Path, start: bytes) -> InputError | None:
    """The error for a file, read as it is named (no compression suffix), whose bytes are an
    archive: read as text, every record would be quarantined as bytes that are not text."""
    suffix = archive_in(start)
    if suffix is None or compression(path) is not None:
        return None
    if suffix in COMPRESSIONS:
        hint = f"name it {path.name}{suffix} so it is decompressed as it is read"
    else:
        hint = f"unpack it first: cdcnorm reads {', '.join(COMPRESSIONS)} archives, not {suffix}"
    return InputError(
        f"this file is a {suffix} archive, but its name does not say so",
        file=str(path),
        expected="the format its name says"
        + (f", or a name ending in {suffix}" if suffix in COMPRESSIONS else ""),
        found=f"{suffix} archive bytes ({start[:6].hex(' ')})",
        hint=hint,
    )


def nested_archive(path: Path, start: bytes) -> InputError | None:
    """The error for an archive whose content, decompressed, is an archive again (a gzip file
    compressed twice, a .zip holding a .gz): read as text, its bytes would be taken for a header or
    records that are not text."""
    inner = archive_in(start)
    if inner is None:
        return None
    outer = path.suffix.lower()
    return InputError(
        f"this {outer} archive holds another archive ({inner}), not a dump",
        file=str(path),
        expected=f"a {outer} archive of the dump itself",
        found=f"{inner} archive bytes ({start[:6].hex(' ')}) once decompressed",
        hint=f"unpack it once and name what comes out for what it is: {base_name(path)}{inner}",
    )


#: The first four bytes of a Parquet file (its specification: "PAR1" begins and ends the file).
PARQUET_MAGIC = b"PAR1"


def parquet_read_as_text(path: Path, start: bytes, fmt: str) -> InputError | None:
    """The error for a Parquet file read as text (``fmt``: csv or jsonl) because of its name: its
    bytes would be taken for a header of odd names, or lines that are not JSON."""
    if not start.startswith(PARQUET_MAGIC):
        return None
    stem = Path(base_name(path)).stem
    return InputError(
        f"this file is Parquet, but it is read as {fmt} (its name, or its mapping's format, says so)",
        file=str(path),
        expected=f"{fmt} text",
        found=f"Parquet's magic bytes {PARQUET_MAGIC.decode()} at the start",
        hint=f"name it {stem}.parquet, or set format: parquet in its mapping (--input-format parquet)",
    )


#: A tar archive's header block: its magic field "ustar" at offset 257 (POSIX.1, the ustar
#: interchange format; GNU tar writes "ustar  " and a NUL there, POSIX "ustar" and a NUL).
TAR_MAGIC, TAR_MAGIC_AT = b"ustar", 257
#: Names a tar archive goes by (common practice): .tar, and .tgz/.tbz2/.txz for a compressed one.
TAR_SUFFIXES = (".tar", ".tgz", ".tbz", ".tbz2", ".txz", ".tzst")


def tar_named(path: Path) -> bool:
    """The file's name says it is a tar archive: ``a.tar``, ``a.tgz``, ``a.tar.gz``."""
    return path.suffix.lower() in TAR_SUFFIXES or Path(base_name(path)).suffix.lower() == ".tar"


def tar_members(start: bytes) -> tuple[list[str], bool] | None:
    """The names of the files a tar archive beginning with ``start`` holds, as far as ``start``
    shows them (Python's tarfile module reads the headers), and whether ``start`` reaches the
    archive's end; None when ``start`` is not a tar archive's first header."""
    if start[TAR_MAGIC_AT : TAR_MAGIC_AT + len(TAR_MAGIC)] != TAR_MAGIC:
        return None
    try:  # and a header whose checksum adds up: text that happens to hold "ustar" there is no archive
        tarfile.TarInfo.frombuf(start[: tarfile.BLOCKSIZE], "utf-8", "surrogateescape")
    except tarfile.HeaderError:
        return None
    names: list[str] = []
    try:
        with tarfile.open(fileobj=io.BytesIO(start), mode="r|") as bundle:
            for member in bundle:
                if member.isfile():
                    names.append(member.name)
    except (tarfile.TarError, EOFError, OSError):  # ``start`` ends inside the archive: the names so far
        return names, False
    return names, True


def tar_bundle(path: Path, start: bytes) -> InputError | None:
    """The error for a tar archive given as a dump (named or not as one, compressed or not): its
    header blocks would be read as the first line of text."""
    members = tar_members(start)
    if members is None:
        return None
    names, whole = members
    shown = first_of(names) if whole else ", ".join(names[:5]) + " and more"
    held = f" ({shown})" if names else ""
    return InputError(
        f"this file is a tar archive{held}, not a dump",
        file=str(path),
        expected="one dump per file (CSV, JSON Lines or Parquet), as it is or compressed by itself",
        found=f"a tar header block (its magic {TAR_MAGIC.decode()!r} at byte {TAR_MAGIC_AT})",
        hint=f"unpack it first (tar -xf {path.name}) and pass the files, or a folder of them",
    )


#: Files of other formats a dump folder may hold, by their first bytes: what each is, and what to
#: do instead. PostgreSQL's COPY binary header "PGCOPY\n\377\r\n\0" (its documentation, COPY,
#: "Binary Format"); SQLite's "SQLite format 3\0" (its file format, "The Database Header"); an Avro
#: object container file's "Obj" and 1 (Avro's specification, "Object Container Files"); Arrow's
#: IPC file "ARROW1" and its padding (the Arrow columnar format, "IPC File Format"); an OLE2 compound
#: file, as Excel's .xls (MS-CFB, 2.2); ORC's "ORC" (its specification), with binary bytes after it
#: (a text starting with "ORC" is no ORC file).
FOREIGN_FORMATS = (
    (
        b"PGCOPY\n\xff\r\n\x00",
        "PostgreSQL's COPY binary format",
        "write it as text: COPY ... TO ... (FORMAT csv), or the default text format with csv.escapes: backslash",
    ),
    (b"SQLite format 3\x00", "an SQLite database", "export the change table as CSV, JSON Lines or Parquet"),
    (b"Obj\x01", "an Avro file", "convert it to Parquet or JSON Lines"),
    (b"ARROW1\x00\x00", "an Arrow IPC (Feather) file", "convert it to Parquet"),
    (
        b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1",
        "an OLE2 compound file (an Excel .xls workbook, say)",
        "save the sheet as CSV",
    ),
    (b"ORC", "an ORC file", "convert it to Parquet"),
)
#: An Office Open XML document (an Excel .xlsx workbook) is a zip archive whose parts include
#: "[Content_Types].xml" (ECMA-376 part 2, Open Packaging Conventions: from memory).
OOXML_PART = "[Content_Types].xml"
OOXML = ("an Office Open XML document (an Excel .xlsx workbook, say)", "save the sheet as CSV")


def foreign_format(path: Path, start: bytes) -> InputError | None:
    """The error for a file of a format no reader reads (``FOREIGN_FORMATS``), given as a dump: read
    as text its bytes would be a header of odd names or lines that are not JSON."""
    formats: tuple[tuple[bytes, str, str], ...] = FOREIGN_FORMATS
    if start.startswith(b"PK\x03\x04") and OOXML_PART.encode() in start[:4096]:
        formats = ((b"PK\x03\x04", *OOXML),)
    for magic, what, hint in formats:
        if start.startswith(magic):
            if magic == b"ORC" and not any(b < 0x20 and b not in b"\t\n\r" for b in start[3:64]):
                continue  # text (a header "ORC_ID,...") has no control characters but these
            return InputError(
                f"this file is {what}, not a dump cdcnorm reads",
                file=str(path),
                expected="CSV, JSON Lines or Parquet",
                found=f"{what}: its first bytes {start[: len(magic)].hex(' ')}",
                hint=hint,
            )
    return None


def refused_start(path: Path, start: bytes, decompressed: bool) -> InputError | None:
    """The error for a file whose first bytes (``start``, after any decompression) are no dump:
    another format, a tar archive, or an archive again (``decompressed``: ``nested_archive``) or
    an archive its name does not say it is (``misnamed_archive``)."""
    wrong = foreign_format(path, start) or tar_bundle(path, start)
    return wrong or (nested_archive(path, start) if decompressed else misnamed_archive(path, start))


def wide_unicode(start: bytes) -> str | None:
    """``UTF-16LE``, ``UTF-16BE``, ``UTF-32LE`` or ``UTF-32BE`` where a file's first bytes are
    text in that encoding, told by a byte order mark or by the NUL bytes around the first ASCII
    character (RFC 4627, section 3, from memory); None otherwise."""
    marks = {
        b"\x00\x00\xfe\xff": "UTF-32BE",
        b"\xff\xfe\x00\x00": "UTF-32LE",
        b"\xfe\xff": "UTF-16BE",
        b"\xff\xfe": "UTF-16LE",
    }
    found = next((name for mark, name in marks.items() if start.startswith(mark)), None)
    if found is None and len(start) >= 4:
        nuls = (start[0] == 0, start[1] == 0, start[2] == 0, start[3] == 0)
        found = {
            (True, True, True, False): "UTF-32BE",
            (False, True, True, True): "UTF-32LE",
            (True, False, True, False): "UTF-16BE",
            (False, True, False, True): "UTF-16LE",
        }.get(nuls)
    return found


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


def _metadata(name: str) -> bool:
    """A zip member that is an operating system's metadata, not data: macOS archives add
    ``__MACOSX/._<name>`` (AppleDouble resource forks) and ``.DS_Store`` beside each file, and a
    hidden file is never a dump (as in a folder). Common practice."""
    parts = name.split("/")
    return parts[0] == "__MACOSX" or any(part.startswith(".") for part in parts if part)


def zip_member(archive: zipfile.ZipFile, path: Path) -> zipfile.ZipInfo:
    """The one file a ``.zip`` dump holds (folders and ``_metadata`` aside); an archive of several
    files, or of none, is an InputError listing them: which of them is the dump is not for cdcnorm
    to guess."""
    files = [i for i in archive.infolist() if not i.is_dir()]
    members = [i for i in files if not _metadata(i.filename)]
    if len(members) == 1:
        return members[0]
    names = [i.filename for i in members]
    left = [i.filename for i in files if _metadata(i.filename)]
    if OOXML_PART in names:
        raise InputError(f"this .zip archive is {OOXML[0]}, not a dump", file=str(path), hint=OOXML[1])
    raise InputError(
        f"this .zip archive holds {len(names)} files" + (f" ({first_of(names)})" if names else ""),
        file=str(path),
        expected="a .zip archive of exactly one file (the dump)",
        found=f"{len(names)} files"
        + (f", besides metadata and hidden files: {first_of(left)}" if left else ""),
        hint="unpack it first and pass the files, or a folder of them, instead of the archive",
    )


def _stream(path: Path, codec: str | None) -> BinaryIO | pa.NativeFile:
    """The file's bytes as a stream: the plain file as it is (a tenth of the cost of a stream per
    call, for many small files), xz through Python's lzma module, the others through pyarrow's."""
    if codec is None:
        return open(path, "rb")
    if codec == "xz":
        return lzma.open(path, "rb")
    return pa.input_stream(str(path), compression=codec)


@contextmanager
def _opened(path: Path, codec: str | None) -> Iterator[BinaryIO | pa.NativeFile]:
    """The file's bytes as a stream (``_stream``), or the one file of a zip archive through Python's
    zipfile module (any method it reads: stored, deflate, bzip2, lzma)."""
    if codec != "zip":
        with _stream(path, codec) as stream:
            yield stream
        return
    with zipfile.ZipFile(path) as archive:
        info = zip_member(archive, path)
        try:
            member = archive.open(info)
        except (NotImplementedError, RuntimeError) as e:  # a method it does not read; encrypted
            raise InputError(
                f"cannot read this file: the archive's file {info.filename} cannot be unpacked ({e})",
                file=str(path),
                hint="unpack it with a tool that can, and pass the file instead of the archive",
            ) from None
        with member:
            yield member


def blocks(path: Path, size: int = BLOCK) -> Iterator[bytes]:
    """The file's bytes, decompressed, in blocks; a corrupt archive is an InputError naming it, and
    so is an archive its name does not say it is (``misnamed_archive``)."""
    codec = compression(path)
    try:
        if path.stat().st_size == 0:  # no bytes, whatever the name: an empty file (lzma calls it truncated)
            return
        with _opened(path, codec) as stream:
            block = stream.read(size)
            if wrong := refused_start(path, block, decompressed=codec is not None):
                raise wrong
            while block:
                yield block
                block = stream.read(size)
    except (
        OSError,
        pa.ArrowException,
        EOFError,
        ValueError,
        lzma.LZMAError,
        zipfile.BadZipFile,  # no central directory (a truncated archive), a bad CRC-32
    ) as e:
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


def scratch_copy(path: Path, scratch: Path) -> Path:
    """A new path in ``scratch`` for a copy of ``path`` (numbered: two inputs may share a name)."""
    scratch.mkdir(parents=True, exist_ok=True)
    return scratch / f"{len(list(scratch.iterdir()))}-{base_name(path)}"


def engine_readable(path: Path, scratch: Path, reads: Collection[str] = ENGINE_READS) -> Path:
    """A path the engine's readers can open: the file itself, or a decompressed copy in ``scratch``;
    ``reads``: the suffixes the reader decompresses itself (the Parquet reader: none)."""
    if compression(path) is None or path.suffix.lower() in reads:
        return path
    target = scratch_copy(path, scratch)
    with open(target, "wb") as out:
        for block in blocks(path):
            out.write(block)
    return target


def transcoded(path: Path, scratch: Path, encoding: str) -> Path | None:
    """A UTF-8 copy in ``scratch`` of a text file in ``encoding`` (decompressed too), which the
    engine's reader, decoding only UTF-8 and Latin-1, can read; None where a byte does not decode
    (the careful path keeps such a cell as bytes). A byte order mark at the start is left out (the
    header's reading leaves it out too); line ends and every other character stay as they are, so
    records and their numbers do too. Streamed in blocks: memory stays bounded."""
    target = scratch_copy(path, scratch)
    decoder = codecs.getincrementaldecoder(encoding)("strict")
    start = True
    try:
        with open(target, "w", encoding="utf-8", newline="") as out:
            for block in blocks(path):
                text = decoder.decode(block)
                if start and text:
                    text, start = text.removeprefix("\ufeff"), False
                out.write(text)
            out.write(decoder.decode(b"", final=True))
    except UnicodeError:  # a byte that does not decode, or a lone surrogate that does not encode
        target.unlink()
        return None
    return target
