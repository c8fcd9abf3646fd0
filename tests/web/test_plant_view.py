"""The plant view's truths: views unmount cleanly (no callback runs after a view is left),
sparklines draw the limits of every rule form on fixed scales, machines are named where
channels are. Headless Chromium against the demo service on 127.0.0.1."""

from __future__ import annotations

from typing import Any

import pytest

from tests.web.conftest import PageLog, Service, wait_for

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
