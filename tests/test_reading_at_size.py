"""Reading real dumps: any column name, sequence kinds, compression, many files, encodings,
over-long records, sub-folders, and a memory limit smaller than the input."""

from __future__ import annotations

import base64
import bz2
import contextlib
import gzip
import io
import json
import lzma
import os
import tarfile
import zipfile
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from cdcnorm.readers import streams
from tests.conftest import ConvertFn, cli, last_run, run_files, write_files

# Names a dump may use that look like the plan's own columns, and names that need quoting.
ODD = ["__$start_lsn", "__row", "__file", "__enc", "v0", "q", "name with space", 'a "quoted" name', "dot.ted"]

ODD_MAPPING = """
table: odd.cols
files: ["odd*"]
key: [id]
change:
  action: {column: "__$operation", codes: {I: insert, D: delete}}
  position: {column: "__$start_lsn", kind: hex}
  sequence: {column: "__row", kind: integer}
fields:
  id: {from: "__file", type: integer}
  enc: {from: "__enc", type: text}
  v0: {from: "v0", type: integer}
  q: text
  spaced: {from: "name with space", type: text}
  quoted: {from: 'a "quoted" name', type: text}
  dotted: {from: "dot.ted", type: text}
"""

ODD_ROWS = [
    {
        "__$operation": "I",
        "__$start_lsn": "0x0A",
        "__row": "2",
        "__file": "7",
        "__enc": "e",
        "v0": "5",
        "q": "x",
        "name with space": "s",
        'a "quoted" name': "qq",
        "dot.ted": "d",
    },
    {
        "__$operation": "I",
        "__$start_lsn": "0x0B",
        "__row": "1",
        "__file": "oops",
        "__enc": "f",
        "v0": "6",
        "q": "y",
        "name with space": "t",
        'a "quoted" name': "rr",
        "dot.ted": "e",
    },
]


def _odd_csv() -> str:
    def cell(v: str) -> str:
        return '"' + v.replace('"', '""') + '"'

    names = ["__$operation", *ODD]
    lines = [",".join(cell(n) for n in names)]
    lines += [",".join(cell(r[n]) for n in names) for r in ODD_ROWS]
    return "\n".join(lines) + "\n"


def _odd_parquet() -> bytes:
    names = ["__$operation", *ODD]
    table = pa.table({n: [r[n] for r in ODD_ROWS] for n in names})
    buf = io.BytesIO()
    pq.write_table(table, buf)
    return buf.getvalue()


def _odd_jsonl() -> str:
    return "".join(json.dumps({n: r[n] for n in ["__$operation", *ODD]}) + "\n" for r in ODD_ROWS)


@pytest.mark.parametrize(
    ("name", "content"),
    [("odd.csv", _odd_csv()), ("odd.parquet", _odd_parquet()), ("odd.jsonl", _odd_jsonl())],
)
def test_any_column_name_in_every_reader(convert: ConvertFn, name: str, content: str | bytes) -> None:
    done = convert(ODD_MAPPING, {name: content})
    (e,) = done.events("odd.cols")
    assert e["key"] == {"id": 7}
    assert e["values"] == {
        "id": 7,
        "enc": "e",
        "v0": 5,
        "q": "x",
        "spaced": "s",
        "quoted": "qq",
        "dotted": "d",
    }
    assert e["position"] == "0000000000000000000000000000000A.00000000000000000002.0"
    (q,) = done.quarantine("odd.cols")  # the row whose "__file" (the key) is not an integer
    assert {k: q[k] for k in ["__$operation", *ODD]} == ODD_ROWS[1]
    assert q["_cdcnorm"]["row"] == 2 and q["_cdcnorm"]["reasons"][0]["column"] == "__file"
    assert done.ledger()["balanced"]


SEQ_MAPPING = """
table: s.t
files: ["s*"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: hex, width: 20}
  sequence: {column: seq, kind: KIND}
fields:
  id: integer
"""


@pytest.mark.parametrize(
    ("kind", "seqs", "order", "text"),
    [
        # text order would put 0x10 before 0x9 and 0x0100 before 0xff: value order does not
        ("hex", ["0x10", "0x9", "0xff", "0x0100"], [2, 1, 3, 4], "00000000000000000009"),
        ("hex-pair", ["1/0", "0/FFFFFFFF", "0/A", "0/9"], [4, 3, 2, 1], "00000000/00000009"),
        ("integer", ["10", "9", "100", "0"], [4, 2, 1, 3], "00000000000000000000"),
        ("text", ["b", "a", "ab", "B"], [4, 2, 3, 1], "42"),  # a text part is written as the hex of its UTF-8
    ],
)
def test_sequences_order_by_value(
    convert: ConvertFn, kind: str, seqs: list[str], order: list[int], text: str
) -> None:
    rows = "".join(f"I,0x2A,{s},{i}\n" for i, s in enumerate(seqs, 1))
    done = convert(SEQ_MAPPING.replace("KIND", kind), {"s.csv": "op,pos,seq,id\n" + rows})
    events = done.events("s.t")
    assert [e["key"]["id"] for e in events] == order
    assert events[0]["position"] == f"0000000000000000002A.{text}.0"
    assert [e["position"] for e in events] == sorted(e["position"] for e in events)


def test_hex_sequence_wider_than_its_width_is_quarantined(convert: ConvertFn) -> None:
    mapping = SEQ_MAPPING.replace("kind: KIND", "kind: hex, width: 4")
    done = convert(mapping, {"s.csv": "op,pos,seq,id\nI,1,0xFFFF,1\nI,1,0x10000,2\nI,1,0x1_0,3\n"})
    assert [e["key"]["id"] for e in done.events("s.t")] == [1]
    reasons = {q["id"]: q["_cdcnorm"]["reasons"][0] for q in done.quarantine("s.t")}
    assert set(reasons) == {"2", "3"} and reasons["2"]["field"] == "sequence"
    assert reasons["2"]["expected"] == "hex digits (optional 0x), at most 4 significant"


PLAIN = """
table: t.notes
files: ["n*"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: integer}
fields:
  id: integer
  a: text
"""

CSV = 'op,pos,id,a\nI,1,1,"x, ""y"""\nI,2,2,"two\nlines"\nI,3,3,\n'


def csv_at(k: int) -> str:
    """The same three records with positions and keys moved by 10 * k."""
    return (
        f'op,pos,id,a\nI,{10 * k + 1},{10 * k + 1},"x, ""y"""\nI,{10 * k + 2},{10 * k + 2},"two\nlines"\n'
        f"I,{10 * k + 3},{10 * k + 3},\n"
    )


def test_compressed_files_are_read_transparently(convert: ConvertFn) -> None:
    zst = pa.BufferOutputStream()
    with pa.CompressedOutputStream(zst, "zstd") as s:
        s.write(csv_at(3).encode())
    files: dict[str, str | bytes] = {
        "n1.csv.gz": gzip.compress(csv_at(1).encode()),
        "n2.csv.bz2": bz2.compress(csv_at(2).encode()),
        "n3.csv.zst": zst.getvalue().to_pybytes(),
        "n4.jsonl.gz": gzip.compress(b'{"op": "I", "pos": 99, "id": 99, "a": "j"}\n'),
    }
    plain = convert(PLAIN, {f"n{k}.csv": csv_at(k) for k in (1, 2, 3)}).events("t.notes")
    done = convert(PLAIN, files)
    got = [(e["origin"]["file"], e["origin"]["row"], e["key"], e["values"]) for e in done.events("t.notes")]
    want = [(e["origin"]["file"], e["origin"]["row"], e["key"], e["values"]) for e in plain]
    names = {"n1.csv": "n1.csv.gz", "n2.csv": "n2.csv.bz2", "n3.csv": "n3.csv.zst"}
    assert got[:-1] == [(names[f], r, k, v) for f, r, k, v in want]
    assert got[-1] == ("n4.jsonl.gz", 1, {"id": 99}, {"id": 99, "a": "j"})
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 10


def _zip(payload: bytes, *names: str, method: int = zipfile.ZIP_DEFLATED) -> bytes:
    """A .zip archive (APPNOTE; written by Python's zipfile module) holding ``payload`` under each
    of ``names`` (one name unless given)."""
    sink = io.BytesIO()
    with zipfile.ZipFile(sink, "w", compression=method) as z:
        for name in names or ("inner.csv",):
            z.writestr(name, payload)
    return sink.getvalue()


def _empty_zip() -> bytes:
    sink = io.BytesIO()
    with zipfile.ZipFile(sink, "w"):  # its end of central directory record alone
        pass
    return sink.getvalue()


def _lz4(payload: bytes) -> bytes:
    out = pa.BufferOutputStream()
    with pa.CompressedOutputStream(out, "lz4") as s:  # the LZ4 frame format
        s.write(payload)
    return bytes(out.getvalue().to_pybytes())


