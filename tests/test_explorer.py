"""The lineage explorer in a real headless browser (Chromium, driven by Playwright): load the
page written by `cdcnorm lineage --out project.html`, search a column, click one, switch an
influence kind off, and check what is highlighted against the graph's own answer (trace)."""

from __future__ import annotations

import json
import os
import shutil
import time
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import ROOT, cli

MODELS, MAPPINGS = ROOT / "examples" / "models", ROOT / "mappings"
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.fixture(scope="module")
def browser() -> Any:
    if CHROMIUM is None:
        if os.environ.get("CDCNORM_REQUIRE_BROWSER"):
            pytest.fail("Chromium is required (CDCNORM_REQUIRE_BROWSER) but not installed")
        pytest.skip("no Chromium: .ci/run installs it (Debian package chromium)")
    playwright = pytest.importorskip("playwright.sync_api")
    with playwright.sync_playwright() as p:
        b = p.chromium.launch(
            executable_path=CHROMIUM,
            args=[
                "--no-sandbox",
                "--disable-gpu",
                "--disable-background-networking",
                "--disable-component-update",
                "--disable-sync",
            ],
        )
        yield b
        b.close()


def _classes(page: Any, cls: str) -> set[str]:
    return set(page.eval_on_selector_all(f"li.col.{cls}", "els => els.map(e => e.dataset.id)"))


