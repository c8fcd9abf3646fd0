"""The browser side of ``quaver bench --dashboard``: headless Chromium through Playwright, the
plant view signed in with a token, and what Chrome DevTools Protocol reports of it.

Knows Playwright, the DevTools Protocol and the dashboard's public markup (``[data-machine]``
sections, ``.card`` elements with an ``.overall`` value); nothing of the service.
"""

from __future__ import annotations

import contextlib
import os
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .harness import LOOPBACK
from .pagestats import ws_payload_bytes

__all__ = ["CHROMIUM", "CHROMIUM_ARGS", "PageProbe", "browser_context"]

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update",
                 "--disable-sync"]
VIEWPORT_W, VIEWPORT_H = 1440, 900
TOKEN_KEY = "quaver.token"  # web/api.js: the token kept for the session

# Counts animation frames from the first document on (window.__qbFrames).
FRAME_COUNTER = """
window.__qbFrames = 0;
(function tick() { window.__qbFrames++; requestAnimationFrame(tick); })();
"""

# Once every machine is in the plant view and every card present shows its overall: the
# page's clock then (ms since the navigation started); false before.
RENDERED = """ids => {
  const root = document.getElementById('ov-machines') || document;
  for (const id of ids) {
    if (!root.querySelector(`[data-machine="${CSS.escape(id)}"]`)) return false;
  }
  const vals = [...root.querySelectorAll('.card .overall')].map(e => e.textContent.trim());
  return vals.length > 0 && vals.every(v => v !== '' && v !== '—') && performance.now();
}"""

# Per machine id: its element's box (first [data-machine] in the plant view) or null.
BOXES = """ids => {
  const root = document.getElementById('ov-machines') || document;
  const out = {};
  for (const id of ids) {
    const el = root.querySelector(`[data-machine="${CSS.escape(id)}"]`);
    const r = el && el.getBoundingClientRect();
    out[id] = r ? {top: r.top, bottom: r.bottom} : null;
  }
  return {boxes: out, height: window.innerHeight, scrollY: window.scrollY,
          cards: root.querySelectorAll('.card').length};
}"""


@contextlib.contextmanager
def browser_context(workdir: Path, chromium: Path = CHROMIUM) -> Iterator[Any]:
    """A persistent headless Chromium context (profile and XDG folders under ``workdir``) that
    may reach 127.0.0.1 only; closed on leaving."""
    from playwright.sync_api import sync_playwright

    if not chromium.exists():
        raise FileNotFoundError(f"{chromium} is missing (apt-get install chromium)")
    env: dict[str, str | float | bool] = {**os.environ,
                                          "XDG_CONFIG_HOME": str(workdir / "config"),
                                          "XDG_CACHE_HOME": str(workdir / "cache")}
    with sync_playwright() as pw:
        ctx = pw.chromium.launch_persistent_context(
            str(workdir / "profile"), executable_path=str(chromium), headless=True,
            args=CHROMIUM_ARGS, env=env,
            viewport={"width": VIEWPORT_W, "height": VIEWPORT_H})
        ctx.route(lambda url: not url.startswith(f"http://{LOOPBACK}:"),
                  lambda route: route.abort())
        try:
            yield ctx
        finally:
            ctx.close()


