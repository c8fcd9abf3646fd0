// The plant cards' overall sparklines: the last ten minutes on a fixed, labelled scale with the
// alert/danger lines of every rule that watches the overall. Canvas and store reads; no DOM building.

import { Surface, pal } from "./plot.js";
import { fmtVal } from "./fmt.js";
import { levels } from "./shared.js";

export const SPARK_MS = 10 * 60e3;
const HEADROOM = 1.3; // the top is 1.3 × the highest danger level (as the band bars do)

/**
 * The levels drawn on a channel's overall sparkline: of every rule that watches its overall on
 * the primary profile, in either form (`overall = true`, or `band = "overall"`, the band the
 * overall is taken over when a channel has one). Baseline-relative rules give their current
 * absolute levels once learnt (null before: nothing drawn). → {alert: [..], danger: [..]}.
 */
export function overallLimits(channelId) {
  const out = { alert: [], danger: [] };
  for (const r of [levels(channelId, "overall", "overall"), levels(channelId, "band", "overall")]) {
    if (!r) continue;
    if (r.alert > 0 && !out.alert.includes(r.alert)) out.alert.push(r.alert);
    if (r.danger > 0 && !out.danger.includes(r.danger)) out.danger.push(r.danger);
  }
  return out;
}

/** The smallest 1, 2, 2.5 or 5 × 10^k at or above `v` (a scale top easy to read). */
export function niceCeil(v) {
  if (!(v > 0)) return 1;
  const p = 10 ** Math.floor(Math.log10(v));
  for (const m of [1, 2, 2.5, 5, 10]) if (m * p >= v * (1 - 1e-9)) return m * p;
  return 10 * p;
}

/**
 * The plant's shared scale per unit, for sparklines of channels without a danger level: a
 * nice number at or above the highest value any of them showed in the last ten minutes, so
 * equal values draw at equal heights on every such card. `chans`: [{id, unit}]; `maxOf(id)`:
 * the highest value of its last ten minutes (asked only of channels without a danger level).
 */
export function sharedTops(chans, maxOf) {
  const mx = new Map();
  for (const c of chans) {
    if (overallLimits(c.id).danger.length) continue;
    mx.set(c.unit, Math.max(mx.get(c.unit) ?? 0, maxOf(c.id)));
  }
  return new Map([...mx].map(([u, m]) => [u, niceCeil(m * 1.1)]));
}

/**
 * One sparkline. `get()` → {pts: [[t_ms, v]], limits: overallLimits(), sharedTop, unit, stale}.
 * The scale is 0…1.3 × the highest danger level when there is one, else 0…sharedTop; values
 * above the top are drawn at the top. The canvas carries what it drew (data-top, data-alert,
 * data-danger, data-last, data-last-frac) for people in devtools and for the tests.
 */
export class Spark {
  constructor(canvas, get) {
    this.get = get;
    this.canvas = canvas;
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
  }

  _draw(ctx, w, h) {
    const { pts, limits, sharedTop, unit, stale } = this.get();
    const dmax = Math.max(0, ...limits.danger);
    const top = dmax > 0 ? dmax * HEADROOM : sharedTop > 0 ? sharedTop : niceCeil(Math.max(0, ...limits.alert) * HEADROOM);
    const d = this.canvas.dataset;
    d.top = String(top);
    d.alert = limits.alert.join(",");
    d.danger = limits.danger.join(",");
    ctx.fillStyle = pal.plot;
    ctx.fillRect(0, 0, w, h);
    const Y = (v) => h - 2 - (Math.min(Math.max(v, 0), top) / top) * (h - 4);
    for (const [list, dash] of [[limits.alert, [3, 2]], [limits.danger, []]]) {
      for (const lvl of list) {
        if (lvl > top) continue;
        ctx.strokeStyle = pal["ink-3"];
        ctx.setLineDash(dash);
        ctx.lineWidth = 1;
        ctx.beginPath();
        ctx.moveTo(0, Math.round(Y(lvl)) + 0.5);
        ctx.lineTo(w, Math.round(Y(lvl)) + 0.5);
        ctx.stroke();
        ctx.setLineDash([]);
      }
    }
    // the scale's top, labelled (comparing cards needs to know what full height means)
    const label = `${fmtVal(top)}${unit ? ` ${unit}` : ""}`;
    ctx.font = `10px ${pal.font}`;
    ctx.textBaseline = "top";
    const lw = ctx.measureText(label).width;
    ctx.fillStyle = pal.plot; // over the lines, never through them
    ctx.fillRect(w - lw - 4, 0, lw + 4, 11);
    ctx.fillStyle = pal["ink-3"];
    ctx.fillText(label, w - lw - 2, 1);
    if (pts.length < 2) {
      delete d.last;
      delete d.lastFrac;
      return;
    }
    const t1 = pts[pts.length - 1][0], t0 = t1 - SPARK_MS;
    const X = (t) => ((t - t0) / SPARK_MS) * (w - 2) + 1;
    ctx.strokeStyle = stale ? pal["ink-3"] : pal.trace;
    ctx.lineWidth = 1.2;
    ctx.beginPath();
    let started = false;
    for (const [t, v] of pts) {
      if (t < t0) continue;
      if (!started) ctx.moveTo(X(t), Y(v));
      else ctx.lineTo(X(t), Y(v));
      started = true;
    }
    ctx.stroke();
    const last = pts[pts.length - 1][1];
    d.last = String(last);
    d.lastFrac = String(Math.min(Math.max(last, 0), top) / top); // the height drawn, 0…1
  }
}
