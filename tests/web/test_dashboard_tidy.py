"""The dashboard's small truths: unknown routes and channels say so, a channel whose data
stopped shows its last values with its state, labels print the API's numbers and never
overlap, the event log names who acknowledged once, and the acknowledge dialog points at
its token field. Headless Chromium against real services on 127.0.0.1."""

from __future__ import annotations

import itertools
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.cli.feed import feed_recording
from service.demo import demo_config
from tests.service.conftest import run_service
from tests.web.conftest import (
    OPERATOR_TOKEN,
    VIEWER_TOKEN,
    PageLog,
    Service,
    screenshot,
    signed_in_as,
    wait_for,
)

pytestmark = pytest.mark.browser

FS = 12800.0  # the demo input's rate (service/examples/demo-feed.toml)
TONES = ((120.0, 0.1), (337.5, 0.05))  # (Hz, g peak) fed to the demo input, then stopped


def open_page(pg: Any, url: str) -> None:
    pg.goto(url, wait_until="domcontentloaded")
    pg.wait_for_function("window.quaver !== undefined", timeout=15000)


def probe(pg: Any, what: str) -> Any:
    return pg.evaluate(f"() => window.quaver.view && window.quaver.view.{what} ? "
                       f"window.quaver.view.{what}() : null")


def hz_of(text: str) -> float:
    """The frequency at the start of a peak label or table cell ("120.0 …", "1.23k …")."""
    m = re.match(r"([\d.]+)(k?)", text.strip())
    assert m, text
    return float(m.group(1)) * (1000.0 if m.group(2) else 1.0)


def half_unit(text: str) -> float:
    """Half a unit in the last digit shown ("120.0" → 0.05; "1.23k" → 5 Hz)."""
    m = re.match(r"[\d]+(?:\.(\d+))?(k?)", text.strip())
    assert m, text
    return 0.5 * 10.0 ** -len(m.group(1) or "") * (1000.0 if m.group(2) else 1.0)


def assert_no_overlap(labels: list[dict[str, Any]]) -> None:
    for a, b in itertools.combinations(labels, 2):
        apart = (a["x0"] + a["w"] <= b["x0"] or b["x0"] + b["w"] <= a["x0"]
                 or a["y0"] + a["h"] <= b["y0"] or b["y0"] + b["h"] <= a["y0"])
        assert apart, f"labels overlap: {a} and {b}"


# --- routes --------------------------------------------------------------------------------