@pytest.mark.parametrize("name", ["n.csv.gz", "n.jsonl.gz", "n.csv.bz2", "n.csv.xz", "n.csv.lz4"])
def test_truncated_archive_is_a_clear_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str
) -> None:
    payload = (CSV * 2000).encode() if ".csv" in name else b'{"op": "I", "pos": 1, "id": 1}\n' * 5000
    # written by Python's gzip, bz2 and lzma modules and pyarrow's LZ4 frame writer
    pack = {".gz": gzip.compress, ".bz2": bz2.compress, ".xz": lzma.compress, ".lz4": _lz4}
    packed = pack[Path(name).suffix](payload)
    dump, err = _refused(
        tmp_path,
        capsys,
        name,
        packed[: len(packed) // 2],
        PLAIN.replace('files: ["n*"]', 'files: ["n.csv", "n.jsonl"]'),
    )
    assert str(dump) in err and "truncated or corrupt" in err


def test_xz_and_lz4_files_are_read_transparently(convert: ConvertFn) -> None:
    # the archives are written by Python's lzma module and pyarrow's LZ4 frame writer
    files: dict[str, str | bytes] = {
        "n1.csv.xz": lzma.compress(csv_at(1).encode()),
        "n2.csv.lz4": _lz4(csv_at(2).encode()),
    }
    plain = convert(PLAIN, {f"n{k}.csv": csv_at(k) for k in (1, 2)}).events("t.notes")
    done = convert(PLAIN, files)
    names = {"n1.csv": "n1.csv.xz", "n2.csv": "n2.csv.lz4"}
    got = [(e["origin"]["file"], e["origin"]["row"], e["key"], e["values"]) for e in done.events("t.notes")]
    assert got == [(names[e["origin"]["file"]], e["origin"]["row"], e["key"], e["values"]) for e in plain]
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 6


@pytest.mark.parametrize("name", ["n.csv.gz", "n.csv.bz2", "n.csv.xz", "n.csv.lz4"])
def test_a_compressed_file_of_no_bytes_is_an_empty_file(convert: ConvertFn, name: str) -> None:
    # a transfer that wrote nothing: read as 0 rows with the empty file's note, whatever the codec
    # (Python's lzma module calls it a truncated archive; pyarrow's streams read it as no bytes)
    done = convert(PLAIN, {name: b"", "n1.csv": csv_at(1)})
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 3
    assert {"table": "t.notes", "file": name, "note": "the file is empty"} in last_run(done.out)["notes"]


def _parquet_bytes() -> bytes:
    sink = io.BytesIO()
    pq.write_table(pa.table({"op": ["I"], "pos": ["1"], "id": ["1"], "a": ["x"]}), sink)
    return sink.getvalue()


@pytest.mark.parametrize(
    ("name", "pack", "suffix"),
    [
        ("n.csv", gzip.compress, ".gz"),
        ("n.jsonl", gzip.compress, ".gz"),
        ("n.parquet", gzip.compress, ".gz"),
        ("n.csv", bz2.compress, ".bz2"),
        ("n.csv", lzma.compress, ".xz"),
        ("n.csv", _lz4, ".lz4"),
        ("n.csv", _zip, ".zip"),
    ],
)
def test_an_archive_named_as_plain_text_is_a_clear_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str, pack: Any, suffix: str
) -> None:
    # read as text, each of its records would be quarantined as bytes that are not UTF-8 (the
    # JSON Lines reader did so, exit 0); the archives are written by Python's and pyarrow's codecs
    payload = {
        "n.csv": CSV.encode(),
        "n.jsonl": b'{"op": "I", "pos": 1, "id": 1, "a": "x"}\n',
        "n.parquet": _parquet_bytes(),
    }[name]
    dump, err = _refused(
        tmp_path, capsys, name, pack(payload), PLAIN.replace('files: ["n*"]', f'files: ["{name}"]')
    )
    assert f"{dump}: this file is a {suffix} archive, but its name does not say so" in err
    assert f"hint: name it {name}{suffix} so it is decompressed as it is read" in err
    (dump.parent / f"{name}{suffix}").write_bytes(dump.read_bytes())  # renamed as the hint says, it reads
    dump.unlink()
    renamed = dump.parent / f"{name}{suffix}"
    code = cli("convert", "--mappings", str(tmp_path / "m"), str(renamed), "--out", str(tmp_path / "out"))
    assert code == 0, capsys.readouterr().err
    ledger = last_run(tmp_path / "out")["ledger"]
    assert ledger["balanced"] and ledger["total"]["read"] == ledger["total"]["emitted"] == (
        3 if name == "n.csv" else 1
    )


def test_a_zip_archive_of_one_file_is_read_transparently(convert: ConvertFn) -> None:
    # any method Python's zipfile reads: deflate, bzip2, lzma, stored; a folder entry is no file
    sink = io.BytesIO()
    with zipfile.ZipFile(sink, "w") as z:  # as macOS writes one: a resource fork and .DS_Store beside it
        z.mkdir("export")
        z.writestr("export/2026-12-01.csv", csv_at(4), compress_type=zipfile.ZIP_STORED)
        z.writestr("__MACOSX/export/._2026-12-01.csv", b"\x00\x05\x16\x07")
        z.writestr("export/.DS_Store", b"Bud1")
    files: dict[str, str | bytes] = {
        "n1.csv.zip": _zip(csv_at(1).encode()),
        "n2.csv.zip": _zip(csv_at(2).encode(), method=zipfile.ZIP_BZIP2),
        "n3.csv.zip": _zip(csv_at(3).encode(), method=zipfile.ZIP_LZMA),
        "n4.csv.zip": sink.getvalue(),
        "n5.jsonl.zip": _zip(b'{"op": "I", "pos": 99, "id": 99, "a": "j"}\n', "n5.jsonl"),
        "n6.parquet.zip": _zip(_parquet_bytes(), "n6.parquet", method=zipfile.ZIP_STORED),
    }
    plain = convert(PLAIN, {f"n{k}.csv": csv_at(k) for k in (1, 2, 3, 4)}).events("t.notes")
    done = convert(PLAIN, files)
    got = [(e["origin"]["file"], e["origin"]["row"], e["key"], e["values"]) for e in done.events("t.notes")]
    want = [(e["origin"]["file"] + ".zip", e["origin"]["row"], e["key"], e["values"]) for e in plain]
    # the stream is ordered by position: n6's 1, the four CSV files' 11-43, n5's 99
    first, last = (
        ("n6.parquet.zip", 1, {"id": 1}, {"id": 1, "a": "x"}),
        ("n5.jsonl.zip", 1, {"id": 99}, {"id": 99, "a": "j"}),
    )
    assert got == [first, *want, last]
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 14


def _refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str, payload: bytes, mapping: str = PLAIN
) -> tuple[Path, str]:
    """``cdcnorm convert`` of one dump named ``name`` holding ``payload``, which must stop the run
    with exit 4, no traceback and no events: the dump's path and what the run said."""
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(mapping)
    (dump := tmp_path / name).write_bytes(payload)
    code = cli("convert", "--mappings", str(mdir), str(dump), "--out", str(tmp_path / "out"))
    err = capsys.readouterr().err
    assert code == 4, err
    assert "Traceback" not in err and not (tmp_path / "out" / "events").exists()
    return dump, err


def _encrypted(archive: bytes) -> bytes:
    """``archive`` with its one file marked encrypted: bit 0 of the general purpose flags, in the
    local file header (offset 6) and the central directory header (offset 8) (APPNOTE 4.3.7, 4.3.12)."""
    out = bytearray(archive)
    for signature, offset in ((b"PK\x03\x04", 6), (b"PK\x01\x02", 8)):
        at = out.index(signature) + offset
        out[at] |= 1
    return bytes(out)


def _bad_crc(archive: bytes) -> bytes:
    """``archive`` (stored, not compressed) with one byte of its file changed: its CRC-32 no longer
    matches (APPNOTE 4.4.7)."""
    out = bytearray(archive)
    at = out.index(b"I,2,2")
    out[at + 2] = ord("7")
    return bytes(out)


UNPACK = "hint: unpack it first and pass the files, or a folder of them, instead of the archive"


@pytest.mark.parametrize(
    ("archive", "said"),
    [
        (_zip(CSV.encode(), "a.csv", "b.csv"), ["this .zip archive holds 2 files (a.csv, b.csv)", UNPACK]),
        (
            _zip(CSV.encode(), *(f"p{i}.csv" for i in range(7))),
            ["this .zip archive holds 7 files (p0.csv, p1.csv, p2.csv, p3.csv, p4.csv and 2 more)", UNPACK],
        ),
        (_empty_zip(), ["this .zip archive holds 0 files", UNPACK]),
        (
            _zip(CSV.encode(), ".n.csv", "__MACOSX/._n.csv"),
            [
                "this .zip archive holds 0 files",
                "found: 0 files, besides metadata and hidden files: .n.csv, __MACOSX/._n.csv",
            ],
        ),
        (_zip(CSV.encode() * 50)[:-30], ["cannot read this file: truncated or corrupt zip archive"]),
        (
            _bad_crc(_zip(CSV.encode(), method=zipfile.ZIP_STORED)),
            ["cannot read this file: truncated or corrupt zip archive (Bad CRC-32"],
        ),
        (
            _encrypted(_zip(CSV.encode())),
            ["cannot read this file: the archive's file inner.csv cannot be unpacked"],
        ),
    ],
    ids=["two-files", "seven-files", "no-file", "hidden-only", "truncated", "bad-crc", "encrypted"],
)
def test_a_zip_archive_that_is_not_one_readable_dump_is_a_clear_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], archive: bytes, said: list[str]
) -> None:
    dump, err = _refused(tmp_path, capsys, "n.csv.zip", archive)
    assert f"{dump}: {said[0]}" in err and all(s in err for s in said[1:]), err


