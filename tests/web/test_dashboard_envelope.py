"""The channel view of an envelope profile in a real browser against the demo service (pump
p1's drive-end bearing develops its outer-race defect): the envelope spectrum carries the
defect markers (BPFO and harmonics, BPFI with its ±1X sidebands, BSF, FTF) at the service's
tone frequencies, and the kurtogram heat map is drawn in greys with the band in use outlined.

Drives headless Chromium through Playwright; knows only the public API and the page."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest

from tests.web.conftest import PageLog, Service, wait_for

pytestmark = pytest.mark.browser

CHANNEL = "p1-de-h"


def test_envelope_markers_and_kurtogram(
    own_service: Callable[..., Service], page: tuple[Any, PageLog]
) -> None:
    # 4× real time: the demo's fault starts at plant second 30 (service/examples/demo.toml)
    svc = own_service(speed=4.0)
    svc.wait_all_channels()
    pg, log = page
    pg.goto(f"{svc.base_url}/#/channel/{CHANNEL}?profile=envelope", wait_until="domcontentloaded")

    def chosen() -> dict[str, Any] | None:
        kg = pg.evaluate("window.quaver && window.quaver.view && window.quaver.view.kurtogram"
                         " && window.quaver.view.kurtogram()")
        return kg if kg and kg.get("drawn") and kg["drawn"].get("band") and (
            "chosen by the kurtogram" in kg["caption"]) else None

    kg = wait_for(chosen, "the kurtogram to choose a band and the page to draw it", 90)
    rest = svc.get(f"channels/{CHANNEL}/kurtogram", profile="envelope")
    assert rest["chosen"] and kg["band"] == rest["band"]  # held by hysteresis: the same band
    lo, hi = kg["band"]["lo_hz"], kg["band"]["hi_hz"]
    # above the envelope's Fmax, 500 Hz (where the band lies is the e2e test's business)
    assert 500.0 < lo < hi <= 0.45 * 12_800
    drawn = kg["drawn"]
    assert drawn["rows"] == len(rest["kurtogram"]["levels"]) and drawn["max"] > 0
    assert drawn["cols"] == len(rest["kurtogram"]["kurtosis"][0])
    box = drawn["band"]
    assert box["w"] > 0 and box["h"] > 0
    # calm greys: the heat map inside the outlined band has r ≈ g ≈ b (colour is for alarms)
    rgb = pg.evaluate(
        """([x, y]) => { const c = document.querySelector('#kg');
             const d = window.devicePixelRatio || 1;
             return Array.from(c.getContext('2d').getImageData(Math.round(x * d),
                                                               Math.round(y * d), 1, 1).data); }""",
        [box["x"] + box["w"] / 2, box["y"] + box["h"] / 2],
    )
    assert max(rgb[:3]) - min(rgb[:3]) <= 6, rgb
    assert pg.is_visible("#kg-panel")

    # defect markers from the service's tracked tones of the envelope profile
    tones = {t["name"]: t["frequency_hz"] for t in
             svc.get(f"channels/{CHANNEL}/tones", profile="envelope")["tones"]}

    def markers() -> dict[str, float] | None:
        m = pg.evaluate("window.quaver.view.markers()")
        got = {x["name"]: x["f"] for x in m}
        return got if "BPFI+1X" in got else None

    got = wait_for(markers, "the defect markers", 30)
    x1 = tones["1X"]
    want = {"BPFO": tones["BPFO"], "BPFI": tones["BPFI"], "BSF": tones["BSF"],
            "FTF": tones["FTF"], "BPFI−1X": tones["BPFI"] - x1, "BPFI+1X": tones["BPFI"] + x1}
    assert set(got) == set(want)
    for name, f in want.items():
        assert got[name] == pytest.approx(f, rel=1e-6), name

    # and their labels on the plot: the defect, its harmonics, the sidebands
    def labels() -> set[str] | None:
        texts = {x["text"] for x in pg.evaluate("window.quaver.view.labels()")
                 if x["kind"] == "bearing"}
        return texts if {"BPFO", "2×BPFO"} <= texts else None

    texts = wait_for(labels, "BPFO and 2×BPFO labelled on the envelope spectrum", 30)
    assert texts & {"BPFI−1X", "BPFI+1X", "BPFI"}, texts
    # the wide profile has no kurtogram: the panel hides
    pg.click("#seg-profile [data-profile=wide]")
    wait_for(lambda: not pg.is_visible("#kg-panel"), "the kurtogram panel to hide", 15)
    assert not log.errors, log.errors
