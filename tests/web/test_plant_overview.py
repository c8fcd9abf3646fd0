"""The plant at a glance on a large generated plant (64 machines, 128 channels, fed at real
time): the abnormal machines first and on the first screen, filters and search, cards off
screen neither updated nor drawn, one animation frame callback at a time, no polling, views
left and re-entered without errors. Headless Chromium against a service on 127.0.0.1.

Knows the public HTTP API, bench.plant's generated plant and the dashboard's markup (tiles
``#ov-tiles .tile[data-machine]``, filters ``#ov-state``, ``#ov-group``, ``#ov-q``, cards
``.card[data-channel]`` whose canvases count their draws in ``data-draws``)."""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from bench.dashboard import _FeedThread
from bench.feeder import Feeder
from bench.plant import ALERT_LEVEL_G, DANGER_LEVEL_G, PER_SOURCE, PlantPlan, config_doc
from tests.service.conftest import RunningService, run_service
from tests.web.conftest import DEMO_TOKEN, PageLog, screenshot, wait_for

pytestmark = pytest.mark.browser

# The page signs in with the demo's token (the `page` fixture); here it is the plant's viewer.
PLAN = PlantPlan(channels=128, machines=64, danger=3, alert=6, token=DEMO_TOKEN)
VIEW_H = 900  # the test browser's viewport height (tests/web/conftest.py)


class Plant:
    def __init__(self, svc: RunningService, feed: _FeedThread) -> None:
        self.svc, self.feed = svc, feed
        self.danger, self.alert = PLAN.abnormal()
        self.machine_of = dict(PLAN.channel_machines())

    @property
    def base_url(self) -> str:
        return self.svc.base_url

    def active_machines(self) -> set[str]:
        return {self.machine_of[a["channel"]] for a in self.svc.get("alarms")
                if a.get("state") in ("alert", "danger")}


@pytest.fixture(scope="module")
def plant(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Plant]:
    """The generated plant of ``quaver bench --dashboard`` at 128 channels, fed at real time
    from a thread of this process until the module's tests are done."""
    work: Path = tmp_path_factory.mktemp("bigplant")
    with run_service(config_doc(PLAN), work) as svc:
        feeder = Feeder(svc.ports, list(PLAN.sources()), PER_SOURCE, PLAN.fs_hz, PLAN.block,
                        time.time_ns(), gains=PLAN.gains())
        feed = _FeedThread(feeder)
        feed.start()
        try:
            p = Plant(svc, feed)
            wait_for(lambda: all(c["latest"] for c in svc.get("channels")),
                     "a spectrum on every channel", 60)
            want = set(p.danger + p.alert)
            wait_for(lambda: want <= p.active_machines(), "every abnormal machine to alarm", 60)
            yield p
        finally:
            feed.stop_event.set()
            feed.join(timeout=10.0)
            feeder.close()
        feed.check()


def open_plant(pg: Any, base_url: str) -> None:
    pg.goto(base_url + "/#/", wait_until="domcontentloaded")
    pg.wait_for_function("window.quaver !== undefined", timeout=15000)
    # every machine has its tile and the abnormal ones show their state
    pg.wait_for_function(
        "n => document.querySelectorAll('#ov-tiles .tile[data-sev]').length === n",
        arg=PLAN.machines, timeout=20000)


def shown_tiles(pg: Any) -> list[dict[str, Any]]:
    """The tiles not hidden, in page order: machine, state, severity, texts, ratio, box."""
    return pg.eval_on_selector_all(
        "#ov-tiles .tile",
        """els => els.filter(e => !e.hidden).map(e => {
            const r = e.getBoundingClientRect();
            const hit = document.elementFromPoint(r.left + r.width / 2, r.top + r.height / 2);
            return {machine: e.dataset.machine, state: e.dataset.state, sev: e.dataset.sev,
                    word: e.querySelector('.t-st .word').textContent,
                    shape: !!e.querySelector('.t-st svg.glyph'),
                    value: e.querySelector('.t-val').textContent,
                    ratio: e.querySelector('.t-val').dataset.ratio,
                    quality: e.querySelector('.t-q').textContent,
                    top: r.top, bottom: r.bottom, seen: !!hit && e.contains(hit)};
        })""")


