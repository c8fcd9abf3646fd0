"""An order profile on the dashboard, in a real browser against the demo service: the
variable-speed fan v1's order spectrum (resampled at constant shaft angle from its tacho)
is drawn on an x axis in orders (ticks "5×", "10×", unit "order"), its 1X, 2X … markers
at orders 1, 2 …, and its order bands where the service puts them — without a console
error.

Drives headless Chromium through Playwright; knows only the public API and the page."""

from __future__ import annotations

from typing import Any

import pytest

from tests.web.conftest import PageLog, Service, screenshot, wait_for

pytestmark = pytest.mark.browser

FAN = "v1-fan-h"


def test_the_fans_order_spectrum_has_an_axis_in_orders(demo: Service,
                                                       page: tuple[Any, PageLog]) -> None:
    pg, log = page
    # the routes the page opens answer 200 first (a 404 before the first stored trend bucket
    # is logged by the browser as a console error, which is not what is tested)
    for path in (f"channels/{FAN}/bands?profile=orders",
                 f"channels/{FAN}/trend?name=overall&profile=orders"):
        wait_for(lambda path=path: demo.status(path)[0] == 200, f"{path} to answer 200", 60)
    rest = demo.get(f"channels/{FAN}/spectrum", profile="orders")
    # the service's payload says what its x values are: orders, 0.025 apart up to 20
    assert (rest["x_unit"], rest["f0_hz"], rest["df_hz"], rest["lines"]) == (
        "order", 0.0, 0.025, 800)
    pg.goto(f"{demo.base_url}/#/channel/{FAN}?profile=orders", wait_until="domcontentloaded")

    def drawn() -> dict[str, Any] | None:
        got = pg.evaluate("""() => { const v = window.quaver && window.quaver.view;
            return v && v.spectrum && v.axis ? {s: v.spectrum(), axis: v.axis()} : null; }""")
        if not got or not got["s"] or got["s"]["profile"] != "orders":
            return None
        return got if got["axis"]["ticks"] and got["axis"]["unit"] == "order" else None

    got = wait_for(drawn, "the order spectrum drawn on an order axis", 60)
    assert (got["s"]["f0_hz"], got["s"]["df_hz"]) == (0.0, 0.025)
    ticks = got["axis"]["ticks"]
    assert all(t.endswith("×") for t in ticks), ticks  # "5×", "10×": orders, not Hz
    assert "10×" in ticks, ticks
    assert pg.evaluate("document.querySelector('#spec').dataset.xUnit") == "order"
    cap = pg.text_content("#spec-cap") or ""
    assert "orders to 20×" in cap and "800 lines" in cap and "angle from v1-tacho" in cap, cap

    def labels() -> list[dict[str, Any]] | None:
        ls = pg.evaluate("window.quaver.view.labels()")
        kinds = {x["kind"] for x in ls}
        return ls if {"harmonic", "band"} <= kinds else None

    ls = wait_for(labels, "the 1X markers and the band labels", 30)
    # 1X, 2X … sit on orders 1, 2 … whatever the speed
    harm = {x["text"]: x["value"] for x in ls if x["kind"] == "harmonic"}
    assert harm.get("1X") == 1 and harm.get("2X") == 2, harm
    # the 1x order band (0.8-1.2 orders from the service) is drawn from order 0.8: its label
    # is placed 3 px right of that, its box 1 px before the text (web/spectrum.js, labels.js)
    bands = {b["name"]: b for b in demo.get(f"channels/{FAN}/bands",
                                            profile="orders")["bands"]}
    assert (bands["1x"]["lo_hz"], bands["1x"]["hi_hz"]) == (0.8, 1.2)
    lab = next(x for x in ls if x["kind"] == "band" and x["text"] == "1x")
    x08 = pg.evaluate("window.quaver.view.xPx(0.8)")
    assert lab["x0"] == pytest.approx(x08 + 3 - 1, abs=0.5), (lab, x08)
    screenshot(pg, "fan-orders")
    assert not log.errors, log.errors
    assert log.console_errors() == [], log.console_errors()


UNITS = """() => Object.fromEntries([...document.querySelectorAll('#sel-unit option')]
    .filter(o => o.value).map(o => [o.value, !o.disabled && !o.hidden]))"""
X_UNITS = """() => ({sgram: document.querySelector('#sgram').dataset.xUnit,
    waterfall: document.querySelector('#waterfall').dataset.xUnit})"""


def test_an_order_profile_offers_acceleration_only_and_its_history_is_in_orders(
        demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    for path in (f"channels/{FAN}/bands?profile=orders",
                 f"channels/{FAN}/trend?name=overall&profile=orders"):
        wait_for(lambda path=path: demo.status(path)[0] == 200, f"{path} to answer 200", 60)
    chan = next(c for c in demo.get("channels") if c["id"] == FAN)
    primary = chan["profiles"][0]["name"]
    assert primary != "orders"
    pg.goto(f"{demo.base_url}/#/channel/{FAN}", wait_until="domcontentloaded")
    pg.wait_for_selector(f"#seg-profile [data-profile='{primary}']", timeout=30000)
    # the primary (frequency) profile: velocity and displacement on offer; the spectrogram
    # and the history waterfall on a frequency axis
    assert all(pg.evaluate(UNITS).values()), pg.evaluate(UNITS)
    wait_for(lambda: pg.evaluate(X_UNITS) == {"sgram": "Hz", "waterfall": "Hz"}, "Hz axes", 30)
    pg.select_option("#sel-unit", "mm/s")
    pg.click("#seg-profile [data-profile='orders']")
    # an order spectrum is of acceleration only (the service resamples the acceleration at
    # constant shaft angle): no velocity or displacement on offer, and the velocity chosen on
    # the other profile falls back to the profile's own unit
    def withdrawn() -> dict[str, bool] | None:
        u: dict[str, bool] = pg.evaluate(UNITS)
        return None if u["mm/s"] else u

    units = wait_for(withdrawn, "velocity withdrawn on the order profile", 30)
    assert units == {"mm/s": False, "in/s": False, "g": True, "m/s2": True,
                     "um": False, "mil": False}, units
    assert pg.input_value("#sel-unit") == ""
    assert pg.evaluate("() => window.quaver.live.sub.unit") is None
    # the spectrogram's read-out and the waterfall's axis are in orders, as the spectrum's
    wait_for(lambda: pg.evaluate(X_UNITS) == {"sgram": "order", "waterfall": "order"},
             "order axes", 60)
    # back on the primary profile everything is on offer again
    pg.click(f"#seg-profile [data-profile='{primary}']")
    wait_for(lambda: all(pg.evaluate(UNITS).values()), "every unit again", 30)
    wait_for(lambda: pg.evaluate(X_UNITS) == {"sgram": "Hz", "waterfall": "Hz"}, "Hz again", 60)
    assert not log.errors, log.errors
    assert log.console_errors() == [], log.console_errors()
