// The spectrum plot: min/max per pixel column, bands and levels, order and bearing markers,
// peaks, hover read-out, zoom/pan by mouse and keys. Gets data from its caller; no network.

import { fmtHz, fmtHzAt, fmtVal, tickHz, tickOrder, unitLabel, convertFactor } from "./fmt.js";
import { Scale, Surface, border, gridX, plotArea, gridY, labelsX, labelsY, linTicks, logTicks, niceCeil, pal } from "./plot.js";
import { Labels } from "./labels.js";
import { DOWN, PRIO, addLegend, addPeakLabels } from "./spectrumlabels.js";

export const MARGIN = { l: 58, r: 14, t: 24, b: 30 };
const LOG_DECADES = 4;
const MAX_HARMONICS = 10;
const WIDE_RATIO = 1.6; // a band with hi/lo above this (over ~2/3 octave) gets a bracket, not a fill

/** Bins of one spectrum in [qa, qb] (inclusive) whose frequencies fall in [fa, fb). */
function binRange(f0, df, n, fa, fb) {
  let qa = Math.ceil((fa - f0) / df - 1e-9);
  let qb = Math.ceil((fb - f0) / df - 1e-9) - 1;
  if (qa < 0) qa = 0;
  if (qb > n - 1) qb = n - 1;
  return [qa, qb];
}

/**
 * Column extremes of `values` for pixel columns 0…W−1 under x scale `xs` (frequency → px).
 * Returns {x: Float32Array, lo, hi, count} with one entry per column that holds a bin
 * (single-bin columns are placed at the bin's own x). Cost O(bins in view + W).
 */
export function columnExtremes(values, f0, df, xs, W) {
  const n = values.length;
  const x = new Float32Array(W);
  const lo = new Float32Array(W);
  const hi = new Float32Array(W);
  let c = 0;
  for (let p = 0; p < W; p++) {
    const fa = xs.val(xs.p0 + p);
    // the last column also takes a line lying exactly on the right edge (e.g. at Fmax)
    const fb = p === W - 1 ? xs.val(xs.p0 + W) + 1e-6 * df : xs.val(xs.p0 + p + 1);
    const [qa, qb] = binRange(f0, df, n, fa, fb);
    if (qb < qa) continue;
    let mn = Infinity;
    let mx = -Infinity;
    for (let q = qa; q <= qb; q++) {
      const v = values[q];
      if (v < mn) mn = v;
      if (v > mx) mx = v;
    }
    if (!(mx >= mn)) continue; // all NaN
    x[c] = qa === qb ? xs.px(f0 + qa * df) : xs.p0 + p + 0.5;
    lo[c] = mn;
    hi[c] = mx;
    c++;
  }
  return { x, lo, hi, count: c };
}

export class SpectrumPlot {
  /**
   * @param canvas  the <canvas> to draw in (focusable for keyboard use)
   * @param opts    {onView(view), onHover(info|null), onPick({q, f})}
   */
  constructor(canvas, opts = {}) {
    this.canvas = canvas;
    this.opts = opts;
    this.data = null; // {f0, df, values, unit, amplitude, t_ns}
    this.overlay = null; // {f0, df, values, label, dash?, legend?: [live words, overlay words]}
    this.logAmp = true;
    this.logFreq = false;
    this.view = null; // {lo, hi} Hz
    this.decades = LOG_DECADES;
    this.yGain = 1; // manual y zoom for linear amplitude
    this.top = null; // auto top of the y axis, held with hysteresis
    this._lowSince = 0;
    this.bands = []; // [{name, lo_hz, hi_hz, value, unit, alert, danger, state}]
    this.speedHz = null;
    this.xUnit = "Hz"; // or "order": an order profile's x values are orders
    this.bearing = []; // [{name, f}]
    this.show = { bands: true, harmonics: true, bearing: true, peaks: true };
    this.hover = null; // {x, y}
    this.selected = null; // bin index
    this.stale = "";
    this.labels = []; // every label drawn, with its box: [{kind, text, value, x0, y0, w, h}]
    this.xs = new Scale(false);
    this.ys = new Scale(true);
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
    this._bind();
  }

