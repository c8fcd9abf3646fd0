// The kurtogram panel of an envelope profile's channel page: Antoni's fast kurtogram (GET
// /api/v1/channels/{id}/kurtogram?profile=…) as a grey heat map, levels down the page and
// frequency across, with the band in use outlined; and the defect markers an envelope
// spectrum gets from the profile's tones. Reads only that route; draws on its own canvas.

import { API, getJSON, qs } from "./api.js";
import { fmtHz, fmtVal } from "./fmt.js";
import { html, setHTML } from "./dom.js";
import { Scale, Surface, border, gridX, labelsX, linTicks, pal, plotArea } from "./plot.js";

const REFRESH_MS = 5000;
const DEFECTS = ["BPFO", "BPFI", "BSF", "FTF"];

/**
 * Defect markers for an envelope spectrum from its tracked tones: each of BPFO, BPFI, BSF and
 * FTF (tones of those names, any case, first of each) as {name, f}, and BPFI's sidebands at
 * ±1X as {name: "BPFI−1X" | "BPFI+1X", f, harmonics: 1}. 1X is the tone "1X" when there is
 * one (it follows the speed the service uses), else `speedHz`.
 */
export function defectMarkers(tones, speedHz) {
  const byName = new Map();
  for (const t of tones || []) {
    const n = String(t.name).toUpperCase();
    if (!byName.has(n) && t.frequency_hz > 0) byName.set(n, t.frequency_hz);
  }
  const out = DEFECTS.filter((n) => byName.has(n)).map((n) => ({ name: n, f: byName.get(n) }));
  const x1 = byName.get("1X") || (speedHz > 0 ? speedHz : 0);
  const bpfi = byName.get("BPFI");
  if (bpfi && x1 && bpfi > x1) {
    out.push({ name: "BPFI−1X", f: bpfi - x1, harmonics: 1 }, { name: "BPFI+1X", f: bpfi + x1, harmonics: 1 });
  }
  return out;
}

/** Draws one kurtogram answer: rows = levels (0 on top), columns = frequency slots. */
export class KurtogramPlot {
  constructor(canvas) {
    this.data = null;
    this.drawn = null; // {cols, rows, band: {x, y, w, h} | null} after a draw, for the tests
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
  }

  setData(d) {
    this.data = d;
    this.surface.invalidate();
  }

  _draw(ctx, w, h) {
    const d = this.data;
    const box = { L: 46, R: w - 12, T: 8, B: h - 22 };
    const { L, R, T, B } = box;
    plotArea(ctx, w, h, box);
    const kg = d?.kurtogram;
    if (!kg) {
      border(ctx, box);
      this.drawn = null;
      return;
    }
    const rows = kg.kurtosis.length, cols = kg.kurtosis[0].length;
    const fTop = kg.fs_hz / 2;
    const xs = new Scale(false).set(0, fTop, L, R);
    let mx = 0;
    for (const r of kg.kurtosis) for (const v of r) mx = Math.max(mx, v);
    const rowH = (B - T) / rows, colW = (R - L) / cols;
    // calm greys: 0 (or below: tonal) is the plot's own grey, the largest kurtosis the darkest
    for (let i = 0; i < rows; i++) {
      for (let j = 0; j < cols; j++) {
        const v = mx > 0 ? Math.max(0, kg.kurtosis[i][j]) / mx : 0;
        const g = Math.round(245 - 200 * v);
        ctx.fillStyle = `rgb(${g},${g},${g - 3})`;
        ctx.fillRect(L + j * colW, T + i * rowH, colW + 0.5, rowH + 0.5);
      }
    }
    const xt = linTicks(0, fTop, Math.max(2, Math.floor((R - L) / 90)));
    gridX(ctx, xs, xt, box);
    labelsX(ctx, xs, xt, box, (f) => fmtHz(f), { dy: 4, spaced: true });
    ctx.fillStyle = pal["ink-3"];
    ctx.font = `10px ${pal.font}`;
    ctx.textAlign = "right";
    ctx.textBaseline = "middle";
    const step = Math.max(1, Math.ceil(14 / rowH));
    for (let i = 0; i < rows; i += step) ctx.fillText(`${+kg.levels[i].toFixed(1)}`, L - 4, T + (i + 0.5) * rowH);
    let band = null;
    const b = d.band;
    if (b) {
      // the band in use, on the row whose bandwidth is nearest its own
      const bw = b.hi_hz - b.lo_hz;
      let row = 0;
      kg.levels.forEach((lv, i) => {
        if (Math.abs(Math.log2(kg.fs_hz * 2 ** -(lv + 1) / bw)) < Math.abs(Math.log2(kg.fs_hz * 2 ** -(kg.levels[row] + 1) / bw))) row = i;
      });
      band = { x: xs.px(b.lo_hz), y: T + row * rowH, w: xs.px(b.hi_hz) - xs.px(b.lo_hz), h: rowH, row };
      ctx.strokeStyle = pal.select;
      ctx.lineWidth = 2;
      ctx.strokeRect(band.x, band.y, Math.max(2, band.w), Math.max(2, band.h));
    }
    border(ctx, box);
    this.drawn = { cols, rows, band, max: mx };
  }
}

