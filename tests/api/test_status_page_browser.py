"""The status page and the HTML report in a real browser: headless Chromium (Debian's) against a
running `inrush serve`, driven by Playwright for the interactions."""

from __future__ import annotations

import datetime as dt
import io
import shutil
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from apihelpers import EXPERIMENT, two_metric_demo_csv
from inrush_process import inrush_serve
from matplotlib import image

from service.cli import main

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]
pytestmark = [
    pytest.mark.slow,
    pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (Debian: apt-get "
                                                "install chromium); the page is still checked "
                                                "without a browser in test_status_page.py"),
]


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    folder = tmp_path_factory.mktemp("browser")
    with inrush_serve(folder) as (base, token):
        auth = {"Authorization": f"Bearer {token}"}
        assert httpx.post(f"{base}/v1/experiments", json=EXPERIMENT, headers=auth,
                          timeout=30).status_code == 201
        upload = httpx.put(f"{base}/v1/experiments/route-cards/observations",
                           content=two_metric_demo_csv().encode(), timeout=60,
                           headers={**auth, "Content-Type": "text/csv"})
        assert upload.status_code == 200, upload.text
        series = httpx.get(f"{base}/v1/experiments/route-cards/series", headers=auth,
                           timeout=30).json()
        yield {"base": base, "token": token, "series": series, "folder": folder}


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    sync_api = pytest.importorskip("playwright.sync_api")
    with sync_api.sync_playwright() as playwright:
        launched = playwright.chromium.launch(executable_path=CHROMIUM, args=FLAGS)
        yield launched
        launched.close()


class Watch:
    """Script errors and console errors (a CSP refusal is one) of a page."""

    def __init__(self, page: Any) -> None:
        self.errors: list[str] = []
        page.on("pageerror", lambda error: self.errors.append(str(error)))
        page.on("console", lambda m: self.errors.append(m.text) if m.type == "error" else None)


def hover_day(page: Any, over: Any, fraction: float) -> str:
    """Point at ``fraction`` of a plot's width; the legend's day cell under the pointer."""
    over.scroll_into_view_if_needed()
    box = over.bounding_box()
    page.mouse.move(box["x"] + fraction * box["width"], box["y"] + box["height"] / 2, steps=2)
    cell = over.locator("xpath=ancestor::div[contains(@class,'uplot')]").locator(
        ".u-series").first.locator(".u-value")
    # uPlot updates the legend on the next animation frames after the pointer moves.
    page.evaluate("new Promise(r => requestAnimationFrame(() => requestAnimationFrame(r)))")
    return str(cell.inner_text())


def test_page_renders_in_chromium(server: dict[str, Any], browser: Any) -> None:
    context = browser.new_context(viewport={"width": 1280, "height": 2000})
    page = context.new_page()
    # ?token= answers with a cookie and a redirect; the browser follows both.
    page.goto(f"{server['base']}/experiments/route-cards?token={server['token']}")
    page.wait_for_selector("html[data-charts='4']")
    assert "token=" not in page.url
    dom = page.content()
    for text in ("Route cards on the trail list", "Arm shares against the plan",
                 "Entrants per source and arm", "naive and re-weighted"):
        assert text in dom
    pixels = image.imread(io.BytesIO(page.screenshot()), format="png")[:, :, :3]
    context.close()
    assert pixels.shape[0] >= 1000 and pixels.shape[1] >= 1000
    colours, counts = np.unique((pixels * 255).round().astype(np.uint8).reshape(-1, 3),
                                axis=0, return_counts=True)
    # Charts, text and the header band: many colours, none covering almost everything.
    assert len(colours) > 200
    assert counts.max() / counts.sum() < 0.8
    # The header band is Inrush's deep teal (#143F3C).
    band = (pixels[5:40, :, :] * 255).round()
    assert (np.abs(band - np.array([0x14, 0x3F, 0x3C])).sum(axis=2) < 6).mean() > 0.5


