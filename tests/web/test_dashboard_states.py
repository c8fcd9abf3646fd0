"""The dashboard's state sets and their meanings come from GET /api/v1/meta (web/states.js),
not from a copy in JavaScript: every channel status the service names maps to a shown state,
its tooltip is the service's meaning, and only the service's live states count as live."""

from __future__ import annotations

from typing import Any

import pytest

from tests.web.conftest import PageLog, Service, wait_for

pytestmark = pytest.mark.browser


def test_states_js_takes_the_sets_and_meanings_from_meta(
    demo: Service, page: tuple[Any, PageLog]
) -> None:
    pg, _ = page
    pg.goto(demo.base_url + "/", wait_until="domcontentloaded")
    pg.wait_for_function("window.quaver !== undefined", timeout=15000)  # after loadStates()
    meta = demo.get("meta")
    got = pg.evaluate(
        """async (names) => {
            const s = await import("/static/states.js");
            return names.map((n) => {
              const key = s.STATUS_TO_STATE[n];
              return { name: n, key, help: key && s.STATES[key]?.help, live: s.isLive(n),
                       event: s.eventStateKey(n) };
            });
        }""",
        [c["name"] for c in meta["channel_statuses"]],
    )
    shown = {"ok": "ok", "no-signal": "nosignal", "sensor-fault": "fault", "gap": "gap",
             "overrun": "overrun", "failed": "failed"}
    for c, g in zip(meta["channel_statuses"], got, strict=True):
        assert g["key"] == shown[c["name"]], g
        assert g["event"] == g["key"]
        assert g["live"] == c["live"]
        if c["name"] != "ok":  # "ok" keeps the dashboard's "running, no alarm"
            assert g["help"].startswith(c["meaning"]), g
            assert g["help"].endswith("its alarms are frozen") == c["suspends_alarms"], g
    alarm = pg.evaluate(
        """async () => { const s = await import("/static/states.js");
           return { alert: s.STATES.alert.help, danger: s.STATES.danger.help,
                    normal: s.eventStateKey("normal"), latched: s.eventStateKey("latched"),
                    other: s.eventStateKey("no-such-state") }; }"""
    )
    meaning = {a["name"]: a["meaning"] for a in meta["alarm_states"]}
    assert alarm == {"alert": meaning["alert"], "danger": meaning["danger"], "normal": "ok",
                     "latched": "latched", "other": "ok"}
    # every card's status is one the service named (none left "unknown")
    wait_for(lambda: pg.query_selector_all(".card") and not pg.query_selector_all(
        '.card[data-state="unknown"]'), "every card in a known state")
