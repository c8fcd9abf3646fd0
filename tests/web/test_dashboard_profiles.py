"""The channel view's analysis profiles in a real browser against the demo service: the
profile chosen drives the spectrum, its caption, bands, trend, the stream and the URL.

Drives headless Chromium through Playwright; knows only the public API and the page."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest

from tests.web.conftest import PageLog, Service, wait_for

pytestmark = pytest.mark.browser

CHANNEL = "p1-de-h"
# The demo's profiles (service/examples/demo.toml): "wide" is [analysis] (Fmax 5 kHz, 1600
# lines) on the 12.8 kHz stream; "narrow" asks Fmax 500 Hz, 1600 lines, and runs on the
# stream decimated by 10.
STREAM_FS_HZ = 12800.0
WIDE_FMAX_HZ, NARROW_FMAX_HZ, LINES, NARROW_DECIMATION = 5000.0, 500.0, 1600, 10
# Line spacing is Fmax / lines (common practice), and equally fs / N for an N-point transform
# at the analysed rate with N = 2.56 × lines (common practice: fs = 2.56 × Fmax).
WIDE_DF_HZ = WIDE_FMAX_HZ / LINES
NARROW_DF_HZ = NARROW_FMAX_HZ / LINES
assert NARROW_DF_HZ == STREAM_FS_HZ / NARROW_DECIMATION / (2.56 * LINES)  # 0.3125 Hz
assert WIDE_DF_HZ == STREAM_FS_HZ / (2.56 * LINES)  # 3.125 Hz


def open_channel(pg: Any, demo: Service, query: str = "") -> None:
    pg.goto(f"{demo.base_url}/#/channel/{CHANNEL}{query}", wait_until="domcontentloaded")


def on_screen(pg: Any) -> dict[str, Any] | None:
    """The spectrum the channel view holds (window.quaver.view, what the plot draws)."""
    return pg.evaluate("window.quaver && window.quaver.view && window.quaver.view.spectrum()")


def pressed_profile(pg: Any) -> str | None:
    return pg.evaluate(
        "(document.querySelector('#seg-profile [aria-pressed=true]') || {}).textContent || null"
    )


def same_frame_as_rest(pg: Any, demo: Service, profile: str | None) -> tuple[dict, dict]:
    """Wait until the frame on screen is one that GET …/spectrum also returned (same seq);
    ``profile`` None asks REST for the default (primary) profile."""
    rest: dict[int, dict[str, Any]] = {}

    def probe() -> tuple[dict, dict] | None:
        shown = on_screen(pg)
        if not shown:
            return None
        params = {} if profile is None else {"profile": profile}
        j = demo.get(f"channels/{CHANNEL}/spectrum", **params)
        rest[j["seq"]] = j
        return (shown, rest[shown["seq"]]) if shown["seq"] in rest else None

    return wait_for(probe, f"a frame on screen that REST also served ({profile})", 30)


def assert_same_spectrum(shown: dict[str, Any], rest: dict[str, Any]) -> None:
    """The page's frame equals the REST one line for line (float32 on the wire: docs/api.md)."""
    assert shown["profile"] == rest["profile"]
    assert shown["f0_hz"] == rest["f0_hz"] and shown["df_hz"] == rest["df_hz"]
    want = np.array([np.nan if v is None else v for v in rest["values"]], dtype=np.float32)
    got = np.asarray(shown["values"], dtype=np.float64).astype(np.float32)
    assert got.shape == want.shape == (rest["lines"] + 1,)
    np.testing.assert_array_equal(got, want)