def test_hover_zoom_export_and_metric_picker(server: dict[str, Any], browser: Any) -> None:
    days = [d["date"] for d in server["series"]["days"]]
    flagged = [d["date"] for d in server["series"]["days"] if d["severity"] == "alert"]
    context = browser.new_context(accept_downloads=True, viewport={"width": 1280, "height": 900})
    page = context.new_page()
    watch = Watch(page)
    page.goto(f"{server['base']}/experiments/route-cards?token={server['token']}")
    page.wait_for_selector("html[data-charts='4']")
    share = page.locator("#shares .u-over")

    # Hover: the exact day (weekday and ISO date), its flag, and values as percentages.
    i = days.index(flagged[0])
    label = hover_day(page, share, (i + 0.5) / len(days))
    weekday = dt.date.fromisoformat(flagged[0]).strftime("%a")
    assert label == f"{weekday} {flagged[0]} \u00b7 flagged (alert)"
    values = page.locator("#shares .u-series .u-value").all_inner_texts()
    assert all(v.endswith("%") for v in values[1:]), values

    # Zoom to a date range with the form: every chart shows those days only.
    page.fill("#range-from", "2026-11-05")
    page.fill("#range-to", "2026-11-12")
    page.click("#range button[type=submit]")
    got = hover_day(page, share, 0.5 / 8)
    assert got.endswith("2026-11-05"), (got, page.input_value("#range-from"))
    entrants = page.locator("#entrants .u-over").first
    assert hover_day(page, entrants, 7.5 / 8).startswith(
        dt.date(2026, 11, 12).strftime("%a 2026-11-12"))
    # Dragging across a chart zooms too, and the form follows.
    share.scroll_into_view_if_needed()
    box = share.bounding_box()
    y = box["y"] + box["height"] / 2
    page.mouse.move(box["x"] + 2.3 / 8 * box["width"], y)
    page.mouse.down()
    page.mouse.move(box["x"] + 5.7 / 8 * box["width"], y, steps=5)
    page.mouse.up()
    assert page.input_value("#range-from") == "2026-11-07"
    assert page.input_value("#range-to") == "2026-11-10"
    page.click("#range [data-reset]")
    assert page.input_value("#range-from") == days[0]
    assert page.input_value("#range-to") == days[-1]

    # Exports: the view as PNG, the server-drawn chart as SVG.
    with page.expect_download() as png:
        page.click("#shares [data-png]")
    data = Path(png.value.path()).read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 5000
    assert png.value.suggested_filename == "route-cards-arm-shares.png"
    # The entrants' panels, one per arm, come as one picture.
    with page.expect_download() as panels:
        page.click("#entrants [data-png]")
    assert panels.value.suggested_filename == "route-cards-entrants.png"
    height = image.imread(panels.value.path(), format="png").shape[0]
    stacked = page.evaluate("[...document.querySelectorAll('#entrants canvas')]"
                            ".reduce((sum, c) => sum + c.height, 0)")
    assert page.locator("#entrants canvas").count() == 2 and height > stacked
    with page.expect_download() as svg:
        page.click("#shares [data-svg-button]")
    root = ET.fromstring(Path(svg.value.path()).read_bytes())
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert root.get("aria-label") == "Arm shares against the plan"

    # The metric picker asks the server for the page of the chosen metric.
    with page.expect_navigation():
        page.select_option("#metric", "trail_minutes")
    assert page.url.endswith("?metric=trail_minutes")
    page.wait_for_selector("html[data-charts='4']")
    assert "trail_minutes" in page.inner_text("#engagement h2")
    assert "Effect on trail_minutes" in page.inner_text("#effect h2")
    assert watch.errors == []  # no script error and no CSP refusal
    context.close()


def test_narrow_screen_and_no_javascript(server: dict[str, Any], browser: Any) -> None:
    context = browser.new_context(viewport={"width": 400, "height": 800})
    page = context.new_page()
    watch = Watch(page)
    page.goto(f"{server['base']}/experiments/route-cards?token={server['token']}")
    page.wait_for_selector("html[data-charts='4']")
    # Nothing sticks out sideways at 400 px; wide tables scroll inside their own box.
    assert page.evaluate("document.documentElement.scrollWidth") <= 400
    widths = page.evaluate("[...document.querySelectorAll('.uplot')].map(e => "
                           "e.getBoundingClientRect().right)")
    assert len(widths) == 4 and max(widths) <= 400
    assert watch.errors == []
    context.close()

    # Without JavaScript the server-drawn charts are shown instead.
    context = browser.new_context(java_script_enabled=False,
                                  viewport={"width": 1024, "height": 800})
    page = context.new_page()
    page.goto(f"{server['base']}/experiments/route-cards?token={server['token']}")
    assert page.locator("svg[aria-label='Arm shares against the plan']").is_visible()
    assert page.locator("svg[aria-label='Entrants per source and arm']").is_visible()
    assert page.locator(".uplot").count() == 0
    assert not page.locator("#range").is_visible()
    context.close()


def test_report_file_works_offline(server: dict[str, Any], browser: Any) -> None:
    folder: Path = server["folder"]
    source = folder / "route_cards.csv"
    source.write_text(two_metric_demo_csv(), encoding="utf-8")
    report = folder / "route_cards.html"
    assert main(["analyze", str(source), "--arms", ",".join(EXPERIMENT["arms"]),
                 "--html", str(report)]) == 0
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    page = context.new_page()
    watch = Watch(page)
    fetched: list[str] = []
    page.on("request", lambda request: fetched.append(request.url))
    page.goto(report.as_uri() + "?metric=trail_minutes")
    page.wait_for_selector("html[data-charts='4']")
    assert all(url.startswith(("file:", "data:", "blob:")) for url in fetched), fetched
    assert page.is_visible("[data-metric-section='trail_minutes']")
    assert not page.is_visible("[data-metric-section='routes_saved']")
    assert page.inner_text("#engagement h2").endswith("trail_minutes")
    legend = page.locator("#engagement .u-series").nth(1).inner_text()
    assert EXPERIMENT["arms"][0] in legend
    # Switching the metric happens in the file itself and is kept in the address.
    page.select_option("#metric", "routes_saved")
    assert page.url.endswith("?metric=routes_saved")
    assert page.is_visible("[data-metric-section='routes_saved']")
    assert not page.is_visible("[data-metric-section='trail_minutes']")
    assert page.inner_text("#engagement h2").endswith("routes_saved")
    assert watch.errors == []
    context.close()
