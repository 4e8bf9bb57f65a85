"""A realistic change dump for benchmarks: 13 columns, written as RFC 4180 CSV.

An invented parcel-locker operator's ``deliveries`` table, exported by a
database whose change table names every change column with a leading double
underscore. Columns: ``__$operation`` (1 delete, 2 insert, 3 before, 4 after),
``__$start_lsn`` (10-byte hex log position, ``0x`` + 20 digits),
``__$seqval`` (10-byte hex in-transaction sequence), ``__$commit_time``, then
nine content columns with quotes, commas, LF and CRLF inside quoted fields and
non-ASCII text. About 1.5 rows per change: paired updates (before and after
image), deletes, 2% overlap duplicates between the live and the archive export,
1% late rows, and a few dirty values (one row in 20,000) that must be
quarantined.

    python tests/bench/dumpgen.py ROWS FOLDER
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

MAPPING = """\
table: lockers.deliveries
files: ["deliveries-*.csv*"]
key: [delivery_id]
change:
  action: {column: "__$operation", codes: {"1": delete, "2": insert, "3": before, "4": after}}
  position: {column: "__$start_lsn", kind: hex, width: 20}
  sequence: {column: "__$seqval", kind: hex}
  committed_at: {column: "__$commit_time"}
fields:
  delivery_id: integer
  recipient: text
  locker: text
  fee: decimal(12,2)
  parcels: integer
  weight_kg: float
  dropped_at: timestamp
  state: text
  express: boolean
  note: text
"""

NAMES = np.array(
    [
        "Åsa Lindqvist",
        "Zoë Okafor",
        "Björn Ødegård",
        "Nguyễn Thị Lan",
        "Siobhán Ní Bhriain",
        "Mateus Conceição",
        "Hanna Kowalczyk",
        "Pierre-Émile Duval",
        "Yuki Tanaka",
        "Ana María Ruiz",
    ]
)
STATES = np.array(["booked", "in locker", "collected", "returned, partly", "expired"])
NOTES = np.array(
    [
        "",
        'said "ring twice"',
        "fragile",
        "leave at\nthe side door",
        "two boxes,\r\none bag",
        "call ahead",
        "Ωμέγα corridor",
        "",
    ]
)


def _hex(values: np.ndarray, digits: int) -> np.ndarray:
    """``0x`` + upper-case hex, zero padded to ``digits`` (values below 2**64)."""
    return np.char.add("0x", np.char.zfill(np.char.upper(np.char.mod("%X", values)), digits))


CHUNK = 5_000_000


def generate(rows: int, folder: Path, seed: int = 11) -> list[Path]:
    """About ``rows`` rows over overlapping live and archive files, shuffled, written in
    chunks of at most 5M rows (two files each) so that memory stays small at any size."""
    paths: list[Path] = []
    done = 0
    part = 0
    while done < rows:
        n = min(CHUNK, rows - done)
        paths += _chunk(n, folder, seed + part, first_change=int(done / 1.5), part=part)
        done += n
        part += 1
    return paths


def _chunk(rows: int, folder: Path, seed: int, first_change: int, part: int) -> list[Path]:
    rng = np.random.default_rng(seed)
    changes = max(int(rows / 1.5), 4)
    kind = rng.choice(np.array([0, 1, 2], dtype=np.int8), size=changes, p=[0.45, 0.45, 0.10])
    ids = rng.integers(1, max(changes // 2, 2), size=changes) + first_change // 2
    reps = np.where(kind == 1, 2, 1)
    c_idx = np.repeat(np.arange(changes), reps) + first_change
    first = np.ones(len(c_idx), dtype=bool)
    first[1:] = c_idx[1:] != c_idx[:-1]
    local = c_idx - first_change
    k = kind[c_idx - first_change]
    op = np.where(k == 0, "2", np.where(k == 2, "1", np.where(first, "3", "4")))
    n = len(c_idx)
    # a transaction every 4 changes: the log position of its commit, the sequence within it
    txn = c_idx // 4
    lsn = _hex(txn.astype(np.uint64) * 0x1F8 + 0x2A_0000_0000, 20)
    seq = _hex((c_idx % 4).astype(np.uint64) * 0x10 + 0x2A_0000_0000 + (c_idx // 4).astype(np.uint64), 20)
    cents = rng.integers(0, 10_000_000, size=n)
    fee = np.char.add(
        np.char.add((cents // 100).astype(str), "."), np.char.zfill((cents % 100).astype(str), 2)
    )
    secs = (1_767_225_600 + c_idx * 3).astype("datetime64[s]")
    commit = np.char.add(np.datetime_as_string(secs, unit="s").astype(str), "Z")
    dropped = np.char.add(np.datetime_as_string(secs - 86_400, unit="s").astype(str), "+01:00")
    weight = np.char.mod("%.3f", rng.random(n) * 30)
    express = rng.choice(np.array(["true", "false"]), size=n)
    # a few dirty values, one row in 20,000: they are quarantined, never emitted
    dirty = rng.random(n) < 1 / 20_000
    fee = np.where(dirty & (rng.random(n) < 0.5), "12.345", fee)
    express = np.where(dirty, "perhaps", express)
    table = pa.table(
        {
            "__$operation": op,
            "__$start_lsn": lsn,
            "__$seqval": seq,
            "__$commit_time": commit,
            "delivery_id": ids[local],
            "recipient": NAMES[ids[local] % len(NAMES)],
            "locker": np.char.add("L-", (ids[local] % 4099).astype(str)),
            "fee": fee,
            "parcels": rng.integers(1, 6, size=n),
            "weight_kg": weight,
            "dropped_at": dropped,
            "state": rng.choice(STATES, size=n),
            "express": express,
            "note": rng.choice(NOTES, size=n),
        }
    )
    # out of order: shuffled; 1% of rows arrive late (moved to the very end)
    order = rng.permutation(n)
    late = rng.random(n) < 0.01
    order = np.concatenate([order[~late], order[late]])
    table = table.take(pa.array(order))
    overlap = int(n * 0.02)
    cut = n // 2
    suffix = f"-{part}" if part else ""
    paths = [folder / f"deliveries-live{suffix}.csv", folder / f"deliveries-archive{suffix}.csv"]
    opts = pacsv.WriteOptions(quoting_style="needed")
    pacsv.write_csv(table.slice(0, cut + overlap), paths[0], write_options=opts)
    pacsv.write_csv(table.slice(cut), paths[1], write_options=opts)
    return paths


def write_mapping(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "deliveries.yaml"
    path.write_text(MAPPING, encoding="utf-8")
    return path


if __name__ == "__main__":
    out = Path(sys.argv[2])
    out.mkdir(parents=True, exist_ok=True)
    for p in generate(int(sys.argv[1]), out):
        print(p, p.stat().st_size)