def test_switching_to_narrow_and_back(
    demo: Service, page: tuple[Any, PageLog], tmp_path_factory: pytest.TempPathFactory
) -> None:
    pg, log = page
    sent: list[dict[str, Any]] = []
    asked: list[str] = []

    def on_ws(ws: Any) -> None:
        def frame(payload: Any) -> None:
            if isinstance(payload, str):
                sent.append(json.loads(payload))

        ws.on("framesent", frame)

    def on_request(r: Any) -> None:
        if "/api/v1/channels/" in r.url:
            asked.append(r.url)

    pg.on("websocket", on_ws)
    pg.on("request", on_request)
    open_channel(pg, demo)
    wait_for(lambda: pressed_profile(pg) == "wide", "the profile buttons, primary pressed")
    names = pg.eval_on_selector_all("#seg-profile button", "b => b.map(x => x.textContent)")
    assert names == [p["name"] for p in demo.get(f"channels/{CHANNEL}")["profiles"]]
    shown, rest = same_frame_as_rest(pg, demo, None)
    assert shown["profile"] == "wide" and shown["df_hz"] == WIDE_DF_HZ
    assert_same_spectrum(shown, rest)

    # --- narrow ---------------------------------------------------------------------------
    n_sent = len(sent)
    pg.click("#seg-profile [data-profile=narrow]")
    wait_for(lambda: (on_screen(pg) or {}).get("profile") == "narrow", "the narrow spectrum")
    # (a) the spectrum drawn is the narrow one: the same numbers REST serves for that frame
    shown, rest = same_frame_as_rest(pg, demo, "narrow")
    assert_same_spectrum(shown, rest)
    assert rest["df_hz"] == NARROW_DF_HZ and rest["fmax_hz"] == NARROW_FMAX_HZ
    view = pg.evaluate("window.quaver.view.view()")
    assert view["hi"] == pytest.approx(NARROW_FMAX_HZ, rel=1e-12)  # the whole range shown
    assert float(pg.get_attribute("#spec", "data-df-hz")) == NARROW_DF_HZ
    # re-subscribed to the narrow profile only (the stream's subscribe message: docs/api.md)
    subs = [m["subscribe"] for m in sent[n_sent:] if "subscribe" in m]
    assert subs and subs[-1]["profiles"] == ["narrow"] and subs[-1]["channels"] == [CHANNEL]
    # (b) the caption under the spectrum: Fmax, lines, Δf and the decimation
    cap = wait_for(lambda: "0.3125" in (t := pg.inner_text("#spec-cap")) and t, "the caption")
    assert "Fmax 500 Hz" in cap and "Δf 0.3125 Hz" in cap and f"{LINES} lines" in cap, cap
    assert f"decimated ×{NARROW_DECIMATION}" in cap, cap
    assert float(pg.get_attribute("#spec-cap", "data-df-hz")) == NARROW_DF_HZ
    assert float(pg.get_attribute("#spec-cap", "data-fmax-hz")) == NARROW_FMAX_HZ
    # bands and trend follow: the narrow profile's bands (no third-octave ones), REST asked
    # with ?profile=narrow
    want_bands = [
        b["name"] for b in demo.get(f"channels/{CHANNEL}/bands", profile="narrow")["bands"]
    ]
    wait_for(
        lambda: (
            pg.evaluate("window.quaver.view.bands()") == {"profile": "narrow", "names": want_bands}
        ),
        "the narrow profile's bands on the page",
    )
    assert not pg.is_visible("#thirds")
    wait_for(
        lambda: any("/trend?" in u and "profile=narrow" in u for u in asked),
        "a trend request for the narrow profile",
    )
    shot = tmp_path_factory.mktemp("shots") / "channel-narrow.png"
    pg.screenshot(path=str(shot), full_page=True)
    assert shot.stat().st_size > 0

    # (c) the URL keeps the choice and a reload restores it
    assert pg.evaluate("location.hash") == f"#/channel/{CHANNEL}?profile=narrow"
    pg.reload(wait_until="domcontentloaded")
    wait_for(lambda: pressed_profile(pg) == "narrow", "narrow pressed after the reload")
    shown, rest = same_frame_as_rest(pg, demo, "narrow")
    assert_same_spectrum(shown, rest)
    wait_for(lambda: "Δf 0.3125 Hz" in pg.inner_text("#spec-cap"), "the caption after reload")

    # (d) back to wide: the wide spectrum, the plain URL
    pg.click("#seg-profile [data-profile=wide]")
    wait_for(lambda: (on_screen(pg) or {}).get("profile") == "wide", "the wide spectrum again")
    shown, rest = same_frame_as_rest(pg, demo, "wide")
    assert_same_spectrum(shown, rest)
    assert rest["df_hz"] == WIDE_DF_HZ and rest["fmax_hz"] == WIDE_FMAX_HZ
    assert pg.evaluate("window.quaver.view.view()")["hi"] == pytest.approx(WIDE_FMAX_HZ)
    assert "Δf 3.125 Hz" in pg.inner_text("#spec-cap")
    assert "decimated" not in pg.inner_text("#spec-cap")
    assert pg.evaluate("location.hash") == f"#/channel/{CHANNEL}"
    assert not log.errors, log.errors


