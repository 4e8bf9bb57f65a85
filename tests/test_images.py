"""Records that hold both images of their change (``change.images``): an update's before-image is
its prior, a delete's is its key and last image, an update whose before-image has another key is a
key change. The same changes written as separate before and after rows (``updates: paired``, the
way it was already converted) are the oracle: the events must be the same but for ``origin``, as
must the events of one feed written as JSON Lines, Parquet and CSV."""

from __future__ import annotations

import csv
import io
import json
import shutil
import tempfile
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cdcnorm.mapping import load_mappings
from cdcnorm.pipeline import Options, run
from tests.conftest import ROOT, Converted, cli

CASE = ROOT / "tests" / "cases" / "pair" / "both-images"

IMAGES = """\
table: t.stock
files: ["s-*"]
key: [id]
change:
  action: {column: op, codes: {c: insert, u: after, d: delete}}
  position: {column: pos, kind: integer}
  images: {before: before, after: after}
fields:
  id: integer
  name: text
  qty: integer
"""

# the same table with its updates as a before row and an after row at one position
PAIRED = IMAGES.replace(
    "{c: insert, u: after, d: delete}", "{I: insert, B: before, A: after, D: delete}"
).replace("  images: {before: before, after: after}\n", "")


def _events(mapping: str, name: str, text: str) -> list[dict[str, Any]]:
    """The events of one dump, converted through the library, without their origin."""
    with tempfile.TemporaryDirectory() as tmp:
        base = Path(tmp)
        (base / "m").mkdir()
        (base / "m" / "t.yaml").write_text(mapping)
        (base / name).write_text(text)
        result = run(load_mappings(base / "m"), [base / name], Options(out=base / "area"))
        assert result.ledger.balanced
        events = Converted(base / "area", 0).events("t.stock")
    for e in events:
        del e["origin"]
    return events


@st.composite
def _changes(draw: st.DrawFn) -> list[tuple[str, dict[str, Any] | None, dict[str, Any] | None]]:
    """A source table's changes, as (op, before, after), from its real states: inserts of free keys,
    updates (some changing the key), deletes."""
    table: dict[int, dict[str, Any]] = {}
    out: list[tuple[str, dict[str, Any] | None, dict[str, Any] | None]] = []
    for _ in range(draw(st.integers(1, 12))):
        free = [k for k in range(1, 6) if k not in table]
        kinds = (["insert"] if free else []) + (["update", "delete"] if table else [])
        kinds += ["rekey"] if table and free else []
        kind = draw(st.sampled_from(kinds))
        row = {"name": draw(st.sampled_from(["bolt", "nut", "", None])), "qty": draw(st.integers(-3, 3))}
        if kind == "insert":
            key = draw(st.sampled_from(free))
            table[key] = {"id": key, **row}
            out.append(("c", None, dict(table[key])))
            continue
        key = draw(st.sampled_from(sorted(table)))
        before = dict(table[key])
        if kind == "delete":
            del table[key]
            out.append(("d", before, None))
        else:
            new = draw(st.sampled_from(free)) if kind == "rekey" else key
            del table[key]
            table[new] = {"id": new, **row}
            out.append(("u", before, dict(table[new])))
    return out


def _cell(v: Any) -> str:
    return "" if v is None else f'"{v}"' if v == "" else str(v)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_changes())
def test_one_record_with_both_images_gives_the_events_of_separate_before_and_after_rows(
    changes: list[tuple[str, dict[str, Any] | None, dict[str, Any] | None]],
) -> None:
    lines = "".join(
        json.dumps({"op": op, "pos": pos, "before": b, "after": a}) + "\n"
        for pos, (op, b, a) in enumerate(changes, start=1)
    )
    rows = ["op,pos,id,name,qty"]
    for pos, (op, b, a) in enumerate(changes, start=1):
        image = {"c": [("I", a)], "u": [("B", b), ("A", a)], "d": [("D", b)]}[op]
        for code, values in image:
            assert values is not None
            rows.append(",".join([code, str(pos), *(_cell(values[f]) for f in ("id", "name", "qty"))]))
    assert _events(IMAGES, "s-1.jsonl", lines) == _events(PAIRED, "s-1.csv", "\n".join(rows) + "\n")


def test_the_case_gives_the_same_events_as_json_lines_parquet_and_csv(tmp_path: Path) -> None:
    records = [json.loads(x) for x in (CASE / "dumps" / "tools-1.jsonl").read_text().splitlines()]
    image = pa.struct([("id", pa.int64()), ("name", pa.string()), ("price", pa.string())])
    both = {"before": image, "after": image}
    table = pa.table(
        {
            "op": [r["op"] for r in records],
            **{side: pa.array([r[side] for r in records], kind) for side, kind in both.items()},
            "source": pa.array([r["source"] for r in records]),
        }
    )
    dumps = {f: tmp_path / f for f in ("jl", "pq", "csv")}
    for d in dumps.values():
        d.mkdir()
    shutil.copy(CASE / "dumps" / "tools-1.jsonl", dumps["jl"])
    pq.write_table(table, dumps["pq"] / "tools-1.parquet")
    flat = io.StringIO()
    w = csv.writer(flat)
    sides = [f"{s}.{f}" for s in ("before", "after") for f in ("id", "name", "price")]
    w.writerow(["op", "source.lsn", "source.ts", *sides])
    for r in records:
        cells = [(r[s.split(".")[0]] or {}).get(s.split(".")[1]) for s in sides]
        w.writerow([r["op"], r["source"]["lsn"], r["source"]["ts"], *("" if c is None else c for c in cells)])
    (dumps["csv"] / "tools-1.csv").write_text(flat.getvalue())
    mappings = tmp_path / "m"
    mappings.mkdir()
    (mappings / "t.yaml").write_text((CASE / "mapping.yaml").read_text().replace("tools-*.jsonl", "tools-*"))
    seen = []
    for kind, d in dumps.items():
        assert (
            cli(
                "convert",
                str(d),
                "--mappings",
                str(mappings),
                "--out",
                str(tmp_path / f"a-{kind}"),
                "--quiet",
            )
            == 0
        )
        events = Converted(tmp_path / f"a-{kind}", 0).events("depot.tools")
        seen.append([{k: v for k, v in e.items() if k != "origin"} for e in events])
    assert seen[0] == seen[1] == seen[2] and len(seen[0]) == 10


@pytest.mark.parametrize(
    ("edit", "said"),
    [
        ("  images: {before: before, after: after}\n", "updates does not apply with images"),
        ("u: after", "action code 'u' is a before-image"),
        ("  name: text", "field name lists alternatives in from"),
        ("before: before, after: after", "before and after name one member"),
    ],
    ids=["updates too", "a before code", "a from list", "one member"],
)
def test_what_images_does_not_take_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], edit: str, said: str
) -> None:
    text = (CASE / "mapping.yaml").read_text()
    replace = {
        "  images: {before: before, after: after}\n": "  images: {before: before, after: after}\n  updates: after-only\n",
        "u: after": "u: before",
        "  name: text": "  name: {from: [name, title], type: text}",
        "before: before, after: after": "before: image, after: image",
    }
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "t.yaml").write_text(text.replace(edit, replace[edit]))
    capsys.readouterr()
    assert cli("check", str(CASE / "dumps"), "--mappings", str(tmp_path / "m")) == 3
    assert said in capsys.readouterr().err
