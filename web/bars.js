// Band values as horizontal bars against their alert and danger levels, and the
// third-octave bands as a small bar spectrum. Canvas only; callers hand in plain rows.

import { fmtHz, fmtVal, unitLabel } from "./fmt.js";
import { Scale, Surface, logTicks, pal } from "./plot.js";
import { bandsOf, levels, profileKey, rulesFor } from "./shared.js";

/**
 * Rows: [{name, lo_hz, hi_hz, value, alert, danger, state, via}] in one unit (RMS); `via`
 * names the profile a value comes from when it is not the one on screen. A row's bar
 * spans 0…1.3 × danger when it has levels; rows without levels share one scale.
 */
export class BandBars {
  constructor(canvas, { compact = false } = {}) {
    this.canvas = canvas;
    this.compact = compact;
    this.rows = [];
    this.unit = "";
    this.stale = false;
    this.rowH = compact ? 17 : 34;
    this.height = 0;
    this.sig = null; // what the last setRows asked to draw (see _sig)
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
  }

  /** New rows: redrawn only when what the canvas shows changes (a value's digits, a bar's
   *  length by a pixel, a state, a level), so a value that jitters below what can be seen costs
   *  nothing. Returns whether a redraw was asked for. */
  setRows(rows, unit) {
    this.rows = rows;
    this.unit = unit;
    const h = this._tops(rows).at(-1) + (this.compact ? 2 : 10);
    if (h !== this.height) {
      this.height = h;
      this.canvas.style.height = `${h}px`;
    }
    const sig = this._sig(rows, unit);
    if (sig === this.sig) return false;
    this.sig = sig;
    this.surface.invalidate();
    return true;
  }

  /** What a drawing of `rows` shows, as a string: equal strings draw the same pixels. */
  _sig(rows, unit) {
    const maxes = this._maxes(rows);
    const px = Math.max(1, this.surface.w || 300); // the bar's length in pixels, near enough
    return JSON.stringify([unit, this.stale, rows.map((r, i) => [r.name, r.via, r.lo_hz, r.hi_hz, r.x_unit, r.alert, r.danger,
      r.state, r.more, fmtVal(r.value), Number.isFinite(r.value) ? Math.round(px * Math.min(1.01, Math.max(0, r.value / maxes[i]))) : -1])]);
  }

  /** Each row's full scale: 1.3 × its highest danger level, else one scale for the rows
   *  without levels (1.2 × their highest value). */
  _maxes(rows) {
    let shared = 0;
    for (const r of rows) if (!(r.danger > 0) && r.value > shared) shared = r.value;
    shared = shared > 0 ? shared * 1.2 : 1;
    return rows.map((r) => {
      const dmax = Math.max(r.danger || 0, ...(r.more || []).map((m) => m.danger || 0));
      return dmax > 0 ? dmax * 1.3 : shared;
    });
  }

  /** Each row's top, and the end of the last one: a row with levels is taller in the full
   *  layout, so the words under its ticks ("alert 2.80") clear the next row's name. */
  _tops(rows) {
    const tops = [this.compact ? 1 : 5];
    for (const r of rows) tops.push(tops.at(-1) + this.rowH + (!this.compact && (r.alert > 0 || r.danger > 0) ? 12 : 0));
    if (!rows.length) tops.push(tops[0] + this.rowH);
    return tops;
  }

  setStale(s) {
    if (s !== this.stale) {
      this.stale = s;
      this.sig = null;
      this.surface.invalidate();
    }
  }

