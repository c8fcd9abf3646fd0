"""The console in a real browser: site time zone on every time, the rules view (filters by
machine and state), shelving with a reason and an end time, acknowledge-all, display names
and the waveform panel — each checked against what the page shows and what REST says.

Runs the demo (its fault early and fast) with service.timezone = Asia/Kathmandu (+05:45 all
year, so a time shown in UTC or the browser's zone cannot pass by accident)."""

from __future__ import annotations

import re
import sys
import time
from collections.abc import Iterator
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo

import pytest

from bench import harness
from tests.web.conftest import (
    LOOPBACK,
    START_TIMEOUT_S,
    PageLog,
    Service,
    free_port,
    screenshot,
    wait_for,
)

pytestmark = pytest.mark.browser
ZONE = "Asia/Kathmandu"
SETTLE_S = 4.0


class ZonedDemo(Service):
    """The demo with the site zone set, its bearing fault from plant second 0 over 10 s."""

    def start(self) -> None:
        code = (
            "import service.demo as d, service.runner as a; "
            f"cfg = d.demo_config(listen='{LOOPBACK}:{self.port}', "
            f"data_dir={str(self.data_dir)!r}, speed=6.0, fault_start_s=0.0, "
            "fault_ramp_s=10.0); "
            "cfg = cfg.model_copy(update={'service': cfg.service.model_copy("
            f"update={{'timezone': {ZONE!r}}})}}); "
            "raise SystemExit(a.run_service(cfg))"
        )
        self.proc = harness.launch([sys.executable, "-c", code], self.data_dir,
                                   self.log_path, append=True)
        wait_for(self._healthy, f"the zoned demo to answer\n{self.log_tail()}", START_TIMEOUT_S)


@pytest.fixture(scope="module")
def zoned(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ZonedDemo]:
    tmp = tmp_path_factory.mktemp("zoned")
    svc = ZonedDemo(port=free_port(), data_dir=tmp, log_path=tmp / "service.log")
    try:
        svc.start()
        svc.wait_all_channels()
        # the fault's alarms, settled: the same active set for SETTLE_S (the fault is whole
        # after 10 plant seconds, under 2 s here; it then holds)
        seen: dict[str, Any] = {"set": None, "since": 0.0}

        def settled() -> bool:
            now = sorted((a["rule"], a["state"]) for a in svc.get("alarms"))
            if now != seen["set"]:
                seen.update(set=now, since=time.monotonic())
            return bool(now) and time.monotonic() - seen["since"] >= SETTLE_S

        wait_for(settled, "the demo fault's alarms to settle", 60)
        yield svc
    finally:
        svc.close()


def open_view(pg: Any, url: str) -> None:
    pg.goto(url)
    pg.wait_for_function("() => window.quaver && window.quaver.store.channels.length > 0")


def site_time(t_ns: int) -> str:
    """What the page must show for ``t_ns``: the site zone's wall time and offset."""
    d = datetime.fromtimestamp(t_ns / 1e9, ZoneInfo(ZONE))
    return d.strftime("%Y-%m-%d %H:%M:%S") + " +05:45"


def rule_rows(pg: Any) -> list[dict[str, str]]:
    return pg.eval_on_selector_all(
        "#rl-rows tr[data-rule]",
        "els => els.map(r => ({rule: r.dataset.rule, machine: r.dataset.machine,"
        " state: r.dataset.state, shelved: r.dataset.shelved, acked: r.dataset.acked,"
        " text: r.innerText}))",
    )


def test_every_time_shows_in_the_site_zone(zoned: ZonedDemo, page: tuple[Any, PageLog]) -> None:
    pg, log = page
    assert zoned.get("meta")["timezone"] == ZONE
    ev = zoned.get("events", limit=1)["events"][0]
    assert ev["time"].endswith("+05:45")  # the API's ISO 8601 beside t_ns
    open_view(pg, zoned.base_url + "/#/events")
    row = f"#ev-rows tr[data-event='{ev['id']}'] td.t"
    shown = wait_for(lambda: pg.query_selector(row) and pg.inner_text(row), "the event's row")
    assert shown == site_time(ev["t_ns"])
    assert pg.inner_text("#tz") == f"times: {ZONE} (UTC+05:45)"
    # the browser itself runs in another zone: the page did not use it
    assert pg.evaluate("() => new Date().getTimezoneOffset()") != -345
    assert not log.errors


