"""The dashboard in a real browser against the demo service: loads cleanly, draws live
spectra, shows the REST values and states, recovers from a restart, handles alarms.

Drives headless Chromium through Playwright; knows only the public API and the page."""

from __future__ import annotations

import json
import math
import struct
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.signal

from tests.web.conftest import (
    DEMO_TOKEN,
    OPERATOR_TOKEN,
    VIEWER_TOKEN,
    PageLog,
    Service,
    screenshot,
    signed_in_as,
    wait_for,
)

pytestmark = pytest.mark.browser

STATE_WORDS = {"OK", "ALERT", "DANGER", "SENSOR FAULT", "LATCHED", "NO DATA", "GAP", "OVERRUN"}
# REST channel status → the word the dashboard must show when no alarm is active.
STATUS_WORD = {
    "ok": "OK",
    "no-data": "NO DATA",
    "gap": "GAP",
    "sensor-fault": "SENSOR FAULT",
    "overrun": "OVERRUN",
}
# Routes of the API contract that a service may not have yet (the page hides what needs them).
def half_unit(text: str) -> float:
    """Half a unit in the last displayed digit of a fixed-notation number ("5.80" → 0.005)."""
    decimals = len(text.split(".")[1]) if "." in text else 0
    return 0.5 * 10.0**-decimals


def fmt3(v: float) -> str:
    """The dashboard's rule for values: 3 significant digits, fixed notation (fmt.js fmtVal)."""
    digits = max(0, 2 - math.floor(math.log10(abs(v))))
    return f"{v:.{min(digits, 6)}f}"


def readout_hz(text: str) -> float:
    """Frequency from the spectrum read-out ("148.4 Hz (line 47) · …" or "2.35 kHz …")."""
    num, unit = text.split()[:2]
    return float(num) * (1000.0 if unit == "kHz" else 1.0)


def open_page(pg: Any, url: str) -> None:
    """Open the dashboard and wait until it has signed in and mounted its view (web/main.js
    init sets window.quaver once the service accepted the session's token)."""
    pg.goto(url, wait_until="domcontentloaded")
    pg.wait_for_function("window.quaver !== undefined", timeout=15000)


def cards_filled(pg: Any) -> bool:
    vals = pg.eval_on_selector_all(".card .overall", "els => els.map(e => e.textContent)")
    return bool(vals) and all(v not in ("", "—") for v in vals)


def canvas_digest(pg: Any, selector: str) -> dict[str, Any]:
    """Hash of a canvas's pixels and the count of dark (trace-coloured) pixels in it."""
    return pg.eval_on_selector(
        selector,
        """c => {
        const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data;
        let dark = 0, h = 2166136261 >>> 0;
        for (let i = 0; i < d.length; i += 4) {
            if (d[i] + d[i + 1] + d[i + 2] < 3 * 110) dark++;
            h = Math.imul(h ^ d[i] ^ (d[i + 1] << 8) ^ (d[i + 2] << 16), 16777619) >>> 0;
        }
        return {hash: h, dark, w: c.width, h: c.height};
    }""",
    )


# --- loading ---------------------------------------------------------------------------------


