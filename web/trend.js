// The trend chart: one value over time (mean line inside its min–max envelope), its alert
// and danger levels, and alarm events marked by shape. Canvas only; data comes from the caller.

import { fmtClock, fmtVal, unitLabel, zoneOffsetMs, zoneParts } from "./fmt.js";
import { Scale, Surface, border, gridX, gridY, labelsX, labelsY, linTicks, niceCeil, pal, plateText, plotArea } from "./plot.js";

const STEPS_S = [1, 2, 5, 10, 15, 30, 60, 120, 300, 600, 900, 1800, 3600, 7200, 10800, 21600, 43200, 86400, 172800, 604800];
const L = 58, Rm = 14, T = 20, Bm = 24;

export class TrendChart {
  constructor(canvas) {
    this.points = []; // [{t_ms, mean, min, max}]
    this.range = [0, 1]; // ms
    this.unit = "";
    this.alert = null;
    this.danger = null;
    this.events = []; // [{t_ms, state, text}]
    this.note = "";
    this.hover = null;
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
    this.surface.trackHover(this);
  }

  set(d) {
    Object.assign(this, d);
    this.surface.invalidate();
  }

  _draw(ctx, w, h) {
    const R = w - Rm, B = h - Bm;
    const box = { L, R, T, B };
    plotArea(ctx, w, h, box);
    const [t0, t1] = this.range;
    const xs = new Scale(false).set(t0, t1, L, R);
    let mx = 0;
    for (const p of this.points) if (p.t_ms >= t0) mx = Math.max(mx, p.max ?? p.mean);
    // Show the levels when the values come near them (or when there are no values yet).
    if (this.danger > 0 && (mx === 0 || this.danger < mx * 3)) mx = Math.max(mx, this.danger);
    else if (this.alert > 0 && (mx === 0 || this.alert < mx * 3)) mx = Math.max(mx, this.alert);
    const top = niceCeil((mx || 1) * 1.1);
    const ys = new Scale(false).set(0, top, B, T);
    // grid and axes
    const yt = linTicks(0, top, Math.max(2, Math.floor((B - T) / 36)));
    gridY(ctx, ys, yt, box);
    labelsY(ctx, ys, yt, box, (v) => fmtVal(v, 2));
    const spanS = (t1 - t0) / 1000;
    const step = (STEPS_S.find((s) => ((R - L) / spanS) * s >= 80) ?? 2592000) * 1000;
    const tz = -zoneOffsetMs(t1); // ticks on the site zone's whole hours and days
    const xt = [];
    for (let t = Math.ceil((t0 - tz) / step) * step + tz; t <= t1; t += step) xt.push(t);
    gridX(ctx, xs, xt, box);
    labelsX(ctx, xs, xt, box, (t) => timeLabel(t, step));
    ctx.save();
    ctx.beginPath();
    ctx.rect(L, T, R - L, B - T);
    ctx.clip();
    // levels
    for (const [lvl, dash, lw, tag] of [[this.alert, [5, 3], 1, "alert"], [this.danger, [], 1.6, "danger"]]) {
      if (!(lvl > 0) || lvl > top) continue;
      const y = ys.px(lvl);
      ctx.strokeStyle = pal.ink;
      ctx.lineWidth = lw;
      ctx.setLineDash(dash);
      ctx.beginPath();
      ctx.moveTo(L, y);
      ctx.lineTo(R, y);
      ctx.stroke();
      ctx.setLineDash([]);
      ctx.font = `600 10px ${pal.font}`;
      plateText(ctx, `${tag} ${fmtVal(lvl)}`, L + 4, y, { fg: pal.ink, bg: pal.plot, pad: 2 });
    }
    // envelope then mean
    const pts = this.points.filter((p) => p.t_ms >= t0 - step && p.t_ms <= t1 + step);
    if (pts.some((p) => p.min !== undefined && p.max !== undefined && p.max > p.min)) {
      ctx.fillStyle = pal.grid;
      ctx.beginPath();
      pts.forEach((p, i) => (i ? ctx.lineTo : ctx.moveTo).call(ctx, xs.px(p.t_ms), ys.px(p.max ?? p.mean)));
      for (let i = pts.length - 1; i >= 0; i--) ctx.lineTo(xs.px(pts[i].t_ms), ys.px(pts[i].min ?? pts[i].mean));
      ctx.closePath();
      ctx.fill();
    }
    ctx.strokeStyle = pal.trace;
    ctx.lineWidth = 1.4;
    ctx.beginPath();
    let prevT = null;
    const gap = Math.max(step / 4, 3 * medianDt(pts));
    for (const p of pts) {
      const x = xs.px(p.t_ms), y = ys.px(p.mean);
      if (prevT === null || p.t_ms - prevT > gap) ctx.moveTo(x, y);
      else ctx.lineTo(x, y);
      prevT = p.t_ms;
    }
    ctx.stroke();
    ctx.restore();
    // events: a shape on the top edge and a thin line down
    for (const ev of this.events) {
      if (ev.t_ms < t0 || ev.t_ms > t1) continue;
      const x = xs.px(ev.t_ms);
      ctx.strokeStyle = pal["ink-3"];
      ctx.setLineDash([2, 2]);
      ctx.beginPath();
      ctx.moveTo(x, T + 8);
      ctx.lineTo(x, B);
      ctx.stroke();
      ctx.setLineDash([]);
      shape(ctx, ev.state, x, T + 3);
    }
    border(ctx, box);
    ctx.font = `11px ${pal.font}`;
    ctx.fillStyle = pal["ink-3"];
    ctx.textAlign = "left";
    ctx.textBaseline = "top";
    ctx.fillText(unitLabel(this.unit, "rms"), 4, 1);
    if (this.note) {
      ctx.textAlign = "right";
      ctx.fillText(this.note, R - 4, T + 3);
    }
    if (!pts.length) {
      ctx.textAlign = "center";
      ctx.textBaseline = "middle";
      ctx.fillText("no values in this period", (L + R) / 2, (T + B) / 2);
    }
    this._drawHover(ctx, xs, ys, pts, R, B);
  }