def test_search_click_and_influence_toggles_highlight_what_trace_says(
    browser: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "project.html"
    assert cli("lineage", "--models", str(MODELS), "--mappings", str(MAPPINGS), "--out", str(out)) == 0
    text = out.read_text()
    assert "http://" not in text and "https://" not in text  # self-contained: nothing fetched
    page = browser.new_page()
    page.goto(out.as_uri())
    page.wait_for_selector("body[data-ready='1']")
    # search a column: it is focused, what it is computed from is "up", what it feeds "down"
    page.fill("#search", "daily_revenue.total_fare")
    page.press("#search", "Enter")
    assert _classes(page, "focus") == {"model:daily_revenue.total_fare"}
    capsys.readouterr()
    assert (
        cli(
            "trace",
            "--models",
            str(MODELS),
            "--mappings",
            str(MAPPINGS),
            "daily_revenue.total_fare",
            "--json",
        )
        == 0
    )
    traced = json.loads(capsys.readouterr().out)
    up = _classes(page, "up")
    for source in traced["value"] + traced["influence"]:
        assert f"source:{source}" in up, source  # the graph's answer, highlighted
    assert "source:ferry.bookings.refunded" in up  # a filter upstream
    assert "model:route_rankings.total_fare" in _classes(page, "down")
    assert "model:stg_bookings.passenger" not in up  # a sibling is neither
    # the mapping table's card is highlighted; open it and click one of its columns
    assert "up" in (page.get_attribute(".table[data-table='source:ferry.bookings'] .head", "class") or "")
    page.click(".table[data-table='source:ferry.bookings'] .head")
    page.click("li.col[data-id='source:ferry.bookings.fare']")
    assert _classes(page, "focus") == {"source:ferry.bookings.fare"}
    assert "model:daily_revenue.total_fare" in _classes(page, "down")
    # switch filters off: the refunded flag no longer reaches the total
    page.click("li.col[data-id='model:daily_revenue.total_fare']")
    page.uncheck("input[data-kind='filter']")
    assert "source:ferry.bookings.refunded" not in _classes(page, "up")
    assert "source:ferry.bookings.fare" in _classes(page, "up")  # value lineage stays
    # where a column is defined, on hover
    title = page.get_attribute("li.col[data-id='model:daily_revenue.total_fare']", "title")
    assert title is not None and "marts/daily_revenue.sql:" in title
    page.close()


def test_the_explorer_of_200_models_opens_quickly(browser: Any, tmp_path: Path) -> None:
    import sys

    sys.path.insert(0, str(ROOT / "tests" / "bench"))
    from bench_lineage import generate

    from cdcnorm.lineage.export import export
    from cdcnorm.lineage.graph import build_project
    from cdcnorm.lineage.models import load_models

    folder = tmp_path / "models"
    folder.mkdir()
    schema = generate(folder)
    project = build_project(None, [], "duckdb", loaded=load_models(folder, "duckdb"), tables=schema)
    out = export(project.graph, tmp_path / "big.html")
    page = browser.new_page()
    started = time.perf_counter()
    page.goto(out.as_uri())
    page.wait_for_selector("body[data-ready='1']")
    opened = time.perf_counter() - started
    page.fill("#search", next(iter(project.models)) + ".id")
    page.press("#search", "Enter")
    assert len(_classes(page, "focus")) == 1
    page.close()
    print(f"explorer of {len(project.models)} models opened in {opened:.2f} s")  # figure for the README


def test_tables_without_a_schema_are_placeholder_cards(browser: Any, tmp_path: Path) -> None:
    models = tmp_path / "models"
    models.mkdir()
    (models / "fares_eur.sql").write_text(
        "SELECT b.booking_id, b.fare * r.rate AS fare_eur\n"
        "FROM ferry.bookings AS b JOIN ref.rates AS r ON r.currency = 'GBP'\n"
    )
    out = tmp_path / "p.html"
    assert cli("lineage", "--models", str(models), "--mappings", str(MAPPINGS), "--out", str(out)) == 0
    page = browser.new_page()
    page.goto(out.as_uri())
    page.wait_for_selector("body[data-ready='1']")
    cards = page.eval_on_selector_all(
        ".table.placeholder", "els => els.map(e => [e.dataset.table, getComputedStyle(e).borderStyle])"
    )
    assert cards == [["source:ref.rates", "dashed"]]  # drawn apart: its columns are inferred
    page.close()


def test_an_incomplete_graph_says_so_in_every_format(
    browser: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the command exits 11 and lists the unresolved references; the files it writes say so too, so a
    # diagram opened later is not taken for the whole lineage. Before, they showed nothing.
    models = tmp_path / "models"
    shutil.copytree(MODELS, models)
    (models / "marts" / "broken.sql").write_text(
        "SELECT b.booking_id\nFROM stg_bookings b\nWHERE b.seats >\n"
    )
    args = ("lineage", "--models", str(models), "--mappings", str(MAPPINGS), "--out")
    out = tmp_path / "p.html"
    assert cli(*args, str(out)) == 11
    page = browser.new_page()
    page.goto(out.as_uri())
    page.wait_for_selector("body[data-ready='1']")
    assert page.is_visible("#gaps summary")
    assert page.inner_text("#gaps summary") == (
        "incomplete: 1 unresolved reference: the lineage through it may be missing"
    )
    page.click("#gaps summary")  # opens the list
    listed = page.inner_text("#gaps ul")
    assert "marts/broken.sql:3: broken: parse error" in listed and page.is_visible("#gaps ul")
    assert "(incomplete: 1 unresolved reference)" in page.title()
    page.close()
    assert cli(*args, str(tmp_path / "p.json")) == 11
    graph = json.loads((tmp_path / "p.json").read_text())["graph"]
    assert [g.split(": ")[1:3] for g in graph["unresolved"]] == [["broken", "parse error"]]
    assert cli(*args, str(tmp_path / "p.dot")) == 11
    assert 'label="column lineage (incomplete: 1 unresolved reference)"' in (tmp_path / "p.dot").read_text()
    # a complete graph's page shows no such list
    clean = tmp_path / "clean.html"
    assert cli("lineage", "--models", str(MODELS), "--mappings", str(MAPPINGS), "--out", str(clean)) == 0
    page = browser.new_page()
    page.goto(clean.as_uri())
    page.wait_for_selector("body[data-ready='1']")
    assert not page.is_visible("#gaps") and "incomplete" not in page.title()
    page.close()


def test_names_from_the_project_are_shown_as_text_never_run_as_markup(browser: Any, tmp_path: Path) -> None:
    """A model file's name and a column's alias holding markup are shown as written. The wires'
    titles were built as markup from the file names (``file:line``), so a file named
    ``<img src=x onerror=...>.sql`` ran its script when the wires were drawn."""
    models = tmp_path / "models"
    models.mkdir()
    evil = "<img src=x onerror=window.__hit=1>"
    (models / f"{evil}.sql").write_text(
        f'CREATE VIEW fares AS SELECT booking_id AS "{evil}", fare FROM ferry.bookings\n'
    )
    out = tmp_path / "p.html"
    assert cli("lineage", "--models", str(models), "--mappings", str(MAPPINGS), "--out", str(out)) == 0
    page = browser.new_page()
    page.goto(out.as_uri())
    page.wait_for_selector("body[data-ready='1']")
    page.fill("#search", f"fares.{evil}")
    page.press("#search", "Enter")
    page.wait_for_timeout(300)
    titles = page.eval_on_selector_all("svg path title", "els => els.map(e => e.textContent)")
    assert f"value (copy) {evil}.sql:1" in titles  # the name, as text
    assert page.evaluate("window.__hit") is None  # and no script ran
    assert page.eval_on_selector_all("img", "els => els.length") == 0
    page.close()