def test_rules_view_filters_by_machine_and_state(
    zoned: ZonedDemo, page: tuple[Any, PageLog]
) -> None:
    pg, log = page
    everything = zoned.get("rules")
    open_view(pg, zoned.base_url + "/#/rules")
    wait_for(lambda: len(rule_rows(pg)) == min(100, len(everything)), "the rules")
    assert pg.inner_text("#rl-page") == f"1–{min(100, len(everything))} of {len(everything)}"
    pg.select_option("#rl-machine", "p1")
    p1 = {r["rule"] for r in zoned.get("rules", machine="p1")}
    assert len(p1) < 100
    wait_for(lambda: {r["rule"] for r in rule_rows(pg)} == p1, "pump 1's rules")
    rows = rule_rows(pg)
    assert {r["machine"] for r in rows} == {"p1"}
    # names, not ids: the machine's and the channel's display names, the id beside
    first = next(r for r in rows if r["rule"] == "p1-de-h.band.bearing")
    assert "Cooling-water pump 1" in first["text"] and "drive end, horizontal" in first["text"]
    assert "p1-de-h" in first["text"]
    pg.select_option("#rl-state", "danger")
    danger = {r["rule"] for r in zoned.get("rules", machine="p1", state="danger")}
    assert danger  # the fault's alarms
    wait_for(lambda: {r["rule"] for r in rule_rows(pg)} == danger, "pump 1's danger rules")
    assert all(r["state"] == "danger" and "DANGER" in r["text"] for r in rule_rows(pg))
    pg.select_option("#rl-state", "normal")
    normal = {r["rule"] for r in zoned.get("rules", machine="p1", state="normal")}
    wait_for(lambda: {r["rule"] for r in rule_rows(pg)} == normal, "pump 1's normal rules")
    assert "state=normal" in pg.url and "machine=p1" in pg.url
    screenshot(pg, "console-rules")
    assert not log.errors


def test_shelve_with_reason_and_end_then_unshelve(
    zoned: ZonedDemo, page: tuple[Any, PageLog]
) -> None:
    pg, log = page
    rule = "p1-de-h.band.bearing"
    open_view(pg, zoned.base_url + "/#/rules?machine=p1")
    sel = f"#rl-rows tr[data-rule='{rule}']"
    wait_for(lambda: pg.query_selector(f"{sel} [data-shelve]"), "the rule's Shelve button")
    pg.click(f"{sel} [data-shelve]")
    pg.fill("#shelve-reason", "bearing change planned for the night shift")
    pg.select_option("#shelve-for", "7200")
    pg.click("#shelve-submit")
    wait_for(lambda: pg.get_attribute(sel, "data-shelved") == "yes", "the row shown shelved")
    text = pg.inner_text(sel)
    assert "SHELVED" in text and "bearing change planned for the night shift" in text
    (sh,) = zoned.get("alarms/shelved")
    assert (sh["rule"], sh["shelve_reason"], sh["shelved_by"]) == (
        rule, "bearing change planned for the night shift", "demo-operator")
    assert sh["shelved_until_ns"] - sh["shelved_ns"] == 7200 * 10**9
    until = site_time(sh["shelved_until_ns"])
    today = site_time(time.time_ns())[:10] == until[:10]  # the site's day, not the browser's
    assert f"until {until[11:] if today else until} —" in text
    # not annunciated: gone from the active list, listed under Shelved, the change logged
    assert rule not in {a["rule"] for a in zoned.get("alarms")}
    open_view(pg, zoned.base_url + "/#/events")
    shelf = f"#shelved-list li[data-rule='{rule}']"
    wait_for(lambda: pg.query_selector(shelf), "the Shelved list")
    assert "SHELVED" in pg.inner_text(shelf)
    assert not pg.query_selector(f"#ev-alarms li[data-rule='{rule}']")
    ev = next(e for e in zoned.get("events")["events"] if e["kind"] == "shelve")
    logged = f"#ev-rows tr[data-event='{ev['id']}']"
    wait_for(lambda: pg.query_selector(logged), "the shelve in the event log")
    assert "SHELVED" in pg.inner_text(logged)
    screenshot(pg, "console-shelved")
    pg.click(f"{shelf} [data-unshelve]")
    wait_for(lambda: pg.query_selector(f"#ev-alarms li[data-rule='{rule}']"),
             "the alarm annunciated again")
    assert not zoned.get("alarms/shelved")
    assert any(e["kind"] == "unshelve" and e["rule"] == rule
               for e in zoned.get("events")["events"])
    assert not log.errors


def test_plant_view_offers_acknowledge_all_per_machine(
    zoned: ZonedDemo, page: tuple[Any, PageLog]
) -> None:
    pg, log = page
    open_view(pg, zoned.base_url + "/")
    # the demo's faults: pump 1 and (its bearing, caught in the envelope) fan v1
    every = [a for a in zoned.get("alarms") if not a["acked"]]
    assert every and {a["channel"].split("-")[0] for a in every} <= {"p1", "v1"}
    unacked = [a for a in every if a["channel"].startswith("p1-")]
    assert unacked
    btn = ".machine[data-machine='p1'] [data-ack-machine]"
    wait_for(lambda: pg.query_selector(btn), "pump 1's Acknowledge-all button")
    assert pg.inner_text(btn) == f"Acknowledge all ({len(unacked)})"
    assert not pg.query_selector(".machine[data-machine='p2'] [data-ack-machine]")  # none
    pg.click(btn)
    assert pg.is_visible("#dlg-ackall")
    assert "Cooling-water pump 1 (p1)" in pg.inner_text("#ackall-what")
    pg.click("#dlg-ackall button[value='cancel']")
    assert not pg.is_visible("#dlg-ackall")
    assert all(not a["acked"] for a in zoned.get("alarms"))  # cancelled: nothing changed
    assert not log.errors


