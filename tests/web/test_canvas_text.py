"""No two texts drawn on the band bars or the spectrogram overlap: every fillText of the
latest draw of a canvas is boxed with the browser's own text metrics (measureText's actual
bounding box at the alignment and baseline in force) and the boxes are checked pairwise.
Headless Chromium against the demo service on 127.0.0.1, run fast so that stored spectra
(one per 10 s of plant time) sit below the live rows of the spectrogram."""

from __future__ import annotations

import itertools
from typing import Any

import pytest

from tests.web.conftest import PageLog, Service

pytestmark = pytest.mark.browser

# Recorded per canvas id: the boxes of the fillText calls since its last draw began (a
# Surface draw starts with setTransform(dpr, …)); calls under a rotation are skipped.
RECORD_TEXT = """
(() => {
  const P = CanvasRenderingContext2D.prototype;
  const boxes = (window.__textBoxes = {});
  const setT = P.setTransform;
  P.setTransform = function (...a) {
    if (this.canvas.id) boxes[this.canvas.id] = [];
    return setT.apply(this, a);
  };
  const fill = P.fillText;
  P.fillText = function (text, x, y, ...rest) {
    const t = this.getTransform();
    const id = this.canvas.id;
    if (id && boxes[id] && t.b === 0 && t.c === 0 && String(text).trim()) {
      const m = this.measureText(text);
      const X = t.e / t.a + x, Y = t.f / t.d + y;  // CSS pixels (translation folded in)
      boxes[id].push({ text: String(text), l: X - m.actualBoundingBoxLeft,
                       r: X + m.actualBoundingBoxRight, t: Y - m.actualBoundingBoxAscent,
                       b: Y + m.actualBoundingBoxDescent });
    }
    return fill.call(this, text, x, y, ...rest);
  };
})();
"""


def overlaps(boxes: list[dict[str, Any]], slack: float = 0.5) -> list[tuple[str, str]]:
    return [(a["text"], b["text"]) for a, b in itertools.combinations(boxes, 2)
            if min(a["r"], b["r"]) - max(a["l"], b["l"]) > slack
            and min(a["b"], b["b"]) - max(a["t"], b["t"]) > slack]


DRAW = """async () => {
  const sgm = await import("/static/spectrogram.js");
  const bm = await import("/static/bars.js");
  const add = (id, w, h) => {
    const c = document.createElement("canvas");
    c.id = id;
    c.style.cssText = `position:fixed;left:0;top:0;width:${w}px;height:${h}px;z-index:99`;
    document.body.append(c);
    return c;
  };
  // a spectrogram as the channel page fills it: 20 stored spectra 10 s apart, then 180
  // live ones 0.1 s apart (newest last), 400 lines each
  const sg = new sgm.Spectrogram(add("t-sgram", 900, 240), { rows: 200 });
  sg.setView({ lo: 0, hi: 1000, logFreq: false, yTop: 10, decades: 4, logAmp: true });
  const now = 1.8e18, line = (k) => Float32Array.from({ length: 400 }, (_, q) => 1 + ((q * k) % 7));
  const row = (k, t_ns) => sg.push({ f0: 0, df: 2.5, values: line(k), t_ns });
  for (let k = 0; k < 20; k++) row(k, now - (20 - k) * 10e9 - 18e9);
  for (let k = 0; k < 180; k++) row(k, now - (180 - k) * 1e8);
  // band bars with levels on every row but one, values around them
  const bars = new bm.BandBars(add("t-bars", 420, 10));
  const band = (name, lo_hz, hi_hz, value, alert, danger, state) =>
    ({ name, lo_hz, hi_hz, value, alert, danger, state });
  bars.setRows([
    band("overall", 10, 1000, 5.6, 2.8, 4.5, "danger"),
    band("1x · narrow", 19.7, 29.6, 5.2, 2.8, 4.5, "danger"),
    band("2x", 44.4, 54.3, 0.49, null, null, "normal"),
    band("bearing", 160, 360, 1.3, 0.45, 0.9, "danger"),
    band("near", 400, 800, 1.0, 4.5, 4.6, "normal"),
  ], "mm/s");
  for (let k = 0; k < 4; k++) await new Promise((r) => requestAnimationFrame(r));
  return window.__textBoxes;
}"""


def test_bar_level_words_and_spectrogram_ticks_never_overlap(
    demo: Service, page: tuple[Any, PageLog]
) -> None:
    pg, log = page
    pg.add_init_script(RECORD_TEXT)
    pg.goto(demo.base_url + "/", wait_until="domcontentloaded")
    pg.wait_for_function("window.quaver !== undefined", timeout=15000)
    boxes = pg.evaluate(DRAW)
    ticks = [b["text"] for b in boxes["t-sgram"] if b["text"].endswith(" s")]
    # ticks reach back into the stored rows (beyond the live 18 s), so the uneven spacing
    # that once stacked "−60 s", "−120 s", "−180 s" on top of each other is exercised
    assert any(int(t[1:-2]) >= 60 for t in ticks), ticks
    assert overlaps(boxes["t-sgram"]) == []
    words = [b["text"] for b in boxes["t-bars"]]
    assert {"alert 2.80", "danger 4.50", "alert 0.450", "danger 0.900"} <= set(words), words
    assert overlaps(boxes["t-bars"]) == []
    assert not log.errors, log.errors
