// Run-up and coast-down records: the list on a channel's page (GET /api/v1/channels/{id}/runups)
// and the record's own view (GET …/runups/{rid}): amplitude and phase of each chosen order
// against speed, two plots over one speed axis, calm greys, one marker shape per order.
// Reads only those routes; draws on its own canvases.

import { API, getJSON } from "./api.js";
import { fmtDateTime, fmtVal } from "./fmt.js";
import { html, setHTML } from "./dom.js";
import { chName } from "./names.js";
import { Scale, Surface, border, gridX, gridY, labelsX, labelsY, linTicks, niceCeil, pal, plotArea } from "./plot.js";

const LIST_REFRESH_MS = 30000;
const SHAPES = ["circle", "square", "triangle", "diamond"]; // one per order, then again
const INKS = ["trace", "trace-2", "mark"]; // the palette's greys, one per order, then again

/** The hash of a record's view. */
export function runupHash(id, rid) {
  return `#/runup/${encodeURIComponent(id)}/${rid}`;
}

/** `#/runup/<id>/<rid>` → {id, rid}, else null. */
export function runupRoute(hash) {
  const m = /^#\/runup\/([^/?]+)\/(\d+)$/.exec(hash);
  return m ? { id: decodeURIComponent(m[1]), rid: Number(m[2]) } : null;
}

const orderName = (o) => `${+o.toFixed(3)}X`;
const kindWord = (k) => (k === "coast-down" ? "coast-down" : "run-up");

/** One record in a line: "run-up 950→1450 r/min · 14:02:10 · 21 points". */
function recordLine(r) {
  const [a, b] = r.kind === "coast-down" ? [r.rpm_hi, r.rpm_lo] : [r.rpm_lo, r.rpm_hi];
  return `${kindWord(r.kind)} ${Math.round(a)}→${Math.round(b)} r/min · ${fmtDateTime(r.end_ns)} · ${r.points} points`;
}

/** The run-up panel of channel `id`'s page in figure `fig`: its newest records as links,
 *  hidden when the channel records none and has none. Returns {dispose(), probe()}. */
export function mountRunupPanel(fig, id) {
  fig.hidden = true;
  let gone = false;
  let last = null;
  async function load() {
    if (gone || document.hidden) return;
    try {
      const d = await getJSON(`${API}/channels/${encodeURIComponent(id)}/runups?limit=8`);
      if (gone) return;
      last = d;
      fig.hidden = !d.recording && !d.runups.length;
      if (fig.hidden) return;
      const range = d.recording ? html`<span class="hint">recorded on each sweep through ${Math.round(d.rpm_lo)}–${Math.round(d.rpm_hi)} r/min, orders ${d.orders.map(orderName).join(", ")}</span>` : "";
      setHTML(fig, html`<figcaption>Run-ups and coast-downs ${range}</figcaption>
        <ul class="evlist runups">${d.runups.length
          ? d.runups.map((r) => html`<li><a href="${runupHash(id, r.id)}" data-runup="${r.id}">${recordLine(r)}</a></li>`)
          : html`<li class="hint">none yet: one is kept when the speed sweeps the whole range</li>`}</ul>`);
    } catch {
      /* a channel without the route's data, or a lost connection: try again later */
    }
  }
  load();
  const timer = setInterval(load, LIST_REFRESH_MS);
  return {
    dispose() {
      gone = true;
      clearInterval(timer);
    },
    probe: () => last && last.runups.map((r) => r.id),
  };
}

/** Amplitude or phase of every order against speed, on one canvas. */
export class OrderPlot {
  constructor(canvas, which) {
    this.which = which; // "amplitude" | "phase"
    this.data = null;
    this.drawn = null; // after a draw: {points: [[{rpm, v, x, y}] per order], labels: [text]}
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
  }

  setData(d) {
    this.data = d;
    this.surface.invalidate();
  }

