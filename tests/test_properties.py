"""Invariants under any input (Hypothesis): order independence, idempotence, a balanced ledger,
and replaying the events of a change log giving the table's final state."""

from __future__ import annotations

import csv
import io
import json
import random
import tempfile
from decimal import Decimal
from pathlib import Path
from typing import Any

from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, run
from tests.conftest import landing_outputs, last_run

MAPPING = """
table: t.moorings
files: ["m-*.csv"]
key: [id]
change:
  action: {column: op, codes: {I: insert, B: before, A: after, D: delete, S: snapshot}}
  position: {column: pos, kind: hex-pair}
  sequence: {column: seq, kind: integer}
fields:
  id: integer
  fee: decimal(6,2)
  name: text
"""

fee = st.one_of(
    st.decimals(min_value=-9999, max_value=9999, places=2, allow_nan=False).map(str),
    st.sampled_from(["1.005", "abc", "", "1E+2", "99999"]),
)
row = st.fixed_dictionaries(
    {
        "op": st.sampled_from(["I", "B", "A", "D", "S", "X"]),
        "pos": st.one_of(
            st.tuples(st.integers(0, 3), st.integers(0, 2**32 - 1)).map(lambda t: f"{t[0]:X}/{t[1]:x}"),
            st.sampled_from(["0/1", "0/2", "zz"]),
        ),
        "seq": st.sampled_from(["0", "1", "2"]),
        "id": st.sampled_from(["1", "2", "3", "", "x"]),
        "fee": fee,
        "name": st.text(alphabet='ab ,"\n', max_size=4),
    }
)
dumps = st.lists(st.lists(row, min_size=0, max_size=12), min_size=1, max_size=3)
# Each example runs a whole conversion: no shrinking phase, to keep the suite inside its time budget.
SETTINGS = settings(
    max_examples=25,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
    phases=[Phase.explicit, Phase.reuse, Phase.generate],
)


def _csv(rows: list[dict[str, str]]) -> str:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=["op", "pos", "seq", "id", "fee", "name"], lineterminator="\n")
    w.writeheader()
    w.writerows(rows)
    return buf.getvalue()


def _convert(files: list[tuple[str, str]]) -> tuple[dict[str, bytes], dict[str, Any]]:
    with tempfile.TemporaryDirectory() as d:
        base = Path(d)
        (base / "maps").mkdir()
        (base / "maps" / "m.yaml").write_text(MAPPING)
        paths = []
        for name, text in files:
            p = base / name
            p.write_text(text, encoding="utf-8")
            paths.append(p)
        out = base / "out"
        run(load_mappings(base / "maps"), paths, Options(out=out))
        outputs = landing_outputs(out)
        ledger = last_run(out)["ledger"]
    return outputs, ledger


def _without_origin(events: bytes) -> list[str]:
    out = []
    for line in events.decode().splitlines():
        e = json.loads(line)
        e.pop("origin")
        out.append(json.dumps(e, sort_keys=True))
    return out


@SETTINGS
@given(dumps, st.randoms(use_true_random=False))
def test_file_order_and_row_order_do_not_change_the_output(
    parts: list[list[dict[str, str]]], rnd: random.Random
) -> None:
    files = [(f"m-{i}.csv", _csv(rows)) for i, rows in enumerate(parts)]
    first, _ = _convert(files)
    shuffled = files[:]
    rnd.shuffle(shuffled)
    second, _ = _convert(shuffled)
    assert first == second  # byte-identical whatever the order of the input files
    reordered = [
        (name, _csv(rnd.sample(rows, len(rows)))) for (name, _), rows in zip(files, parts, strict=True)
    ]
    third, _ = _convert(reordered)
    key = "events/t.moorings.jsonl"
    # rows moved inside their files: the same events in the same order; only origin row numbers move
    assert _without_origin(first.get(key, b"")) == _without_origin(third.get(key, b""))


@SETTINGS
@given(st.lists(row, min_size=1, max_size=15))
def test_feeding_a_dump_twice_changes_nothing_but_the_duplicate_count(rows: list[dict[str, str]]) -> None:
    text = _csv(rows)
    once, led1 = _convert([("m-a.csv", text)])
    twice, led2 = _convert([("m-a.csv", text), ("m-b.csv", text)])
    key = "events/t.moorings.jsonl"
    assert once.get(key) == twice.get(key)  # the copy from m-a.csv is kept: even the origins agree
    t1, t2 = led1["total"], led2["total"]
    # every row of the second copy is a duplicate or, like its twin, quarantined; nothing else moves
    assert t2["read"] == 2 * t1["read"]
    assert t2["duplicate"] + t2["quarantined"] == t1["duplicate"] + t1["quarantined"] + t1["read"]
    assert t2["duplicate"] >= t1["duplicate"] + t1["emitted"] + t1["merged"] + t1["pending"]
    assert t2["emitted"] == t1["emitted"] and t2["merged"] == t1["merged"] and t2["pending"] == t1["pending"]


