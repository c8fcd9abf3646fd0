"""Run-up records on the dashboard, in a real browser against the demo service: a record of
the fan v1 (put in the service's store as the service would) is listed on the fan's channel
page, its link opens the run-up view, whose two plots draw every point of every order at its
speed, amplitude and phase, with labelled axes and units — without a console error; the
tacho's sidebar entry shows its speed, not a bare "ok".

Drives headless Chromium through Playwright; knows the public API, the page, and the store's
run-up table (to put a record of known values in)."""

from __future__ import annotations

import re
import sqlite3
import time
from typing import Any

import pytest

from service.store.runups import insert_runup
from tests.web.conftest import PageLog, Service, screenshot, wait_for

pytestmark = pytest.mark.browser

FAN, TACHO = "v1-fan-h", "v1-tacho"
ORDERS = [1.0, 2.0, 7.0]
RPM = [960.0, 1060.0, 1160.0, 1260.0, 1360.0, 1450.0]


def _record() -> dict[str, Any]:
    """A run-up of known values: 1X rising through a resonance near 1260 r/min (amplitude
    peak, phase through −90°), 2X flat, 7X growing; the 2X phase wraps past ±180°."""
    t0 = time.time_ns() - 60 * 10**9
    amp = [[0.010, 0.014, 0.022, 0.040, 0.021, 0.012],
           [0.004] * 6,
           [0.001, 0.002, 0.003, 0.004, 0.005, 0.006]]
    phase = [[-10.0, -25.0, -50.0, -90.0, -130.0, -160.0],
             [150.0, 165.0, 175.0, -175.0, -165.0, -150.0],
             [0.0, 10.0, 20.0, 30.0, 40.0, 50.0]]
    rows = [{"rpm": r, "t_ns": t0 + k * 10**9, "steps": 6,
             "amplitude": [amp[j][k] for j in range(3)],
             "phase_deg": [phase[j][k] for j in range(3)]} for k, r in enumerate(RPM)]
    return {"kind": "run-up", "start_ns": t0, "end_ns": t0 + 40 * 10**9, "rpm_lo": 950.0,
            "rpm_hi": 1450.0, "rpm_step": 100.0, "orders": ORDERS, "rows": rows}


def _put(demo: Service, rec: dict[str, Any]) -> int:
    """Into the running service's database, in one transaction (SQLite's own locking: the
    service's writer waits for it, as for any second connection)."""
    c = sqlite3.connect(demo.data_dir / "quaver.db", timeout=10.0, isolation_level=None)
    try:
        c.execute("BEGIN IMMEDIATE")
        rid = insert_runup(c, FAN, "g", rec)
        c.execute("COMMIT")
        return rid
    finally:
        c.close()


def test_a_run_up_is_listed_and_drawn(demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    demo.wait_all_channels()
    for p in (f"channels/{FAN}/bands", f"channels/{FAN}/trend?name=overall"):
        wait_for(lambda p=p: demo.status(p)[0] == 200, f"{p} to answer 200", 40)
    rec = _record()
    rid = _put(demo, rec)
    served = demo.get(f"channels/{FAN}/runups/{rid}")["rows"]
    assert [{k: v for k, v in r.items() if k != "time"} for r in served] == rec["rows"]

    pg.goto(f"{demo.base_url}/#/channel/{FAN}", wait_until="domcontentloaded")
    wait_for(lambda: rid in (pg.evaluate("window.quaver?.view?.runups?.() || []") or []),
             "the record listed on the fan's page")
    link = pg.locator(f'#runup-panel a[data-runup="{rid}"]')
    text = link.inner_text()
    assert re.search(r"run-up 950→1450 r/min · .* · 6 points", text), text
    caption = pg.inner_text("#runup-panel figcaption")
    assert "950–1450 r/min" in caption and "1X, 2X, 7X" in caption, caption
    # the tacho's sidebar entry: its speed in r/min (the drive's range, varspeed.py)
    side = pg.locator(f'#side a[data-channel="{TACHO}"] .v')
    wait_for(lambda: re.fullmatch(r"\d{3,4} r/min", side.inner_text()) is not None,
             "the tacho's speed in the sidebar")
    assert 880 <= int(side.inner_text().split()[0]) <= 1520

    link.click()
    wait_for(lambda: pg.evaluate("location.hash") == f"#/runup/{FAN}/{rid}", "the run-up view")
    amp = wait_for(lambda: pg.evaluate("window.quaver?.view?.amplitude?.()"), "amplitude drawn")
    ph = wait_for(lambda: pg.evaluate("window.quaver?.view?.phase?.()"), "phase drawn")
    for drawn, key in ((amp, "amplitude"), (ph, "phase_deg")):
        assert len(drawn["points"]) == 3  # one series per order
        for j, pts in enumerate(drawn["points"]):
            # every point, at its speed and value, as stored
            assert [p["rpm"] for p in pts] == RPM
            assert [p["v"] for p in pts] == [r[key][j] for r in rec["rows"]]
            xs = [p["x"] for p in pts]
            assert all(b > a for a, b in zip(xs, xs[1:], strict=False))  # speed to the right
    # larger amplitude is drawn higher (smaller y): the 1X peak at 1260 r/min is the top
    one_x = amp["points"][0]
    assert min(one_x, key=lambda p: p["y"])["rpm"] == 1260.0
    assert {"speed, r/min", "amplitude, g RMS", "1X", "2X", "7X"} <= set(amp["labels"])
    assert {"speed, r/min", "phase, degrees"} <= set(ph["labels"])
    facts = pg.inner_text("#ru-facts")
    assert "orders 1X, 2X, 7X" in facts and "bins of 100 r/min" in facts, facts
    csv_href = pg.get_attribute("#ru-csv", "href")
    assert csv_href.endswith(f"/runups/{rid}?format=csv")
    screenshot(pg, "runup-view")
    assert not log.errors and not log.console_errors(), (log.errors, log.console_errors())

    # a record that is not there: said so (the browser logs the 404 itself)
    pg.evaluate(f"location.hash = '#/runup/{FAN}/{rid + 10**6}'")
    wait_for(lambda: "no run-up record" in pg.inner_text("#ru-facts"), "the missing record said")
    assert not log.errors
    assert all("404" in t for t, _ in log.console_errors()), log.console_errors()