  _draw(ctx, w, h) {
    const box = { L: 74, R: w - 14, T: 10, B: h - 40 };
    const { L, R, T, B } = box;
    plotArea(ctx, w, h, box);
    const d = this.data;
    if (!d || !d.rows.length) {
      border(ctx, box);
      this.drawn = null;
      return;
    }
    const rpm = d.rows.map((p) => p.rpm);
    const lo = Math.min(d.rpm_lo, ...rpm), hi = Math.max(d.rpm_hi, ...rpm);
    const xs = new Scale(false).set(lo, hi, L, R);
    const amp = this.which === "amplitude";
    const top = amp ? niceCeil(Math.max(...d.rows.flatMap((p) => p.amplitude)) * 1.1) : 180;
    const ys = new Scale(false).set(amp ? 0 : -180, top, B, T);
    const xt = linTicks(lo, hi, Math.max(2, Math.floor((R - L) / 80)));
    const yt = amp ? linTicks(0, top, 4) : [-180, -90, 0, 90, 180];
    gridX(ctx, xs, xt, box);
    gridY(ctx, ys, yt, box);
    labelsX(ctx, xs, xt, box, (v) => `${Math.round(v)}`, { spaced: true });
    labelsY(ctx, ys, yt, box, (v) => (amp ? fmtVal(v, 3) : `${v}°`));
    const labels = [];
    ctx.fillStyle = pal["ink-2"];
    ctx.font = `12px ${pal.font}`;
    ctx.textAlign = "center";
    ctx.textBaseline = "bottom";
    const xLabel = "speed, r/min";
    ctx.fillText(xLabel, (L + R) / 2, h - 4);
    labels.push(xLabel);
    const yLabel = amp ? `amplitude, ${d.unit} RMS` : "phase, degrees";
    ctx.save();
    ctx.translate(13, (T + B) / 2);
    ctx.rotate(-Math.PI / 2);
    ctx.textBaseline = "middle";
    ctx.fillText(yLabel, 0, 0);
    ctx.restore();
    labels.push(yLabel);
    const points = d.orders.map((o, j) => {
      const ink = pal[INKS[j % INKS.length]];
      const pts = d.rows.map((p) => {
        const v = amp ? p.amplitude[j] : p.phase_deg[j];
        return { rpm: p.rpm, v, x: xs.px(p.rpm), y: ys.px(v) };
      });
      ctx.strokeStyle = ink;
      ctx.lineWidth = 1.25;
      ctx.beginPath();
      pts.forEach((p, k) => {
        // phase wraps at ±180°: no line across the plot where it does
        const jump = k > 0 && !amp && Math.abs(p.v - pts[k - 1].v) > 180;
        if (k === 0 || jump) ctx.moveTo(p.x, p.y);
        else ctx.lineTo(p.x, p.y);
      });
      ctx.stroke();
      ctx.fillStyle = ink;
      for (const p of pts) marker(ctx, SHAPES[j % SHAPES.length], p.x, p.y);
      return pts;
    });
    // the legend, top right: marker and order name
    ctx.font = `11px ${pal.font}`;
    ctx.textAlign = "left";
    ctx.textBaseline = "middle";
    let x = R - 8 - d.orders.length * 52;
    d.orders.forEach((o, j) => {
      ctx.fillStyle = pal[INKS[j % INKS.length]];
      marker(ctx, SHAPES[j % SHAPES.length], x + 4, T + 10);
      ctx.fillStyle = pal["ink-2"];
      ctx.fillText(orderName(o), x + 11, T + 10);
      labels.push(orderName(o));
      x += 52;
    });
    border(ctx, box);
    this.drawn = { points: points.map((pts) => pts.map((p) => ({ ...p }))), labels };
  }
}

function marker(ctx, shape, x, y, r = 3) {
  ctx.beginPath();
  if (shape === "square") ctx.rect(x - r, y - r, 2 * r, 2 * r);
  else if (shape === "triangle") {
    ctx.moveTo(x, y - r - 0.5);
    ctx.lineTo(x + r + 0.5, y + r);
    ctx.lineTo(x - r - 0.5, y + r);
    ctx.closePath();
  } else if (shape === "diamond") {
    ctx.moveTo(x, y - r - 1);
    ctx.lineTo(x + r + 1, y);
    ctx.lineTo(x, y + r + 1);
    ctx.lineTo(x - r - 1, y);
    ctx.closePath();
  } else ctx.arc(x, y, r, 0, 2 * Math.PI);
  ctx.fill();
}

/** The view of record `rid` of channel `id` in `root`. Returns {unmount(), probe}. */
export function mountRunup(root, id, rid) {
  const base = `${API}/channels/${encodeURIComponent(id)}/runups/${rid}`;
  setHTML(root, html`<div class="runup-view">
    <p class="crumbs"><a href="#/channel/${encodeURIComponent(id)}">${chName(id)}</a> › <span id="ru-title">run-up ${rid}</span></p>
    <p class="hint" id="ru-facts">loading…</p>
    <figure class="panel"><figcaption>Amplitude against speed <span class="hint">each point: the vector mean of the steps of 4 revolutions in its speed bin</span></figcaption>
      <canvas id="ru-amp" class="plot-runup" aria-label="amplitude of each order against speed"></canvas></figure>
    <figure class="panel"><figcaption>Phase against speed <span class="hint">of each order at the tacho pulse; a resonance turns the phase as the amplitude peaks</span></figcaption>
      <canvas id="ru-phase" class="plot-runup" aria-label="phase of each order against speed"></canvas></figure>
    <p><a class="hint" id="ru-csv" href="${base}?format=csv" download>CSV of the points</a></p>
  </div>`);
  const $ = (s) => root.querySelector(s);
  const ampPlot = new OrderPlot($("#ru-amp"), "amplitude");
  const phasePlot = new OrderPlot($("#ru-phase"), "phase");
  let record = null;
  let error = "";
  getJSON(base).then((d) => {
    record = d;
    $("#ru-title").textContent = `${kindWord(d.kind)} ${rid}`;
    $("#ru-facts").textContent = `${recordLine(d)} · from ${fmtDateTime(d.start_ns)} · orders ${d.orders.map(orderName).join(", ")} · bins of ${d.rpm_step} r/min · amplitude ${d.unit} RMS`;
    ampPlot.setData(d);
    phasePlot.setData(d);
  }).catch((e) => {
    error = e.status === 404 ? `no run-up record ${rid} on this channel` : `not available: ${e.message}`;
    $("#ru-facts").textContent = error;
  });
  return {
    probe: {
      runup: () => record && { id: record.id, kind: record.kind, orders: record.orders, points: record.points },
      amplitude: () => ampPlot.drawn,
      phase: () => phasePlot.drawn,
      error: () => error,
    },
    unmount() {
      ampPlot.surface.dispose();
      phasePlot.surface.dispose();
    },
  };
}