  _draw(ctx, w, h) {
    ctx.fillStyle = pal.panel;
    ctx.fillRect(0, 0, w, h);
    const rows = this.rows;
    // the levels drawn per row, for people in devtools and the tests
    const more = (r) => (this.compact && r.more) || [];
    this.canvas.dataset.levels = JSON.stringify(rows.map((r) => ({
      name: r.name, alert: [r.alert, ...more(r).map((m) => m.alert)].filter((v) => v > 0),
      danger: [r.danger, ...more(r).map((m) => m.danger)].filter((v) => v > 0) })));
    if (!rows.length) {
      ctx.fillStyle = pal["ink-3"];
      ctx.font = `italic 12px ${pal.font}`;
      ctx.textBaseline = "top";
      ctx.fillText("no bands yet", this.compact ? 0 : 10, 4);
      return;
    }
    const maxes = this._maxes(rows);
    const c = this.compact;
    const padL = c ? 0 : 10, padR = c ? 0 : 10;
    const nameW = c ? 74 : 0;
    const valW = c ? 50 : 0;
    const x0 = padL + nameW, x1 = w - padR - valW;
    const tops = this._tops(rows);
    rows.forEach((r, i) => {
      const top = tops[i];
      const max = maxes[i];
      const trackY = c ? top + 5 : top + 18;
      const trackH = c ? 7 : 9;
      const abn = r.state === "alert" || r.state === "danger";
      ctx.textBaseline = "middle";
      // labels
      if (c) {
        ctx.font = `11.5px ${pal.font}`;
        ctx.fillStyle = pal["ink-2"];
        ctx.textAlign = "left";
        ctx.fillText(clip(ctx, r.via ? `${r.name} · ${r.via}` : r.name, nameW - 6), 0, trackY + trackH / 2);
        ctx.font = `${abn ? "700 " : ""}11.5px ${pal.mono}`;
        ctx.fillStyle = this.stale ? pal["ink-3"] : pal.ink;
        ctx.textAlign = "right";
        ctx.fillText(fmtVal(r.value), w, trackY + trackH / 2);
      } else {
        ctx.font = `600 12px ${pal.font}`;
        ctx.fillStyle = pal.ink;
        ctx.textAlign = "left";
        const label = r.via ? `${r.name} · ${r.via}` : r.name; // watched on another profile
        ctx.fillText(label, padL, top + 7);
        const nw = ctx.measureText(label).width;
        ctx.font = `11px ${pal.font}`;
        ctx.fillStyle = pal["ink-3"];
        // an order profile's band edges are orders
        const range = !Number.isFinite(r.lo_hz) ? "" : r.x_unit === "order"
          ? `orders ${+r.lo_hz.toPrecision(4)}–${+r.hi_hz.toPrecision(4)}` : `${fmtHz(r.lo_hz, false)}–${fmtHz(r.hi_hz)}`;
        ctx.fillText(range + (r.danger > 0 ? "" : "  · no limits"), padL + nw + 8, top + 7);
        ctx.textAlign = "right";
        ctx.font = `${abn ? "700 " : ""}12px ${pal.mono}`;
        ctx.fillStyle = this.stale ? pal["ink-3"] : pal.ink;
        const word = r.state === "danger" ? "DANGER " : r.state === "alert" ? "ALERT " : "";
        ctx.fillText(`${word}${fmtVal(r.value)}`, w - padR, top + 7);
      }
      // track and bar
      ctx.fillStyle = pal.plot;
      ctx.fillRect(x0, trackY, x1 - x0, trackH);
      ctx.strokeStyle = pal.line || pal.grid;
      ctx.strokeStyle = pal.axis;
      ctx.lineWidth = 1;
      ctx.strokeRect(x0 + 0.5, trackY + 0.5, x1 - x0 - 1, trackH - 1);
      const frac = Number.isFinite(r.value) ? Math.max(0, Math.min(1, r.value / max)) : 0;
      ctx.fillStyle = this.stale ? pal.grid : r.state === "danger" ? pal.danger : r.state === "alert" ? pal.alert : pal["trace-2"];
      ctx.fillRect(x0 + 1, trackY + 1, (x1 - x0 - 2) * frac, trackH - 2);
      if (r.value > max) {
        // over the scale: an arrow head at the end
        ctx.fillStyle = pal.ink;
        ctx.beginPath();
        ctx.moveTo(x1 + 1, trackY + trackH / 2);
        ctx.lineTo(x1 - 5, trackY - 1);
        ctx.lineTo(x1 - 5, trackY + trackH + 1);
        ctx.fill();
      }
      // levels: alert thin, danger thick, both neutral ink, each labelled below with its word
      // and value ("alert 4.50", "danger 7.10"): a lone letter would read as a severity zone
      // of the vibration standards, which these limits are not
      ctx.font = `600 9px ${pal.font}`;
      const ticks = levelTicks(ctx, r, (lvl) => x0 + (x1 - x0) * (lvl / max));
      // another rule's levels on the same value: ticks too (on the cards, which have no words)
      if (c) for (const m of r.more || []) ticks.push(...levelTicks(ctx, m, (lvl) => x0 + (x1 - x0) * (lvl / max)));
      for (const t of ticks) {
        ctx.strokeStyle = pal.ink;
        ctx.lineWidth = t.lw;
        ctx.beginPath();
        ctx.moveTo(t.x, trackY - 3);
        ctx.lineTo(t.x, trackY + trackH + 3);
        ctx.stroke();
        if (!c) {
          ctx.fillStyle = pal["ink-2"];
          ctx.textAlign = t.align;
          ctx.textBaseline = "top";
          ctx.fillText(t.text, t.x, trackY + trackH + 3);
        }
      }
    });
    if (!c) {
      ctx.font = `11px ${pal.font}`;
      ctx.fillStyle = pal["ink-3"];
      ctx.textAlign = "right";
      ctx.textBaseline = "bottom";
    }
  }
}

