"""The plant view's truths: views unmount cleanly (no callback runs after a view is left),
sparklines draw the limits of every rule form on fixed scales, machines are named where
channels are. Headless Chromium against the demo service on 127.0.0.1."""

from __future__ import annotations

import json
from typing import Any

import httpx
import pytest

from service.demo import demo_config
from tests.service.conftest import run_service
from tests.web.conftest import DEMO_TOKEN, PageLog, Service, screenshot, wait_for

pytestmark = pytest.mark.browser

SWITCHES = 20  # rounds over every view
LEAVE_ON_NEXT_MESSAGE = """route => {
  const kinds = ["bands", "channels", "alarms"];
  let timer = 0;
  const leave = () => {
    clearTimeout(timer);
    for (const k of kinds) window.quaver.live.removeEventListener(k, leave);
    location.hash = route;
    window.dispatchEvent(new HashChangeEvent("hashchange")); // route now, not in a later task
  };
  for (const k of kinds) window.quaver.live.addEventListener(k, leave);
  timer = setTimeout(leave, 300); // a view that gets none of these (rules, events) soon
}"""


def open_page(pg: Any, url: str) -> None:
    pg.goto(url, wait_until="domcontentloaded")
    pg.wait_for_function("window.quaver !== undefined", timeout=15000)


def _ready_for_every_view(demo: Service) -> None:
    """Wait until the routes the views open with answer 200 (a 404 before the first stored
    bucket is logged by the browser as a console error, which is not what is tested)."""
    for c in demo.wait_all_channels():
        for p in c["profiles"]:
            path = f"channels/{c['id']}/bands?profile={p['name']}"
            wait_for(lambda path=path: demo.status(path)[0] == 200, f"{path} to answer 200")
    for path in ["channels/p1-de-h/trend?name=band:bearing", "channels/p1-de-h/trend?name=overall"]:
        wait_for(lambda path=path: demo.status(path)[0] == 200, f"{path} to answer 200", 40)


def test_quick_view_changes_leave_no_callbacks_behind(demo: Service,
                                                      page: tuple[Any, PageLog]) -> None:
    pg, log = page
    _ready_for_every_view(demo)
    open_page(pg, demo.base_url + "/#/")
    pg.wait_for_selector(".card")
    views = [
        ("#/channel/p1-de-h", "#spec"), ("#/rules", "#rl-rows"),
        ("#/events", "#ev-older"), ("#/nope", "[data-notfound=route]"),
        ("#/", ".card"), ("#/channel/nope", "[data-notfound=channel]"), ("#/", ".card"),
    ]
    shown = []
    for _ in range(SWITCHES):
        for route, ready in views:
            # leave at once on the next live message (or soon): the view's work for it (an animation
            # frame, a redraw) is then still pending when the view unmounts
            pg.evaluate(LEAVE_ON_NEXT_MESSAGE, route)
            pg.wait_for_function("r => location.hash === r", arg=route, timeout=15000)
            pg.wait_for_selector(ready, state="attached", timeout=15000)
            pg.wait_for_timeout(60)  # and while its own first answers are on their way
            shown.append(route)
    # the last view is the plant again and keeps updating: late callbacks of the others would
    # have thrown by now (the stream sends bands about once a second per channel)
    seq0 = pg.eval_on_selector("[data-channel='p1-de-h'] [data-role=overall]", "e => e.dataset.seq")
    wait_for(lambda: pg.eval_on_selector("[data-channel='p1-de-h'] [data-role=overall]",
                                         "e => e.dataset.seq") != seq0, "the plant view to update")
    assert len(shown) == SWITCHES * len(views)
    assert pg.query_selector("[data-notfound]") is None
    assert not log.errors, f"uncaught errors in the page: {log.errors[:5]}"
    assert not log.console_errors(), f"console errors: {log.console_errors()[:5]}"


# --- sparklines: the limits of every rule form, on fixed scales ------------------------------


def _demo_with_every_overall_rule_form() -> dict[str, Any]:
    """The demo (its `band = "overall"` rule on every channel) plus an `overall = true` rule on
    one channel and a baseline-relative one (alert/danger factors) on another."""
    cfg = demo_config(fault_start_s=1e6)
    doc = cfg.model_dump(mode="json", exclude_none=True, exclude_defaults=True)
    doc.pop("service", None)
    doc["alarms"] = [
        *doc["alarms"],
        {"channel": "f1-gb-h", "overall": True, "alert": 2.0, "danger": 3.6},
        {"channel": "p1-de-v", "overall": True, "baseline_learn_s": 3.0,
         "alert_factor": 3.0, "danger_factor": 8.0},
        # in danger at once: an alarm and events to name
        {"channel": "f1-fan-h", "overall": True, "alert": 0.1, "danger": 0.2},
    ]
    return doc