@pytest.mark.parametrize(
    ("name", "packed", "inner"),
    [
        ("n.csv.gz", gzip.compress(gzip.compress(CSV.encode())), ".gz"),
        ("n.jsonl.gz", gzip.compress(gzip.compress(b'{"op": "I", "pos": 1, "id": 1}\n')), ".gz"),
        ("n.csv.zip", _zip(gzip.compress(CSV.encode())), ".gz"),
        ("n.csv.bz2", bz2.compress(_zip(CSV.encode())), ".zip"),
        ("n.parquet.gz", gzip.compress(bz2.compress(_parquet_bytes())), ".bz2"),
    ],
)
def test_an_archive_inside_an_archive_is_a_clear_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str, packed: bytes, inner: str
) -> None:
    # decompressed once, the bytes were read as text: "the header row is not utf-8 text, set
    # csv.encoding" for a CSV, every line quarantined for JSON Lines (exit 0); the archives are
    # written by Python's gzip, bz2 and zipfile modules
    dump, err = _refused(tmp_path, capsys, name, packed)
    outer = Path(name).suffix
    assert f"{dump}: this {outer} archive holds another archive ({inner}), not a dump" in err
    assert f"hint: unpack it once and name what comes out for what it is: {name[: -len(outer)]}{inner}" in err


@pytest.mark.parametrize("name", ["n.csv", "n.jsonl", "n.csv.gz"])
def test_a_parquet_file_named_as_text_is_a_clear_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str
) -> None:
    # read as CSV its bytes were a header of odd names ("expected a column named 'op', found
    # columns PAR1..."); the file is written by pyarrow
    payload = _parquet_bytes()
    dump, err = _refused(tmp_path, capsys, name, gzip.compress(payload) if name.endswith(".gz") else payload)
    fmt = "jsonl" if ".jsonl" in name else "csv"
    assert f"{dump}: this file is Parquet, but it is read as {fmt}" in err
    assert "hint: name it n.parquet, or set format: parquet in its mapping" in err


def test_many_small_files_keep_their_record_numbers(convert: ConvertFn) -> None:
    files: dict[str, str | bytes] = {
        f"n{i:04d}.csv": f"op,pos,id,a\nI,{2 * i + 1},{2 * i + 1},x\nI,{2 * i + 2},{2 * i + 2},y\n"
        for i in range(400)
    }
    files["n9999.csv"] = 'op,pos,id,a\nI,5000,5000,"open\n'  # one broken file among them
    done = convert(PLAIN, files)
    events = done.events("t.notes")
    assert len(events) == 800
    assert all(e["origin"]["row"] == 2 - e["key"]["id"] % 2 for e in events)
    assert all(e["origin"]["file"] == f"n{(e['key']['id'] - 1) // 2:04d}.csv" for e in events)
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 801 and ledger["total"]["quarantined"] == 1


def _small_files(*, bad: bool) -> dict[str, str | bytes]:
    """Small files of every shape a feed drops: LF and CRLF line ends, a BOM, quoted commas and
    line breaks, blank lines, no final line end, a header alone, a compressed one; with ``bad``, a
    record with a field too many, an unterminated quote, a CR-only file, bytes that are not UTF-8."""
    files: dict[str, str | bytes] = {}
    for i in range(20):
        body = f'I,{3 * i + 1},{3 * i + 1},"x, ""{i}"""\nI,{3 * i + 2},{3 * i + 2},"two\nlines"\n\nI,{3 * i + 3},{3 * i + 3},\n'
        files[f"n{i:03d}.csv"] = "op,pos,id,a\n" + body
    for i in range(20, 38):  # CRLF, one without its last line end, one with a BOM
        text = f'op,pos,id,a\r\nI,{3 * i + 1},{3 * i + 1},crlf\r\nI,{3 * i + 2},{3 * i + 2},"in\r\nside"\r\n'
        files[f"n{i:03d}.csv"] = text.removesuffix("\r\n") if i == 21 else text
    files["n022.csv"] = b"\xef\xbb\xbf" + str(files["n022.csv"]).encode()
    files["n040.csv"] = "op,pos,id,a\n"
    files["n041.csv.gz"] = gzip.compress(b"op,pos,id,a\nI,200,200,gz\n")
    if bad:
        files["n042.csv"] = "op,pos,id,a\nI,210,210,ok\nI,211,211,one,too many\nI,212,212,ok\n"
        files["n043.csv"] = 'op,pos,id,a\nI,220,220,ok\nI,221,221,"open\nI,222,222,after\n'
        files["n044.csv"] = "op,pos,id,a\rI,230,230,cr\rI,231,231,only\r"
        files["n045.csv"] = b"op,pos,id,a\nI,240,240,caf\xe9\nI,241,241,fine\n"
    return files


@pytest.mark.parametrize("bad", [False, True])
def test_small_files_read_together_as_read_one_by_one(
    convert: ConvertFn, monkeypatch: pytest.MonkeyPatch, bad: bool
) -> None:
    # the same events, quarantine (record numbers, raw text) and ledger whether the small files
    # are joined into one scan or each read by itself
    from cdcnorm.readers import csv as csv_reader

    joined_files: list[int] = []
    join = csv_reader._joined

    def counting(group: list[Any], *args: Any) -> list[Any]:
        left = join(group, *args)
        joined_files.append(len(group) - len(left))
        return left

    monkeypatch.setattr(csv_reader, "_joined", counting)
    files = _small_files(bad=bad)
    joined = convert(PLAIN, files)
    # good files: every one but the header alone is read joined (LF, CRLF); a bad record sends its
    # joined scan (the LF one) back to reading file by file
    assert joined_files == [18 if bad else 39]
    monkeypatch.setattr(csv_reader, "JOIN_MIN", 10**9)
    alone = convert(PLAIN, files)
    assert joined.events("t.notes") == alone.events("t.notes")
    assert joined.quarantine("t.notes") == alone.quarantine("t.notes")
    assert joined.ledger() == alone.ledger()
    ledger = joined.ledger()
    assert ledger["balanced"]
    per_file = ledger["tables"]["t.notes"]["files"]
    assert per_file["n001.csv"]["read"] == 3 and per_file["n040.csv"]["read"] == 0
    assert ledger["total"]["read"] == (107 if bad else 97)
    assert ledger["total"]["quarantined"] == (3 if bad else 0)
    rows = {(e["origin"]["file"], e["origin"]["row"]) for e in joined.events("t.notes")}
    assert ("n000.csv", 3) in rows and ("n021.csv", 2) in rows and ("n041.csv.gz", 1) in rows
    if bad:
        assert ("n043.csv", 3) in rows  # reading resumed after the unterminated quote


def test_a_record_with_a_field_too_many_among_small_files(
    convert: ConvertFn, monkeypatch: pytest.MonkeyPatch
) -> None:
    # one bad record sends its whole joined scan back to reading file by file: nothing is lost
    files: dict[str, str | bytes] = {
        f"n{i:03d}.csv": f"op,pos,id,a\nI,{i + 1},{i + 1},x\n" for i in range(30)
    }
    files["n007.csv"] = "op,pos,id,a\nI,8,8,x,extra\n"
    done = convert(PLAIN, files)
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 30
    (bad,) = done.quarantine("t.notes")
    assert bad["_cdcnorm"]["file"] == "n007.csv" and bad["_cdcnorm"]["row"] == 1
    assert bad["_cdcnorm"]["text"] == "I,8,8,x,extra"
    assert [e["origin"]["file"] for e in done.events("t.notes")] == [
        f"n{i:03d}.csv" for i in range(30) if i != 7
    ]


def _small_json_files() -> dict[str, str | bytes]:
    """Small JSON Lines files that differ: columns one file has and another lacks (mapped and not),
    a nested object, a malformed line, bytes that are not UTF-8, blank lines, an empty file, a
    compressed one, a repeated member name."""
    files: dict[str, str | bytes] = {}
    for i in range(20):
        rows = [
            {"op": "I", "pos": 2 * i + 1, "id": 2 * i + 1, "a": f"x{i}"},
            {"op": "I", "pos": 2 * i + 2, "id": 2 * i + 2},
        ]
        if i % 3 == 0:
            rows[0]["extra"] = {"deep": [1, 2]}  # a column read by no field, in some files only
        if i % 4 == 0:
            rows[1]["a"] = None
        files[f"n{i:03d}.jsonl"] = "".join(json.dumps(r) + "\n" for r in rows) + ("\n" if i % 5 == 0 else "")
    files["n020.jsonl"] = '{"op": "I", "pos": 100, "id": 100, "a": "ok"}\nnot json\n[1, 2]\n'
    files["n021.jsonl"] = (
        b'{"op": "I", "pos": 101, "id": 101, "a": "caf\xe9"}\n{"op": "I", "pos": 102, "id": 102, "a": "b"}\n'
    )
    files["n022.jsonl"] = ""
    files["n023.jsonl.gz"] = gzip.compress(b'{"op": "I", "pos": 103, "id": 103, "a": "gz"}\n')
    files["n024.jsonl"] = '{"op": "I", "pos": 104, "id": 104, "a": "one", "a": "two"}\n'
    files["n025.jsonl"] = '{"op": "I", "pos": 105, "id": 105, "a": 1.50}\n'  # a number kept as written
    return files