/** The level ticks of a row: [{x, lw, text, align}] for alert and danger, labelled with the
 *  word and the value; when the two labels would overlap centred, alert's ends at its tick
 *  and danger's starts at its tick. Exported for the browser tests (`levelTicks`). */
export function levelTicks(ctx, r, xOf) {
  const out = [];
  for (const [lvl, word, lw] of [[r.alert, "alert", 1.5], [r.danger, "danger", 2.5]]) {
    if (lvl > 0) out.push({ x: xOf(lvl), lw, text: `${word} ${fmtVal(lvl)}`, align: "center" });
  }
  if (out.length === 2) {
    const [a, d] = out;
    const wa = ctx.measureText(a.text).width, wd = ctx.measureText(d.text).width;
    if (a.x + wa / 2 + 4 > d.x - wd / 2) {
      a.align = "right";
      d.align = "left";
    }
  }
  return out;
}

function clip(ctx, s, w) {
  if (ctx.measureText(s).width <= w) return s;
  while (s.length > 1 && ctx.measureText(s + "…").width > w) s = s.slice(0, -1);
  return s + "…";
}

/** Third-octave band values (RMS) as vertical bars on a log amplitude axis. */
export class ThirdsChart {
  constructor(canvas) {
    this.rows = [];
    this.unit = "";
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
  }
  setRows(rows, unit) {
    this.rows = rows;
    this.unit = unit;
    this.surface.invalidate();
  }
  _draw(ctx, w, h) {
    ctx.fillStyle = pal.panel;
    ctx.fillRect(0, 0, w, h);
    const rows = this.rows.filter((r) => Number.isFinite(r.value));
    if (!rows.length) return;
    const L = 44, R = w - 10, T = 6, B = h - 18;
    let mx = 0;
    for (const r of rows) mx = Math.max(mx, r.value);
    const top = 10 ** Math.ceil(Math.log10(mx || 1));
    const ys = new Scale(true).set(top / 1e3, top, B, T);
    ctx.fillStyle = pal.plot;
    ctx.fillRect(L, T, R - L, B - T);
    ctx.font = `10px ${pal.mono}`;
    ctx.fillStyle = pal["ink-3"];
    ctx.textAlign = "right";
    ctx.textBaseline = "middle";
    for (const v of logTicks(ys.lo, ys.hi, 1).major) {
      const y = ys.px(v);
      ctx.strokeStyle = pal.grid;
      ctx.beginPath();
      ctx.moveTo(L, Math.round(y) + 0.5);
      ctx.lineTo(R, Math.round(y) + 0.5);
      ctx.stroke();
      ctx.fillText(fmtVal(v, 1), L - 4, y);
    }
    const bw = (R - L) / rows.length;
    ctx.textAlign = "center";
    ctx.textBaseline = "top";
    rows.forEach((r, i) => {
      const y = Math.max(T, Math.min(B, ys.px(Math.max(r.value, ys.lo))));
      ctx.fillStyle = r.state === "danger" ? pal.danger : r.state === "alert" ? pal.alert : pal["trace-2"];
      ctx.fillRect(L + i * bw + 1, y, Math.max(1, bw - 2), B - y);
      const label = r.name.replace(/^third /, "").replace(/ kHz$/, "k").replace(/ Hz$/, "");
      if (i % Math.max(1, Math.ceil(34 / bw)) === 0) {
        ctx.fillStyle = pal["ink-3"];
        ctx.fillText(label, L + (i + 0.5) * bw, B + 3);
      }
    });
    ctx.strokeStyle = pal.axis;
    ctx.strokeRect(L + 0.5, T + 0.5, R - L - 1, B - T - 1);
    ctx.textAlign = "left";
    ctx.textBaseline = "top";
    ctx.fillStyle = pal["ink-3"];
    ctx.font = `10px ${pal.font}`;
    ctx.fillText(unitLabel(this.unit, "rms"), L + 4, T + 2);
  }
}