def test_overview_keeps_the_primary_profile(demo: Service, page: tuple[Any, PageLog]) -> None:
    """After a narrow channel view, the plant view's bands are the primary profile's."""
    pg, log = page
    open_channel(pg, demo, "?profile=narrow")
    wait_for(lambda: (on_screen(pg) or {}).get("profile") == "narrow", "the narrow spectrum")
    wait_for(
        lambda: pg.evaluate(f"window.quaver.store.bands.has('{CHANNEL}|narrow')"),
        "a narrow bands message",
    )
    pg.evaluate("location.hash = '#/'")
    primary = demo.get(f"channels/{CHANNEL}")["profiles"][0]["name"]
    wait_for(
        lambda: (
            pg.evaluate(f"(window.quaver.store.bands.get('{CHANNEL}') || {{}}).profile") == primary
        ),
        "the primary profile's bands in the plant view",
    )
    names = pg.evaluate(f"window.quaver.store.bands.get('{CHANNEL}').bands.map(b => b.name)")
    assert names == [b["name"] for b in demo.get(f"channels/{CHANNEL}/bands")["bands"]]
    assert not log.errors, log.errors


def test_unknown_profile_in_the_url_shows_the_primary(
    demo: Service, page: tuple[Any, PageLog]
) -> None:
    """An old link naming a profile the channel does not run: the primary one, and a note."""
    pg, log = page
    code, body = demo.status(f"channels/{CHANNEL}/spectrum?profile=nosuch")
    assert code == 404 and "nosuch" in body["detail"]  # the service refuses it too (docs/api.md)
    open_channel(pg, demo, "?profile=nosuch")
    wait_for(lambda: (on_screen(pg) or {}).get("profile") == "wide", "the primary spectrum")
    wait_for(lambda: "nosuch" in pg.inner_text("#spec-cap"), "a note naming the bad profile")
    assert pg.evaluate("location.hash") == f"#/channel/{CHANNEL}"
    assert pressed_profile(pg) == "wide"
    assert not log.errors, log.errors


def rule_view(rule: str, kind: str, name: str, profile: str, primary: bool) -> dict[str, Any]:
    return {"rule": rule, "channel": "p1-de-h", "kind": kind, "name": name, "profile": profile,
            "primary": primary}


RULES = [
    # (rule view, words in the alarm list). Views as the service makes them (its alarm API;
    # service/alarms/events.py AlarmView: `profile` and whether it is the channel's `primary` one).
    (rule_view("p1-de-h.narrow.band.1x", "band", "1x", "narrow", False), "1x band · narrow"),
    (rule_view("p1-de-h.narrow.overall", "overall", "overall", "narrow", False),
     "overall · narrow"),
    (rule_view("p1-de-h.band.1x", "band", "1x", "wide", True), "1x band"),
    (rule_view("p1-de-h.band.1x", "band", "1x", "", True), "1x band"),
    # a primary profile that happens to be called "band"
    (rule_view("p1-de-h.band.bearing", "band", "bearing", "band", True), "bearing band"),
]