def test_page_loads_without_console_errors(demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    # Every profile of every channel has its first bands (before that the service answers
    # 503, which the browser logs as a console error): wait_all_channels waits for the
    # primary profiles only.
    for c in demo.wait_all_channels():
        for p in c["profiles"]:
            path = f"channels/{c['id']}/bands?profile={p['name']}"
            wait_for(lambda path=path: demo.status(path)[0] == 200, f"{path} to answer 200")
    open_page(pg, demo.base_url + "/")
    wait_for(lambda: cards_filled(pg), "every channel card to show an overall value")
    # let a few polls/stream messages and the event probes happen
    n0 = len(log.console)
    wait_for(
        lambda: pg.evaluate("window.quaver && window.quaver.live.conn") in ("live", "polling"),
        "the live link",
    )
    time.sleep(3)  # a few refresh cycles' worth of messages; nothing is asserted on time
    assert not log.errors, f"uncaught errors in the page: {log.errors}"
    # The browser logs a failed request as a console error: every route the page asks for
    # exists, so there is none.
    assert not log.console_errors(), f"console errors: {log.console_errors()}"
    assert len(log.console) >= n0
    # the cautions are on the page
    foot = pg.inner_text("#cautions")
    assert "not a machine-protection or safety system" in foot
    assert "qualified people" in foot
    screenshot(pg, "overview", full_page=True)


def test_channels_grouped_by_machine(demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, _ = page
    open_page(pg, demo.base_url + "/")
    wait_for(lambda: cards_filled(pg), "channel cards")
    rest = demo.get("channels")
    shown = pg.eval_on_selector_all(
        ".machine",
        "els => els.map(m => [m.dataset.machine,"
        " [...m.querySelectorAll('.card')].map(c => c.dataset.channel)])",
    )
    expected: dict[str, list[str]] = {}
    for c in rest:
        expected.setdefault(c["machine"], []).append(c["id"])
    assert dict(shown) == expected


# --- values and states -------------------------------------------------------------------------


def test_overall_on_screen_matches_rest(demo: Service, page: tuple[Any, PageLog]) -> None:
    """Each card shows the overall of the very frame the service reported (matched by seq),
    to display rounding; and a steady channel agrees with an independent REST read."""
    pg, _ = page
    seen: dict[tuple[str, int], float] = {}

    def on_response(resp: Any) -> None:
        if resp.url.endswith("/api/v1/channels") and resp.status == 200:
            try:
                for c in resp.json():
                    if c["latest"]:
                        seen[(c["id"], c["latest"]["seq"])] = c["latest"]["overall"]
            except Exception:  # a response body can be gone once the page navigates
                pass

    def on_ws(ws: Any) -> None:
        def frame(payload: Any) -> None:
            if isinstance(payload, str):
                m = json.loads(payload)
                if m.get("kind") == "status" and (m.get("latest") or {}).get("seq") is not None:
                    seen[(m.get("id") or m["channel"], m["latest"]["seq"])] = m["latest"]["overall"]
                # the plant view takes each channel's latest overall from its primary profile's
                # bands messages while the stream is open (web/README.md)
                if m.get("kind") == "bands" and m.get("profile") == primary.get(m["channel"]):
                    seen[(m["channel"], m["seq"])] = m["overall"]
                # and every channel's from the `overall` message (the cards off screen)
                if m.get("kind") == "overall":
                    for c in m["channels"]:
                        if c.get("seq") is not None:
                            seen[(c["id"], c["seq"])] = c["overall"]

        ws.on("framereceived", frame)

    primary = {c["id"]: c["profiles"][0]["name"] for c in demo.get("channels")}
    pg.on("response", on_response)
    pg.on("websocket", on_ws)
    open_page(pg, demo.base_url + "/")
    wait_for(lambda: cards_filled(pg), "channel cards")

    def read() -> list[dict[str, Any]]:
        # a tacho's card shows its speed, not an overall (test_dashboard_speed.py)
        return pg.eval_on_selector_all(
            ".card:not([data-kind=tacho])",
            """els => els.map(c => {
            const o = c.querySelector('.overall');
            return {id: c.dataset.channel, text: o.textContent, seq: Number(o.dataset.seq),
                    unit: c.querySelector('.unit').textContent};
        })""",
        )

    def all_matched() -> list[dict[str, Any]] | None:
        cards = read()
        return cards if all((c["id"], c["seq"]) in seen for c in cards) else None

    cards = wait_for(all_matched, "cards whose frames the page was seen receiving")
    rest = {c["id"]: c for c in demo.get("channels")}
    for c in cards:
        want = seen[(c["id"], c["seq"])]  # the service's own reply for that frame (REST or stream)
        shown = float(c["text"])
        assert abs(shown - want) <= half_unit(c["text"]) * (1 + 1e-9), (c, want)
        assert c["text"] == fmt3(want)
        assert c["unit"] == f"{rest[c['id']]['latest']['unit']} RMS"
    # An independent read of a channel the demo keeps steady (pump 2: no growing fault).
    # Frame-to-frame scatter of an 8-frame exponential average is well under 5 % there
    # (seen on the demo; from memory, not a published figure).
    text = pg.eval_on_selector('.card[data-channel="p2-de-h"] .overall', "e => e.textContent")
    now = demo.get("channels")
    p2 = next(c for c in now if c["id"] == "p2-de-h")["latest"]["overall"]
    assert abs(float(text) - p2) <= 0.05 * p2


def test_state_is_shown_as_text_and_shape(demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, _ = page
    open_page(pg, demo.base_url + "/")
    wait_for(lambda: cards_filled(pg), "channel cards")
    wait_for(
        lambda: all(
            pg.eval_on_selector_all(".card", "els => els.map(e => e.dataset.state !== 'unknown')")
        ),
        "a state on every card",
    )
    badges = pg.eval_on_selector_all(
        ".card",
        """els => els.map(c => ({
        id: c.dataset.channel, word: c.querySelector('.badge .word').textContent,
        shape: !!c.querySelector(
            '.badge svg.glyph path, .badge svg.glyph circle, .badge svg.glyph rect'),
        title: c.querySelector('.badge').title}))""",
    )
    rest = {c["id"]: c for c in demo.get("channels")}
    alarms = demo.get("alarms")
    for b in badges:
        assert b["word"] in STATE_WORDS, b
        assert b["shape"], f"{b['id']}: the state has no shape"
        assert b["title"], f"{b['id']}: the state has no explanation"
        active = [a for a in alarms if a["channel"] == b["id"] and a["state"] != "normal"]
        if not active:
            assert b["word"] == STATUS_WORD[rest[b["id"]]["status"]], (b, rest[b["id"]]["status"])
    # The channel page says it too.
    open_page(pg, demo.base_url + "/#/channel/p2-de-h")
    wait_for(lambda: pg.inner_text("#ch-badge").strip() in STATE_WORDS, "the channel's state word")


# --- the spectrum --------------------------------------------------------------------------------


def test_spectrum_draws_and_changes(demo: Service, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    open_page(pg, demo.base_url + "/#/channel/p1-de-h")
    first = wait_for(
        lambda: (d := canvas_digest(pg, "#spec"))["dark"] > 2000 and d,
        "the spectrum trace to be drawn",
    )
    # a live spectrum changes: wait for different pixels (bounded)
    wait_for(lambda: canvas_digest(pg, "#spec")["hash"] != first["hash"], "the spectrum to change")
    # the spectrogram fills with rows
    wait_for(lambda: canvas_digest(pg, "#sgram")["dark"] > 200, "the spectrogram to show rows")
    assert not log.errors, log.errors
    screenshot(pg, "channel", full_page=True)


@pytest.mark.parametrize("log_f", [False, True])
def test_column_extremes_keep_every_line(
    demo: Service, page: tuple[Any, PageLog], log_f: bool
) -> None:
    """Drawing 6400 lines in ~1000 pixel columns keeps each column's min and max exactly
    (numpy min/max over the lines whose frequency falls in the column), so no tone is lost."""
    pg, _ = page
    open_page(pg, demo.base_url + "/#/")
    rng = np.random.default_rng(11)
    n, df, width = 6401, 0.78125, 997
    values = (1e-3 * (1 + rng.random(n))).astype(np.float32)
    spikes = rng.choice(n, 12, replace=False)
    values[spikes] = 1.0
    lo_hz, hi_hz = (df, (n - 1) * df) if log_f else (0.0, (n - 1) * df)
    got = pg.evaluate(
        """async ([vals, df, W, lo, hi, logF]) => {
        const s = await import('/static/spectrum.js');
        const p = await import('/static/plot.js');
        const xs = new p.Scale(logF).set(lo, hi, 0, W);
        const e = s.columnExtremes(Float32Array.from(vals), 0, df, xs, W);
        return {x: Array.from(e.x.subarray(0, e.count)), lo: Array.from(e.lo.subarray(0, e.count)),
                hi: Array.from(e.hi.subarray(0, e.count)),
                edges: Array.from({length: W + 1}, (_, i) => xs.val(i))};
    }""",
        [values.tolist(), df, width, lo_hz, hi_hz, log_f],
    )
    edges = np.asarray(got["edges"])
    f = np.arange(n) * df
    # reference: numpy min/max over the lines whose frequency falls in each pixel column
    want_lo, want_hi = [], []
    last = len(edges) - 2
    for i, (a, b) in enumerate(zip(edges[:-1], edges[1:], strict=True)):
        right = f <= b + 1e-9 * df if i == last else f < b - 1e-9 * df  # the last column is closed
        sel = values[(f >= a - 1e-9 * df) & right]
        if sel.size:
            want_lo.append(sel.min())
            want_hi.append(sel.max())
    assert len(got["hi"]) == len(want_hi)
    assert np.array_equal(np.asarray(got["hi"], np.float32), np.asarray(want_hi, np.float32))
    assert np.array_equal(np.asarray(got["lo"], np.float32), np.asarray(want_lo, np.float32))
    in_view = spikes[(f[spikes] >= lo_hz) & (f[spikes] <= hi_hz)]
    assert np.sum(np.asarray(got["hi"]) == 1.0) >= len(
        set(np.searchsorted(edges, f[in_view], "right"))
    )


def test_spectrum_zoom_pan_and_keys(demo: Service, page: tuple[Any, PageLog]) -> None:
    """Wheel zooms in about the cursor, keys pan and reset; the view stays inside 0…Fmax."""
    pg, _ = page
    open_page(pg, demo.base_url + "/#/channel/p2-de-h")
    wait_for(lambda: canvas_digest(pg, "#spec")["dark"] > 2000, "the spectrum")
    spec = demo.get("channels/p2-de-h/spectrum")
    fmax = spec["f0_hz"] + (len(spec["values"]) - 1) * spec["df_hz"]
    # the page exposes no view API; read it back through the hover read-out instead
    box = pg.locator("#spec").bounding_box()
    x, y = box["x"] + box["width"] * 0.5, box["y"] + box["height"] * 0.5
    pg.mouse.move(x, y)
    before = wait_for(lambda: pg.inner_text("#readout"), "a hover read-out")
    f_before = readout_hz(before)
    for _ in range(6):
        pg.mouse.wheel(0, -240)
    pg.mouse.move(x + 40, y)
    after = pg.inner_text("#readout")
    f_after = readout_hz(after)
    # zoomed in: 40 px now spans far fewer Hz than the whole-range 40 px would
    whole_40px = fmax / (box["width"] - 72) * 40
    assert 0 < f_after - f_before < whole_40px / 2, (before, after)
    pg.focus("#spec")
    pg.keyboard.press("0")
    pg.keyboard.press("l")
    pg.wait_for_function(
        "() => document.querySelector('[data-ya=lin]').getAttribute('aria-pressed') === 'true'"
    )
    pg.keyboard.press("l")
    pg.wait_for_function(
        "() => document.querySelector('[data-ya=log]').getAttribute('aria-pressed') === 'true'"
    )


def test_hover_reads_the_frame_on_screen(demo: Service, page: tuple[Any, PageLog]) -> None:
    """Held still, the hover read-out gives the value of the very frame the service sent for
    that line (decoded here from the captured stream or REST reply), to display rounding."""
    pg, _ = page
    frames: dict[int, tuple[float, float, np.ndarray]] = {}

    def on_ws(ws: Any) -> None:
        def frame(payload: Any) -> None:
            if isinstance(payload, bytes | bytearray):
                (n,) = struct.unpack_from("<I", payload, 0)
                h = json.loads(payload[4 : 4 + n])
                v = np.frombuffer(bytes(payload[4 + n : 4 + n + 4 * h["count"]]), dtype="<f4")
                if h["channel"] == "p2-de-h":
                    frames[h["seq"]] = (h["f0_hz"], h["df_hz"], v)

        ws.on("framereceived", frame)

    def on_response(resp: Any) -> None:
        if "/channels/p2-de-h/spectrum" in resp.url and resp.status == 200:
            try:
                j = resp.json()
                frames[j["seq"]] = (j["f0_hz"], j["df_hz"], np.asarray(j["values"], dtype="<f4"))
            except Exception:  # body gone after navigation
                pass

    pg.on("websocket", on_ws)
    pg.on("response", on_response)
    open_page(pg, demo.base_url + "/#/channel/p2-de-h")
    wait_for(lambda: canvas_digest(pg, "#spec")["dark"] > 2000, "the spectrum")
    pg.click("#btn-hold")
    seq = int(wait_for(lambda: pg.get_attribute("#spec", "data-seq"), "the frame's seq"))
    wait_for(lambda: seq in frames, "the held frame among those the page received")
    f0, df, values = frames[seq]
    box = pg.locator("#spec").bounding_box()
    checked = 0
    for frac in (0.05, 0.2, 0.5, 0.8):
        pg.mouse.move(box["x"] + 58 + (box["width"] - 72) * frac, box["y"] + box["height"] / 2)
        text = wait_for(lambda: pg.inner_text("#readout"), "a hover read-out")
        q = int(text.split("(line ")[1].split(")")[0])
        shown = text.split(" · ")[-1].split()[0]
        assert readout_hz(text) == pytest.approx(f0 + q * df, abs=0.0005)
        # the frame as decoded here from the bytes the service sent (wire format: docs/api.md)
        assert abs(float(shown) - float(values[q])) <= half_unit(shown) * (1 + 1e-6), (
            text,
            values[q],
        )
        assert text.endswith("mm/s RMS")
        checked += 1
    assert pg.get_attribute("#spec", "data-seq") == str(seq)  # held: still the same frame
    assert checked == 4


# A WebSocket that never opens, as behind a proxy that refuses upgrades.
NO_SOCKET = """
window.WebSocket = class {
    constructor(url) {
        this.url = url;
        this.readyState = 0;
        setTimeout(() => {
            this.readyState = 3;
            this.onerror && this.onerror(new Event("error"));
            this.onclose && this.onclose(new CloseEvent("close", {code: 1006}));
        }, 20);
    }
    send() { throw new Error("not open"); }
    close() {}
};
"""


def test_falls_back_to_polling_without_a_socket(demo: Service, browser: Any) -> None:
    """When the stream cannot open, the page says so and keeps the spectrum live over REST."""
    pg = browser.new_page()
    signed_in_as(pg, DEMO_TOKEN)
    errors: list[str] = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    try:
        pg.add_init_script(NO_SOCKET)
        open_page(pg, demo.base_url + "/#/channel/p2-de-h")
        wait_for(lambda: pg.get_attribute("#conn", "data-conn") == "polling", "the polling state")
        assert "polling" in pg.inner_text("#conn")
        first = wait_for(
            lambda: (d := canvas_digest(pg, "#spec"))["dark"] > 2000 and d, "the spectrum"
        )
        seq = pg.get_attribute("#spec", "data-seq")
        wait_for(lambda: pg.get_attribute("#spec", "data-seq") != seq, "a newer spectrum over REST")
        wait_for(
            lambda: canvas_digest(pg, "#spec")["hash"] != first["hash"], "the spectrum to change"
        )
        assert not errors, errors
    finally:
        pg.close()


# --- reconnection -------------------------------------------------------------------------------


def test_reconnects_after_service_restart(own_service: Any, page: tuple[Any, PageLog]) -> None:
    svc: Service = own_service()
    svc.wait_all_channels()
    pg, _ = page
    open_page(pg, svc.base_url + "/")
    wait_for(lambda: cards_filled(pg), "channel cards")
    wait_for(lambda: pg.get_attribute("#conn", "data-conn") in ("live", "polling"), "the live link")
    svc.stop()
    wait_for(
        lambda: pg.get_attribute("#conn", "data-conn") == "reconnecting",
        "the reconnecting state",
        20,
    )
    assert "reconnecting" in pg.inner_text("#conn")
    assert pg.is_visible("#banner") and "reconnecting" in pg.inner_text("#banner")
    screenshot(pg, "reconnecting", full_page=True)
    seq_before = pg.get_attribute('.card[data-channel="p2-de-h"] .overall', "data-seq")
    svc.start()
    wait_for(lambda: pg.get_attribute("#conn", "data-conn") in ("live", "polling"), "recovery", 30)
    assert not pg.is_visible("#banner")
    # and values flow again
    wait_for(
        lambda: (
            pg.get_attribute('.card[data-channel="p2-de-h"] .overall', "data-seq") != seq_before
        ),
        "a fresh value after the restart",
        20,
    )


# --- the line filter (the window response from GET /windows, as the dialog asks for it) -----------


def _dtft_db(w: np.ndarray, nu: np.ndarray) -> np.ndarray:
    n = w.size
    k = np.arange(n)
    W = np.exp(-2j * np.pi * np.outer(nu, k) / n) @ w
    return 20 * np.log10(np.maximum(np.abs(W) / w.sum(), 1e-300))


@pytest.mark.parametrize(
    "window,scipy_name",
    [
        ("hann", "hann"),
        ("hamming", "hamming"),
        ("blackman-harris", "blackmanharris"),
        ("flattop", "flattop"),
        ("rectangular", "boxcar"),
        ("kaiser", ("kaiser", 8.6)),
    ],
)
def test_line_filter_matches_scipy_window(
    demo: Service, page: tuple[Any, PageLog], window: str, scipy_name: Any
) -> None:
    """The line-filter dialog's response (what lineResponse fetches for it) equals the
    transform of scipy's periodic window."""
    pg, _ = page
    open_page(pg, demo.base_url + "/#/")
    n, span, ppl = 512, 6, 8
    got = pg.evaluate(f"""async () => {{
        const m = await import('/static/filterview.js');
        const r = await m.lineResponse({json.dumps(window)}, {n}, {span}, {ppl});
        return {{off: Array.from(r.offset_bins), db: Array.from(r.gain_db), enbw: r.enbw_bins}};
    }}""")
    w = scipy.signal.get_window(scipy_name, n, fftbins=True)  # scipy.signal.get_window
    nu = np.asarray(got["off"])
    assert np.allclose(nu, np.arange(-span * ppl, span * ppl + 1) / ppl)
    want = _dtft_db(w, nu)
    db = np.asarray(got["db"])
    keep = want > -140  # below that both are rounding noise
    assert np.max(np.abs(db[keep] - want[keep])) < 1e-6
    assert got["enbw"] == pytest.approx(n * np.sum(w**2) / np.sum(w) ** 2, rel=1e-12)


def test_unknown_window_is_named(demo: Service, page: tuple[Any, PageLog]) -> None:
    """A window outside the catalogue is refused (422) with the allowed ones named."""
    pg, _ = page
    open_page(pg, demo.base_url + "/#/")
    got = pg.evaluate("""async () => {
        const m = await import('/static/filterview.js');
        try { await m.lineResponse('hanning', 64, 8, 16); return null; }
        catch (e) { return {status: e.status, detail: e.detail}; }
    }""")
    assert got is not None and got["status"] == 422, got
    for name in ("rectangular", "hann", "hamming", "blackman-harris", "flattop", "kaiser"):
        assert f"'{name}'" in got["detail"], got


def test_line_filter_dialog_hann_figures(demo: Service, page: tuple[Any, PageLog]) -> None:
    """The dialog's figures for the demo's Hann window agree with Harris 1978, Table 1:
    ENBW 1.50 bins, 3 dB bandwidth 1.44 bins, scalloping loss 1.42 dB, highest sidelobe −32 dB."""
    pg, _ = page
    open_page(pg, demo.base_url + "/#/channel/p1-de-h")
    wait_for(lambda: canvas_digest(pg, "#spec")["dark"] > 2000, "the spectrum")
    wait_for(lambda: "hann" in pg.inner_text("#ch-facts"), "the analysis facts")
    pg.click("#btn-filter")
    pg.wait_for_selector("#dlg-filter[open]")
    wait_for(lambda: "ENBW" in pg.inner_text("#flt-facts"), "the filter figures")
    facts = dict(
        zip(
            pg.eval_on_selector_all("#flt-facts dt", "e => e.map(x => x.textContent)"),
            pg.eval_on_selector_all("#flt-facts dd", "e => e.map(x => x.textContent)"),
            strict=True,
        )
    )
    assert facts["ENBW"].startswith("1.50 lines")  # Harris 1978 Table 1: 1.50 bins
    assert float(facts["−3 dB width"].split()[0]) == pytest.approx(
        1.44, abs=0.01
    )  # Harris 1978: 1.44
    assert float(facts["scalloping loss"].split()[0]) == pytest.approx(
        1.42, abs=0.01
    )  # Harris 1978: 1.42
    assert float(facts["highest sidelobe"].split()[0]) == pytest.approx(
        -31.5, abs=0.5
    )  # Harris 1978: −32
    assert canvas_digest(pg, "#flt-plot")["dark"] > 300
    screenshot(pg, "line-filter")


# --- the binary spectrum message -----------------------------------------------------------------


@pytest.mark.parametrize("pad", [0, 1, 2, 3])
def test_binary_spectrum_decoding(demo: Service, page: tuple[Any, PageLog], pad: int) -> None:
    """A stream message (u32 LE header length, JSON header, float32 LE values) decodes to the
    same numbers whatever the header length's alignment (the wire format in docs/api.md)."""
    pg, _ = page
    open_page(pg, demo.base_url + "/#/")
    rng = np.random.default_rng(5)
    values = rng.standard_normal(6401).astype("<f4")
    header = {
        "kind": "spectrum",
        "channel": "p1-de-h",
        "seq": 7,
        "timestamp_ns": 1,
        "f0_hz": 0.0,
        "df_hz": 0.78125,
        "unit": "mm/s",
        "amplitude": "rms",
        "count": values.size,
        "missed": 0,
        "pad": "x" * pad,
    }
    hb = json.dumps(header).encode()
    msg = struct.pack("<I", len(hb)) + hb + values.tobytes()
    got = pg.evaluate(
        """async (b) => {
        const m = await import('/static/live.js');
        const u = Uint8Array.from(atob(b), c => c.charCodeAt(0));
        const r = m.decodeSpectrum(u.buffer);
        return {h: r.header, v: Array.from(r.values)};
    }""",
        __import__("base64").b64encode(msg).decode(),
    )
    assert got["h"]["count"] == values.size and got["h"]["df_hz"] == 0.78125
    assert np.array_equal(np.asarray(got["v"], dtype="<f4"), values)


# --- alarms (need the alarm API) -----------------------------------------------------------------


def test_sign_in_ack_with_the_operator_token_and_sign_out(
    own_service: Any, browser: Any
) -> None:
    """With tokens configured the page asks for one before it reads anything; a wrong token
    is refused (401), a viewer signs in ("signed in as ... (viewer)") and sees the demo's
    alarm but may not acknowledge it (403); the operator token does; sign-out asks again.
    The token rides in a header and in the WebSocket subprotocol, never in a URL."""
    svc: Service = own_service(speed=6.0, tokens=True)
    svc.wait_all_channels()
    pg = browser.new_page()  # no token kept: a first visit
    errors: list[str] = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    urls: list[str] = []
    pg.on("request", lambda r: urls.append(r.url))
    sockets: list[Any] = []
    pg.on("websocket", lambda ws: sockets.append(ws))
    try:
        pg.goto(svc.base_url + "/", wait_until="domcontentloaded")
        pg.wait_for_selector("#dlg-signin[open]")
        assert "asks for a token" in pg.inner_text("#signin-why")
        assert not pg.is_visible("#who")
        pg.fill("#signin-token", "not-a-token")
        pg.click("#signin-submit")
        wait_for(lambda: "401" in pg.inner_text("#signin-msg"), "the refusal of a wrong token")
        assert pg.evaluate("sessionStorage.getItem('quaver.token')") is None

        pg.fill("#signin-token", VIEWER_TOKEN)
        with pg.expect_navigation():
            pg.click("#signin-submit")
        pg.wait_for_selector("#who:not([hidden])")
        assert pg.inner_text("#who-text") == "signed in as web-test-viewer (viewer)"
        assert pg.evaluate("sessionStorage.getItem('quaver.token')") == VIEWER_TOKEN
        assert pg.evaluate("localStorage.length") == 0  # the browser session only
        wait_for(lambda: cards_filled(pg), "the plant cards, read with the token")
        wait_for(lambda: pg.get_attribute("#conn", "data-conn") == "live", "the live stream")

        sel = "#ov-alarm-list li[data-state=alert], #ov-alarm-list li[data-state=danger]"
        wait_for(lambda: pg.query_selector(sel), "an alarm from the demo's growing fault", 50)
        rule = pg.get_attribute(sel, "data-rule")
        pg.click(f'#ov-alarm-list li[data-rule="{rule}"] [data-ack]')
        pg.wait_for_selector("#dlg-ack[open]")
        assert not pg.is_visible("#ack-token")  # signed in: the session's token is used
        pg.fill("#ack-note", "web test: seen")
        pg.click("#ack-submit")
        wait_for(lambda: "403" in pg.inner_text("#ack-msg"), "the refusal of a viewer token")
        assert not any(a["rule"] == rule and a.get("acked") for a in svc.get("alarms"))
        assert pg.is_visible("#ack-token")  # another token is asked for
        pg.fill("#ack-token", OPERATOR_TOKEN)
        pg.click("#ack-submit")
        wait_for(lambda: not pg.is_visible("#dlg-ack"), "the dialog to close after success")
        wait_for(
            lambda: all(
                a.get("acked") or a["state"] == "normal"
                for a in svc.get("alarms")
                if a["rule"] == rule
            ),
            "the acknowledgement at the service",
        )
        assert pg.evaluate("sessionStorage.getItem('quaver.token')") == OPERATOR_TOKEN
        wait_for(lambda: pg.inner_text("#who-text") == "signed in as web-test-operator (operator)",
                 "the header naming the operator")

        with pg.expect_navigation():
            pg.click("#signout")
        pg.wait_for_selector("#dlg-signin[open]")
        assert pg.evaluate("sessionStorage.getItem('quaver.token')") is None
        assert not pg.is_visible("#who")
        assert sockets and all("token" not in ws.url for ws in sockets)
        assert not [u for u in urls if VIEWER_TOKEN in u or OPERATOR_TOKEN in u]
        assert not errors, errors
    finally:
        pg.close()


def test_event_log_and_evidence(own_service: Any, page: tuple[Any, PageLog]) -> None:
    """An alarm's raising event is in the log; its evidence shows the spectrum kept then."""
    svc: Service = own_service(speed=6.0)
    svc.wait_all_channels()
    pg, log = page

    def raising() -> dict[str, Any] | None:
        evs = svc.get("events", limit=50)["events"]
        return next((e for e in evs if e["to_state"] in ("alert", "danger")), None)

    ev = wait_for(raising, "a raising event", 50)
    open_page(pg, svc.base_url + "/#/events")
    pg.wait_for_selector(f'tr[data-event="{ev["id"]}"] [data-evidence]', timeout=15000)
    pg.click(f'tr[data-event="{ev["id"]}"] [data-evidence]')
    pg.wait_for_selector("#dlg-evidence[open]")
    wait_for(lambda: canvas_digest(pg, "#ev-spec")["dark"] > 1000, "the evidence spectrum")
    links = pg.eval_on_selector_all("#ev-downloads a", "e => e.map(a => a.getAttribute('href'))")
    assert any("format=wav" in h for h in links) and any("format=csv" in h for h in links)
    assert svc.client.get(links[0]).status_code == 200
    # the demo asks for a token, which a plain link cannot carry: the page fetches it
    with pg.expect_download() as got:
        pg.click('#ev-downloads a[href*="format=wav"]')
    wav = Path(got.value.path()).read_bytes()
    assert wav[:4] == b"RIFF" and wav[8:12] == b"WAVE", wav[:16]
    screenshot(pg, "evidence")
    assert not log.errors, log.errors


def test_live_alarm_push_arrives_without_polling(
    own_service: Any, page: tuple[Any, PageLog]
) -> None:
    """Issue 15 item 6: stream alarm messages carried the event's kind ("transition", "ack")
    instead of "alarm", so the page never heard them and polled /events every 5 s. Now the
    events page asks /events only after an alarm message arrives: an acknowledgement made
    elsewhere shows up in its table, and no /events request came before the push."""
    svc: Service = own_service(speed=6.0)
    svc.wait_all_channels()
    active = wait_for(lambda: svc.get("alarms"), "an alarm from the demo's growing fault", 50)
    pg, log = page
    seen: list[tuple[str, Any]] = []  # in arrival order: ("push", event) / ("poll", url)

    def on_ws(ws: Any) -> None:
        def frame(payload: Any) -> None:
            if isinstance(payload, str):
                m = json.loads(payload)
                if m["kind"] == "alarm":
                    seen.append(("push", m))

        ws.on("framereceived", frame)

    pg.on("websocket", on_ws)
    pg.on("request", lambda r: "/api/v1/events" in r.url and seen.append(("poll", r.url)))
    open_page(pg, svc.base_url + "/#/events")
    wait_for(lambda: pg.get_attribute("#conn", "data-conn") == "live", "the live stream")
    pg.wait_for_selector("tr[data-event]", timeout=15000)
    pg.wait_for_load_state("networkidle")  # the first loads are done
    seen.clear()
    pg.wait_for_timeout(6000)  # longer than the old 5 s poll
    assert_fetched_only_after_a_push(seen)
    seen.clear()
    unacked = next(a for a in active if not a.get("acked"))
    r = svc.client.post(f"/api/v1/alarms/{unacked['rule']}/ack", json={"note": "web push"})
    assert r.status_code == 200, r.text  # the demo harness token is its operator's
    ev = r.json()
    pg.wait_for_selector(f'tr[data-event="{ev["id"]}"]', timeout=15000)
    pushes = [m for kind, m in seen if kind == "push"]
    assert any(m["id"] == ev["id"] and m["event_kind"] == "ack" for m in pushes), pushes
    assert_fetched_only_after_a_push(seen)
    assert not log.errors, log.errors


def assert_fetched_only_after_a_push(seen: list[tuple[str, Any]]) -> None:
    """Each /events request in ``seen`` answers an alarm message before it: at every point
    there have been at least as many messages as requests (a poll would be one extra)."""
    pushes = polls = 0
    for kind, what in seen:
        pushes += kind == "push"
        polls += kind == "poll"
        assert polls <= pushes, f"/events asked with no alarm message to answer: {what}"


def test_no_page_asks_anything_beyond_the_service(demo: Service, page: tuple[Any, PageLog]) -> None:
    """Issue 15 item 10: /docs was blank without internet (Swagger UI from a CDN) and /redoc
    fetched web fonts. Every page — the dashboard's views and both API docs — now renders
    with each request going to the service itself (the browser context refuses anything
    else, so a stray request would also leave a page half drawn)."""
    pg, log = page
    base = demo.base_url
    asked: list[str] = []
    pg.on("request", lambda r: asked.append(r.url))
    for path in ("/", "/#/events", "/#/channel/p1-de-h"):
        open_page(pg, base + path)
        pg.wait_for_load_state("networkidle")
    pg.goto(base + "/docs", wait_until="domcontentloaded")
    pg.wait_for_selector(".swagger-ui .info .title", timeout=15000)
    assert "quaver" in pg.inner_text(".swagger-ui .info .title")
    # the operations: the spec was read with the kept token
    pg.wait_for_selector(".opblock-summary-path", timeout=15000)
    pg.goto(base + "/redoc", wait_until="domcontentloaded")
    pg.wait_for_selector("#redoc h1", timeout=30000)
    assert "quaver" in pg.inner_text("#redoc h1")
    pg.wait_for_load_state("networkidle")
    outside = [u for u in asked if not (u.startswith(base + "/") or u.startswith("data:")
                                         or u.startswith("blob:"))]
    assert outside == [], outside
    assert any(u.startswith(base + "/docs-assets/") for u in asked)
    assert not log.errors, log.errors


def test_a_token_link_signs_in_at_once_and_leaves_no_token_in_the_address(
    demo: Service, browser: Any
) -> None:
    """`quaver demo` prints …/#token=T: opening it signs in without the prompt, keeps the token
    for the session only, and the fragment (never sent to a server) is taken out of the
    address bar straight away."""
    pg = browser.new_page()  # no token kept: a first visit
    try:
        pg.goto(f"{demo.base_url}/#token=quaver-demo-operator", wait_until="domcontentloaded")
        pg.wait_for_function("window.quaver !== undefined", timeout=15000)
        assert "token=" not in pg.url
        assert not pg.is_visible("#dlg-signin[open]")
        assert pg.evaluate("Object.values(sessionStorage)") == ["quaver-demo-operator"]
    finally:
        pg.close()