  // --- inputs -----------------------------------------------------------------------
  setData(d) {
    const first = !this.data || this.data.values.length !== d.values.length || this.data.df !== d.df || this.data.unit !== d.unit || this.data.amplitude !== d.amplitude;
    this.data = d;
    if (first) {
      this.top = null;
      if (!this.view) this.resetView(false);
      else this._clampView();
    }
    this.surface.invalidate();
  }
  setOverlay(o) {
    this.overlay = o;
    this.surface.invalidate();
  }
  setBands(bands) {
    this.bands = bands || [];
    this.surface.invalidate();
  }
  /** The x axis' unit: "Hz", or "order" for an order profile (ticks 1×, 2×…, readout "order"). */
  setXUnit(u) {
    const next = u === "order" ? "order" : "Hz";
    if (next === this.xUnit) return;
    this.xUnit = next;
    this.view = null; // orders and Hz share no zoom
    this.surface.invalidate();
  }
  setMarkers({ speedHz, bearing }) {
    this.speedHz = speedHz > 0 ? speedHz : null;
    this.bearing = bearing || [];
    this.surface.invalidate();
  }
  setShow(k, on) {
    this.show[k] = on;
    this.surface.invalidate();
  }
  /** The service's interpolated peaks {peaks: [{frequency_hz, amplitude}], unit, amplitude}. */
  setServerPeaks(m) {
    this.serverPeaks = m;
    this.surface.invalidate();
  }
  setStale(text) {
    if (text === this.stale) return;
    this.stale = text;
    this.surface.invalidate();
  }
  setLogAmp(on) {
    this.logAmp = on;
    this.top = null;
    this.surface.invalidate();
    this._viewChanged();
  }
  setLogFreq(on) {
    this.logFreq = on;
    this._clampView();
    this.surface.invalidate();
    this._viewChanged();
  }

  /** Full frequency range of the data: [first line > 0 (log) or f0, last line]. */
  fullRange() {
    const d = this.data;
    if (!d) return [0, 1];
    const last = d.f0 + (d.values.length - 1) * d.df;
    const first = this.logFreq ? Math.max(d.df, d.f0, (d.lowcut_hz || 0) * 0.5) : d.f0;
    return [first, last];
  }

  resetView(notify = true) {
    const [a, b] = this.fullRange();
    this.view = { lo: a, hi: b };
    this.decades = LOG_DECADES;
    this.yGain = 1;
    this.top = null;
    this.surface.invalidate();
    if (notify) this._viewChanged();
  }

  _clampView() {
    if (!this.data || !this.view) return;
    const [a, b] = this.fullRange();
    let { lo, hi } = this.view;
    const minSpan = 8 * this.data.df;
    if (hi - lo < minSpan) hi = lo + minSpan;
    if (lo < a) [lo, hi] = [a, Math.min(b, hi + (a - lo))];
    if (hi > b) [lo, hi] = [Math.max(a, lo - (hi - b)), b];
    if (this.logFreq && lo <= 0) lo = a;
    this.view = { lo, hi };
  }

  _viewChanged() {
    this.opts.onView?.({ ...this.view, logFreq: this.logFreq, plotLeft: MARGIN.l, plotRight: MARGIN.r, yTop: this.top, decades: this.decades, logAmp: this.logAmp });
  }

  /** Zoom the x axis by `k` (<1 = in) about frequency `f`. */
  zoom(k, f) {
    if (!this.view || !this.data) return;
    const { lo, hi } = this.view;
    if (f === undefined) f = this.logFreq ? Math.sqrt(lo * hi) : (lo + hi) / 2;
    if (this.logFreq) {
      const L = Math.log10(f);
      this.view = { lo: 10 ** (L - (L - Math.log10(lo)) * k), hi: 10 ** (L + (Math.log10(hi) - L) * k) };
    } else {
      this.view = { lo: f - (f - lo) * k, hi: f + (hi - f) * k };
    }
    this._clampView();
    this.surface.invalidate();
    this._viewChanged();
  }

  /** Pan by a fraction of the visible width (positive = to higher frequency). */
  pan(frac) {
    if (!this.view) return;
    const { lo, hi } = this.view;
    if (this.logFreq) {
      const r = (Math.log10(hi) - Math.log10(lo)) * frac;
      this.view = { lo: lo * 10 ** r, hi: hi * 10 ** r };
    } else {
      const d = (hi - lo) * frac;
      this.view = { lo: lo + d, hi: hi + d };
    }
    this._clampView();
    this.surface.invalidate();
    this._viewChanged();
  }