@pytest.mark.parametrize("rule,words", RULES)
def test_alarm_words_name_non_primary_profiles(
    demo: Service, page: tuple[Any, PageLog], rule: dict[str, str], words: str
) -> None:
    pg, _ = page
    pg.goto(demo.base_url + "/#/", wait_until="domcontentloaded")
    got = pg.evaluate(
        """async (a) => {
        const m = await import('/static/alarms.js');
        const li = document.createElement('ul');
        li.innerHTML = m.alarmListHtml([{...a, state: 'alert', value: 1, alert: 0.5, danger: 1.5,
                                          unit: 'mm/s', since_ns: Date.now() * 1e6}]);
        return {what: m.what(a), shown: li.querySelector('.what').textContent};
    }""",
        rule,
    )
    assert got["what"] == words
    assert got["shown"].endswith(words)


def bars_on_screen(pg: Any) -> dict[str, dict[str, Any]]:
    rows = pg.evaluate("window.quaver.view && window.quaver.view.bars && window.quaver.view.bars()")
    return {r["name"]: r for r in rows or []}


def test_every_watched_bar_shows_its_rules_limits_whichever_profile_is_on_screen(
    demo: Service, page: tuple[Any, PageLog]
) -> None:
    # Regression (issue 14, item 6): bars showed only the limits of band rules on the profile
    # on screen, so the narrow view's "bearing" (watched on the primary profile) and the plant
    # card's "1x" (watched on narrow) were grey with "no limits". The demo's rules
    # (service/examples/demo.toml): bearing 0.45/0.9 mm/s on the primary profile, 1x 2.8/4.5
    # on narrow. A bar watched on another profile shows that rule, that profile's value, and
    # names the profile.
    pg, log = page
    rules = {a["rule"]: a for a in demo.get("alarms", all="true")}  # ids as the API gives them
    assert rules[f"{CHANNEL}.band.bearing"]["danger"] == 0.9
    assert rules[f"{CHANNEL}.narrow.band.1x"]["danger"] == 4.5
    open_channel(pg, demo, "?profile=narrow")
    wait_for(lambda: (on_screen(pg) or {}).get("profile") == "narrow", "the narrow spectrum")

    def narrow_bars() -> dict[str, dict[str, Any]] | None:
        rows = bars_on_screen(pg)
        wide = pg.evaluate(f"window.quaver.store.bands.get('{CHANNEL}')")
        if "bearing" not in rows or not wide or rows["bearing"]["danger"] is None:
            return None
        wide_value = next(b["value"] for b in wide["bands"] if b["name"] == "bearing")
        return rows if rows["bearing"]["value"] == wide_value else None

    rows = wait_for(narrow_bars, "the bearing bar with the primary profile's rule", 30)
    assert (rows["bearing"]["alert"], rows["bearing"]["danger"]) == (0.45, 0.9)
    assert rows["bearing"]["via"] == "wide"
    assert (rows["1x"]["alert"], rows["1x"]["danger"], rows["1x"]["via"]) == (2.8, 4.5, "")

    open_channel(pg, demo)
    wait_for(lambda: (on_screen(pg) or {}).get("profile") == "wide", "the wide spectrum")
    rows = wait_for(lambda: (r := bars_on_screen(pg)).get("1x", {}).get("danger") and r,
                    "the 1x bar with the narrow profile's rule", 30)
    assert (rows["1x"]["alert"], rows["1x"]["danger"], rows["1x"]["via"]) == (2.8, 4.5, "narrow")
    assert rows["bearing"]["via"] == "" and rows["bearing"]["danger"] == 0.9
    assert not log.errors, log.errors