def test_small_json_lines_files_read_together_as_read_one_by_one(
    convert: ConvertFn, monkeypatch: pytest.MonkeyPatch
) -> None:
    from cdcnorm.readers import jsonl

    scans: list[int] = []
    read = jsonl._read

    def counting(files: list[Any], *args: Any) -> None:
        scans.append(len(files))
        read(files, *args)

    monkeypatch.setattr(jsonl, "_read", counting)
    files = _small_json_files()
    together = convert(PLAIN, files)
    assert scans == [26]  # one scan for every file
    monkeypatch.setattr(jsonl, "JOIN_MIN", 10**9)
    alone = convert(PLAIN, files)
    assert scans[1:] == [1] * 26
    assert together.events("t.notes") == alone.events("t.notes")
    assert together.quarantine("t.notes") == alone.quarantine("t.notes")
    assert together.ledger() == alone.ledger()
    record, record_alone = last_run(together.out), last_run(alone.out)
    assert record["notes"] == record_alone["notes"]  # the unread column noted for its files only
    assert any("extra" in n["note"] and n["file"] == "n000.jsonl" for n in record["notes"])
    assert not any("extra" in n["note"] and n["file"] == "n001.jsonl" for n in record["notes"])
    ledger = together.ledger()
    assert ledger["balanced"] and ledger["total"]["quarantined"] == 4
    by_id = {e["key"]["id"]: e for e in together.events("t.notes")}
    assert by_id[105]["values"]["a"] == "1.50" and by_id[2]["values"]["a"] is None
    assert by_id[103]["origin"] == {"file": "n023.jsonl.gz", "row": 1}


def test_many_parquet_files_of_two_schemas_read_as_the_same_rows_in_csv(convert: ConvertFn) -> None:
    # files of one schema are read in one scan; the reader's own columns (the file name) never
    # take a name a file has: "file_row_number", "filename" and "__fname" are ordinary columns
    parquet: dict[str, str | bytes] = {}
    csv: dict[str, str | bytes] = {}
    for i in range(24):
        rows = [("I", str(2 * i + 1), str(2 * i + 1), f"p{i}"), ("I", str(2 * i + 2), str(2 * i + 2), None)]
        extra = ["file_row_number", "filename"] if i % 2 else ["__fname"]
        table = pa.table(
            {
                "op": [r[0] for r in rows],
                "pos": [r[1] for r in rows],
                "id": [r[2] for r in rows],
                "a": [r[3] for r in rows],
                **{name: ["odd", "odd"] for name in extra},
            }
        )
        buf = io.BytesIO()
        pq.write_table(table, buf)
        parquet[f"n{i:03d}.parquet"] = buf.getvalue()
        csv[f"n{i:03d}.csv"] = "op,pos,id,a\n" + "".join(",".join(r[:3]) + f",{r[3] or ''}\n" for r in rows)
    buf = io.BytesIO()
    pq.write_table(pa.table({c: pa.array([], pa.string()) for c in ("op", "pos", "id", "a")}), buf)
    parquet["n900.parquet"] = buf.getvalue()
    mapping = PLAIN.replace('files: ["n*"]', 'files: ["n*"]\nnulls: [""]')
    got = convert(mapping, parquet)
    want = convert(mapping, csv)
    strip = [
        (e["key"], e["values"], e["origin"]["file"].split(".")[0], e["origin"]["row"])
        for e in want.events("t.notes")
    ]
    assert [
        (e["key"], e["values"], e["origin"]["file"].split(".")[0], e["origin"]["row"])
        for e in got.events("t.notes")
    ] == strip
    ledger = got.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 48
    assert ledger["tables"]["t.notes"]["files"]["n900.parquet"]["read"] == 0


def test_small_files_without_a_header_read_together(convert: ConvertFn) -> None:
    mapping = PLAIN.replace("fields:", "csv: {header: false, columns: [op, pos, id, a]}\nfields:")
    files: dict[str, str | bytes] = {
        f"n{i:03d}.csv": f"I,{2 * i + 1},{2 * i + 1},x\nI,{2 * i + 2},{2 * i + 2},y\n" for i in range(20)
    }
    files["n005.csv"] = b"\xef\xbb\xbf" + str(files["n005.csv"]).encode()  # a BOM before the first record
    done = convert(mapping, files)
    events = done.events("t.notes")
    assert [(e["origin"]["file"], e["origin"]["row"]) for e in events] == [
        (f"n{i:03d}.csv", r) for i in range(20) for r in (1, 2)
    ]
    assert events[10]["values"] == {"id": 11, "a": "x"} and done.ledger()["total"]["read"] == 40


@pytest.mark.parametrize(
    ("encoding", "raw", "text"),
    [("latin-1", b"Caf\xe9 cr\xe8me", "Café crème"), ("cp1252", b"\x80 5 \x93ok\x94", "€ 5 “ok”")],
)
def test_csv_encoding(convert: ConvertFn, encoding: str, raw: bytes, text: str) -> None:
    # Python's codecs are the reference for both encodings
    assert raw.decode(encoding) == text
    mapping = PLAIN + f"csv: {{encoding: {encoding}}}\n"
    done = convert(mapping, {"n.csv": b"op,pos,id,a\nI,1,1," + raw + b"\n"})
    (e,) = done.events("t.notes")
    assert e["values"]["a"] == text


def test_a_cell_that_is_not_text_in_csv_encoding_names_that_encoding(convert: ConvertFn) -> None:
    """0x81 has no character in cp1252 (Python's codec is the reference): the cell is quarantined with
    its bytes, and its reason names cp1252, not UTF-8 (it said "expected UTF-8 text"). A file read as
    UTF-8 (its byte order mark overrides the label) keeps the UTF-8 wording."""
    with pytest.raises(UnicodeDecodeError):
        b"\x81".decode("cp1252")
    done = convert(
        PLAIN + "csv: {encoding: cp1252}\n",
        {
            "n1.csv": b"op,pos,id,a\nI,1,1,bad\x81x\n",
            "n2.csv": b"\xef\xbb\xbfop,pos,id,a\nI,2,2,bad\xffx\n",
        },
    )
    why = {int(q["id"]): q["_cdcnorm"] for q in done.quarantine("t.notes")}
    assert why[1]["reasons"][0]["expected"] == "cp1252 text"
    assert why[1]["reasons"][0]["reason"] == "not cp1252 (found shows the bytes, base64)"
    assert why[1]["raw_base64"] == {"a": base64.b64encode(b"bad\x81x").decode()}
    assert why[2]["reasons"][0]["expected"] == "UTF-8 text"
    assert why[2]["reasons"][0]["reason"] == "not UTF-8 (found shows the bytes, base64)"


@pytest.mark.parametrize("encoding", ["latin-1", "cp1252"])
def test_a_utf8_byte_order_mark_is_read_as_utf8_whatever_csv_encoding_says(
    convert: ConvertFn, encoding: str
) -> None:
    # A byte order mark names its encoding: the WHATWG Encoding Standard's decode lets it override
    # the label (from memory). Before, the mark was dropped and the UTF-8 text read as 8-bit text
    # without a word: "Zoë €" became "ZoÃ« â‚¬". Python's codecs are the reference for both files.
    utf8 = "Zoë €".encode()
    assert utf8.decode(encoding, "replace") != "Zoë €"  # the negative control: what the label would make
    eight = "Åse".encode(encoding)
    done = convert(
        PLAIN + f"csv: {{encoding: {encoding}}}\n",
        {
            "n1.csv": b"\xef\xbb\xbfop,pos,id,a\nI,1,1," + utf8 + b"\n",
            "n2.csv": b"op,pos,id,a\nI,2,2," + eight + b"\n",
        },
    )
    assert [e["values"]["a"] for e in done.events("t.notes")] == [
        utf8.decode("utf-8"),
        eight.decode(encoding),
    ]
    (note,) = [n for n in last_run(done.out)["notes"] if "UTF-8" in n["note"]]
    assert note["file"] == "n1.csv" and "read as UTF-8" in note["note"] and "byte order mark" in note["note"]


@pytest.mark.parametrize(
    ("encoding", "codec", "bom"),
    [
        ("utf-16-le", "utf-16-le", b""),
        ("utf-16-le", "utf-16-le", b"\xff\xfe"),
        ("utf-16-be", "utf-16-be", b""),
        ("utf-16", "utf-16", b""),
    ],
    ids=["le", "le-with-bom", "be", "bom-detected"],
)
def test_utf16_dumps(convert: ConvertFn, encoding: str, codec: str, bom: bytes) -> None:
    # some databases' export tools write UTF-16 (Python's codecs are the reference). A line end is
    # two bytes there, and U+010A is the bytes 0A 01 in UTF-16LE: before, the header was cut at the
    # first 0A byte, and a byte order mark stayed in the first column's name
    text = 'op,pos,id,a,"Ċ col"\nI,1,1,"Åsa, ""Ċ""",x\nI,2,2,"two\nlines",y\n'
    raw = bom + text.encode(codec)
    assert raw.decode(encoding).removeprefix("\ufeff") == text
    done = convert(
        PLAIN.replace("  a: text", "  a: text\n  c: {from: Ċ col, type: text}")
        + f"csv: {{encoding: {encoding}}}\n",
        {"n.csv": raw},
    )
    assert [(e["values"]["a"], e["values"]["c"]) for e in done.events("t.notes")] == [
        ('Åsa, "Ċ"', "x"),
        ("two\nlines", "y"),
    ]
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 2