  /** Y zoom: >1 magnifies amplitudes (fewer decades in log, smaller top in linear). */
  yZoom(k) {
    if (this.logAmp) this.decades = Math.min(9, Math.max(1, this.decades / k));
    else this.yGain = Math.min(1000, Math.max(0.01, this.yGain * k));
    this.surface.invalidate();
    this._viewChanged();
  }

  // --- interaction ------------------------------------------------------------------
  _bind() {
    const c = this.canvas;
    let drag = null;
    c.addEventListener("wheel", (e) => {
      if (!this.data) return;
      e.preventDefault();
      const k = Math.exp(Math.sign(e.deltaY) * Math.min(Math.abs(e.deltaY), 200) * 0.0025);
      if (e.shiftKey || e.altKey) this.yZoom(1 / k);
      else this.zoom(k, this.xs.val(e.offsetX));
    }, { passive: false });
    c.addEventListener("pointerdown", (e) => {
      if (e.button !== 0) return;
      c.setPointerCapture(e.pointerId);
      drag = { x: e.offsetX, moved: false, view: { ...this.view } };
    });
    c.addEventListener("pointermove", (e) => {
      this.hover = { x: e.offsetX, y: e.offsetY };
      if (drag && this.data) {
        const dx = e.offsetX - drag.x;
        if (Math.abs(dx) > 3) drag.moved = true;
        if (drag.moved) {
          this.view = { ...drag.view };
          this.pan(-dx / Math.max(1, this.xs.p1 - this.xs.p0));
          c.style.cursor = "grabbing";
        }
      }
      this.surface.invalidate();
    });
    c.addEventListener("pointerup", (e) => {
      if (drag && !drag.moved && this.data) this._pick(e.offsetX);
      drag = null;
      c.style.cursor = "";
    });
    c.addEventListener("pointerleave", () => {
      this.hover = null;
      this.opts.onHover?.(null);
      this.surface.invalidate();
    });
    c.addEventListener("dblclick", () => this.resetView());
    c.addEventListener("keydown", (e) => {
      if (e.ctrlKey || e.metaKey || e.altKey) return;
      const act = {
        ArrowLeft: () => this.pan(-0.15), ArrowRight: () => this.pan(0.15),
        ArrowUp: () => this.yZoom(1.25), ArrowDown: () => this.yZoom(0.8),
        "+": () => this.zoom(0.7), "=": () => this.zoom(0.7), "-": () => this.zoom(1 / 0.7), _: () => this.zoom(1 / 0.7),
        0: () => this.resetView(), Home: () => this.resetView(),
      }[e.key];
      if (act) {
        e.preventDefault();
        act();
      } else {
        this.opts.onKey?.(e);
      }
    });
  }

  _pick(x) {
    const hit = this._hit(x);
    if (!hit) return;
    this.selected = hit.q;
    this.opts.onPick?.({ q: hit.q, f: hit.f });
    this.surface.invalidate();
  }

  /** The bin under pixel x: the largest in the pixel column when several share it. */
  _hit(x) {
    const d = this.data;
    if (!d || x < this.xs.p0 || x > this.xs.p1) return null;
    const n = d.values.length;
    let [qa, qb] = binRange(d.f0, d.df, n, this.xs.val(x - 0.5), this.xs.val(x + 0.5));
    if (qb < qa) {
      const q = Math.min(n - 1, Math.max(0, Math.round((this.xs.val(x) - d.f0) / d.df)));
      qa = qb = q;
    }
    let q = qa;
    for (let i = qa + 1; i <= qb; i++) if (d.values[i] > d.values[q]) q = i;
    return { q, f: d.f0 + q * d.df, v: d.values[q] };
  }