def test_band_rows_take_the_rule_of_any_profile_and_the_overall_rule(
    demo: Service, page: tuple[Any, PageLog]
) -> None:
    # bandRows (web/bars.js) with made-up levels and messages: an `overall = true` rule
    # watches the band named "overall" (the channel's overall is that band's value); a rule on
    # another profile brings that profile's value; a band no rule watches has no limits.
    pg, _ = page
    pg.goto(demo.base_url + "/#/", wait_until="domcontentloaded")
    got = pg.evaluate("""async () => {
        const m = await import('/static/bars.js');
        const over = {rule: 'c.overall', kind: 'overall', alert: 1, danger: 2, state: 'danger'};
        const onNarrow = {rule: 'c.narrow.band.1x', kind: 'band', alert: 3, danger: 6,
                          state: 'alert'};
        const table = {'|overall|overall': over, 'narrow|band|1x': onNarrow};
        const look = {
            levels: (ch, kind, name, p) =>
                table[`${p === 'wide' ? '' : p}|${kind}|${name}`] ?? null,
            profileKey: (ch, p) => (p === 'wide' ? '' : p),
            rulesFor: (ch, kind, name) => Object.entries(table)
                .filter(([k]) => k.endsWith(`|${kind}|${name}`))
                .map(([k, rule]) => ({pk: k.split('|')[0],
                                      profile: k.split('|')[0] || 'wide', rule})),
            bandsOf: (ch, pk) => (pk === 'narrow' ? {bands: [{name: '1x', value: 4}]} : null),
        };
        const msg = {profile: 'wide', unit: 'mm/s', bands: [
            {name: 'overall', lo_hz: 10, hi_hz: 1000, value: 2.5},
            {name: '1x', lo_hz: 20, hi_hz: 30, value: 0.1},
            {name: 'other', lo_hz: 40, hi_hz: 50, value: 0.2}]};
        return m.bandRows('c', msg, look).named;
    }""")
    rows = {r["name"]: r for r in got}
    assert (rows["overall"]["alert"], rows["overall"]["danger"]) == (1, 2)
    assert rows["overall"]["state"] == "danger" and rows["overall"]["via"] == ""
    assert (rows["1x"]["danger"], rows["1x"]["value"], rows["1x"]["via"]) == (6, 4, "narrow")
    assert rows["1x"]["state"] == "alert"
    assert rows["other"]["danger"] is None and rows["other"]["state"] == "ok"


def test_the_overall_is_named_with_its_band_everywhere(
    demo: Service, page: tuple[Any, PageLog]
) -> None:
    # Regression (issue 14, item 7): the narrow view's headline said "overall (narrow)" for
    # 2-500 Hz beside the 10-1000 Hz overall the alarms use, and the trend picker said
    # "overall (to Fmax)". Every overall now names the band REST gives for it.
    pg, log = page
    wide = demo.get(f"channels/{CHANNEL}/bands")
    narrow = demo.get(f"channels/{CHANNEL}/bands", profile="narrow")
    assert (wide["overall_lo_hz"], wide["overall_hi_hz"]) == (10.0, 1000.0)
    assert (narrow["overall_lo_hz"], narrow["overall_hi_hz"]) == (2.0, 500.0)
    open_channel(pg, demo)
    wait_for(lambda: "10.00 Hz–1.00 kHz" in pg.inner_text("#ch-unit"), "the headline's band")
    wait_for(lambda: pg.evaluate("(document.querySelector('#sel-trend option') || {}).textContent")
             == "overall 10.00 Hz–1.00 kHz", "the trend picker's overall with its band")
    open_channel(pg, demo, "?profile=narrow")
    wait_for(lambda: pg.inner_text("#ch-unit").endswith("overall 2.000 Hz–500.0 Hz (narrow)"),
             "the narrow headline's band")
    wait_for(lambda: pg.evaluate("(document.querySelector('#sel-trend option') || {}).textContent")
             == "overall 2.000 Hz–500.0 Hz", "the narrow trend picker's overall")
    assert not log.errors, log.errors