def test_acknowledge_all_marks_each_alarm_ack(
    zoned: ZonedDemo, page: tuple[Any, PageLog]
) -> None:
    pg, log = page
    open_view(pg, zoned.base_url + "/#/events")
    unacked = {a["rule"] for a in zoned.get("alarms") if not a["acked"]}
    assert unacked
    wait_for(lambda: pg.query_selector("[data-ackall-active]"), "the Acknowledge-all button")
    # before: each one shows UNACK (a filled square in a bold frame), none ACK
    marks = pg.eval_on_selector_all(
        "#ev-alarms li[data-rule]",
        "els => els.map(l => [l.dataset.rule, l.querySelector('.ackmark').innerText])")
    assert {r for r, m in marks if m == "UNACK"} == unacked
    pg.click("[data-ackall-active]")
    pg.fill("#ackall-note", "seen on the round")
    pg.click("#ackall-submit")
    wait_for(lambda: "Acknowledged" in pg.inner_text("#ackall-msg"), "the answer")
    every_acked = "els => els.length && els.every(l => l.dataset.acked === 'yes')"
    wait_for(lambda: pg.eval_on_selector_all("#ev-alarms li[data-rule]", every_acked),
             "every alarm shown acknowledged")
    marks = pg.eval_on_selector_all(
        "#ev-alarms li[data-rule]", "els => els.map(l => l.querySelector('.ackmark').innerText)")
    assert marks and set(marks) == {"ACK"}
    acks = [e for e in zoned.get("events", limit=200)["events"] if e["kind"] == "ack"]
    assert {e["rule"] for e in acks} >= unacked
    assert {e["note"] for e in acks if e["rule"] in unacked} == {"seen on the round"}
    assert all(a["acked"] for a in zoned.get("alarms"))
    screenshot(pg, "console-acked")
    assert not log.errors


def test_waveform_panel_and_names_on_the_channel_page(
    zoned: ZonedDemo, page: tuple[Any, PageLog]
) -> None:
    pg, log = page
    open_view(pg, zoned.base_url + "/#/channel/p2-de-h")
    # 0.25 s at 12.8 kHz: the panel asks for it every refresh, and shows what the ring holds
    # (after a gap, less: at 6× real time on a busy machine the demo's sources can overrun)
    wait_for(lambda: pg.get_attribute("#wave-panel", "data-n") == "3200", "the waveform")
    assert pg.get_attribute("#wave-panel", "data-unit") == "g"
    cap = pg.inner_text("#wave-cap")  # "3200 samples · 12800/s · from 22:44:48 +05:45"
    assert re.fullmatch(r"3200 samples · 12800/s · from (\d{4}-\d\d-\d\d )?\d\d:\d\d:\d\d \+05:45",
                        cap), cap
    assert pg.inner_text("#ch-name") == "Cooling-water pump 2 · drive end, horizontal (p2-de-h)"
    side = pg.inner_text(".side a.ch[data-channel='p2-de-h']")
    assert "drive end, horizontal" in side
    assert "COOLING-WATER PUMP 2" in pg.inner_text(".side h3[data-machine='p2']").upper()
    screenshot(pg, "console-waveform")
    assert not log.errors



def test_band_limit_ticks_say_alert_and_danger_with_their_values(
    zoned: ZonedDemo, page: tuple[Any, PageLog]
) -> None:
    """The bar's level ticks read "alert 4.50" / "danger 7.10", never a lone "A"/"D" (which
    reads as a severity zone of ISO 10816-3: docs/references.md); close levels move apart."""
    pg, _ = page
    open_view(pg, zoned.base_url + "/")
    ticks = pg.evaluate("""async () => {
        const m = await import("/static/bars.js");
        const ctx = document.createElement("canvas").getContext("2d");
        ctx.font = "600 9px sans-serif";
        const far = m.levelTicks(ctx, {alert: 4.5, danger: 7.1}, (v) => v * 40);
        const near = m.levelTicks(ctx, {alert: 4.5, danger: 4.6}, (v) => v * 40);
        return [far.map((t) => [t.text, t.align]), near.map((t) => [t.text, t.align])];
    }""")
    assert ticks == [[["alert 4.50", "center"], ["danger 7.10", "center"]],
                     [["alert 4.50", "right"], ["danger 4.60", "left"]]]