  // --- drawing ----------------------------------------------------------------------
  _yRange(ext) {
    let mx = 0;
    for (let i = 0; i < ext.count; i++) if (ext.hi[i] > mx) mx = ext.hi[i];
    const now = performance.now();
    // Hold the axis: rise at once, fall only after the peak has stayed low for 3 s.
    const want = this.logAmp ? 10 ** Math.ceil(Math.log10(mx > 0 ? mx * 1.05 : 1)) : niceCeil(mx * 1.08);
    if (this.top === null || want > this.top) {
      this.top = want;
      this._lowSince = 0;
    } else if (want < this.top * (this.logAmp ? 0.5 : 0.45)) {
      if (!this._lowSince) this._lowSince = now;
      else if (now - this._lowSince > 3000) {
        this.top = want;
        this._lowSince = 0;
      }
    } else this._lowSince = 0;
    if (this.logAmp) return [this.top / 10 ** this.decades, this.top];
    return [0, this.top / this.yGain];
  }

  _draw(ctx, w, h) {
    const L = MARGIN.l, R = w - MARGIN.r, T = MARGIN.t, B = h - MARGIN.b;
    plotArea(ctx, w, h, { L, R, T, B });
    ctx.font = `11px ${pal.font}`;
    const d = this.data;
    this.labels = [];
    const labels = (this._labels = new Labels());
    if (!d || !this.view || R - L < 20 || B - T < 20) {
      ctx.fillStyle = pal["ink-3"];
      ctx.textAlign = "center";
      ctx.textBaseline = "middle";
      ctx.fillText(this.stale || "waiting for the first spectrum…", (L + R) / 2, (T + B) / 2);
      return;
    }
    this.xs = new Scale(this.logFreq).set(this.view.lo, this.view.hi, L, R);
    const W = Math.floor(R - L);
    const ext = columnExtremes(d.values, d.f0, d.df, this.xs, W);
    const [ylo, yhi] = this._yRange(ext);
    this.ys = new Scale(this.logAmp).set(this.logAmp ? ylo : 0, yhi, B, T);
    const ys = this.ys, xs = this.xs;
    const yOf = (v) => {
      const y = this.logAmp ? (v > 0 ? ys.px(v) : B + 10) : ys.px(v);
      return y < T - 4 ? T - 4 : y > B + 4 ? B + 4 : y;
    };

    ctx.save();
    ctx.beginPath();
    ctx.rect(L, T - 4, R - L, B - T + 8);
    ctx.clip();
    if (this.show.bands) this._drawBands(ctx, T, B, yOf);
    this._drawGrid(ctx, L, R, T, B);
    if (this.show.harmonics) this._drawHarmonics(ctx, T, B);
    if (this.show.bearing) this._drawBearing(ctx, T, B);
    if (this.overlay) {
      // the other spectrum (evidence: now): wide, grey and dashed; this one thin, dark, solid
      const o = this.overlay;
      const oe = columnExtremes(o.values, o.f0, o.df, xs, W);
      this._trace(ctx, oe, yOf, pal["trace-2"], o.dash ? 1.6 : 2.2, o.dash ?? [7, 4]);
    }
    this._trace(ctx, ext, yOf, this.stale ? pal["ink-3"] : pal.trace, 1.1);
    this._drawDots(ctx, d, yOf);
    ctx.restore();

    this._drawAxes(ctx, L, R, T, B);
    if (this.show.peaks) this.peaks = addPeakLabels(this, ctx, d, yOf, { L, R, T });
    this._drawSelected(ctx, d, T, B);
    if (this.show.bands && this._levelsHidden) {
      labels.add({ kind: "note", prio: PRIO.note, text: `band limits are in ${this._levelsHidden}: show that unit to see them`, x: L + 6, y: B - 10, size: 11, font: `11px ${pal.font}`, fg: pal["ink-2"], bg: pal.plot, moves: DOWN(-16, 3) });
    }
    if (this.stale) {
      labels.add({ kind: "stale", prio: PRIO.stale, text: this.stale, x: R - 6, y: T + 12, size: 12, font: `600 12px ${pal.font}`, align: "right", fg: pal.ink, bg: pal.panel });
    }
    if (this.overlay) addLegend(this, ctx, { R, T });
    this.labels = labels.draw(ctx);
    this._drawHover(ctx, d, L, R, T, B, yOf);
  }

