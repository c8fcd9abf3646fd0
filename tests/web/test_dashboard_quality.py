"""The plant view tells the truth about a channel that goes silent: its card turns NO SIGNAL
(greyed, the old value struck through, "since …") within the channel's stale_after_s, and back
to OK when data returns. A real `quaver serve` fed over framed TCP, read by headless Chromium."""

from __future__ import annotations

import socket
import threading
import time
from pathlib import Path
from typing import Any

import pytest

from tests.service.conftest import SMALL_FS, feed_tone, one_band_config, run_service
from tests.web.conftest import PageLog, screenshot, wait_for

pytestmark = pytest.mark.browser
STALE_S = 2.0


class Producer(threading.Thread):
    """Feeds the 123 Hz tone at about real time while ``on`` is set; bounded by ``stop``."""

    def __init__(self, port: int) -> None:
        super().__init__(daemon=True)
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=10)
        self.on, self.stop = threading.Event(), threading.Event()
        self.error: BaseException | None = None

    def run(self) -> None:
        nxt = 0
        try:
            for _ in range(2000):  # at most 200 s
                if self.stop.is_set():
                    return
                if self.on.is_set():
                    nxt = feed_tone(self.sock, nxt, int(0.1 * SMALL_FS), 0.3)
                time.sleep(0.1)
        except BaseException as e:  # reported by the test
            self.error = e
        finally:
            self.sock.close()


def _card(pg: Any) -> dict[str, str]:
    return pg.evaluate(
        """() => { const c = document.querySelector('.card[data-channel="a"]');
                   return c ? { state: c.dataset.state, live: c.dataset.live || "",
                                note: c.querySelector('.note').textContent,
                                word: c.querySelector('.st').textContent } : null; }"""
    )


def test_a_silent_producer_turns_the_card_no_signal_and_back(
    tmp_path: Path, page: tuple[Any, PageLog]
) -> None:
    pg, log = page
    doc = one_band_config(channels=[{"id": "a", "machine": "m1", "stale_after_s": STALE_S}])
    with run_service(doc, tmp_path) as svc:
        prod = Producer(svc.ports["s"])
        prod.on.set()
        prod.start()
        try:
            svc.wait(lambda: svc.channel("a")["status"] == "ok" or None, "channel a ok")
            pg.goto(f"{svc.base_url}/#/")
            wait_for(lambda: (_card(pg) or {}).get("state") == "ok", "the card reads OK", 15)
            prod.on.clear()  # the producer stays connected and sends nothing
            t0 = time.monotonic()
            wait_for(lambda: (_card(pg) or {}).get("state") == "nosignal",
                     "the card reads NO SIGNAL", 15)
            seen_s = time.monotonic() - t0
            card = _card(pg)
            assert card["live"] == "no" and "NO SIGNAL" in card["word"]
            assert "since" in card["note"] and "value from" in card["note"], card
            # stale_after_s, the service's watch (0.25 s) and the page's status message (1 s)
            assert seen_s < STALE_S + 3.0, seen_s
            shot = screenshot(pg, "plant-no-signal")
            assert shot.stat().st_size > 0
            prod.on.set()
            wait_for(lambda: (_card(pg) or {}).get("state") == "ok", "the card back to OK", 15)
            assert _card(pg)["live"] == "yes"
        finally:
            prod.stop.set()
            prod.join(timeout=10)
        assert prod.error is None, prod.error
    assert not log.errors, log.errors