@pytest.mark.parametrize("encoding", ["cp1252", "utf-16", "utf-16-le", "utf-16-be"])
def test_a_dump_in_another_encoding_is_read_by_the_engine_from_a_utf8_copy(
    convert: ConvertFn, encoding: str
) -> None:
    # The engine's reader decodes UTF-8 and Latin-1 only: any other encoding was read record by
    # record, 3 to 4 times as long. A UTF-8 copy of the file (Python's codec decodes it: the
    # reference) is read by the engine's reader; a file with a byte that does not decode is still
    # read record by record, to the same values, that cell quarantined with its bytes
    text = 'op,pos,id,a\nI,1,1,"Åsa, ""€"""\nI,2,2,"two\r\nlines"\nI,3,3,\nI,4,4,""\n'
    raw = text.encode(encoding)
    assert raw.decode(encoding).removeprefix("\ufeff") == text
    mapping = PLAIN + f"csv: {{encoding: {encoding}}}\n"
    expected = {1: 'Åsa, "€"', 2: "two\r\nlines", 3: None, 4: ""}
    done = convert(mapping, {"n.csv": raw})
    assert {e["key"]["id"]: e["values"]["a"] for e in done.events("t.notes")} == expected
    assert not last_run(done.out)["notes"]  # the engine's reader read the copy
    tail = "utf-16-le" if encoding == "utf-16" else encoding  # no second byte order mark
    bad = b"I,5,5,bad\x81\n" if encoding == "cp1252" else "I,5,5,bad\ud800\n".encode(tail, "surrogatepass")
    with pytest.raises(UnicodeDecodeError):
        (raw + bad).decode(encoding)
    careful = convert(mapping, {"n.csv": raw + bad})
    assert {e["key"]["id"]: e["values"]["a"] for e in careful.events("t.notes")} == expected
    (q,) = careful.quarantine("t.notes")
    assert q["_cdcnorm"]["row"] == 5 and careful.ledger()["balanced"]
    (note,) = [n["note"] for n in last_run(careful.out)["notes"]]
    assert (
        note == f"read record by record (the fast reader rejected it, or a byte of it is not {encoding} text)"
    )


