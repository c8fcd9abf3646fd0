"""The channel page's spectral history in a real browser against the demo service: the
history waterfall draws rows from stored spectra and appends live ones, a picked stored
spectrum is overlaid on the live one with a legend in words, and the spectrogram opens
filled from history.

Drives headless Chromium through Playwright; knows only the public API and the page."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest

from tests.web.conftest import PageLog, Service, screenshot, wait_for

pytestmark = pytest.mark.browser

CHANNEL = "p1-de-h"
SPEED = 5.0  # plant seconds per second: the demo's 10 s history interval closes every 2 s

# Pixels of the waterfall's plot area that are not its empty background (the plot colour):
# drawn rows are grey levels of the stored values.
DRAWN_PIXELS_JS = """() => {
  const c = document.querySelector('#waterfall');
  const ctx = c.getContext('2d');
  const css = getComputedStyle(document.documentElement).getPropertyValue('--plot').trim();
  const n = parseInt(css.replace('#', ''), 16);
  const bg = [(n >> 16) & 255, (n >> 8) & 255, n & 255];
  const dpr = window.devicePixelRatio || 1;
  const x0 = Math.round(120 * dpr), y0 = Math.round(10 * dpr);
  const w = c.width - x0 - Math.round(16 * dpr), h = c.height - y0 - Math.round(36 * dpr);
  const d = ctx.getImageData(x0, y0, w, h).data;
  let drawn = 0, levels = new Set();
  for (let i = 0; i < d.length; i += 4) {
    const off = Math.abs(d[i] - bg[0]) + Math.abs(d[i + 1] - bg[1]) + Math.abs(d[i + 2] - bg[2]);
    if (off > 6) drawn++;
    levels.add(d[i]);
  }
  return {drawn, total: w * h, levels: levels.size};
}"""


def data(pg: Any, selector: str, key: str) -> int:
    v = pg.evaluate(f"(document.querySelector({selector!r}) || {{dataset: {{}}}}).dataset.{key}")
    return int(v) if v is not None else -1


def test_waterfall_draws_history_appends_live_and_overlays_a_picked_spectrum(
    own_service: Callable[..., Service], page: tuple[Any, PageLog]
) -> None:
    demo = own_service(speed=SPEED)
    demo.wait_all_channels()

    def stored() -> list[dict[str, Any]] | None:
        items = demo.get(f"channels/{CHANNEL}/history", since=0, until=4e9)["items"]
        return items if len([i for i in items if i["reason"] == "interval"]) >= 4 else None

    before = wait_for(stored, "four stored spectra of p1-de-h", 60)
    pg, log = page
    pg.goto(f"{demo.base_url}/#/channel/{CHANNEL}", wait_until="domcontentloaded")
    wait_for(lambda: data(pg, "#waterfall", "historyRows") >= len(before),
             "the waterfall's rows from history", 30)
    shown = data(pg, "#waterfall", "historyRows")
    now = demo.get(f"channels/{CHANNEL}/history", since=0, until=4e9)["count"]
    assert len(before) <= shown <= now  # one row per stored spectrum (fewer than 400)
    assert data(pg, "#waterfall", "cols") >= 64
    # the rows are drawn: a good part of the plot area holds grey levels above the lowest
    # (the quietest lines are drawn in the background's own colour), and many different ones
    px = wait_for(lambda: (lambda p: p if p["drawn"] > 0.2 * p["total"] else None)(
        pg.evaluate(DRAWN_PIXELS_JS)), "the waterfall's pixels", 15)
    assert px["levels"] > 20, px
    # live rows are appended as frames arrive (one per stored interval's worth of time)
    wait_for(lambda: data(pg, "#waterfall", "liveRows") >= 1, "a live row appended", 30)
    # the spectrogram opened with stored spectra in it
    assert data(pg, "#sgram", "historyRows") >= 1

    # pick a row: its stored spectrum is overlaid on the live one, with a legend in words
    pg.locator("#waterfall").scroll_into_view_if_needed()
    box = pg.locator("#waterfall").bounding_box()
    pg.mouse.click(box["x"] + box["width"] / 2, box["y"] + 20)  # the newest rows
    legend = pg.locator("#hist-legend")
    wait_for(lambda: "dashed" in (legend.text_content() or ""), "the overlay's legend", 15)
    text = legend.text_content() or ""
    assert "live" in text and "solid line" in text and "stored" in text, text
    picked = pg.evaluate("window.quaver.view.history().picked")
    ids = {i["id"] for i in demo.get(f"channels/{CHANNEL}/history", since=0, until=4e9)["items"]}
    assert picked["id"] in ids
    overlay = pg.evaluate("document.querySelector('#spec').dataset.overlay")
    assert overlay and overlay.startswith("stored ")
    pg.locator("#hist-panel").scroll_into_view_if_needed()
    screenshot(pg, "history-waterfall", full_page=True)

    # another range: the waterfall loads it and says which is chosen
    pg.click("button[data-hrange='1 day']")
    wait_for(lambda: pg.evaluate(
        "document.querySelector(\"button[data-hrange='1 day']\").getAttribute('aria-pressed')"
    ) == "true", "the 1 day range chosen", 5)
    wait_for(lambda: pg.evaluate("window.quaver.view.history().range") == "1 day", "range", 5)
    wait_for(lambda: data(pg, "#waterfall", "historyRows") >= len(before),
             "the 1 day range's rows", 30)
    pg.click("button[data-unpick]") if pg.locator("button[data-unpick]").count() else None
    assert not log.errors, log.errors
    assert not log.console_errors(), log.console_errors()