@SETTINGS
@given(dumps)
def test_the_ledger_always_balances(parts: list[list[dict[str, str]]]) -> None:
    _, ledger = _convert([(f"m-{i}.csv", _csv(rows)) for i, rows in enumerate(parts)])
    assert ledger["balanced"]
    for name, t in ledger["tables"].items():
        for fname, c in t["files"].items():
            flow = c["emitted"] + c["merged"] + c["duplicate"] + c["quarantined"] + c["pending"]
            assert c["read"] + c["pending_in"] == flow, (name, fname)
        assert t["total"]["emitted"] == t["total"]["upserts"] + t["total"]["deletes"]


ops = st.lists(
    st.tuples(
        st.sampled_from(["insert", "update", "rekey", "delete"]),
        st.integers(0, 9),
        st.decimals(0, 999, places=2),
    ),
    min_size=1,
    max_size=30,
)


def _log(operations: list[tuple[str, int, Any]]) -> tuple[list[dict[str, str]], dict[int, str]]:
    """Apply operations to a table; return its change log (paired updates) and its final state."""
    state: dict[int, str] = {}
    log: list[dict[str, str]] = []
    next_id = 100
    for pos, (op, pick, fee_value) in enumerate(operations, start=1):
        keys = sorted(state)
        lsn = f"{pos >> 4:X}/{pos * 16:X}"
        row = {"seq": "0", "name": "n"}
        if op == "insert" or not keys:
            next_id += 1
            state[next_id] = str(fee_value)
            log.append({**row, "op": "I", "pos": lsn, "id": str(next_id), "fee": str(fee_value)})
            continue
        key = keys[pick % len(keys)]
        if op == "delete":
            log.append({**row, "op": "D", "pos": lsn, "id": str(key), "fee": state.pop(key)})
        elif op == "update":
            log.append({**row, "op": "B", "pos": lsn, "id": str(key), "fee": state[key]})
            state[key] = str(fee_value)
            log.append({**row, "op": "A", "pos": lsn, "id": str(key), "fee": state[key]})
        else:
            next_id += 1
            log.append({**row, "op": "B", "pos": lsn, "id": str(key), "fee": state[key]})
            state[next_id] = state.pop(key)
            log.append({**row, "op": "A", "pos": lsn, "id": str(next_id), "fee": state[next_id]})
    return log, state


@SETTINGS
@given(ops, st.randoms(use_true_random=False))
def test_replaying_the_events_gives_the_final_state(
    operations: list[tuple[str, int, Any]], rnd: random.Random
) -> None:
    log, state = _log(operations)
    # two overlapping exports, each shuffled (common practice: the live feed and its archive)
    cut = rnd.randint(0, len(log))
    overlap = rnd.randint(0, len(log) - cut)
    first, second = log[: cut + overlap], log[cut:]
    rnd.shuffle(first)
    rnd.shuffle(second)
    outputs, ledger = _convert([("m-live.csv", _csv(first)), ("m-archive.csv", _csv(second))])
    replayed: dict[int, str] = {}
    for line in outputs["events/t.moorings.jsonl"].decode().splitlines():
        e = json.loads(line)
        if e["action"] == "upsert":
            replayed[e["key"]["id"]] = e["values"]["fee"]
        else:
            del replayed[e["key"]["id"]]
    assert replayed == {k: str(Decimal(v).quantize(Decimal("0.01"))) for k, v in state.items()}
    assert ledger["total"]["quarantined"] == 0 and ledger["balanced"]
    assert ledger["total"]["read"] - ledger["total"]["duplicate"] == len(log)


MIXED = """
table: t.fares
files: ["f-*.csv"]
key: [id]
change:
  action: {column: op, codes: {I: insert, D: delete}}
  position: {column: pos, kind: integer}
fields:
  id: integer
  fee: decimal(6,2)
  day: date
"""

# (raw text, valid?) by construction; Python's decimal and datetime confirm each in the test
good_fee = st.decimals(min_value=-9999, max_value=9999, places=2, allow_nan=False).map(
    lambda d: (str(d), True)
)
bad_fee = st.sampled_from(
    [("1.005", False), ("abc", False), ("1e400", False), ("12345.6", False), ("1,5", False)]
)
good_day = st.dates(min_value=__import__("datetime").date(1, 1, 1)).map(lambda d: (d.isoformat(), True))
bad_day = st.sampled_from(
    [("2024-02-30", False), ("2023-13-01", False), ("01/02/2024", False), ("2024-2-3", False)]
)
mixed_row = st.tuples(
    st.sampled_from(["I", "D"]), st.integers(1, 6), st.one_of(good_fee, bad_fee), st.one_of(good_day, bad_day)
)