  _drawHover(ctx, xs, ys, pts, R, B) {
    if (!this.hover || !pts.length || this.hover.x < L || this.hover.x > R) return;
    const t = xs.val(this.hover.x);
    let best = pts[0];
    for (const p of pts) if (Math.abs(p.t_ms - t) < Math.abs(best.t_ms - t)) best = p;
    const x = xs.px(best.t_ms);
    ctx.strokeStyle = pal.ink;
    ctx.setLineDash([2, 2]);
    ctx.beginPath();
    ctx.moveTo(x, T);
    ctx.lineTo(x, B);
    ctx.stroke();
    ctx.setLineDash([]);
    const ev = this.events.find((e) => Math.abs(xs.px(e.t_ms) - this.hover.x) < 5);
    let s = `${fmtClock(best.t_ms * 1e6)}  ${fmtVal(best.mean)}`;
    if (best.max !== undefined && best.min !== undefined && best.max !== best.min) s += ` (${fmtVal(best.min)}…${fmtVal(best.max)})`;
    if (ev) s = `${fmtClock(ev.t_ms * 1e6)}  ${ev.text}`;
    ctx.font = `11px ${pal.mono}`;
    const right = x + 10 + ctx.measureText(s).width > R;
    plateText(ctx, s, right ? x - 8 : x + 8, Math.max(T + 10, Math.min(B - 10, ys.px(best.mean) - 14)), { align: right ? "right" : "left", fg: pal.ink, bg: pal.panel });
  }
}

function medianDt(pts) {
  if (pts.length < 3) return 1e12;
  const d = [];
  for (let i = 1; i < pts.length; i++) d.push(pts[i].t_ms - pts[i - 1].t_ms);
  d.sort((a, b) => a - b);
  return d[d.length >> 1];
}

function timeLabel(t, step) {
  const d = zoneParts(t); // the site zone's wall time
  if (step >= 86400e3) return `${d.y}-${d.mo}-${d.d}`;
  if (step >= 3600e3 && d.h === "00") return `${d.mo}-${d.d}`;
  if (step < 60e3) return `${d.h}:${d.mi}:${d.s}`;
  return `${d.h}:${d.mi}`;
}

/** Event marker shapes match the state glyphs: diamond danger, triangle alert, ring otherwise. */
function shape(ctx, state, x, y) {
  ctx.lineWidth = 1.5;
  if (state === "danger") {
    ctx.fillStyle = pal.danger;
    ctx.beginPath();
    ctx.moveTo(x, y - 1);
    ctx.lineTo(x + 6, y + 5);
    ctx.lineTo(x, y + 11);
    ctx.lineTo(x - 6, y + 5);
    ctx.closePath();
    ctx.fill();
  } else if (state === "alert") {
    ctx.fillStyle = pal.alert;
    ctx.strokeStyle = pal["alert-ink"];
    ctx.beginPath();
    ctx.moveTo(x, y);
    ctx.lineTo(x + 6, y + 10);
    ctx.lineTo(x - 6, y + 10);
    ctx.closePath();
    ctx.fill();
    ctx.stroke();
  } else {
    ctx.strokeStyle = pal["ink-2"];
    ctx.fillStyle = pal.plot;
    ctx.beginPath();
    ctx.arc(x, y + 5, 4, 0, 2 * Math.PI);
    ctx.fill();
    ctx.stroke();
  }
}
