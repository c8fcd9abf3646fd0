"""Running speed on the dashboard, in a real browser against the demo service: the
variable-speed fan v1 (its drive ramps 900 ↔ 1500 r/min every two minutes, a tacho measures
it) shows its measured speed on its channel page and its plant card, the speed changes on
screen as the fan ramps, and the tacho channel has a page of its own (speed, status, pulses)
instead of a spectrum — without a console error.

Drives headless Chromium through Playwright; knows only the public API and the page."""

from __future__ import annotations

import re
from typing import Any

import pytest

from tests.web.conftest import PageLog, Service, screenshot, wait_for

pytestmark = pytest.mark.browser

FAN, TACHO = "v1-fan-h", "v1-tacho"
GREY = "rgb(124, 130, 134)"  # --ink-3 of web/app.css: the speed line is calm grey when ok


def _ready(demo: Service) -> None:
    """Routes the fan's page opens with answer 200 (a 503/404 before the first frame or
    stored bucket is logged by the browser as a console error, which is not what is tested)."""
    for c in demo.wait_all_channels():
        if c["id"] == FAN:
            for p in c["profiles"]:
                path = f"channels/{FAN}/bands?profile={p['name']}"
                wait_for(lambda path=path: demo.status(path)[0] == 200, f"{path} to answer 200")
    path = f"channels/{FAN}/trend?name=overall"
    wait_for(lambda: demo.status(path)[0] == 200, f"{path} to answer 200", 40)


def _speed_line(pg: Any, sel: str) -> dict[str, Any] | None:
    return pg.evaluate(
        """sel => { const e = document.querySelector(sel);
             return e && e.dataset.rpm !== "" ? {rpm: Number(e.dataset.rpm),
               source: e.dataset.source, status: e.dataset.status, text: e.textContent,
               color: getComputedStyle(e).color} : null; }""", sel)


def _changed(pg: Any, sel: str, before: float, what: str) -> dict[str, Any]:
    # the demo's speed moves by up to 7.9 r/min a second (300·π/120, service/sources/
    # varspeed.py), and by at least ~2 r/min within 10 s even at a turn of the ramp
    return wait_for(lambda: (s := _speed_line(pg, sel)) and abs(s["rpm"] - before) >= 1.0
                    and s, what, 40)


def test_the_fans_speed_is_shown_and_changes(demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    _ready(demo)

    # the fan's channel page: "1234 r/min · tacho" in grey, the tacho's measured speed
    pg.goto(f"{demo.base_url}/#/channel/{FAN}", wait_until="domcontentloaded")
    sel = "#ch-speed .speed"
    first = wait_for(lambda: _speed_line(pg, sel), "the fan's speed on its page")
    rest = demo.get(f"channels/{FAN}")["speed"]
    assert (first["source"], first["status"]) == ("tacho", "ok") == (rest["source"], rest["status"])
    assert re.fullmatch(r"\d{3,4} r/min · tacho", first["text"]), first
    assert 880 <= first["rpm"] <= 1520  # the drive's range (varspeed.py), a little margin
    # read a moment apart: within the ramp's 7.9 r/min a second of the service's own value
    assert abs(first["rpm"] - rest["rpm"]) <= 40.0, (first, rest)
    assert first["color"] == GREY
    later = _changed(pg, sel, first["rpm"], "the fan's speed to change on its page")
    assert later["source"] == "tacho" and 880 <= later["rpm"] <= 1520
    # the 1X markers and the order read-out use the measured speed
    probe = pg.evaluate("window.quaver.view.speed()")
    assert probe["source"] == "tacho" and probe["rpm"] > 0
    screenshot(pg, "fan-speed-channel")

    # the tacho's own page: its speed, status and pulses, no spectrum
    pg.evaluate(f"location.hash = '#/channel/{TACHO}'")
    tsel = "#tacho-rpm"
    t1 = wait_for(lambda: _speed_line(pg, tsel), "the tacho page's speed")
    assert pg.query_selector("#spec") is None
    assert t1["status"] == "ok" and 880 <= t1["rpm"] <= 1520
    facts = pg.inner_text("#ch-facts")
    assert "speed of" in facts and re.search(r"\d+ accepted · 0 extra", facts), facts
    links = pg.eval_on_selector_all("#ch-facts a", "els => els.map(a => a.getAttribute('href'))")
    assert links == [f"#/channel/{FAN}"]
    assert pg.inner_text("#tacho-unit").startswith("r/min")
    _changed(pg, tsel, t1["rpm"], "the tacho page's speed to change")
    screenshot(pg, "fan-speed-tacho")

    # the plant cards: the tacho's headline is its speed; the fan's card has the speed line
    pg.evaluate("location.hash = '#/'")
    card = f".card[data-channel='{TACHO}'][data-kind='tacho']"
    pg.wait_for_selector(card)
    wait_for(lambda: re.fullmatch(r"\d{3,4}", pg.inner_text(f"{card} .overall")),
             "the tacho card's speed")
    assert pg.inner_text(f"{card} .unit") == "r/min"
    fan_line = f".card[data-channel='{FAN}'] .speedline .speed"
    got = wait_for(lambda: _speed_line(pg, fan_line), "the fan card's speed line")
    assert got["source"] == "tacho" and got["color"] == GREY
    # a pump has its configured (fixed) speed: the same line says so
    pump = wait_for(lambda: _speed_line(pg, ".card[data-channel='p2-de-h'] .speedline .speed"),
                    "the pump card's speed line")
    assert pump["source"] == "fixed" and pump["rpm"] == pytest.approx(1476.0)
    screenshot(pg, "fan-speed-plant")

    assert not log.errors, log.errors
    assert log.console_errors() == [], log.console_errors()
