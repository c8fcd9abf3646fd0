// The scrolling spectrogram: recent spectra of one channel as rows of grey (log amplitude),
// newest on top, on the spectrum plot's frequency view. Gets data from its caller; no network.

import { fmtVal, fmtX } from "./fmt.js";
import { MARGIN, columnExtremes } from "./spectrum.js";
import { Scale, Surface, border, pal, plateText } from "./plot.js";

function parseHex(c) {
  const m = /^#?([0-9a-f]{6})$/i.exec(c.trim());
  const n = m ? parseInt(m[1], 16) : 0x888888;
  return [(n >> 16) & 255, (n >> 8) & 255, n & 255];
}

export class Spectrogram {
  /** `xUnit()`: "Hz", or "order" for an order profile's spectra (read-outs in orders). */
  constructor(canvas, { rows = 300, xUnit = () => "Hz" } = {}) {
    this.rows = rows;
    this.canvas = canvas;
    this.xUnit = xUnit;
    this.ring = new Array(rows).fill(null); // {values, f0, df, t_ns}
    this.head = 0; // next row to write; rows run newest → oldest from head+1 upwards
    this.count = 0;
    this.view = null;
    this.off = document.createElement("canvas");
    this.offCtx = this.off.getContext("2d");
    this.dirtyAll = true;
    this.hover = null;
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
    this.surface.onResize = () => (this.dirtyAll = true);
    this._lut = null;
    this.surface.trackHover(this);
  }

  clear() {
    this.ring.fill(null);
    this.count = 0;
    this.dirtyAll = true;
    this.surface.invalidate();
  }

  /** Add one spectrum {f0, df, values, t_ns}; the values are copied. */
  push(d) {
    const prev = this.ring[this.head];
    if (prev && (prev.values.length !== d.values.length || prev.df !== d.df)) this.clear();
    this.head = (this.head - 1 + this.rows) % this.rows;
    this.ring[this.head] = { values: Float32Array.from(d.values), f0: d.f0, df: d.df, t_ns: d.t_ns };
    this.count = Math.min(this.rows, this.count + 1);
    this._fresh = (this._fresh || 0) + 1;
    this.surface.invalidate();
  }

  /** Follow the spectrum plot: {lo, hi, logFreq, yTop, decades, logAmp}. */
  setView(v) {
    const o = this.view;
    if (o && o.lo === v.lo && o.hi === v.hi && o.logFreq === v.logFreq && o.yTop === v.yTop && o.decades === v.decades) return;
    this.view = { ...v };
    this.dirtyAll = true;
    this.surface.invalidate();
  }

  _lutFor() {
    if (this._lut) return this._lut;
    const a = parseHex(pal.plot), b = parseHex(pal.trace);
    const lut = new Uint8ClampedArray(256 * 4);
    for (let i = 0; i < 256; i++) {
      const t = (i / 255) ** 0.85;
      for (let c = 0; c < 3; c++) lut[4 * i + c] = a[c] + (b[c] - a[c]) * t;
      lut[4 * i + 3] = 255;
    }
    return (this._lut = lut);
  }

  _renderRow(row, W, img, xs, lgLo, lgSpan) {
    const lut = this._lutFor();
    const px = img.data;
    const bg = lut.subarray(0, 4);
    for (let i = 0; i < W; i++) px.set(bg, 4 * i);
    if (!row) return;
    const e = columnExtremes(row.values, row.f0, row.df, xs, W);
    // Columns with no line of their own (zoomed in) take the nearest line to their left.
    let j = 0;
    for (let p = 0; p < W; p++) {
      while (j + 1 < e.count && e.x[j + 1] - xs.p0 <= p + 0.5) j++;
      if (!e.count || e.x[j] - xs.p0 > p + 1) continue;
      const v = e.hi[j];
      let t = v > 0 ? (Math.log10(v) - lgLo) / lgSpan : 0;
      t = t < 0 ? 0 : t > 1 ? 1 : t;
      px.set(lut.subarray(4 * Math.round(t * 255), 4 * Math.round(t * 255) + 4), 4 * p);
    }
  }

