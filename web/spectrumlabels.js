// The spectrum's labels that carry numbers or say which line is which: the service's peaks
// (never a value read off the drawing) and the key of two spectra drawn together. They ask
// the plot's Labels (labels.js) for their places; no data of their own, no network.

import { fmtHz, fmtVal } from "./fmt.js";
import { pal } from "./plot.js";

/** How many of the service's peaks the tones table lists; only those are labelled, so every
 *  peak label has its row in the table. */
export const LISTED_PEAKS = 6;
// Which labels give way to which when they would overlap: the state of the plot first,
// then the values people read, then the markers' names.
export const PRIO = { stale: 100, legend: 95, unit: 90, peak: 80, note: 70, bearing: 60, harmonic: 50, band: 40, level: 30 };
/** Moves for a label: `n` places, `step` px further down each (up when negative). */
export const DOWN = (step, n) => Array.from({ length: n }, (_, i) => [0, i * step]);

/**
 * The service's peaks in view (GET /channels/{id}/tones: interpolated frequency and
 * amplitude; `plot.serverPeaks`), largest first, at least 44 px apart: each marked on the
 * trace of `d` and labelled with the service's numbers, to the digits the tones table
 * shows. The amplitude only when the service's is in the unit drawn. Without the service's
 * peaks (none yet, or a spectrum it gave none for) nothing is labelled.
 * Returns the peaks marked, [{q, f, v}] (q: the nearest line of `d`).
 */
export function addPeakLabels(plot, ctx, d, yOf, { L, R, T }) {
  const v = d.values;
  const sp = plot.serverPeaks;
  const sameUnit = sp && sp.unit === d.unit && sp.amplitude === d.amplitude;
  const floor = plot.logAmp ? plot.ys.lo * 3 : plot.ys.hi * 0.04;
  const chosen = [];
  for (const p of (sp?.peaks || []).slice(0, LISTED_PEAKS).sort((a, b) => b.amplitude - a.amplitude)) {
    const f = p.frequency_hz;
    if (!Number.isFinite(f) || f < plot.view.lo || f > plot.view.hi) continue;
    const q = Math.round((f - d.f0) / d.df);
    if (q < 0 || q >= v.length || !(v[q] >= floor)) continue;
    const x = plot.xs.px(f);
    if (chosen.every((c) => Math.abs(c.x - x) > 44)) chosen.push({ q, x, p });
  }
  ctx.font = `10.5px ${pal.mono}`;
  chosen.forEach(({ q, x, p }, i) => {
    const f = p.frequency_hz;
    const y = yOf(v[q]);
    ctx.fillStyle = pal.ink;
    ctx.beginPath();
    ctx.moveTo(x, y - 3);
    ctx.lineTo(x - 4, y - 10);
    ctx.lineTo(x + 4, y - 10);
    ctx.closePath();
    ctx.fill();
    const ord = plot.speedHz && f / plot.speedHz < 40 ? ` ${(f / plot.speedHz).toFixed(2)}X` : "";
    // an order spectrum's peaks are at orders already: "7.00X", not "7.000 7.00X"
    const text = plot.xUnit === "order" ? `${f.toFixed(2)}X${sameUnit ? ` · ${fmtVal(p.amplitude)}` : ""}`
      : `${fmtHz(f, false)}${ord}${sameUnit ? ` · ${fmtVal(p.amplitude)}` : ""}`;
    const tw = ctx.measureText(text).width + 6;
    plot._labels.add({
      kind: "peak", prio: PRIO.peak - i / 100, text,
      value: { frequency_hz: f, amplitude: sameUnit ? p.amplitude : null },
      x: Math.min(R - tw / 2 - 2, Math.max(L + tw / 2 + 2, x)), y: Math.max(T + 8, y - 18),
      size: 10.5, font: ctx.font, align: "center", fg: pal.ink, bg: pal.plot, pad: 3,
      moves: [...DOWN(15, 6), ...DOWN(-15, 3).slice(1)],
    });
  });
  return chosen.map(({ q, p }) => ({ q, f: p.frequency_hz, v: v[q] }));
}

/** The key of two spectra drawn together (`plot.data` and `plot.overlay`: evidence then
 *  and now, live and a stored one): a sample of each line, its style as drawn, its words
 *  (the overlay's `legend` pair if it gives one, else the two labels). */
export function addLegend(plot, ctx, { R, T }) {
  const o = plot.overlay; // its own words and dash when it has them (history: live and stored)
  const words = o.legend ?? [plot.data.label || "this spectrum", o.label || "other"];
  const rows = [[words[0], [], 1.1, pal.trace], [words[1], o.dash ?? [7, 4], o.dash ? 1.6 : 2.2, pal["trace-2"]]];
  const font = `11px ${pal.font}`;
  ctx.font = font;
  const w = Math.max(...rows.map(([t]) => ctx.measureText(t).width)) + 44;
  const h = rows.length * 15 + 6;
  plot._labels.add({
    kind: "legend", prio: PRIO.legend, text: rows.map(([t]) => t).join(" / "), x: R - 6 - w, y: T + 26, w, h, pad: 0, base: "top", font,
    moves: DOWN(18, 6),
    paint: (c, box) => {
      c.fillStyle = pal.panel;
      c.fillRect(box.x0, box.y0, box.w, box.h);
      c.font = font;
      c.textAlign = "left";
      c.textBaseline = "middle";
      rows.forEach(([text, dash, width, colour], i) => {
        const y = box.y0 + 10 + i * 15;
        c.strokeStyle = colour;
        c.lineWidth = width;
        c.setLineDash(dash);
        c.beginPath();
        c.moveTo(box.x0 + 6, y);
        c.lineTo(box.x0 + 34, y);
        c.stroke();
        c.setLineDash([]);
        c.fillStyle = pal.ink;
        c.fillText(text, box.x0 + 40, y);
      });
    },
  });
}
