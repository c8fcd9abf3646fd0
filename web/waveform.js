// The waveform panel of the channel page: the newest raw samples of a channel (GET
// /api/v1/channels/{id}/waveform, input units after sensitivity), time axis in ms, refreshed
// every second. Reads only that route; draws on its own canvas.

import { API, getJSON, qs } from "./api.js";
import { fmtVal, fmtWhen, unitLabel } from "./fmt.js";
import { html, setHTML } from "./dom.js";
import { Scale, Surface, border, gridX, gridY, labelsX, labelsY, linTicks, pal, plotArea } from "./plot.js";

const SPANS = [[0.1, "100 ms"], [0.25, "250 ms"], [0.5, "500 ms"], [1, "1 s"]];
const REFRESH_MS = 1000;

/** Draws one block: {fs, t0_ns, unit, step, samples | min+max}. */
export class WavePlot {
  constructor(canvas) {
    this.data = null;
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
  }

  setData(d) {
    this.data = d;
    this.surface.invalidate();
  }

  _draw(ctx, w, h) {
    const d = this.data;
    const box = { L: 60, R: w - 12, T: 8, B: h - 22 };
    const { L, R, T, B } = box;
    plotArea(ctx, w, h, box);
    if (!d) {
      border(ctx, box);
      return;
    }
    const lo = d.min ?? d.samples, hi = d.max ?? d.samples;
    let mx = 0;
    for (let i = 0; i < lo.length; i++) mx = Math.max(mx, Math.abs(lo[i]), Math.abs(hi[i]));
    mx = mx > 0 ? mx * 1.08 : 1;
    const durMs = (d.n / d.fs) * 1000;
    const xs = new Scale(false).set(0, durMs, L, R);
    const ys = new Scale(false).set(-mx, mx, B, T);
    const xt = linTicks(0, durMs, Math.max(2, Math.floor((R - L) / 80)));
    const yt = linTicks(-mx, mx, Math.max(5, Math.floor((B - T) / 24))); // steps below mx
    gridX(ctx, xs, xt, box);
    gridY(ctx, ys, yt, box, (v) => (v === 0 ? pal.axis : pal.grid));
    labelsX(ctx, xs, xt, box, (t) => `${+t.toFixed(2)} ms`, { dy: 4, spaced: true });
    labelsY(ctx, ys, yt, box, (v) => fmtVal(v, 2));
    ctx.save();
    ctx.beginPath();
    ctx.rect(L, T, R - L, B - T);
    ctx.clip();
    ctx.strokeStyle = pal.trace;
    ctx.lineWidth = 1;
    ctx.beginPath();
    const dtMs = (d.step / d.fs) * 1000;
    if (d.min) {
      for (let i = 0; i < lo.length; i++) { // one run of `step` samples: its extent
        const x = xs.px((i + 0.5) * dtMs);
        ctx.moveTo(x, ys.px(hi[i]));
        ctx.lineTo(x, ys.px(lo[i]) + 0.5);
      }
    } else {
      for (let i = 0; i < lo.length; i++) {
        const x = xs.px(i * dtMs), y = ys.px(lo[i]);
        if (i) ctx.lineTo(x, y);
        else ctx.moveTo(x, y);
      }
    }
    ctx.stroke();
    ctx.restore();
    border(ctx, box);
    ctx.fillStyle = pal["ink-3"];
    ctx.font = `11px ${pal.font}`;
    ctx.textAlign = "left";
    ctx.textBaseline = "top";
    ctx.fillText(unitLabel(d.unit), 6, T);
  }
}

/** Fill the figure `fig` of the channel page with the waveform of channel `id` and keep it
 *  current while the page is open. Returns {dispose(), probe()}. */
export function mountWave(fig, id) {
  setHTML(fig, html`<figcaption>Waveform <span class="hint">the newest raw samples, input units after sensitivity</span>
      <span class="seg" role="group" aria-label="waveform span" id="wave-spans">${SPANS.map(([s, t]) => html`<button data-span="${s}" aria-pressed="${s === 0.25}">${t}</button>`)}</span>
      <span class="readout" id="wave-cap"></span></figcaption>
    <canvas id="wave" class="plot-wave" aria-label="waveform of ${id}"></canvas>`);
  const plot = new WavePlot(fig.querySelector("#wave"));
  const cap = fig.querySelector("#wave-cap");
  let seconds = 0.25;
  let busy = false;
  let gone = false;
  async function load() {
    if (busy || gone || document.hidden) return;
    busy = true;
    try {
      const points = Math.max(64, Math.round((plot.surface.w || 600) * 2));
      const d = await getJSON(`${API}/channels/${encodeURIComponent(id)}/waveform${qs({ seconds, points })}`);
      if (gone) return;
      plot.setData(d);
      cap.textContent = `${d.n} samples · ${fmtVal(d.fs, 5)}/s · from ${fmtWhen(d.t0_ns)}`;
      cap.title = d.step > 1 ? `drawn as the min/max of each ${d.step} samples` : "every sample drawn";
      fig.dataset.n = d.n;
      fig.dataset.unit = d.unit;
    } catch (e) {
      if (!gone) cap.textContent = e.status === 503 ? "no samples yet" : `not available: ${e.message}`;
    } finally {
      busy = false;
    }
  }
  fig.querySelector("#wave-spans").addEventListener("click", (e) => {
    const b = e.target.closest("[data-span]");
    if (!b) return;
    seconds = Number(b.dataset.span);
    for (const x of fig.querySelectorAll("[data-span]")) x.setAttribute("aria-pressed", String(x === b));
    load();
  });
  const timer = setInterval(load, REFRESH_MS);
  load();
  return {
    dispose() {
      gone = true;
      clearInterval(timer);
      plot.surface.dispose();
    },
    probe: () => plot.data,
  };
}