@pytest.fixture(scope="module")
def plant(tmp_path_factory: pytest.TempPathFactory) -> Any:
    """A service of the demo with every form of overall rule (see above)."""
    with run_service(_demo_with_every_overall_rule_form(), tmp_path_factory.mktemp("plant")) as svc:
        yield svc


def _overall_levels(entries: list[dict[str, Any]], channel: str) -> tuple[set[float], set[float]]:
    """The alert and danger levels /alarms gives for the rules watching a channel's overall on
    its primary profile (either form)."""
    mine = [a for a in entries if a["channel"] == channel and a.get("primary", True)
            and (a["kind"] == "overall" or (a["kind"] == "band" and a["name"] == "overall"))]
    return ({a["alert"] for a in mine if a["alert"]}, {a["danger"] for a in mine if a["danger"]})


def _spark(pg: Any, channel: str) -> dict[str, str]:
    return pg.eval_on_selector(f".card[data-channel='{channel}'] canvas.spark",
                               "c => ({...c.dataset})")


def _floats(s: str) -> set[float]:
    return {float(x) for x in s.split(",") if x}


def test_sparklines_draw_every_rule_form_on_fixed_scales(plant: Any,
                                                         page: tuple[Any, PageLog]) -> None:
    pg, log = page
    svc = plant
    def entries() -> list[dict[str, Any]]:
        got = svc.get("alarms", all="true")
        return got if isinstance(got, list) else got["alarms"]

    # the baseline rule has learnt: its absolute levels are known
    wait_for(lambda: _overall_levels(entries(), "p1-de-v")[1] - {4.5},
             "the baseline rule's levels", 30)
    open_page(pg, svc.base_url + "/#/")
    pg.wait_for_selector(".card canvas.spark")
    al = entries()
    for ch in ["p1-de-h", "f1-gb-h", "p1-de-v"]:
        alert, danger = _overall_levels(al, ch)
        assert danger, (ch, al)
        d = wait_for(lambda ch=ch: (s := _spark(pg, ch)).get("last") and s,
                     f"the sparkline of {ch}")
        # every rule's levels are drawn, whatever its form, and nothing else
        assert _floats(d["alert"]) == alert, (ch, d)
        assert _floats(d["danger"]) == danger, (ch, d)
        # the card's overall bar draws the same rules' levels
        # (the bars come with the bands the page subscribes to once the card is on screen)
        def overall_bar_of(ch: str = ch) -> list[dict[str, Any]]:
            bars = json.loads(pg.eval_on_selector(f".card[data-channel='{ch}'] canvas.minibars",
                                                  "c => c.dataset.levels || '[]'"))
            return [b for b in bars if b["name"] == "overall"]

        overall_bar = wait_for(overall_bar_of, f"the overall bar of {ch}")
        assert set(overall_bar[0]["alert"]) == alert, (ch, overall_bar)
        assert set(overall_bar[0]["danger"]) == danger, (ch, overall_bar)
        # the scale is fixed at 1.3 × the highest danger level, not the data's own range
        assert float(d["top"]) == pytest.approx(1.3 * max(danger), rel=1e-9), (ch, d)
        assert float(d["lastFrac"]) == pytest.approx(
            min(float(d["last"]), float(d["top"])) / float(d["top"]), rel=1e-9)
    # the demo's form (band = "overall") alone: the demo's own levels
    assert _overall_levels(al, "p1-de-h") == ({2.8}, {4.5})
    # two (nearly) flat channels on the same scale: the higher level draws higher, in
    # proportion (an auto scale would draw both near the top)
    same = [c["id"] for c in svc.get("channels")
            if _overall_levels(al, c["id"])[1] == {4.5} and c["latest"]]
    # (the cards drawn: those on screen; the demo's fan v1 sits further down)
    sparks = {ch: sp for ch in same if (sp := _spark(pg, ch)).get("last")}
    assert len(sparks) >= 2, sparks
    lo = min(sparks, key=lambda ch: float(sparks[ch]["last"]))
    hi = max(sparks, key=lambda ch: float(sparks[ch]["last"]))
    v_lo, v_hi = float(sparks[lo]["last"]), float(sparks[hi]["last"])
    assert v_hi > 1.2 * v_lo, sparks
    assert float(sparks[hi]["lastFrac"]) / float(sparks[lo]["lastFrac"]) == pytest.approx(
        v_hi / v_lo, rel=1e-6)
    assert float(sparks[hi]["lastFrac"]) < 1.0
    screenshot(pg, "plant-sparklines")
    assert not log.errors, log.errors