def test_unknown_route_and_channel_say_so(demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    open_page(pg, demo.base_url + "/#/settings")
    pg.wait_for_selector("[data-notfound=route]")
    text = pg.inner_text("#main")
    assert "No such view" in text and "#/settings" in text
    assert pg.get_attribute("[data-notfound=route] a", "href") == "#/"
    assert pg.query_selector(".card") is None  # not the plant view behind it

    pg.evaluate("location.hash = '#/channel/nope'")
    pg.wait_for_selector("[data-notfound=channel]")
    text = pg.inner_text("#main")
    assert "No channel 'nope'" in text
    assert "#/" in pg.eval_on_selector_all("[data-notfound=channel] a",
                                           "els => els.map(a => a.getAttribute('href'))")
    # the channels the service has are offered, each a link to its view
    ids = [c["id"] for c in demo.get("channels")]
    links = pg.eval_on_selector_all("[data-notfound=channel] a[href^='#/channel/']",
                                    "els => els.map(a => a.textContent)")
    assert links == ids
    screenshot(pg, "unknown-channel")

    pg.evaluate("location.hash = '#/channel/p1-de-h'")
    pg.wait_for_selector("#spec")
    assert pg.query_selector("[data-notfound]") is None
    assert not log.errors, log.errors


def test_no_console_errors_across_views(demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    for c in demo.wait_all_channels():  # every profile has bands: no 503 on the way
        for p in c["profiles"]:
            path = f"channels/{c['id']}/bands?profile={p['name']}"
            wait_for(lambda path=path: demo.status(path)[0] == 200, f"{path} to answer 200")
    # the trends the channel views open with (the band with alarm levels, else the overall)
    # are stored: before their first bucket the service answers 404, which the browser logs
    for path in ["channels/p1-de-h/trend?name=band:bearing",
                 "channels/p1-de-h/trend?name=band:1x&profile=narrow",
                 "channels/f1-gb-h/trend?name=overall"]:
        wait_for(lambda path=path: demo.status(path)[0] == 200, f"{path} to answer 200", 40)
    open_page(pg, demo.base_url + "/#/")
    for route, ready in [
        ("#/channel/p1-de-h", "#spec"), ("#/events", "#main table, #main .empty"),
        ("#/settings", "[data-notfound=route]"), ("#/channel/nope", "[data-notfound=channel]"),
        ("#/channel/p1-de-h?profile=narrow", "#spec"), ("#/%E0%A4%A", "[data-notfound=route]"),
        ("#/", ".card"), ("#/channel/f1-gb-h", "#spec"), ("#/", ".card"),
    ]:
        pg.evaluate(f"location.hash = {route!r}")
        pg.wait_for_selector(ready, timeout=15000)
        pg.wait_for_timeout(700)  # a tick of the view's timers (nothing is asserted on time)
    assert not log.errors, f"uncaught errors in the page: {log.errors}"
    assert not log.console_errors(), f"console errors: {log.console_errors()}"


# --- a channel whose data stopped ---------------------------------------------------------------


def _demo_with_input() -> dict[str, Any]:
    cfg = demo_config(fault_start_s=1e6, feed_listen="127.0.0.1:8751")
    doc = cfg.model_dump(mode="json", exclude_none=True, exclude_defaults=True)
    doc.pop("service", None)
    for s in doc["sources"]:
        if s["id"] == "workshop-rig":
            s["listen"] = "auto"
    return doc


def test_stopped_channel_shows_its_last_values_with_its_state(
    tmp_path: Path, page: tuple[Any, PageLog]
) -> None:
    pg, log = page
    t = np.arange(int(4 * FS)) / FS
    x = sum(a * np.sin(2 * np.pi * f * t) for f, a in TONES)[None, :]
    with run_service(_demo_with_input(), tmp_path) as svc:
        feed_recording(x, FS, "127.0.0.1", svc.ports["workshop-rig"], fmt="framed", speed=8.0,
                       say=lambda _: None)
        svc.wait(lambda: svc.channel("rig-h")["status"] == "no-signal" or None,
                 "rig-h to go silent", 20)
        tones = svc.get("channels/rig-h/tones")
        bands = svc.get("channels/rig-h/bands")
        assert tones["status"] == "no-signal" and tones["peaks"], tones
        open_page(pg, svc.base_url + "/#/channel/rig-h")
        note = wait_for(lambda: probe(pg, "notLive"), "the not-live note")
        assert re.fullmatch(r"NO SIGNAL since \d\d:\d\d:\d\d — last values, from \d\d:\d\d:\d\d",
                            note), note
        assert pg.is_visible("#ch-lastnote")
        assert "notlive" in pg.get_attribute("#tones-panel", "class")
        assert "notlive" in pg.get_attribute("#bands-panel", "class")
        # the bars hold the service's last band values (not "no bands yet")
        bars = wait_for(lambda: probe(pg, "bars"), "the last bands")
        want = {b["name"]: b["value"] for b in bands["bands"]}
        assert "overall" in {b["name"] for b in bars}
        assert {b["name"]: b["value"] for b in bars} == {b["name"]: want[b["name"]] for b in bars}
        # the tones table: the service's last peaks, in its order, with its numbers
        cells = "rs => rs.slice(1).map(r => [...r.cells].map(c => c.textContent))"
        rows = wait_for(lambda: pg.eval_on_selector_all("#tones tr:not(.sep)", cells),
                        "the last peaks in the table")
        shown = [r for r in rows if r[0] == ""]  # peak rows have no name
        assert len(shown) == min(6, len(tones["peaks"]))  # the table lists up to six
        for (_, freq, _, amp), p in zip(shown, tones["peaks"], strict=False):
            assert abs(hz_of(freq) - p["frequency_hz"]) <= half_unit(freq), (freq, p)
            assert float(amp) == pytest.approx(p["amplitude"], rel=0.01), (amp, p)
        # spectrum peak labels: the API's frequency and amplitude, to the digits shown
        labels = wait_for(lambda: [lb for lb in probe(pg, "labels") or [] if lb["kind"] == "peak"],
                          "peak labels on the spectrum")
        api = {round(p["frequency_hz"], 6): p for p in tones["peaks"]}
        for lb in labels:
            p = api[round(lb["value"]["frequency_hz"], 6)]  # a peak the service reported
            f_txt, _, a_txt = lb["text"].partition(" · ")
            assert abs(hz_of(f_txt) - p["frequency_hz"]) <= half_unit(f_txt), (lb, p)
            assert float(a_txt) == pytest.approx(p["amplitude"], rel=0.01), (lb, p)
        top = max(labels, key=lambda lb: lb["value"]["amplitude"])
        assert hz_of(top["text"]) == pytest.approx(TONES[0][0], abs=0.05)  # 120.0 Hz
        screenshot(pg, "channel-no-signal")
    assert not log.errors, log.errors


# --- labels on the live spectrum -------------------------------------------------------------


# On the narrow profile (Fmax 500 Hz) the orders 1X…10X, BPFO and its multiples, band names
# and peaks all compete for the top of the plot.
CROWDED = {"peak", "harmonic", "bearing", "band", "unit"}


@pytest.mark.parametrize(("route", "kinds"), [
    ("#/channel/p1-de-h?profile=narrow", CROWDED),
    ("#/channel/p1-de-h", {"peak", "unit", "bearing"}),
    ("#/channel/f1-gb-h", {"peak", "unit", "band"}),
])
def test_spectrum_labels_never_overlap(demo: Service, page: tuple[Any, PageLog],
                                       route: str, kinds: set[str]) -> None:
    pg, log = page
    demo.wait_all_channels()
    open_page(pg, demo.base_url + "/" + route)
    labels = wait_for(lambda: (lambda ls: ls if kinds <= {lb["kind"] for lb in ls} else None)(
        probe(pg, "labels") or []), f"{sorted(kinds)} labels on the spectrum")
    assert_no_overlap(labels)

    def same_as_table() -> bool:
        # a peak label and its row in the tones table show the same service numbers
        got = pg.evaluate("""() => [window.quaver.view.labels().filter(l => l.kind === 'peak')
            .map(l => l.text.split(' ')[0] + ' ' + l.text.split(' · ')[1]),
            [...document.querySelectorAll('#tones tr:not(.sep)')].slice(1)
            .filter(r => r.cells[0].textContent === '')
            .map(r => r.cells[1].textContent.replace(' kHz', 'k').replace(' Hz', '') + ' '
                      + r.cells[3].textContent)]""")
        return bool(got[0]) and set(got[0]) <= set(got[1])

    wait_for(same_as_table, "peak labels equal to their rows in the tones table")
    for scale in ("log", "lin"):  # other layouts of the same labels
        pg.click(f"[data-xa={scale}]")
        pg.wait_for_timeout(400)
        assert_no_overlap(probe(pg, "labels"))
    # zoomed out on a narrow window the same labels compete for less room
    pg.set_viewport_size({"width": 900, "height": 800})
    pg.wait_for_timeout(500)
    assert_no_overlap(probe(pg, "labels"))
    pg.set_viewport_size({"width": 1440, "height": 900})
    assert not log.errors, log.errors


# --- the event log and the acknowledge dialog ---------------------------------------------------


def test_ack_names_who_once_and_the_dialog_points_at_its_field(
    own_service: Any, browser: Any
) -> None:
    svc: Service = own_service(speed=10.0, tokens=True)
    svc.wait_all_channels()
    pg = browser.new_page()
    signed_in_as(pg, VIEWER_TOKEN)  # may read, may not acknowledge
    errors: list[str] = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    try:
        def alarm() -> dict[str, Any] | None:
            return next((a for a in svc.get("alarms") if a["state"] in ("alert", "danger")
                         and not a.get("acked")), None)

        a = wait_for(alarm, "an alarm from the demo's growing fault", 60)
        open_page(pg, svc.base_url + "/#/")
        sel = f'#ov-alarm-list li[data-rule="{a["rule"]}"] [data-ack]'
        pg.wait_for_selector(sel, timeout=15000)
        pg.click(sel)
        pg.wait_for_selector("#dlg-ack[open]")
        pg.click("#ack-submit")
        wait_for(lambda: "403" in pg.inner_text("#ack-msg"), "the refusal of a viewer token")
        msg = pg.inner_text("#ack-msg")
        assert "field above" in msg and "below" not in msg, msg
        assert pg.is_visible("#ack-token")
        field_y = pg.eval_on_selector("#ack-token", "e => e.getBoundingClientRect().top")
        msg_y = pg.eval_on_selector("#ack-msg", "e => e.getBoundingClientRect().top")
        assert field_y < msg_y  # the field is where the message says
        pg.click("#dlg-ack button[value=cancel]")

        r = svc.client.post(f"/api/v1/alarms/{a['rule']}/ack", json={"note": "seen"},
                            headers={"Authorization": f"Bearer {OPERATOR_TOKEN}"})
        assert r.status_code == 200, r.text
        ack = next(e for e in svc.get("events", limit=50)["events"]
                   if e["kind"] == "ack" and e["rule"] == a["rule"])
        who = "web-test-operator"
        assert ack["acked_by"] == who and f"by {who}" in ack["message"], ack
        pg.evaluate("location.hash = '#/events'")
        row = f'tr[data-event="{ack["id"]}"] .msg'
        pg.wait_for_selector(row, timeout=15000)
        text = pg.inner_text(row)
        assert text.count(who) == 1, text
        assert text == f"{ack['message']}: “seen”", text

        # the evidence of the raising event: then and now told apart by line and words
        raised = wait_for(lambda: next((e for e in svc.get("events", limit=200)["events"]
                                        if e.get("has_evidence")), None), "a kept spectrum")
        button = f'tr[data-event="{raised["id"]}"] [data-evidence]'
        pg.wait_for_selector(button, timeout=15000)
        pg.click(button)
        pg.wait_for_selector("#dlg-evidence[open]")
        labels_js = "async () => (await import('/static/evidence.js')).evidenceLabels()"
        key = wait_for(lambda: [lb for lb in pg.evaluate(labels_js) if lb["kind"] == "legend"],
                       "the key of the evidence spectrum")
        assert key[0]["text"] == "then (at the event) / now"
        caption = pg.inner_text("#dlg-evidence figcaption")
        assert "solid" in caption and "dashed" in caption, caption
        assert_no_overlap(pg.evaluate(labels_js))
        screenshot(pg, "evidence-then-now")
        assert not errors, errors
    finally:
        pg.close()


def test_label_layout_gives_way_by_priority(demo: Service, page: tuple[Any, PageLog]) -> None:
    """labels.js on its own: three labels asking for the same place; the most important keeps
    it, the next moves to its first free place, the one with no free place is left out."""
    pg, log = page
    open_page(pg, demo.base_url + "/#/")
    placed = pg.evaluate("""async () => {
        const { Labels } = await import('/static/labels.js');
        const ctx = document.createElement('canvas').getContext('2d');
        const L = new Labels();
        const at = { x: 100, y: 50, size: 10, font: '10px sans-serif', fg: '#000', w: 40 };
        L.add({ ...at, text: 'low', kind: 'band', prio: 1 });
        L.add({ ...at, text: 'mid', kind: 'harmonic', prio: 5, moves: [[0, 0], [0, 20]] });
        L.add({ ...at, text: 'top', kind: 'peak', prio: 9 });
        return L.draw(ctx);
    }""")
    # a plain label's box: the text's width plus 1 px each side, 10 px font + 3 px tall,
    # its middle at y (labels.js boxOf)
    assert [(p["text"], p["x0"], p["y0"], p["w"], p["h"]) for p in placed] == [
        ("top", 99, 43.5, 42, 13),
        ("mid", 99, 63.5, 42, 13),
    ]
    assert_no_overlap(placed)
    assert not log.errors, log.errors
