"""Status pages: headless Chromium loads the overview and a series page; sorting, filters, paging.

Outside references: Debian's Chromium driven by Playwright renders the pages (skipped with a
reason when /usr/bin/chromium is missing); the rows the overview must show are those of
`aftercast status --json` (horizon "all"); sort order and label filters are checked against
pandas doing the same on those rows and on the series file; HTML escaping follows the HTML
standard's rule that text must not open tags (the markup series id from tests/servers.py).
"""

from __future__ import annotations

import contextlib
import io
import json
from collections.abc import Iterator
from html.parser import HTMLParser
from pathlib import Path
from typing import Any
from urllib.parse import quote

import pandas as pd
import pytest
import requests

from aftercast.cli import main
from aftercast.matching import match
from aftercast.periods import parse_instant
from aftercast.web.app import create_app
from tests.servers import NASTY_SERIES_ID
from tests.test_web import AUTH, NOW, Fleet, LiveServer, daily_rows, seeded_store

CHROMIUM = Path("/usr/bin/chromium")
ODD_ID = f"shop-999/{NASTY_SERIES_ID}"


class TableRows(HTMLParser):
    """Cell texts of each body row of the table with a given id."""

    def __init__(self, table_id: str) -> None:
        super().__init__()
        self.table_id = table_id
        self.rows: list[list[str]] = []
        self._depth = 0
        self._cell: str | None = None
        self._in_body = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "table" and ("id", self.table_id) in attrs:
            self._depth = 1
        elif self._depth and tag == "tbody":
            self._in_body = True
        elif self._in_body and tag == "tr":
            self.rows.append([])
        elif self._in_body and tag in ("td", "th"):
            self._cell = ""

    def handle_endtag(self, tag: str) -> None:
        if self._in_body and tag in ("td", "th") and self._cell is not None:
            self.rows[-1].append(self._cell.strip())
            self._cell = None
        elif tag == "tbody":
            self._in_body = False
        elif tag == "table":
            self._depth = 0

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell += data


def table(html: str, table_id: str = "fleet") -> list[list[str]]:
    parser = TableRows(table_id)
    parser.feed(html)
    return parser.rows


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Fleet]:
    folder = Path(tmp_path_factory.mktemp("pages"))
    engine, config = seeded_store(folder)
    with LiveServer(create_app(engine, config)) as live:
        rows, actuals = daily_rows(ODD_ID, 7, lambda d: 9 + d % 3)
        for kind, body in (("forecasts", rows), ("actuals", actuals)):
            answer = requests.post(f"{live.url}/v1/{kind}", json=body, headers=AUTH, timeout=10)
            assert answer.json()["accepted"] == 7
        match(engine, parse_instant(NOW))
        config_path = folder / "c.yaml"
        config_path.write_text(f"store: {{url: '{config.store.url}'}}\n", encoding="utf-8")
        yield Fleet(engine, config, folder, live.url, [])
    engine.dispose()


def overview(site: Fleet, **params: Any) -> list[list[str]]:
    """The fleet table's rows of the overview page asked with `params` (at NOW)."""
    answer = requests.get(f"{site.url}/", params={"now": NOW, **params}, timeout=10)
    assert answer.status_code == 200
    return table(answer.text)


def status_rows(site: Fleet) -> pd.DataFrame:
    out = io.StringIO()
    config_path = site.folder / "c.yaml"
    with contextlib.redirect_stdout(out):
        assert main(["--config", str(config_path), "status", "--json", "--now", NOW]) == 0
    rows = pd.DataFrame(json.loads(out.getvalue()))
    # The overview leaves out aftercast's own benchmark forecasts unless asked (benchmarks=1).
    return rows[(rows["horizon"] == "all") & ~rows["model"].str.startswith("benchmark:")]