def test_abnormal_machines_come_first_on_the_first_screen(plant: Plant,
                                                          page: tuple[Any, PageLog]) -> None:
    pg, log = page
    open_plant(pg, plant.base_url)
    want = set(plant.danger + plant.alert)

    def sorted_in() -> list[dict[str, Any]] | None:
        t = shown_tiles(pg)
        return t if {x["machine"] for x in t[: len(want)]} == want else None

    tiles = wait_for(sorted_in, "the abnormal machines' tiles first", 20)
    n_d = len(plant.danger)
    # danger before alert before the rest (the order asked of the plant view)
    assert {t["machine"] for t in tiles[:n_d]} == set(plant.danger), tiles[: len(want)]
    assert {t["machine"] for t in tiles[n_d : len(want)]} == set(plant.alert)
    for t in tiles[: len(want)]:
        # on the first screen, not covered nor scrolled out of its box, as a shape and a word
        assert t["top"] >= 0 and t["bottom"] <= VIEW_H and t["seen"], t
        assert t["shape"] and t["word"] in ("DANGER", "ALERT"), t
        # the worst overall against the level it is shown against (bench/plant.py's levels)
        value, limit = t["value"].split(" / ")
        lim = DANGER_LEVEL_G if t["word"] == "DANGER" else ALERT_LEVEL_G
        assert limit == f"{lim:.3g} g" or float(limit.split()[0]) == pytest.approx(lim), t
        assert float(value) >= lim * 0.95, t  # alarms have hysteresis; common practice
        assert t["quality"].endswith("data ok"), t
    # within a severity the larger value against its limit comes first (to the percent)
    normal = [t for t in tiles if t["sev"] == "normal"]
    assert len(normal) == PLAN.machines - len(want)
    pct = [round(float(t["ratio"]) * 100) for t in normal]
    assert pct == sorted(pct, reverse=True), pct
    # the tiles' values are the service's: a normal machine's worst against the REST values
    chans = plant.svc.get("channels")
    top = normal[0]["machine"]
    mine = [c["latest"]["overall"] for c in chans if c["machine"] == top]
    assert float(normal[0]["value"].split(" / ")[0]) == pytest.approx(max(mine), rel=0.2)
    screenshot(pg, "plant-overview-128")
    assert not log.errors, log.errors
    assert not log.console_errors(), log.console_errors()


def _expected(chans: list[dict[str, Any]], pred: Any) -> set[str]:
    return {c["machine"] for c in chans if pred(c)}