  _trace(ctx, e, yOf, color, width, dash) {
    if (!e.count) return;
    ctx.strokeStyle = color;
    ctx.lineWidth = width;
    ctx.lineJoin = "round";
    ctx.setLineDash(dash || []);
    ctx.beginPath();
    let prevY = yOf(e.hi[0]);
    ctx.moveTo(e.x[0], prevY);
    for (let i = 0; i < e.count; i++) {
      const a = yOf(e.hi[i]);
      const b = yOf(e.lo[i]);
      // Enter each column at the end nearer the previous one, so the line stays continuous.
      if (Math.abs(prevY - a) < Math.abs(prevY - b)) {
        ctx.lineTo(e.x[i], a);
        if (b !== a) ctx.lineTo(e.x[i], b);
        prevY = b;
      } else {
        ctx.lineTo(e.x[i], b);
        if (b !== a) ctx.lineTo(e.x[i], a);
        prevY = a;
      }
    }
    ctx.stroke();
    ctx.setLineDash([]);
  }

  /** When zoomed in far enough to tell the lines apart, mark each line with a dot. */
  _drawDots(ctx, d, yOf) {
    const xs = this.xs;
    if ((xs.px(this.view.lo + d.df) - xs.px(this.view.lo)) < 7) return;
    const [qa, qb] = binRange(d.f0, d.df, d.values.length, this.view.lo, this.view.hi);
    ctx.fillStyle = pal.trace;
    for (let q = qa; q <= qb; q++) {
      ctx.beginPath();
      ctx.arc(xs.px(d.f0 + q * d.df), yOf(d.values[q]), 2, 0, 2 * Math.PI);
      ctx.fill();
    }
  }

  _drawGrid(ctx, L, R, T, B) {
    const xs = this.xs, ys = this.ys;
    const box = { L, R, T, B };
    this._xt = this.logFreq
      ? logTicks(this.view.lo, this.view.hi, (R - L) / Math.log10(this.view.hi / this.view.lo))
      : { major: linTicks(this.view.lo, this.view.hi, Math.max(2, Math.floor((R - L) / 90))), minor: [] };
    gridX(ctx, xs, this._xt.minor, box, pal["grid-2"]);
    gridX(ctx, xs, this._xt.major, box);
    this._yt = this.logAmp
      ? logTicks(ys.lo, ys.hi, (B - T) / Math.log10(ys.hi / ys.lo))
      : { major: linTicks(ys.lo, ys.hi, Math.max(2, Math.floor((B - T) / 45))), minor: [] };
    if (this.logAmp) this._yt.major = this._yt.major.filter((v) => Math.abs(Math.log10(v) - Math.round(Math.log10(v))) < 1e-9 || (B - T) / this.decades > 110);
    if (this.decades <= 3) gridY(ctx, ys, this._yt.minor, box, pal["grid-2"]);
    gridY(ctx, ys, this._yt.major, box);
  }

  _drawAxes(ctx, L, R, T, B) {
    const d = this.data;
    const box = { L, R, T, B };
    border(ctx, box);
    const orders = this.xUnit === "order";
    const fmtX = orders ? tickOrder : tickHz;
    labelsX(ctx, this.xs, this._xt.major, box, fmtX, { spaced: true });
    this.xTicks = this._xt.major.map(fmtX); // the x tick texts (for people and tests)
    labelsY(ctx, this.ys, this._yt.major, box, (v) => fmtVal(v, 2));
    ctx.font = `11px ${pal.font}`;
    ctx.fillStyle = pal["ink-3"];
    ctx.textAlign = "right";
    ctx.textBaseline = "top";
    ctx.fillText(orders ? "order" : "Hz", L - 6, B + 5);
    this._labels.add({ kind: "unit", prio: PRIO.unit, text: unitLabel(d.unit, d.amplitude) + (this.logAmp ? "  (log)" : ""), x: 4, y: 5, size: 11, font: `11px ${pal.font}`, base: "top", fg: pal["ink-3"] });
  }