/** The band in use and the kurtogram's best band, in words. */
function caption(d) {
  const kg = d.kurtogram, b = d.band;
  const parts = [];
  if (b) parts.push(`band ${fmtHz(b.lo_hz)}–${fmtHz(b.hi_hz)}${d.mode === "auto" ? (d.chosen ? " (chosen by the kurtogram)" : " (broad default: nothing impulsive found)") : " (fixed)"}`);
  if (kg) {
    const k = kg.best;
    parts.push(`kurtogram maximum ${fmtVal(k.kurtosis, 3)} at level ${+k.level.toFixed(1)}, ${fmtHz(k.lo_hz)}–${fmtHz(k.hi_hz)}`);
  }
  if (d.changes) parts.push(`${d.changes} band change${d.changes > 1 ? "s" : ""}`);
  return parts.join(" · ");
}

/** Fill the figure `fig` with the kurtogram of channel `id`'s envelope profile `profile()`
 *  and keep it current while shown. `active()`: is the profile shown an envelope one (the
 *  panel hides itself otherwise). Returns {dispose(), probe(), refresh()}. */
export function mountKurtogram(fig, id, { profile, active }) {
  setHTML(fig, html`<figcaption>Kurtogram <span class="hint">spectral kurtosis over band centre (across) and bandwidth (down, level 0 = the whole band); darker = more impulsive; outlined: the band demodulated</span></figcaption>
    <canvas id="kg" class="plot-kurtogram" aria-label="kurtogram of ${id}"></canvas>
    <p class="spec-cap" id="kg-cap" aria-live="polite"></p>`);
  const plot = new KurtogramPlot(fig.querySelector("#kg"));
  const cap = fig.querySelector("#kg-cap");
  let busy = false;
  let gone = false;
  async function load() {
    fig.hidden = !active();
    if (fig.hidden || busy || gone || document.hidden) return;
    busy = true;
    const asked = profile();
    try {
      const d = await getJSON(`${API}/channels/${encodeURIComponent(id)}/kurtogram${qs({ profile: asked })}`);
      if (gone || asked !== profile()) return;
      plot.setData(d);
      cap.textContent = caption(d);
    } catch (e) {
      if (!gone) cap.textContent = e.status === 503 ? "no kurtogram yet" : `not available: ${e.message}`;
    } finally {
      busy = false;
    }
  }
  const timer = setInterval(load, REFRESH_MS);
  load();
  return {
    refresh() {
      plot.setData(null);
      cap.textContent = "";
      load();
    },
    dispose() {
      gone = true;
      clearInterval(timer);
      plot.surface.dispose();
    },
    probe: () => plot.data && { band: plot.data.band, best: plot.data.kurtogram?.best ?? null, levels: plot.data.kurtogram?.levels ?? [], drawn: plot.drawn, caption: cap.textContent },
  };
}