def test_overview_lists_the_status_rows_sorted_and_paged(site: Fleet) -> None:
    expected = status_rows(site)
    shown = {(r[0], r[1]) for r in overview(site, per_page=500)}
    assert shown == set(zip(expected["series_id"], expected["model"], strict=True))

    order = [(r[0], r[1]) for r in overview(site, sort="mae", order="desc", per_page=500)]
    by_pandas = expected.sort_values(["mae", "series_id", "model"], ascending=[False, True, True])
    assert order == list(zip(by_pandas["series_id"], by_pandas["model"], strict=True))

    first = {(r[0], r[1]) for r in overview(site, per_page=10)}
    second = {(r[0], r[1]) for r in overview(site, per_page=10, page=2)}
    assert len(first) == 10 and not first & second and len(first | second) == len(expected)


def test_label_filter_matches_the_series_file(site: Fleet) -> None:
    series = pd.read_csv(site.folder / "data" / "series.csv")
    north = set(series.loc[series["label_region"] == "north", "series_id"])
    assert {r[0] for r in overview(site, label="region:north", per_page=500)} == north


def test_markup_in_a_series_id_is_escaped_and_its_page_is_reachable(site: Fleet) -> None:
    overview = requests.get(f"{site.url}/", params={"now": NOW, "q": "shop-999"}, timeout=10)
    assert NASTY_SERIES_ID not in overview.text  # never as live markup
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in overview.text
    page = requests.get(
        f"{site.url}/series/{quote(ODD_ID, safe='/')}", params={"now": NOW}, timeout=10
    )
    assert page.status_code == 200 and "<script>" not in page.text
    assert [r[0] for r in table(page.text, "windows")] == ["1", "all"]
    missing = requests.get(f"{site.url}/series/no/such/series", timeout=10)
    assert missing.status_code == 404


@pytest.mark.skipif(
    not CHROMIUM.exists(),
    reason="Debian's chromium is not installed at "
    "/usr/bin/chromium (apt-get install chromium); no browser is downloaded",
)
def test_chromium_loads_the_overview_and_a_series_page(site: Fleet, tmp_path: Path) -> None:
    from playwright.sync_api import sync_playwright

    expected = status_rows(site)
    outside: list[str] = []
    with sync_playwright() as playwright:
        browser = playwright.chromium.launch(
            executable_path=str(CHROMIUM),
            args=[
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-background-networking",
                "--disable-dev-shm-usage",
            ],
        )
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 900})
            page.on(
                "request",
                lambda r: outside.append(r.url) if not r.url.startswith(site.url) else None,
            )
            page.goto(f"{site.url}/?now={NOW}&per_page=100")
            rows = page.locator("#fleet tbody tr")
            assert rows.count() == len(expected)
            assert page.locator("#row-count").inner_text().startswith(f"{len(expected)} rows")
            page.screenshot(path=str(tmp_path / "overview.png"), full_page=True)

            first = sorted(expected["series_id"])[0]
            page.locator("#fleet tbody th a", has_text=first).first.click()
            page.wait_for_selector("#band-chart svg")
            assert page.locator("#series-title").inner_text() == first
            for chart in ("#band-chart svg", "#error-chart svg", "#pit-chart svg"):
                assert page.locator(chart).is_visible()
            assert page.locator("#windows tbody tr").count() >= 2
            page.screenshot(path=str(tmp_path / "series.png"), full_page=True)

            phone = browser.new_page(viewport={"width": 390, "height": 844})
            phone.goto(f"{site.url}/series/{quote(first, safe='/')}?now={NOW}")
            width = phone.evaluate("document.documentElement.scrollWidth")
            assert width <= 390 + 1  # wide tables scroll inside their box, the page does not
            phone.screenshot(path=str(tmp_path / "series-phone.png"), full_page=True)
        finally:
            browser.close()
    assert not outside  # no CDN, no external font: the pages work offline
    for name in ("overview.png", "series.png", "series-phone.png"):
        assert (tmp_path / name).stat().st_size > 10_000