  _draw(ctx, w, h) {
    const L = MARGIN.l, R = w - MARGIN.r, T = 6, B = h - 20;
    ctx.fillStyle = pal.panel;
    ctx.fillRect(0, 0, w, h);
    const W = Math.max(1, Math.floor(R - L));
    const v = this.view;
    const newest = this.ring[(this.head) % this.rows];
    if (!v || !newest || !this.count) {
      ctx.fillStyle = pal.plot;
      ctx.fillRect(L, T, R - L, B - T);
      return;
    }
    const xs = new Scale(v.logFreq).set(v.lo, v.hi, 0, W);
    const top = v.yTop > 0 ? v.yTop : 1;
    const lgHi = Math.log10(top);
    const lgLo = lgHi - (v.logAmp ? v.decades : 3);
    if (this.off.width !== W || this.off.height !== this.rows) {
      this.off.width = W;
      this.off.height = this.rows;
      this.dirtyAll = true;
    }
    const img = this.offCtx.createImageData(W, 1);
    if (this.dirtyAll) {
      for (let r = 0; r < this.rows; r++) {
        this._renderRow(this.ring[r], W, img, xs, lgLo, lgHi - lgLo);
        this.offCtx.putImageData(img, 0, r);
      }
      this.dirtyAll = false;
      this._fresh = 0;
    } else {
      for (let k = 0; k < Math.min(this._fresh || 0, this.rows); k++) {
        const r = (this.head + k) % this.rows;
        this._renderRow(this.ring[r], W, img, xs, lgLo, lgHi - lgLo);
        this.offCtx.putImageData(img, 0, r);
      }
      this._fresh = 0;
    }
    // Newest row at the top: [head, rows) then [0, head), stretched to the plot height.
    const H = B - T;
    const rowH = H / this.rows;
    ctx.imageSmoothingEnabled = false;
    const n1 = this.rows - this.head;
    ctx.drawImage(this.off, 0, this.head, W, n1, L, T, R - L, n1 * rowH);
    if (this.head > 0) ctx.drawImage(this.off, 0, 0, W, this.head, L, T + n1 * rowH, R - L, this.head * rowH);
    border(ctx, { L, R, T, B });

    // Time axis: seconds before the newest row.
    ctx.font = `11px ${pal.mono}`;
    ctx.fillStyle = pal["ink-2"];
    ctx.textAlign = "right";
    ctx.textBaseline = "middle";
    ctx.fillText("now", L - 6, T + 6);
    const t0 = newest.t_ns;
    let spanS = 0;
    for (let k = 0; k < this.count; k++) {
      const r = this.ring[(this.head + k) % this.rows];
      if (r) spanS = (t0 - r.t_ns) / 1e9;
    }
    const step = [1, 2, 5, 10, 15, 30, 60, 120, 300].find((s) => (H / Math.max(spanS, 1e-3)) * s * (this.count / this.rows) > 34) ?? 600;
    // Rows are not evenly spaced in time once stored spectra (one per history interval) sit
    // below the live ones (one per frame): a tick labels the multiple of `step` its row has
    // passed, and ticks closer than a label's height are left out, so they never overlap.
    let next = step, lastY = T + 6;
    for (let k = 0; k < this.count; k++) {
      const r = this.ring[(this.head + k) % this.rows];
      if (!r) continue;
      const age = (t0 - r.t_ns) / 1e9;
      if (age >= next) {
        const y = T + (k + 0.5) * rowH;
        const passed = Math.floor(age / step) * step;
        if (y < B - 6 && y - lastY >= 14) {
          ctx.fillText(`−${passed} s`, L - 6, y);
          lastY = y;
        }
        next = passed + step;
      }
    }
    ctx.font = `11px ${pal.font}`;
    ctx.fillStyle = pal["ink-3"];
    ctx.textAlign = "left";
    ctx.textBaseline = "top";
    ctx.fillText(`${fmtVal(10 ** lgLo)} … ${fmtVal(top)} (log grey scale)`, L, B + 4);
    this.canvas.dataset.xUnit = this.xUnit() || "Hz"; // for people in devtools and the tests

    if (this.hover && this.hover.x >= L && this.hover.x <= R && this.hover.y >= T && this.hover.y <= B) {
      const k = Math.floor((this.hover.y - T) / rowH);
      const row = this.ring[(this.head + k) % this.rows];
      if (row) {
        const f = xs.val(this.hover.x - L);
        const q = Math.max(0, Math.min(row.values.length - 1, Math.round((f - row.f0) / row.df)));
        const text = `${fmtX(row.f0 + q * row.df, this.xUnit())} · −${((t0 - row.t_ns) / 1e9).toFixed(1)} s · ${fmtVal(row.values[q])}`;
        ctx.font = `11px ${pal.mono}`;
        plateText(ctx, text, Math.min(this.hover.x + 10, R - 4), this.hover.y, {
          align: this.hover.x + 10 + ctx.measureText(text).width > R ? "right" : "left", fg: pal.ink, bg: pal.panel,
        });
      }
    }
  }
}