def test_alarms_and_events_on_the_plant_view_name_the_machine(plant: Any,
                                                               page: tuple[Any, PageLog]) -> None:
    pg, log = page
    chans = {c["id"]: c for c in plant.get("channels")}
    fan = chans["f1-fan-h"]
    assert fan["machine_name"] and fan["machine_name"] != fan["machine"]
    wait_for(lambda: any(e["channel"] == "f1-fan-h" for e in plant.get("events")["events"]),
             "an event on f1-fan-h", 30)
    open_page(pg, plant.base_url + "/#/")
    alarm = pg.wait_for_selector("#ov-alarm-list li[data-rule='f1-fan-h.overall'] .what")
    assert alarm.inner_text() == f"{fan['machine_name']} · {fan['name']} f1-fan-h · overall"
    pg.wait_for_selector("#ov-event-rows li[data-event]")
    rows = pg.eval_on_selector_all("#ov-event-rows li[data-event] .what",
                                   "els => els.map(e => e.textContent)")
    events = plant.get("events", limit=12)["events"]
    assert len(rows) == len(events) > 0
    for text, ev in zip(rows, events, strict=True):
        c = chans[ev["channel"]]
        # "Cooling fan 1 · fan shaft, horizontal f1-fan-h · overall"
        assert text.startswith(f"{c['machine_name']} · {c['name']} {c['id']}"), (text, ev)
    assert not log.errors, log.errors


# --- no polling while the stream is open ---------------------------------------------------


QUIET_S = 10  # the window in which the plant view must not poll


def test_plant_view_follows_the_stream_without_polling(plant: Any,
                                                       page: tuple[Any, PageLog]) -> None:
    pg, log = page
    asked: list[str] = []
    pg.on("request", lambda r: asked.append(r.url))
    open_page(pg, plant.base_url + "/#/")
    pg.wait_for_selector("#ov-alarm-list li[data-rule='f1-fan-h.overall'][data-acked='no']")
    wait_for(lambda: pg.evaluate("() => window.quaver.live.wsOpen"), "the stream to open")
    pg.evaluate("""() => { window.alarmMsgs = 0;
        window.quaver.live.addEventListener("alarm", () => window.alarmMsgs++); }""")
    pg.wait_for_timeout(1500)  # the resync on connect is answered
    card = "[data-channel='p1-de-h'] [data-role=overall]"
    seq0 = int(pg.eval_on_selector(card, "e => e.dataset.seq"))
    start = len(asked)
    pg.wait_for_timeout(QUIET_S * 1000)
    window = asked[start:]
    polled = [u for u in window if u.split("?")[0].endswith("/api/v1/channels")]
    alarms = [u for u in window if "/api/v1/alarms" in u]
    msgs = pg.evaluate("() => window.alarmMsgs")
    assert not polled, polled
    # /alarms is fetched only after an alarm message (at most once each), never on a clock
    assert len(alarms) <= msgs, (alarms, msgs)
    # the values still moved: they come with the stream's bands messages
    seq1 = int(pg.eval_on_selector(card, "e => e.dataset.seq"))
    assert seq1 > seq0
    # an alarm change arrives pushed: acknowledge over the API, the plant view shows it
    r = httpx.post(f"{plant.base_url}/api/v1/alarms/f1-fan-h.overall/ack", json={"note": "seen"},
                   headers={"Authorization": f"Bearer {DEMO_TOKEN}"}, timeout=5.0,
                   trust_env=False)
    assert r.status_code == 200, r.text
    pg.wait_for_selector("#ov-alarm-list li[data-rule='f1-fan-h.overall'][data-acked='yes']")
    assert not [u for u in asked[start:] if u.split("?")[0].endswith("/api/v1/channels")]
    assert not log.errors, log.errors
