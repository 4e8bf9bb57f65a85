"""The identity index's content digests are stored in landing areas and compared by every later
run: they must not change between versions (of cdcnorm or of its engine) without a new index
version. These digests were recorded from the output of index format 1 (which stored them as hex) and
are the same in format 2; if this test fails after an
upgrade, stored landing areas would see their own repeats as conflicting versions."""

from __future__ import annotations

import pyarrow.parquet as pq

from tests.conftest import ConvertFn, run_files

MAPPING = """
table: t.digest
files: ["d*"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: hex, width: 20}
  committed_at: {column: at}
fields:
  id: integer
  name: text
  fee: decimal(12,2)
  weight: float
  seen: timestamp
  ok: boolean
"""

DUMP = (
    "op,pos,at,id,name,fee,weight,seen,ok\n"
    'I,0A,2026-03-01T10:00:00Z,1,Åsa "quoted",12.50,0.1,2026-03-01T09:59:59.123456Z,true\n'
    "I,0B,2026-03-01T10:00:01+02:00,2,,-0.01,1e300,2026-02-28 23:00:00,false\n"
    "I,0C,2026-03-01T10:00:02Z,3,a\\nb,,-0.0,,\n"
)

#: (position text, digest) per emitted row, recorded from this version's landing area.
RECORDED = [
    ("0000000000000000000A", "15A7AC8E2EE77CE0516D964293947E38"),
    ("0000000000000000000B", "3586D88A8192D668D54B98BDB686F342"),
    ("0000000000000000000C", "11872DDAD5AAF7A99EE1421891C03CA4"),
]


def test_stored_digests_do_not_change(convert: ConvertFn) -> None:
    done = convert(MAPPING, {"d.csv": DUMP})
    assert done.ledger()["total"]["emitted"] == 3 and done.quarantine("t.digest") == []
    (index,) = run_files(done.out, "index/emitted", "t.digest")
    rows = pq.read_table(index).to_pylist()
    # format 2 keeps 128-bit numbers as two unsigned 64-bit halves
    got = [
        (f"{r['__pos_hi'] << 64 | r['__pos_lo']:020X}", f"{r['__digest_hi'] << 64 | r['__digest_lo']:032X}")
        for r in rows
    ]
    assert got == RECORDED


OTHER_TYPES = """
table: t.digest2
files: ["e*"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: integer}
fields:
  id: integer
  day: date
  at: time
  ref: uuid
  blob: bytes
  doc: json
"""

OTHER_DUMP = (
    "op,pos,id,day,at,ref,blob,doc\n"
    'I,1,1,2026-03-01,10:00:00.5,0190F4B2-7C1D-7A3E-9F00-1234567890AB,00ff10,"{""a"": [1.50, 1e2, null], ""b"": ""x""}"\n'
    "I,2,2,0001-01-01,23:59:59-04:00,,,\n"
)

#: (position text, digest) per emitted row, recorded from this version's landing area (the digest is
#: computed as in index format 1; format 2 only stores it differently).
OTHER_RECORDED = [
    ("00000000000000000001", "5553FA597F29260090378B2705844564"),
    ("00000000000000000002", "C699D4CA96FE70DA4EC507C74F409396"),
]


def test_stored_digests_of_the_other_types_do_not_change(convert: ConvertFn) -> None:
    done = convert(OTHER_TYPES, {"e.csv": OTHER_DUMP})
    assert done.ledger()["total"]["emitted"] == 2 and done.quarantine("t.digest2") == []
    (index,) = run_files(done.out, "index/emitted", "t.digest2")
    rows = pq.read_table(index).to_pylist()
    got = [(r["__pos"], f"{r['__digest_hi'] << 64 | r['__digest_lo']:032X}") for r in rows]
    assert got == OTHER_RECORDED