/** The levels and messages bandRows reads: shared.js's own (a test may hand in others). */
const SHARED = { levels, rulesFor, bandsOf, profileKey };

/**
 * Rows for BandBars from a bands message: every band, with the levels and state of the alarm
 * rule that watches it, whichever profile the message is of. A row watched on another profile
 * shows that profile's value and names it (`via`), so a bar never reads "no limits" for a band
 * an alarm watches.
 */
export function bandRows(channelId, msg, look = SHARED) {
  const named = [];
  const thirds = [];
  const here = look.profileKey(channelId, msg?.profile);
  for (const b of msg?.bands || []) {
    const { rule, value, via } = watcher(look, channelId, b, msg, here);
    let state = "ok";
    if (rule && rule.state && rule.rule) state = rule.state === "latched" ? "latched" : rule.state === "normal" ? "ok" : rule.state;
    else if (rule?.danger > 0 && value >= rule.danger) state = "danger";
    else if (rule?.alert > 0 && value >= rule.alert) state = "alert";
    const row = { ...b, value, via, unit: msg.unit, x_unit: msg.x_unit ?? "Hz", alert: rule?.alert ?? null, danger: rule?.danger ?? null, state };
    // the band named "overall" may be watched in both forms (band = "overall", overall = true)
    const more = b.name === "overall" && rule ? otherOverallRule(look, channelId, rule, via || msg.profile) : null;
    if (more && (more.alert > 0 || more.danger > 0)) row.more = [{ alert: more.alert ?? null, danger: more.danger ?? null }];
    (b.name.startsWith("third ") ? thirds : named).push(row);
  }
  return { named, thirds };
}

/** The other form's rule watching a channel's overall on `profile` (null when there is none). */
function otherOverallRule({ levels }, channelId, rule, profile) {
  return rule.kind === "overall" ? levels(channelId, "band", "overall", profile) : levels(channelId, "overall", "overall", profile);
}

/** The rule that watches band `b` of `msg`, and the value it watches: a band rule on the
 *  message's profile; for the band named "overall", the overall rule (the channel's overall
 *  is that band's value); else such a rule on another profile, with that profile's value. */
function watcher({ levels, rulesFor, bandsOf }, channelId, b, msg, here) {
  const isOverall = b.name === "overall";
  const own = levels(channelId, "band", b.name, msg.profile)
    ?? (isOverall ? levels(channelId, "overall", "overall", msg.profile) : null);
  if (own) return { rule: own, value: b.value, via: "" };
  const others = [
    ...rulesFor(channelId, "band", b.name),
    ...(isOverall ? rulesFor(channelId, "overall", "overall") : []),
  ].filter((x) => x.pk !== here);
  if (!others.length) return { rule: null, value: b.value, via: "" };
  const o = others[0];
  const m2 = bandsOf(channelId, o.pk);
  const b2 = (m2?.bands || []).find((x) => x.name === b.name);
  const value = b2 ? b2.value : isOverall && m2 ? m2.overall : NaN;
  return { rule: o.rule, value: value ?? NaN, via: o.profile };
}

/** The few bands worth a glance, in a stable order: abnormal first, then those with limits. */
export function topBands(named, n = 3) {
  const rank = (r) => (r.state === "danger" ? 0 : r.state === "alert" ? 1 : r.danger > 0 ? 2 : 3);
  return named.map((r, i) => [rank(r), i, r]).sort((a, b) => a[0] - b[0] || a[1] - b[1]).slice(0, n).map((x) => x[2]);
}
