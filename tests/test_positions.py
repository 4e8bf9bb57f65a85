"""Log positions: the normalised text's byte order must be the log order."""

from __future__ import annotations

import random

from tests.conftest import ConvertFn


def _positions(
    convert: ConvertFn, kind: str, raw: list[str], extra: str = ""
) -> tuple[list[str], dict[str, str]]:
    mapping = f"""
    table: t.pos
    files: ["p*.csv"]
    key: [id]
    change:
      action: {{column: op, codes: {{I: insert}}}}
      position: {{column: pos, kind: {kind}{extra}}}
    fields:
      id: integer
      raw: text
    """
    shuffled = list(enumerate(raw))
    random.Random(3).shuffle(shuffled)
    rows = "".join(f"I,{p},{i},{p}\n" for i, p in shuffled)
    done = convert(mapping, {"p.csv": "op,pos,id,raw\n" + rows})
    order = [e["values"]["raw"] for e in done.events("t.pos")]
    bad = {q["raw"]: q["_cdcnorm"]["reasons"][0]["reason"] for q in done.quarantine("t.pos")}
    return order, bad


def test_hex_pair_order_from_postgresql_manual(convert: ConvertFn) -> None:
    # PostgreSQL manual, pg_lsn type: two hex numbers of up to 8 digits, value (hi << 32) | lo.
    # Worked order run on a server (shared reference values): 0/0 < 9/FFFFFFFF < A/0 < 10/0 <
    # 16/B374D85 < 16/B374D848, although 16/B374D85 sorts higher as raw text.
    expected = ["0/0", "9/FFFFFFFF", "A/0", "10/0", "16/B374D85", "16/B374D848"]
    assert sorted(expected) != expected  # raw text order is wrong
    order, bad = _positions(convert, "hex-pair", [*expected, "16/", "/1", "100000000/0", "-1/0"])
    assert order == expected
    assert set(bad) == {"16/", "/1", "100000000/0", "-1/0"}
    assert set(bad.values()) == {"malformed position"}
    # the value rule (hi << 32) | lo orders them the same way
    values = [int(h, 16) << 32 | int(lo, 16) for h, lo in (p.split("/") for p in expected)]
    assert values == sorted(values)
    assert values[-1] - values[-2] == 2822605507  # difference stated in the reference values (run)


def test_hex_byte_string_positions_any_case(convert: ConvertFn) -> None:
    # A 10-byte log sequence number orders as unsigned big-endian bytes (common practice):
    # compare fixed-width hex of one case, not raw text of mixed case or width.
    raw = ["0x0000002A000001F80003", "0000002a000001f80004", "2A000001F80005", "0x0000002B00000000000A"]
    # leading zeros do not count towards the width; significant digits do
    padded = "0x" + "0" * 40 + "2C00000000000001"
    too_wide = ["0x" + "F" * 21, "000" + "1" * 21, "0x"]
    order, bad = _positions(convert, "hex", [*raw, padded, "0xZZ", *too_wide], ", width: 20")
    assert order == [*raw, padded]
    assert set(bad) == {"0xZZ", *too_wide}


def test_integer_positions_are_numeric_not_text(convert: ConvertFn) -> None:
    raw = ["9", "10", "99", "100", str(2**64 - 1)]
    order, bad = _positions(convert, "integer", [*raw, str(2**64), "-1", "1.5"])
    assert order == raw
    assert set(bad) == {str(2**64), "-1", "1.5"}


def test_timestamp_positions_across_offsets(convert: ConvertFn) -> None:
    # RFC 3339 section 4.2: 18:50:00-04:00 is the same instant as 22:50:00Z
    # 23:00:00+00:15 is 22:45Z and 18:49:59-04:00 is 22:49:59Z: raw text order is the reverse
    raw = ["2026-03-01T23:00:00+00:15", "2026-03-01T18:49:59-04:00", "2026-03-01T22:50:00.5Z"]
    order, _ = _positions(convert, "timestamp", raw)
    assert order == raw and sorted(raw) != raw