@SETTINGS
@given(st.lists(mixed_row, min_size=1, max_size=30), st.randoms(use_true_random=False), st.integers(1, 3))
def test_good_and_bad_rows_in_random_files_are_never_lost_or_changed(
    rows: list[tuple[str, int, tuple[str, bool], tuple[str, bool]]], rnd: random.Random, n_files: int
) -> None:
    from datetime import date
    from decimal import InvalidOperation

    def fee_ok(raw: str) -> bool:  # Python's decimal: a number with at most 2 places, below 10**4
        try:
            d = Decimal(raw)
        except InvalidOperation:
            return False
        return abs(d) < 10**4 and d == d.quantize(Decimal("0.01")) and "," not in raw

    def day_ok(raw: str) -> bool:  # Python's datetime: an ISO 8601 calendar date YYYY-MM-DD
        try:
            return len(raw) == 10 and date.fromisoformat(raw) is not None
        except ValueError:
            return False

    for _, _, (fee, f_valid), (day, d_valid) in rows:
        assert fee_ok(fee) == f_valid and day_ok(day) == d_valid
    numbered = [(i + 1, r) for i, r in enumerate(rows)]  # position = row number: one change each
    rnd.shuffle(numbered)
    files: dict[str, list[tuple[int, Any]]] = {}
    for item in numbered:
        files.setdefault(f"f-{rnd.randrange(n_files)}.csv", []).append(item)
    with tempfile.TemporaryDirectory() as d:
        base = Path(d)
        (base / "m").mkdir()
        (base / "m" / "t.yaml").write_text(MIXED)
        written = {}
        for name, items in files.items():
            buf = io.StringIO()
            w = csv.writer(buf, lineterminator="\n")
            w.writerow(["op", "pos", "id", "fee", "day"])
            for pos, (op, key, (fee, _), (day, _)) in items:
                w.writerow([op, pos, key, fee, day])
            (base / name).write_text(buf.getvalue(), encoding="utf-8")
            written[name] = items
        result = run(load_mappings(base / "m"), [base / n for n in files], Options(out=base / "out"))
        assert result.ledger.balanced
        events = {
            (e["origin"]["file"], e["origin"]["row"]): e
            for p in (base / "out" / "events" / "t.fares").glob("*.jsonl")
            for e in map(json.loads, p.read_text(encoding="utf-8").splitlines())
        }
        quarantined = {
            (q["_cdcnorm"]["file"], q["_cdcnorm"]["row"]): q
            for p in (base / "out" / "quarantine" / "t.fares").glob("*.jsonl")
            for q in map(json.loads, p.read_text(encoding="utf-8").splitlines())
        }
        assert not set(events) & set(quarantined)  # one fate per row
        seen = 0
        for name, items in written.items():
            for row, (pos, (op, key, (fee, f_valid), (day, d_valid))) in enumerate(items, start=1):
                seen += 1
                if f_valid and d_valid:
                    e = events[(name, row)]  # never lost
                    assert e["key"] == {"id": key} and e["action"] == ("upsert" if op == "I" else "delete")
                    if op == "I":  # never changed: the exact value, by Python's decimal and datetime
                        assert Decimal(e["values"]["fee"]) == Decimal(fee)
                        assert e["values"]["fee"] == str(Decimal(fee).quantize(Decimal("0.01")))
                        assert date.fromisoformat(e["values"]["day"]) == date.fromisoformat(day)
                else:
                    q = quarantined[(name, row)]  # kept with its raw text, exactly
                    assert (q["op"], q["pos"], q["id"], q["fee"], q["day"]) == (
                        op,
                        str(pos),
                        str(key),
                        fee,
                        day,
                    )
        assert seen == len(rows) == len(events) + len(quarantined)


TEXTUAL = """
table: t.logbook
files: ["l-*.csv"]
key: [id]
change:
  action: {column: op, codes: {I: insert}}
  position: {column: pos, kind: text}
  sequence: {column: seq, kind: text}
fields:
  id: integer
"""

position_text = st.text(alphabet=st.sampled_from(list("a-./0Z~ é€😀")), min_size=1, max_size=5)


@SETTINGS
@given(st.lists(st.tuples(position_text, position_text), min_size=1, max_size=25, unique=True))
def test_text_positions_sort_in_the_byte_order_of_their_texts(pairs: list[tuple[str, str]]) -> None:
    """Whatever the texts, plain byte order of ``position`` is the order of (position, sequence) by
    their UTF-8 bytes (Python's bytes order), the sequence breaking ties: 'a' before 'a-'."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["op", "pos", "seq", "id"])
    for i, (pos, seq) in enumerate(pairs, start=1):
        w.writerow(["I", pos, seq, i])
    with tempfile.TemporaryDirectory() as d:
        base = Path(d)
        (base / "m").mkdir()
        (base / "m" / "t.yaml").write_text(TEXTUAL)
        (base / "l-1.csv").write_text(buf.getvalue(), encoding="utf-8")
        run(load_mappings(base / "m"), [base / "l-1.csv"], Options(out=base / "out"))
        (path,) = (base / "out" / "events" / "t.logbook").glob("*.jsonl")
        events = [json.loads(x) for x in path.read_text(encoding="utf-8").splitlines()]
    by_bytes = sorted(events, key=lambda e: e["position"].encode())
    expected = sorted(
        range(1, len(pairs) + 1), key=lambda i: (pairs[i - 1][0].encode(), pairs[i - 1][1].encode())
    )
    assert [e["key"]["id"] for e in by_bytes] == expected
    assert [e["key"]["id"] for e in events] == expected  # the file is written in that order too