  _drawBands(ctx, T, B, yOf) {
    const d = this.data;
    this._levelsHidden = "";
    const xs = this.xs;
    for (const b of this.bands) {
      if (!(b.lo_hz < b.hi_hz) || b.hi_hz < this.view.lo || b.lo_hz > this.view.hi) continue;
      const x0 = Math.max(xs.p0, xs.px(Math.max(b.lo_hz, this.logFreq ? this.view.lo : -Infinity)));
      const x1 = Math.min(xs.p1, xs.px(b.hi_hz));
      if (x1 - x0 < 1) continue;
      const abn = b.state === "danger" || b.state === "alert";
      const wide = b.hi_hz > WIDE_RATIO * Math.max(b.lo_hz, 1e-9);
      ctx.fillStyle = b.state === "danger" ? pal.danger : b.state === "alert" ? pal.alert : pal.region;
      if (!wide || abn) {
        ctx.globalAlpha = abn ? (wide ? 0.09 : 0.16) : 1;
        ctx.fillRect(x0, T, x1 - x0, B - T);
        ctx.globalAlpha = 1;
      }
      if (wide) {
        // a wide band (e.g. an overall range): a bracket along the top instead of a fill
        ctx.fillStyle = abn ? (b.state === "danger" ? pal.danger : pal.alert) : pal["ink-3"];
        ctx.fillRect(x0, T, x1 - x0, 2);
        ctx.fillRect(x0, T, 1.5, 12);
        ctx.fillRect(x1 - 1.5, T, 1.5, 12);
      }
      ctx.font = `10px ${pal.font}`;
      if (x1 - x0 > ctx.measureText(b.name).width + 4) {
        const fg = b.state === "danger" ? pal["danger-ink"] : b.state === "alert" ? pal["alert-ink"] : pal["ink-3"];
        this._labels.add({ kind: "band", prio: PRIO.band, text: b.name, x: x0 + 3, y: T + (wide ? 5 : 3), size: 10, font: ctx.font, base: "top", fg, moves: DOWN(12, 4) });
      }
      // Levels: a narrow band's RMS reaches its level when one line in it reaches the level,
      // so the level is drawn across the band in the spectrum's unit (same quantity only).
      const k = convertFactor(b.unit, d.unit, d.amplitude, "rms");
      if (k === null && !wide && (b.alert > 0 || b.danger > 0)) this._levelsHidden = b.unit;
      if (k === null || wide) continue; // a wide band's RMS sums many lines: no per-line level
      // labelled with words: a lone "A"/"D" reads as a severity zone of the vibration standards
      for (const [lvl, dash, wdt, tag] of [[b.alert, [5, 3], 1, "alert"], [b.danger, [], 1.6, "danger"]]) {
        if (!(lvl > 0)) continue;
        const y = yOf(lvl * k);
        if (y <= T - 4 || y >= B + 4) continue;
        ctx.strokeStyle = pal.ink;
        ctx.lineWidth = wdt;
        ctx.setLineDash(dash);
        ctx.beginPath();
        ctx.moveTo(x0, y);
        ctx.lineTo(x1, y);
        ctx.stroke();
        ctx.setLineDash([]);
        ctx.font = `600 9px ${pal.font}`;
        if (x1 - x0 > ctx.measureText(tag).width + 4) {
          this._labels.add({ kind: "level", prio: PRIO.level, text: tag, value: lvl, x: x0 + 2, y: y - 1, size: 9, font: ctx.font, base: "bottom", fg: pal.ink, moves: [[0, 0], [0, 13], [10, 0], [10, 13]] });
        }
      }
    }
  }

  _vmark(ctx, f, T, B, dash) {
    const x = this.xs.px(f);
    if (x < this.xs.p0 || x > this.xs.p1) return null;
    ctx.strokeStyle = pal.mark;
    ctx.lineWidth = 1;
    ctx.setLineDash(dash);
    ctx.beginPath();
    ctx.moveTo(Math.round(x) + 0.5, T);
    ctx.lineTo(Math.round(x) + 0.5, B);
    ctx.stroke();
    ctx.setLineDash([]);
    return x;
  }

  _drawHarmonics(ctx, T, B) {
    const f1 = this.speedHz;
    if (!f1) return;
    const spacing = this.xs.px(this.view.hi) - this.xs.px(this.view.hi - f1);
    if (spacing < 8) return;
    ctx.font = `10px ${pal.font}`;
    for (let k = 1; k <= MAX_HARMONICS && k * f1 <= this.view.hi; k++) {
      if (k * f1 < this.view.lo) continue;
      const x = this._vmark(ctx, k * f1, T, B, [1, 3]);
      if (x === null) continue;
      const left = k === 1 ? Infinity : x - this.xs.px((k - 1) * f1);
      if (k > 1 && left < 22 && k % 2) continue;
      this._labels.add({ kind: "harmonic", prio: PRIO.harmonic - k / 100, text: `${k}X`, value: k * f1, x, y: T - 3, size: 10, font: ctx.font, align: "center", base: "bottom", fg: pal.mark });
    }
  }