def test_filters_and_search_pick_the_machines(plant: Plant, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    open_plant(pg, plant.base_url)
    chans = plant.svc.get("channels")

    def machines_shown() -> set[str]:
        return {t["machine"] for t in shown_tiles(pg)}

    def sections_shown() -> set[str]:
        return set(pg.eval_on_selector_all(
            "#ov-cards section.machine",
            "els => els.filter(e => !e.hidden).map(e => e.dataset.machine)"))

    wait_for(lambda: set(plant.danger) <= {t["machine"] for t in shown_tiles(pg)
                                           if t["sev"] == "danger"}, "the danger tiles")
    pg.select_option("#ov-state", "danger")
    wait_for(lambda: machines_shown() == set(plant.danger), "only the danger machines")
    assert sections_shown() == set(plant.danger)
    pg.select_option("#ov-state", "abnormal")
    wait_for(lambda: machines_shown() == set(plant.danger + plant.alert), "the abnormal machines")
    pg.select_option("#ov-state", "")
    # a group of [[machines]] (bench/plant.py: four areas)
    pg.select_option("#ov-group", "area-south")
    south = _expected(chans, lambda c: c["machine_group"] == "area-south")
    assert 0 < len(south) < PLAN.machines
    wait_for(lambda: machines_shown() == south, "the machines of area-south")
    assert sections_shown() == south
    pg.select_option("#ov-group", "")
    # search: a channel id, then words of a machine's name (each word, any case)
    pg.fill("#ov-q", "m031-c2")
    wait_for(lambda: machines_shown() == {"m031"}, "the machine of channel m031-c2")
    pg.fill("#ov-q", "boiler FEED")
    named = _expected(chans, lambda c: all(w in (c["machine_name"] or "").lower()
                                           for w in ("boiler", "feed")))
    # bench/plant.py names the machines after 8 kinds in turn: m007 is "Boiler feed pump 1"
    assert {"m007", "m015"} <= named and len(named) == PLAN.machines // 8
    wait_for(lambda: machines_shown() == named, f"the boiler feed pumps: {named}")
    pg.fill("#ov-q", "no such machine")
    wait_for(lambda: not machines_shown(), "no machine")
    assert pg.is_visible("#ov-none")
    pg.fill("#ov-q", "")
    wait_for(lambda: len(machines_shown()) == PLAN.machines, "every machine again")
    # a tile opens its machine's channels: the section is scrolled into view
    last = shown_tiles(pg)[-1]["machine"]
    pg.click(f"#ov-tiles .tile[data-machine='{last}']")
    wait_for(lambda: pg.eval_on_selector(
        f"#ov-cards section[data-machine='{last}']",
        "e => { const r = e.getBoundingClientRect(); return r.top >= 0 && r.top < innerHeight; }"),
        f"the section of {last} in view")
    assert not log.errors, log.errors


DRAWS = """ch => [...document.querySelectorAll(`.card[data-channel="${ch}"] canvas`)]
    .map(c => Number(c.dataset.draws || 0)).reduce((a, b) => a + b, 0)"""
SEQ = """ch => document.querySelector(`.card[data-channel="${ch}"] .overall`).dataset.seq || ''"""
BOX = """ch => { const r = document.querySelector(`.card[data-channel="${ch}"]`)
    .getBoundingClientRect(); return {top: r.top, bottom: r.bottom}; }"""
# Counts the page's animation frame callbacks: how many are asked for before each frame runs.
FRAME_COUNTER = """
window.__rafMax = 0; window.__rafAsked = 0;
const rawRaf = window.requestAnimationFrame.bind(window);
window.requestAnimationFrame = (fn) => { window.__rafAsked++; return rawRaf((t) => {
  window.__rafMax = Math.max(window.__rafMax, window.__rafAsked); window.__rafAsked = 0; fn(t);
}); };
"""


def test_cards_off_screen_are_neither_updated_nor_drawn(plant: Plant,
                                                        page: tuple[Any, PageLog]) -> None:
    pg, log = page
    pg.add_init_script(FRAME_COUNTER)
    open_plant(pg, plant.base_url)
    first = pg.eval_on_selector("#ov-cards .card", "e => e.dataset.channel")
    last = pg.eval_on_selector_all("#ov-cards .card", "els => els.at(-1).dataset.channel")
    wait_for(lambda: pg.evaluate(DRAWS, first) > 0, f"the card of {first} drawn")
    box = pg.evaluate(BOX, last)
    assert box["top"] > VIEW_H + 300, box  # well below the screen and the observer's margin
    draws0 = {ch: pg.evaluate(DRAWS, ch) for ch in (first, last)}
    seq0 = {ch: pg.evaluate(SEQ, ch) for ch in (first, last)}
    pg.evaluate("window.__rafMax = 0")  # from here on (Playwright's own waits poll on frames)
    pg.wait_for_timeout(6000)  # several seconds of the stream (overall and bands: 1 per second)
    # the card on screen followed the stream, the one off screen did nothing at all
    assert pg.evaluate(DRAWS, first) > draws0[first]
    assert pg.evaluate(SEQ, first) != seq0[first]
    assert pg.evaluate(DRAWS, last) == draws0[last] == 0
    assert pg.evaluate(SEQ, last) == seq0[last]
    # the stream brings the bands of the cards on screen only (every channel's overall comes in
    # one message a second), and every alarm event
    sub = pg.evaluate("() => window.quaver.live.sub")
    shown = sorted(pg.evaluate("() => window.quaver.view.visibleCards()"))
    assert sub["channels"] == shown and first in shown and last not in shown, (sub, shown)
    assert sub["every_alarm"] is True and "overall" in sub["kinds"]
    # every card the page drew was on screen: far fewer than the plant's channels
    drawn = pg.eval_on_selector_all("#ov-cards canvas.spark[data-draws]", "els => els.length")
    assert 0 < drawn < PLAN.channels / 4, drawn
    # the page asks for one animation frame at a time, whatever arrives
    assert pg.evaluate("window.__rafMax") == 1
    # scrolled into view, the card catches up: its newest value and a drawing
    pg.eval_on_selector(f".card[data-channel='{last}']", "e => e.scrollIntoView()")
    wait_for(lambda: pg.evaluate(DRAWS, last) > 0, f"the card of {last} drawn once in view")
    want = {c["id"]: c for c in plant.svc.get("channels")}[last]["latest"]["seq"]
    wait_for(lambda: int(pg.evaluate(SEQ, last) or -1) >= want - 10,
             f"the card of {last} to show a current value")
    assert not log.errors, log.errors


QUIET_S = 10


def test_no_polling_and_views_reentered_cleanly(plant: Plant, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    asked: list[str] = []
    pg.on("request", lambda r: asked.append(r.url))
    open_plant(pg, plant.base_url)
    wait_for(lambda: pg.evaluate("() => window.quaver.live.wsOpen"), "the stream to open")
    pg.evaluate("""() => { window.alarmMsgs = 0;
        window.quaver.live.addEventListener("alarm", () => window.alarmMsgs++); }""")
    pg.wait_for_timeout(2000)  # the resync on connect and the visible cards' trends answered
    start = len(asked)
    pg.wait_for_timeout(QUIET_S * 1000)
    window = [u.split("?")[0] for u in asked[start:]]
    assert not [u for u in window if u.endswith(("/api/v1/channels", "/api/v1/events"))], window
    assert len([u for u in window if u.endswith("/api/v1/alarms")]) <= pg.evaluate(
        "() => window.alarmMsgs"), window
    # leave and re-enter every view a few times: no error, the plant view is whole again
    first = plant.svc.get("channels")[0]["id"]
    for _ in range(3):
        for route, ready in [("#/events", "#ev-older"), ("#/rules", "#rl-rows"),
                             (f"#/channel/{first}", "#spec"), ("#/", "#ov-tiles .tile[data-sev]")]:
            pg.evaluate("r => { location.hash = r; }", route)
            pg.wait_for_selector(ready, state="attached", timeout=15000)
            pg.wait_for_timeout(300)
    wait_for(lambda: len(shown_tiles(pg)) == PLAN.machines, "every tile again")
    assert not log.errors, log.errors
    assert not log.console_errors(), log.console_errors()


# Bands and overall messages of one channel, as the stream would send them, FAST_HZ a second
# (the service rate-limits the plant view's to 1 per second: this is a page fed faster than
# that, or a burst after a slow spell); each one's values differ from the last by far more
# than a pixel of a bar.
FAST_FEED = """([ch, hz, n]) => new Promise((done) => {
  const live = window.quaver.live, store = window.quaver.store;
  const tmpl = store.bands.get(ch), c = store.byId.get(ch);
  let i = 0;
  const timer = setInterval(() => {
    i++;
    const f = 0.5 + 0.5 * (i % 2);  // every message moves every bar and the overall
    const seq = 1e9 + i, t_ns = c.latest.timestamp_ns + i * 1e9 / hz;
    const overall = c.latest.overall * f;
    live._onMessage(JSON.stringify({...tmpl, seq, timestamp_ns: t_ns, overall,
      bands: tmpl.bands.map((b) => ({...b, value: b.value * f}))}));
    live._onMessage(JSON.stringify({kind: "overall", channels: [{id: ch, status: c.status,
      seq, timestamp_ns: t_ns, overall, unit: c.latest.unit, quality: c.latest.quality,
      overall_lo_hz: c.latest.overall_lo_hz, overall_hi_hz: c.latest.overall_hi_hz}]}));
    if (i >= n) { clearInterval(timer); done(i); }
  }, 1000 / hz);
})"""
CANVAS_DRAWS = """([ch, cls]) => Number(document.querySelector(
    `.card[data-channel="${ch}"] canvas.${cls}`).dataset.draws || 0)"""
FAST_HZ, FAST_S = 20, 6


def test_a_card_on_screen_repaints_at_a_bounded_rate_under_a_fast_feed(
        plant: Plant, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    open_plant(pg, plant.base_url)
    first = pg.eval_on_selector("#ov-cards .card", "e => e.dataset.channel")
    wait_for(lambda: pg.evaluate("ch => !!window.quaver.store.bands.get(ch)", first)
             and pg.evaluate(CANVAS_DRAWS, [first, "minibars"]) > 0
             and pg.evaluate(CANVAS_DRAWS, [first, "spark"]) > 0, f"the card of {first} drawn")
    spark0 = pg.evaluate(CANVAS_DRAWS, [first, "spark"])
    bars0 = pg.evaluate(CANVAS_DRAWS, [first, "minibars"])
    sent = pg.evaluate(FAST_FEED, [first, FAST_HZ, FAST_HZ * FAST_S])
    assert sent == FAST_HZ * FAST_S
    spark = pg.evaluate(CANVAS_DRAWS, [first, "spark"]) - spark0
    bars = pg.evaluate(CANVAS_DRAWS, [first, "minibars"]) - bars0
    # the card followed the feed: its overall reads the last message's value
    shown = pg.eval_on_selector(f".card[data-channel='{first}'] .overall", "e => e.dataset.seq")
    assert int(shown) >= 1e9, shown
    # ... but its sparkline (ten minutes on a card ~260 px wide: 2.3 s a pixel) redrew at most
    # once per 2.5 s (web/cards.js SPARK_REDRAW_MS), not per message: FAST_S s gives at most
    # FAST_S / 2.5 + 1 ticks of that clock (+1: its levels may change once with the alarms)
    assert 1 <= spark <= FAST_S / 2.5 + 2, (spark, FAST_HZ * FAST_S)
    # and its bars (which redraw only when what they show changes, as here every message) at
    # most every 0.5 s (web/overview.js CARDS_MIN_MS), not per message
    assert 1 <= bars <= FAST_S / 0.5 + 2, (bars, FAST_HZ * FAST_S)
    assert not log.errors, log.errors
    assert not log.console_errors(), log.console_errors()