def test_utf16_without_a_byte_order_mark_needs_its_byte_order(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before: a traceback (UnicodeError: UTF-16 stream does not start with BOM)
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(PLAIN + "csv: {encoding: utf-16}\n")
    write_files(tmp_path / "d", {"n.csv": CSV.encode("utf-16-le")})
    assert cli("convert", "--mappings", str(mdir), str(tmp_path / "d"), "--out", str(tmp_path / "o")) == 4
    err = capsys.readouterr().err
    assert "n.csv:1: the file's start is not utf-16 text" in err and "utf-16-le or utf-16-be" in err
    assert "Traceback" not in err
    # a header that is not text in the encoding is refused; bytes that are not, in a record, are
    # that record's (quarantined with them)
    (mdir / "t.yaml").write_text(PLAIN)
    write_files(tmp_path / "e", {"n.csv": b"op,pos,id,\xe9\nI,1,1,x\n"})
    assert cli("convert", "--mappings", str(mdir), str(tmp_path / "e"), "--out", str(tmp_path / "o")) == 4
    assert "n.csv:1: the header row is not utf-8 text" in capsys.readouterr().err


def test_unknown_encoding_is_a_mapping_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(PLAIN + "csv: {encoding: klingon}\n")
    write_files(tmp_path / "d", {"n.csv": CSV})
    assert cli("check", "--mappings", str(mdir), str(tmp_path / "d")) == 3
    assert 'unknown text encoding "klingon"' in capsys.readouterr().err


def test_over_long_record_is_quarantined_and_reading_resumes(
    convert: ConvertFn, monkeypatch: pytest.MonkeyPatch
) -> None:
    from cdcnorm.readers import csv as csv_reader
    from cdcnorm.readers import forms

    monkeypatch.setattr(csv_reader, "MAX_RECORD_BYTES", 1 << 20)  # the engine's reader's line
    monkeypatch.setattr(forms, "MAX_RECORD_BYTES", 1 << 20)  # a record read record by record
    big = "z" * (3 << 20)
    done = convert(PLAIN, {"n.csv": f"op,pos,id,a\nI,1,1,x\nI,2,2,{big}\nI,3,3,y\n"})
    assert [e["key"]["id"] for e in done.events("t.notes")] == [1, 3]
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["row"] == 2 and q["_cdcnorm"]["text"] == f"I,2,2,{big}"
    assert "longer than 1 MiB" in q["_cdcnorm"]["reasons"][0]["reason"]


def test_a_long_good_record_in_a_file_read_record_by_record(convert: ConvertFn) -> None:
    """The careful path's parser reads blocks that hold its longest record, whatever its size up
    to the limit: a 6 MiB field (with a comma and a line break) in a file with a broken quote."""
    big = "w" * (3 << 20) + ",\n" + "v" * (3 << 20)
    done = convert(PLAIN, {"n.csv": f'op,pos,id,a\nI,1,1,x\nI,2,2,"{big}"\nI,3,3,"b\nI,4,4,y\n'})
    events = done.events("t.notes")
    assert [e["key"]["id"] for e in events] == [1, 2, 4]
    assert events[1]["values"]["a"] == big
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["row"] == 3 and q["_cdcnorm"]["text"] == 'I,3,3,"b'


def test_sub_folders_need_recursive(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(PLAIN)
    write_files(tmp_path / "d", {"n1.csv": CSV})
    write_files(tmp_path / "d" / "2026-03-02", {"n2.csv": CSV.replace("I,", "I,1", 1)})
    base = ["convert", "--mappings", str(mdir), str(tmp_path / "d"), "--json"]
    assert cli(*base, "--out", str(tmp_path / "o1")) == 4
    assert "2026-03-02" in capsys.readouterr().err
    assert cli(*base, "--out", str(tmp_path / "o2"), "--recursive") == 0
    report = json.loads(capsys.readouterr().out)
    assert set(report["ledger"]["tables"]["t.notes"]["files"]) == {"n1.csv", "n2.csv"}


def test_recursive_follows_linked_folders_and_stops_on_a_link_to_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # before, --recursive left a linked folder's files out without a word
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(PLAIN)
    write_files(tmp_path / "d" / "day1", {"n1.csv": CSV})
    write_files(tmp_path / "mounted", {"n2.csv": CSV.replace("I,", "I,1", 1)})
    (tmp_path / "d" / "day2").symlink_to(tmp_path / "mounted", target_is_directory=True)
    (tmp_path / "d" / "day1" / "up").symlink_to(tmp_path / "d", target_is_directory=True)  # a loop
    (tmp_path / "d" / "again").symlink_to(tmp_path / "d" / "day1", target_is_directory=True)
    # a hidden link to nothing (a copy in progress, by common practice) is never read: noted, not fatal
    (tmp_path / "d" / "day1" / ".n9.csv.part").symlink_to(tmp_path / "not-yet.csv")
    base = ["convert", "--mappings", str(mdir), str(tmp_path / "d"), "--recursive", "--json"]
    assert cli(*base, "--out", str(tmp_path / "o1")) == 0
    report = json.loads(capsys.readouterr().out)
    assert [Path(h).name for h in report["hidden"]] == [".n9.csv.part"]
    files = report["ledger"]["tables"]["t.notes"]["files"]
    assert set(files) == {"n1.csv", "n2.csv"}  # the linked folder read; a folder reached twice read once
    assert report["ledger"]["balanced"] and report["ledger"]["total"]["read"] == 2 * files["n1.csv"]["read"]
    (tmp_path / "d" / "day1" / "n3.csv").symlink_to(tmp_path / "gone.csv")
    assert cli(*base, "--out", str(tmp_path / "o2")) == 4
    err = capsys.readouterr().err
    assert "n3.csv: a link to nothing" in err and "gone.csv" in err and "Traceback" not in err
    assert not (tmp_path / "o2" / "events").exists()
    # named as an input, the same (before: "no such file", though the name is there)
    assert (
        cli(
            "convert",
            "--mappings",
            str(mdir),
            str(tmp_path / "d" / "day1" / "n3.csv"),
            "--out",
            str(tmp_path / "o3"),
        )
        == 4
    )
    assert "n3.csv: a link to nothing: it points to" in capsys.readouterr().err


def test_a_folder_that_cannot_be_listed_stops_the_run(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    # its files would otherwise be left out; the tests run as root, which may list any folder, so
    # the refusal is the operating system's error, raised where the folder is listed
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(PLAIN)
    write_files(tmp_path / "d" / "day1", {"n1.csv": CSV})
    write_files(tmp_path / "d" / "locked", {"n2.csv": CSV})
    listing = Path.iterdir

    def iterdir(self: Path) -> Any:
        if self.name == "locked":
            raise PermissionError(13, "Permission denied", str(self))
        return listing(self)

    monkeypatch.setattr(Path, "iterdir", iterdir)
    args = [
        "convert",
        "--mappings",
        str(mdir),
        str(tmp_path / "d"),
        "--recursive",
        "--out",
        str(tmp_path / "o"),
    ]
    assert cli(*args) == 4
    err = capsys.readouterr().err
    assert "locked: cannot list the folder: Permission denied" in err and "Traceback" not in err


def test_broken_last_field_through_the_cli(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(PLAIN.replace("a: text", "name: text"))
    write_files(tmp_path / "d", {"n.csv": 'op,pos,id,name\nI,1,1,ok\nI,2,2,"b\nI,3,3,a\nI,4,4,c\n'})
    assert cli("check", "--mappings", str(mdir), str(tmp_path / "d"), "--json") == 0
    report = json.loads(capsys.readouterr().out)
    assert report["files"][0]["rows"] == 4 and report["files"][0]["malformed"] == 1
    out = tmp_path / "out"
    assert cli("convert", "--mappings", str(mdir), str(tmp_path / "d"), "--out", str(out), "--json") == 0
    ledger = json.loads(capsys.readouterr().out)["ledger"]
    assert ledger["balanced"] and ledger["total"]["read"] == 4 and ledger["total"]["quarantined"] == 1
    (line,) = run_files(out, "quarantine", "t.notes")[0].read_text().splitlines()
    assert json.loads(line)["_cdcnorm"]["text"] == 'I,2,2,"b'


def test_a_dump_larger_than_the_memory_limit_converts(tmp_path: Path) -> None:
    """No timing: the engine's limit is far below the input's size, and the output is the same."""
    import sys

    sys.path.insert(0, str(Path(__file__).resolve().parent / "bench"))
    import dumpgen

    mdir = dumpgen.write_mapping(tmp_path / "m").parent
    (tmp_path / "d").mkdir()
    files = dumpgen.generate(150_000, tmp_path / "d")
    assert sum(f.stat().st_size for f in files) > 25 << 20
    outs = []
    for name, extra in (("free", []), ("tight", ["--memory-limit", "64MB", "--threads", "1"])):
        out = tmp_path / name
        assert (
            cli(
                "convert",
                "--quiet",
                "--mappings",
                str(mdir),
                str(tmp_path / "d"),
                "--out",
                str(out),
                "--format",
                "parquet",
                *extra,
            )
            == 0
        )
        outs.append(out)
    a, b = (pq.read_table(run_files(o, "events", "lockers.deliveries")[0]) for o in outs)
    assert a.num_rows > 90_000 and a.equals(b)
    assert last_run(outs[0])["ledger"] == last_run(outs[1])["ledger"]


def test_the_fast_reader_reads_a_file_larger_than_the_engine_memory(tmp_path: Path) -> None:
    """A CSV file larger than the engine's whole memory is read by the engine's reader, in
    buffers its memory holds: not handed to the record-by-record path (slower, and outside the
    engine's limit) because the reader's default buffer would not fit."""
    from cdcnorm.engines.duckdb import DuckDBEngine
    from cdcnorm.inputs import expand_inputs, route
    from cdcnorm.mapping import load_mappings
    from cdcnorm.pipeline import Options, read_all

    write_files(
        tmp_path / "m",
        {
            "t.yaml": "table: t.wide\nfiles: ['w*.csv']\nkey: [id]\nchange:\n"
            "  action: {column: op, codes: {I: insert}}\n  position: {column: pos, kind: integer}\n"
            "fields:\n  id: integer\n  note: text\n"
        },
    )
    rows = 500_000
    pad = "x" * 90
    with (tmp_path / "w.csv").open("w", encoding="utf-8") as f:
        f.write("op,pos,id,note\n")
        f.writelines(f'I,{i},{i},"{pad}, {i}"\n' for i in range(rows))
    assert (tmp_path / "w.csv").stat().st_size > 50 << 20
    mappings = load_mappings(tmp_path / "m")
    engine = DuckDBEngine(memory_limit="40MB", threads=1, temp_directory=str(tmp_path / "spill"))
    routed = route(expand_inputs([tmp_path / "w.csv"]), mappings)
    read = read_all(mappings, routed, engine, Options(), lambda *a: None, tmp_path / "scratch")
    (f,) = read["t.wide"].files
    assert f.notes == [] and f.rows_read == rows and f.malformed == 0


def test_a_limit_too_small_for_the_engine_is_a_clear_error_and_commits_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    import sys

    sys.path.insert(0, str(Path(__file__).resolve().parent / "bench"))
    import dumpgen

    mdir = dumpgen.write_mapping(tmp_path / "m").parent
    (tmp_path / "d").mkdir()
    dumpgen.generate(50_000, tmp_path / "d")
    out = tmp_path / "out"
    args = ["convert", "--mappings", str(mdir), str(tmp_path / "d"), "--out", str(out)]
    assert cli(*args, "--memory-limit", "8MB") == 12
    err = capsys.readouterr().err
    assert "ran out of memory within the limit" in err and "--memory-limit" in err
    assert "Traceback" not in err and "bug in cdcnorm" not in err
    assert not (out / "runs").exists() or not list((out / "runs").iterdir())  # nothing committed
    assert not (out / "events").exists()


MiB = 1 << 20
GiB = 1 << 30


@pytest.mark.parametrize(
    ("limit", "input_gib", "noted"),
    [
        # the sizes measured within the target under --memory-limit 1GB (tests/bench/RESULTS.md):
        # 20M rows (3.6 GiB of CSV, 170-218 MiB above the limit) and 50M rows (9.1 GiB, 273-364 MiB)
        ("1GB", 0.2, False),
        ("1GB", 3.6, False),
        ("1GB", 9.06, False),
        ("1GB", 12.0, True),
        ("4GB", 12.0, False),
        ("1GB", 100.0, True),
    ],
)
def test_an_input_too_large_for_the_limit_gets_a_note(limit: str, input_gib: float, noted: bool) -> None:
    from cdcnorm.engines.duckdb import MEMORY_OVERHEAD, DuckDBEngine, engine_share, predicted_overhead

    engine = DuckDBEngine(memory_limit=limit, input_bytes=int(input_gib * GiB))
    # the engine's share of the limit does not depend on the input (a quarter, at most 256 MiB, kept back)
    assert engine.engine_memory == pytest.approx(engine_share(engine.memory_budget), abs=1024)
    assert engine.engine_memory == pytest.approx(
        engine.memory_budget - min(engine.memory_budget // 4, 256 * MiB), abs=1024
    )
    note = engine.memory_note()
    assert (note is not None) == noted
    if note:
        assert f"about {input_gib:,.1f} GiB of input is large for a memory limit of {limit}" in note
        advised = int(note.rsplit("--memory-limit ", 1)[1].split("GB")[0]) * 10**9
        # the limit the note advises keeps the prediction within the target, and one a GB less does not
        assert predicted_overhead(advised, int(input_gib * GiB)) <= MEMORY_OVERHEAD
        assert predicted_overhead(advised - 10**9, int(input_gib * GiB)) > MEMORY_OVERHEAD


def test_a_run_plans_its_memory_for_the_text_its_files_hold(tmp_path: Path) -> None:
    from cdcnorm.readers import streams

    text = b"op,pos,id\n" + b"I,1,1\n" * 1000
    (tmp_path / "a.csv").write_bytes(text)
    (tmp_path / "a.csv.gz").write_bytes(gzip.compress(text))
    (tmp_path / "a.csv.bz2").write_bytes(bz2.compress(text))
    pq.write_table(pa.table({"id": list(range(1000))}), tmp_path / "a.parquet")
    assert streams.planned_size(tmp_path / "a.csv") == len(text)
    for name in ("a.csv.gz", "a.csv.bz2", "a.parquet"):  # counted as five times their size
        assert streams.planned_size(tmp_path / name) == 5 * (tmp_path / name).stat().st_size
    assert streams.planned_size(tmp_path / "gone.csv") == 0
    # a format the mapping names counts over the name's suffix (Parquet named .dat, text named .pq)
    (tmp_path / "a.dat").write_bytes((tmp_path / "a.parquet").read_bytes())
    assert streams.planned_size(tmp_path / "a.dat", "parquet") == 5 * (tmp_path / "a.dat").stat().st_size
    (tmp_path / "b.pq").write_bytes(text)
    assert streams.planned_size(tmp_path / "b.pq", "csv") == len(text)


def test_a_note_says_when_the_input_is_large_for_the_limit(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The run still converts; its printed result and its JSON say what the limit could not keep."""
    from cdcnorm.readers import streams

    write_files(
        tmp_path / "m",
        {
            "t.yaml": "table: t.small\nfiles: ['s*.csv']\nkey: [id]\nchange:\n"
            "  action: {column: op, codes: {I: insert}}\n  position: {column: pos, kind: integer}\n"
            "fields:\n  id: integer\n"
        },
    )
    (tmp_path / "s.csv").write_text("op,pos,id\nI,1,1\n", encoding="utf-8")
    # as if the file held 500 GiB of text: no test writes that much
    monkeypatch.setattr(streams, "planned_size", lambda path, fmt=None: 500 * GiB)
    args = ["convert", "--mappings", str(tmp_path / "m"), str(tmp_path / "s.csv"), "--memory-limit", "2GB"]
    assert cli(*args, "--out", str(tmp_path / "a")) == 0
    said = capsys.readouterr()
    note = "note: about 500.0 GiB of input is large for a memory limit of 2GB: what the engine spills"
    assert note in " ".join(said.out.split())  # in the summary
    assert note in " ".join(said.err.split())  # and when the run starts, before the wait
    assert cli(*args, "--out", str(tmp_path / "b"), "--json") == 0
    said = capsys.readouterr()
    assert "500.0 GiB" in json.loads(said.out)["memory_note"]
    assert "note:" not in said.err  # --json prints nothing else
    monkeypatch.undo()
    assert cli(*args, "--out", str(tmp_path / "c"), "--json") == 0
    assert json.loads(capsys.readouterr().out)["memory_note"] is None


def test_control_characters_and_line_separators_stay_one_json_line(convert: ConvertFn) -> None:
    # RFC 8259 section 7: control characters are escaped inside strings; U+2028 may stand as is
    text = "a\x01b\x1fc\u2028d\re"
    done = convert(PLAIN, {"n.csv": f'op,pos,id,a\nI,1,1,"{text}"\n'})
    lines = run_files(done.out, "events", "t.notes")[0].read_text(encoding="utf-8").split("\n")
    assert len(lines) == 2 and lines[1] == ""
    assert json.loads(lines[0])["values"]["a"] == text


def test_a_path_that_is_not_utf8_text_is_refused_by_name(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # a name of bytes that are not UTF-8 cannot reach the engine's SQL: a clear error, no traceback
    import os

    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(PLAIN)
    (dumps := tmp_path / "d").mkdir()
    bad = os.fsdecode(os.fsencode(dumps) + b"/n-\xff.csv")
    Path(bad).write_text(CSV)
    code = cli("convert", "--mappings", str(mdir), str(dumps), "--out", str(tmp_path / "out"))
    err = capsys.readouterr().err
    assert code == 4 and "Traceback" not in err
    assert "n-\\xff.csv: the dump file's name is not UTF-8 text" in err
    (good := tmp_path / "g").mkdir()
    (good / "n.csv").write_text(CSV)
    out = os.fsdecode(os.fsencode(tmp_path) + b"/out-\xfe")
    code = cli("convert", "--mappings", str(mdir), str(good), "--out", out)
    err = capsys.readouterr().err
    assert code == 4 and "out-\\xfe: the landing area's name is not UTF-8 text" in err


def _tar(payload: bytes, *names: str, fmt: int = tarfile.GNU_FORMAT) -> bytes:
    """A tar archive (POSIX.1 ustar, GNU or pax headers; written by Python's tarfile module)
    holding ``payload`` under each of ``names``."""
    sink = io.BytesIO()
    with tarfile.open(fileobj=sink, mode="w", format=fmt) as bundle:
        for name in names:
            info = tarfile.TarInfo(name)
            info.size = len(payload)
            bundle.addfile(info, io.BytesIO(payload))
    return sink.getvalue()


@pytest.mark.parametrize(
    ("name", "packed", "held"),
    [
        ("n.csv", _tar(CSV.encode(), "n1.csv", "n2.csv"), "n1.csv, n2.csv"),
        ("n.csv", _tar(CSV.encode(), "day/n1.csv", fmt=tarfile.USTAR_FORMAT), "day/n1.csv"),
        ("n.jsonl", _tar(b'{"op": "I", "pos": 1, "id": 1}\n', "n.jsonl", fmt=tarfile.PAX_FORMAT), "n.jsonl"),
        ("n.csv.gz", gzip.compress(_tar(CSV.encode(), *(f"p{i}.csv" for i in range(7)))), "p0.csv, p1.csv"),
        ("n.csv.bz2", bz2.compress(_tar(CSV.encode(), "n1.csv")), "n1.csv"),
        ("n.csv.zip", _zip(_tar(CSV.encode(), "n1.csv")), "n1.csv"),
        ("n.parquet", _tar(_parquet_bytes(), "n.parquet"), "n.parquet"),
        ("n.csv", _tar(os.urandom(300_000), *(f"big{i}.csv" for i in range(9))), "big0.csv"),
    ],
)
def test_a_tar_archive_given_as_a_dump_is_a_clear_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str, packed: bytes, held: str
) -> None:
    # its header block was read as the CSV header ("expected a column named 'op', found columns
    # "n1.csv\u0000\u0000..."), or as a line of JSON; the archives are written by Python's tarfile
    dump, err = _refused(tmp_path, capsys, name, packed)
    assert f"{dump}: this file is a tar archive ({held}" in err and "), not a dump" in err
    assert "found: a tar header block (its magic 'ustar' at byte 257)" in err
    assert f"hint: unpack it first (tar -xf {name}) and pass the files, or a folder of them" in err


def test_a_big_tar_archive_names_the_files_its_start_shows(tmp_path: Path) -> None:
    # nine 3 MiB files: the first 16 MiB show the first six headers, not the archive's end
    start = _tar(os.urandom(3 << 20), *(f"big{i}.csv" for i in range(9)))[: streams.BLOCK]
    error = streams.tar_bundle(tmp_path / "n.csv", start)
    assert error is not None
    assert "(big0.csv, big1.csv, big2.csv, big3.csv, big4.csv and more)" in error.message


def test_text_that_holds_ustar_where_a_tar_header_would_is_read_as_text(convert: ConvertFn) -> None:
    # the magic alone is not taken for an archive: a tar header's checksum must add up too
    header = "op,pos,id,a\n"
    filler = "x" * (streams.TAR_MAGIC_AT - len(header) - len("I,1,1,"))
    text = f"{header}I,1,1,{filler}ustar  and more\n"
    assert text.encode()[streams.TAR_MAGIC_AT :].startswith(streams.TAR_MAGIC)
    done = convert(PLAIN, {"n.csv": text})
    (event,) = done.events("t.notes")
    assert event["values"]["a"] == f"{filler}ustar  and more"


@pytest.mark.parametrize("name", ["n.tar.gz", "n.tgz", "n.tar"])
def test_a_file_named_as_a_tar_archive_says_so(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str
) -> None:
    dump, err = _refused(
        tmp_path, capsys, name, _tar(CSV.encode(), "n1.csv"), PLAIN.replace('["n*"]', '["n*.csv"]')
    )
    assert f"{dump}: this file matches no mapping" in err, err
    assert f"hint: its name says it is a tar archive: unpack it first (tar -xf {name})" in err


def _sqlite_bytes(tmp_path: Path) -> bytes:
    import sqlite3

    db = tmp_path / "made.db"
    with contextlib.closing(sqlite3.connect(db)) as conn:
        conn.execute("CREATE TABLE changes (op TEXT, pos INTEGER)")
        conn.commit()
    return db.read_bytes()


def _arrow_bytes(kind: str) -> bytes:
    sink = io.BytesIO()
    table = pa.table({"op": ["I"], "pos": [1]})
    if kind == "orc":
        import pyarrow.orc as orc

        orc.write_table(table, sink)
    else:
        import pyarrow.feather as feather

        feather.write_feather(table, sink)
    return sink.getvalue()


def _workbook() -> bytes:
    """The parts an Excel .xlsx package starts with (ECMA-376 part 2, from memory), zipped."""
    sink = io.BytesIO()
    with zipfile.ZipFile(sink, "w") as z:
        z.writestr("[Content_Types].xml", '<?xml version="1.0"?><Types/>')
        z.writestr("xl/workbook.xml", '<?xml version="1.0"?><workbook/>')
    return sink.getvalue()


@pytest.mark.parametrize(
    ("name", "make", "what"),
    [
        # the header of PostgreSQL's COPY binary format (its documentation, COPY, "Binary Format")
        (
            "n.csv",
            lambda _: b"PGCOPY\n\xff\r\n\x00" + bytes(8) + b"\xff\xff",
            "PostgreSQL's COPY binary format",
        ),
        ("n.csv.gz", lambda t: gzip.compress(_sqlite_bytes(t)), "an SQLite database"),  # by sqlite3
        (
            "n.jsonl",
            lambda _: b"Obj\x01\x04\x14avro.codec\x08null\x00" + bytes(16),
            "an Avro file",
        ),  # its spec
        ("n.parquet", lambda _: _arrow_bytes("feather"), "an Arrow IPC (Feather) file"),  # by pyarrow
        ("n.csv", lambda _: _arrow_bytes("orc"), "an ORC file"),  # by pyarrow
        (
            "n.csv",
            lambda _: b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(504),
            "an OLE2 compound file",
        ),  # MS-CFB
        ("n.csv", lambda _: _workbook(), "an Office Open XML document"),
    ],
)
def test_a_file_of_another_format_is_a_clear_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], name: str, make: Any, what: str
) -> None:
    # read as text, its bytes were a header of odd names (exit 4 for schema drift, naming columns
    # such as "SQLite format 3\u0000..."), or every line quarantined as not JSON (exit 0)
    dump, err = _refused(tmp_path, capsys, name, make(tmp_path))
    assert f"{dump}: this file is {what}" in err and ", not a dump cdcnorm reads" in err, err


def test_a_workbook_in_a_zip_is_named_as_one(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    dump, err = _refused(tmp_path, capsys, "n.csv.zip", _workbook())
    assert f"{dump}: this .zip archive is an Office Open XML document" in err, err
    assert "hint: save the sheet as CSV" in err


def test_a_text_that_starts_like_an_orc_file_is_read_as_text(convert: ConvertFn) -> None:
    orc_named = PLAIN.replace("id: integer", "ORC_ID: integer").replace("key: [id]", "key: [ORC_ID]")
    text = "ORC_ID,op,pos,a\n1,I,1,x\n"
    done = convert(orc_named, {"n.csv": text})
    assert [e["key"]["ORC_ID"] for e in done.events("t.notes")] == [1]


def test_an_unpaired_surrogate_deep_in_a_utf16_dump_is_quarantined_not_a_traceback(
    convert: ConvertFn,
) -> None:
    # 00 D8 is half a surrogate pair alone: Python's UTF-16 codec (the reference) cannot decode it.
    # Past the first MiB (the header's block) it ended the run in a traceback: the careful path's
    # error handler took bytes 0x80-0xFF only
    rows = "op,pos,id,a\n" + "".join(f"I,{i},{i},value {i}\n" for i in range(1, 60_001))
    bad = "I,60001,60001,bad\ud800x\n".encode("utf-16-le", "surrogatepass")
    raw = rows.encode("utf-16-le") + bad + "I,60002,60002,ok\n".encode("utf-16-le")
    assert len(rows.encode("utf-16-le")) > 2 << 20
    with pytest.raises(UnicodeDecodeError, match="illegal UTF-16 surrogate"):
        bad.decode("utf-16-le")
    done = convert(PLAIN + "csv: {encoding: utf-16-le}\n", {"n.csv": raw})
    (q,) = done.quarantine("t.notes")
    assert q["_cdcnorm"]["row"] == 60_001 and q["_cdcnorm"]["reasons"][0]["expected"] == "utf-16-le text"
    # the cell's bytes as the dump holds them (before: its good characters in UTF-8, b"bad\x00\xd8x")
    assert base64.b64decode(q["_cdcnorm"]["raw_base64"]["a"]) == "bad".encode("utf-16-le") + b"\x00\xd8x\x00"
    ledger = done.ledger()
    assert ledger["balanced"] and ledger["total"]["read"] == 60_002 and ledger["total"]["emitted"] == 60_001


def _units(codec: str, *parts: str | bytes) -> bytes:
    """Text parts in ``codec`` (Python's codec: the reference), byte parts as they are."""
    return b"".join(p if isinstance(p, bytes) else p.encode(codec) for p in parts)


@pytest.mark.parametrize(
    ("encoding", "codec", "bom"),
    [("utf-16-le", "utf-16-le", b""), ("utf-16-be", "utf-16-be", b""), ("utf-16", "utf-16-be", b"\xfe\xff")],
    ids=["le", "be", "be-by-its-mark"],
)
def test_a_utf16_unit_that_does_not_decode_keeps_its_bytes_whatever_they_are(
    convert: ConvertFn, encoding: str, codec: str, bom: bytes
) -> None:
    # A lone surrogate unit (Python's codec cannot decode one: the reference) whose bytes are a
    # comma, a quote or a line feed: written back as themselves to the careful path's scratch file,
    # they split its record there, and the run ended in a traceback (pyarrow: "Expected 4 columns,
    # got 5"). Each such cell is quarantined with its bytes as the dump holds them.
    def unit(low: int) -> bytes:
        return bytes((low, 0xD8)) if codec.endswith("le") else bytes((0xD8, low))

    parts = {2: ("a", unit(0x2C), "b"), 3: ("x", unit(0x22)), 4: (unit(0x0A),)}
    raw = bom + _units(codec, "op,pos,id,a\nI,1,1,ok\n")
    for i, cell in parts.items():
        raw += _units(codec, f"I,{i},{i},", *cell, "\n")
    with pytest.raises(UnicodeDecodeError):
        raw.decode(encoding)
    done = convert(PLAIN + f"csv: {{encoding: {encoding}}}\n", {"n.csv": raw})
    assert [e["values"]["a"] for e in done.events("t.notes")] == ["ok"]
    got = {int(q["id"]): q["_cdcnorm"] for q in done.quarantine("t.notes")}
    assert {i: base64.b64decode(q["raw_base64"]["a"]) for i, q in got.items()} == {
        i: _units(codec, *cell) for i, cell in parts.items()
    }
    assert all(q["reasons"][0]["expected"] == f"{encoding} text" for q in got.values())
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 4


def test_an_odd_last_byte_of_a_utf16_dump_is_not_read_as_a_character(convert: ConvertFn) -> None:
    # A UTF-16 file cut one byte into a unit (Python's codec: "truncated data"). The byte 0x41
    # was written back as itself and read as the letter A: a malformed record "A" (no line end
    # after the last record), or a last value with an A it does not hold. Now the record is shown as
    # its bytes, base64, and the value is quarantined with its bytes.
    head = "op,pos,id,a\nI,1,1,ok\n".encode("utf-16-le")
    with pytest.raises(UnicodeDecodeError, match="truncated data"):
        (head + b"A").decode("utf-16-le")
    mapping = PLAIN + "csv: {encoding: utf-16-le}\n"
    other = "op,pos,id,a\nI,3,3,ok\nI,2,2,cut".encode("utf-16-le") + b"A"
    done = convert(mapping, {"n1.csv": head + b"A", "n2.csv": other})
    by_file = {q["_cdcnorm"]["file"]: q["_cdcnorm"] for q in done.quarantine("t.notes")}
    assert base64.b64decode(by_file["n1.csv"]["text"]) == b"A"
    assert by_file["n1.csv"]["reasons"][0]["reason"] == (
        "expected 4 fields, found 1; not utf-16-le text (text shown base64)"
    )
    assert base64.b64decode(by_file["n2.csv"]["raw_base64"]["a"]) == "cut".encode("utf-16-le") + b"A"
    assert [e["values"]["a"] for e in done.events("t.notes")] == ["ok", "ok"]
    assert done.ledger()["balanced"] and done.ledger()["total"]["read"] == 4


@pytest.mark.parametrize(
    ("encoding", "bad"), [("utf-8", b"a\xff\xfeb"), ("cp1252", "é".encode("cp1252") + b"\x81")]
)
def test_a_malformed_record_with_bytes_that_do_not_decode_is_shown_as_its_bytes(
    convert: ConvertFn, encoding: str, bad: bytes
) -> None:
    # A record of the wrong length whose bytes do not all decode (Python's codec: the reference)
    # was shown with U+FFFD in place of each such byte: the record's bytes were lost. It is shown as
    # the base64 of its bytes, as a JSON line that is not UTF-8 is.
    with pytest.raises(UnicodeDecodeError):
        bad.decode(encoding)
    record = b"I,2,2," + bad + b",extra"
    done = convert(
        PLAIN + f"csv: {{encoding: {encoding}}}\n", {"n.csv": b"op,pos,id,a\nI,1,1,ok\n" + record + b"\n"}
    )
    (q,) = done.quarantine("t.notes")
    assert base64.b64decode(q["_cdcnorm"]["text"]) == record
    assert (
        q["_cdcnorm"]["reasons"][0]["reason"]
        == f"expected 4 fields, found 5; not {encoding} text (text shown base64)"
    )
    assert done.ledger()["balanced"]


def test_a_copy_text_record_with_a_cell_that_is_not_text_is_shown_as_its_bytes(convert: ConvertFn) -> None:
    # COPY's text format (PostgreSQL's documentation, COPY, "Text Format"): an octal escape makes the
    # record malformed; a cell of it that is not UTF-8 (Python's codec: the reference) was shown
    # as one U+FFFD, its bytes lost. The record is shown as its bytes, base64.
    bad = b"a\xffb"
    with pytest.raises(UnicodeDecodeError):
        bad.decode("utf-8")
    record = b"I\t2\t2\\101\t" + bad
    done = convert(
        PLAIN + "csv: {escapes: backslash}\n", {"n.csv": b"op\tpos\tid\ta\nI\t1\t1\tok\n" + record + b"\n"}
    )
    (q,) = done.quarantine("t.notes")
    assert base64.b64decode(q["_cdcnorm"]["text"]) == record
    assert q["_cdcnorm"]["reasons"][0]["reason"].endswith("; not UTF-8 text (text shown base64)")
    assert [e["values"]["a"] for e in done.events("t.notes")] == ["ok"]


@pytest.mark.parametrize(
    ("codec", "mark", "said", "setting"),
    [
        ("utf-16-le", b"", "UTF-16LE", "utf-16-le"),
        ("utf-16-le", b"\xff\xfe", "UTF-16LE", "utf-16-le"),
        ("utf-16-be", b"\xfe\xff", "UTF-16BE", "utf-16-be"),
        ("utf-32-le", b"", "UTF-32LE", "utf-32-le"),
    ],
)
def test_a_csv_file_in_utf16_read_as_utf8_names_its_encoding(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], codec: str, mark: bytes, said: str, setting: str
) -> None:
    # Without a byte order mark, UTF-16's NUL bytes are valid UTF-8: the header read as "o\0p\0",
    # and the run stopped on schema drift, suggesting the column "o p ". The file's encoding is told
    # (Python's codecs write it: the reference), and the setting that reads it is named; with it,
    # the file converts.
    (mdir := tmp_path / "m").mkdir()
    (mdir / "t.yaml").write_text(PLAIN)
    write_files(tmp_path / "d", {"n.csv": mark + CSV.encode(codec)})
    args = ("convert", "--mappings", str(mdir), str(tmp_path / "d"), "--out", str(tmp_path / "o"))
    assert cli(*args) == 4
    err = capsys.readouterr().err
    assert f"n.csv:1: the file is {said} text, and csv.encoding is utf-8" in err
    assert f"set csv.encoding: {setting} in the mapping" in err
    (mdir / "t.yaml").write_text(PLAIN + f"csv: {{encoding: {setting}}}\n")
    assert cli(*args, "--quiet") == 0