  _drawBearing(ctx, T, B) {
    ctx.font = `10px ${pal.font}`;
    let row = 0;
    for (const t of this.bearing) {
      if (!(t.f > 0)) continue;
      const spacing = this.xs.px(this.view.hi) - this.xs.px(this.view.hi - t.f);
      const maxK = spacing < 14 ? 1 : (t.harmonics ?? 5); // a sideband is marked once
      for (let k = 1; k <= maxK; k++) {
        const f = k * t.f;
        if (f < this.view.lo || f > this.view.hi) continue;
        const x = this._vmark(ctx, f, T + 14, B, [6, 3]);
        if (x === null) continue;
        const label = (k > 1 ? `${k}×` : "") + t.name.toUpperCase();
        this._labels.add({ kind: "bearing", prio: PRIO.bearing - k / 100, text: label, value: f, x, y: T + 15 + 16 * row, size: 10, font: ctx.font, align: "center", base: "top", fg: pal.mark, bg: pal.plot, pad: 2, moves: DOWN(16, 4) });
      }
      row = (row + 1) % 3;
    }
  }

  _drawSelected(ctx, d, T, B) {
    if (this.selected === null || this.selected >= d.values.length) return;
    const x = this.xs.px(d.f0 + this.selected * d.df);
    if (x < this.xs.p0 || x > this.xs.p1) return;
    ctx.fillStyle = pal.select;
    ctx.beginPath();
    ctx.moveTo(x, B);
    ctx.lineTo(x - 5, B + 7);
    ctx.lineTo(x + 5, B + 7);
    ctx.closePath();
    ctx.fill();
  }

  _drawHover(ctx, d, L, R, T, B, yOf) {
    if (!this.hover) return;
    const hit = this._hit(this.hover.x);
    if (!hit) {
      this.opts.onHover?.(null);
      return;
    }
    const x = this.xs.px(hit.f);
    const y = yOf(hit.v);
    ctx.strokeStyle = pal.ink;
    ctx.lineWidth = 1;
    ctx.setLineDash([2, 2]);
    ctx.beginPath();
    ctx.moveTo(Math.round(x) + 0.5, T);
    ctx.lineTo(Math.round(x) + 0.5, B);
    ctx.stroke();
    ctx.setLineDash([]);
    ctx.beginPath();
    ctx.arc(x, y, 3.5, 0, 2 * Math.PI);
    ctx.stroke();
    const info = {
      f: hit.f, q: hit.q, v: hit.v, unit: d.unit, amplitude: d.amplitude,
      order: this.speedHz ? hit.f / this.speedHz : null,
      then: this.overlay ? this.overlay.values[Math.round((hit.f - this.overlay.f0) / this.overlay.df)] : undefined,
    };
    const orders = this.xUnit === "order";
    const lines = [`${orders ? `order ${hit.f.toFixed(Math.min(3, (String(d.df).split(".")[1] || "").length))}` : fmtHzAt(hit.f, d.df)}  (line ${hit.q})`];
    if (info.order !== null && !orders) lines.push(`order ${info.order.toFixed(2)}X`);
    lines.push(`${fmtVal(hit.v)} ${unitLabel(d.unit, d.amplitude)}`);
    if (info.then !== undefined) lines.push(`${this.overlay.label || "other"} ${fmtVal(info.then)}`);
    ctx.font = `11px ${pal.mono}`;
    const tw = Math.max(...lines.map((s) => ctx.measureText(s).width)) + 12;
    const th = lines.length * 15 + 8;
    let bx = x + 12;
    if (bx + tw > R) bx = x - 12 - tw;
    const by = Math.max(T + 2, Math.min(B - th - 2, this.hover.y - th - 8));
    ctx.fillStyle = pal.panel;
    ctx.strokeStyle = pal.axis;
    ctx.fillRect(bx, by, tw, th);
    ctx.strokeRect(bx + 0.5, by + 0.5, tw - 1, th - 1);
    ctx.fillStyle = pal.ink;
    ctx.textAlign = "left";
    ctx.textBaseline = "top";
    lines.forEach((s, i) => ctx.fillText(s, bx + 6, by + 5 + i * 15));
    this.opts.onHover?.(info);
  }
}