@dataclass
class PageProbe:
    """The plant view in one page with a DevTools session: bytes received (HTTP bodies as
    ``Network.loadingFinished`` counts them on the wire, WebSocket message payloads),
    main-thread task time, animation frames and the JS heap."""

    ctx: Any
    base_url: str
    token: str
    page: Any = None
    cdp: Any = None
    http_bytes: int = 0
    ws_bytes: int = 0
    ws_messages: int = 0
    t_open: float = 0.0
    errors: list[str] = field(default_factory=list)

    def open(self) -> None:
        self.page = self.ctx.new_page()
        self.page.add_init_script(
            f"if (!sessionStorage.getItem({TOKEN_KEY!r})) "
            f"sessionStorage.setItem({TOKEN_KEY!r}, {self.token!r});" + FRAME_COUNTER)
        self.page.on("pageerror", lambda e: self.errors.append(str(e)))
        self.cdp = self.page.context.new_cdp_session(self.page)
        self.cdp.send("Network.enable")
        self.cdp.send("Performance.enable", {"timeDomain": "timeTicks"})
        self.cdp.on("Network.loadingFinished", self._http)
        self.cdp.on("Network.webSocketFrameReceived", self._ws)
        self.t_open = time.monotonic()
        self.page.goto(f"{self.base_url}/#/", wait_until="commit")

    def _http(self, ev: dict[str, Any]) -> None:
        self.http_bytes += int(ev.get("encodedDataLength", 0))

    def _ws(self, ev: dict[str, Any]) -> None:
        resp = ev.get("response", {})
        self.ws_bytes += ws_payload_bytes(str(resp.get("payloadData", "")),
                                          int(resp.get("opcode", 1)))
        self.ws_messages += 1

    def bytes_received(self) -> int:
        return self.http_bytes + self.ws_bytes

    def wait_rendered(self, machine_ids: Sequence[str], timeout_s: float) -> float:
        """Seconds from the navigation's start until every machine and card value is in the
        DOM (checked at every animation frame; the page's own clock)."""
        from playwright.sync_api import TimeoutError as PageTimeout

        try:
            got = self.page.wait_for_function(RENDERED, arg=list(machine_ids), polling="raf",
                                              timeout=timeout_s * 1000.0)
        except PageTimeout:
            raise RuntimeError(f"the plant view did not show every machine with its values "
                               f"within {timeout_s:g} s (page errors: {self.errors[:3]})"
                               ) from None
        return float(got.json_value()) / 1000.0

    def first_screen(self, machine_ids: Sequence[str]) -> dict[str, Any]:
        """Which of ``machine_ids`` have their element within the viewport (top < height and
        bottom > 0) as the page stands, scrolled to the top."""
        got = self.page.evaluate(BOXES, list(machine_ids))
        inside = [m for m, b in got["boxes"].items()
                  if b is not None and b["top"] < got["height"] and b["bottom"] > 0]
        return {"in_first_screen": sorted(inside),
                "not_in_first_screen": sorted(set(machine_ids) - set(inside)),
                "viewport_height": got["height"], "scroll_y": got["scrollY"],
                "cards_in_dom": got["cards"]}

    def sample(self) -> dict[str, float]:
        """Now: DevTools Timestamp and TaskDuration (cumulative s), the page's frame count."""
        m = {x["name"]: float(x["value"])
             for x in self.cdp.send("Performance.getMetrics")["metrics"]}
        frames = float(self.page.evaluate("window.__qbFrames || 0"))
        return {"t": m["Timestamp"], "task_s": m["TaskDuration"], "frames": frames,
                "wall": time.monotonic(), "bytes": float(self.bytes_received())}

    def retained_heap(self, reads: int = 3, apart_s: float = 0.5) -> int:
        """Used JS heap after a full garbage collection (HeapProfiler.collectGarbage, then
        Runtime.getHeapUsage), bytes: the least of ``reads`` such readings ``apart_s`` apart.
        One reading also counts whatever is in flight at that instant (a message being
        handled, a response being parsed): at 1024 channels single readings 30 s apart went
        4.5, 5.3, 4.6 MB while heap snapshots showed nothing retained had grown."""
        out = []
        for k in range(reads):
            if k:
                time.sleep(apart_s)
            self.cdp.send("HeapProfiler.collectGarbage")
            out.append(int(self.cdp.send("Runtime.getHeapUsage")["usedSize"]))
        return min(out)

    def close(self) -> None:
        if self.page is not None:
            with contextlib.suppress(Exception):
                self.page.close()
            self.page = None
