// The history waterfall: stored spectra of a channel as rows of grey (log amplitude), time
// down the page (newest on top, each row as tall as the time it covers), frequency across.
// Gets pooled rows from its caller (web/history.js); no network.

import { fmtVal, fmtX, tickX } from "./fmt.js";
import { Scale, Surface, border, linTicks, pal, plateText } from "./plot.js";

const M = { l: 112, r: 14, t: 8, b: 34 };

function parseHex(c) {
  const m = /^#?([0-9a-f]{6})$/i.exec(c.trim());
  const n = m ? parseInt(m[1], 16) : 0x888888;
  return [(n >> 16) & 255, (n >> 8) & 255, n & 255];
}

/** Max-pool one spectrum (line q at f0 + q·df) into `cols` columns over [fmin, fmax): the
 *  largest line in each, the nearest line for a column holding none; NaN outside the lines.
 *  The same rule as the service's waterfall (service/waterfall.py). */
export function poolColumns(values, f0, df, fmin, fmax, cols) {
  const out = new Float32Array(cols).fill(-Infinity);
  const w = (fmax - fmin) / cols;
  for (let q = 0; q < values.length; q++) {
    const k = Math.floor((f0 + q * df - fmin) / w);
    if (k >= 0 && k < cols && values[q] > out[k]) out[k] = values[q];
  }
  for (let k = 0; k < cols; k++) {
    if (out[k] !== -Infinity) continue;
    const q = Math.round((fmin + (k + 0.5) * w - f0) / df);
    out[k] = q >= 0 && q < values.length ? values[q] : NaN;
  }
  return out;
}

export class Waterfall {
  /** `xUnit()`: "Hz", or "order" for an order profile's spectra (the axis is in orders). */
  constructor(canvas, { onPick, xUnit = () => "Hz" } = {}) {
    this.canvas = canvas;
    this.xUnit = xUnit;
    this.rows = []; // {t0_ns, t_ns, values: Float32Array, live: bool}, oldest first
    this.cols = 0;
    this.fmin = 0;
    this.fmax = 1;
    this.span = null; // [since_ns, until_ns] shown: the range, or less while less is stored
    this.maxSpan = 0; // ns: the range asked for
    this.unit = "";
    this.picked = null; // t_ns of the picked row
    this.note = "";
    this.onPick = onPick;
    this.surface = new Surface(canvas, (ctx, w, h) => this._draw(ctx, w, h));
    this.surface.trackHover(this);
    canvas.addEventListener("click", (e) => {
      const r = this._rowAt(e.offsetY);
      if (r) this.onPick?.(r);
    });
    this._lut = null;
  }

  /** Rows from the service's waterfall answer, replacing what is shown. */
  setHistory({ rows, cols, fmin, fmax, span, maxSpan, unit, amplitude }) {
    this.rows = rows;
    this.maxSpan = maxSpan;
    this.cols = cols;
    this.fmin = fmin;
    this.fmax = fmax;
    this.span = span;
    this.unit = unit;
    this.amplitude = amplitude;
    this._mark();
  }

  /** Append a live row (already pooled to this grid); the range's end moves to its time. */
  appendLive(row) {
    this.rows.push({ ...row, live: true });
    if (this.span && row.t_ns > this.span[1]) {
      // the end moves on; the start stays until the whole range is shown, then follows
      this.span = [Math.max(this.span[0], row.t_ns - this.maxSpan), row.t_ns];
      while (this.rows.length && this.rows[0].t_ns < this.span[0]) this.rows.shift();
    }
    this._mark();
  }

  setNote(text) {
    this.note = text;
    this.surface.invalidate();
  }

  _mark() {
    // what is drawn, for people in devtools and for the tests
    const live = this.rows.filter((r) => r.live).length;
    this.canvas.dataset.rows = String(this.rows.length);
    this.canvas.dataset.historyRows = String(this.rows.length - live);
    this.canvas.dataset.liveRows = String(live);
    this.canvas.dataset.cols = String(this.cols);
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

  /** Row bands on the page: [{row, y0, y1}] with the newest at the top. */
  _layout(T, B) {
    const [s0, s1] = this.span;
    const ys = new Scale(false).set(s1, s0, T, B);
    const out = [];
    for (let i = 0; i < this.rows.length; i++) {
      const r = this.rows[i];
      const prev = i ? this.rows[i - 1].t_ns : null;
      // a row covers from the previous row's time (or its own first spectrum) to its time,
      // at least 2 px so that a single stored spectrum is seen
      const start = Math.max(s0, Math.min(r.t0_ns, prev ?? r.t0_ns));
      let y0 = ys.px(r.t_ns), y1 = ys.px(start);
      if (y1 - y0 < 2) y1 = y0 + 2;
      out.push({ row: r, y0: Math.max(T, y0), y1: Math.min(B, y1) });
    }
    return { out, ys };
  }

  _rowAt(y) {
    if (!this._bands) return null;
    for (const b of this._bands) if (y >= b.y0 && y < b.y1 + 0.5) return b.row;
    return null;
  }

  _draw(ctx, w, h) {
    const L = M.l, R = w - M.r, T = M.t, B = h - M.b;
    ctx.fillStyle = pal.panel;
    ctx.fillRect(0, 0, w, h);
    ctx.fillStyle = pal.plot;
    ctx.fillRect(L, T, R - L, B - T);
    ctx.font = `11px ${pal.font}`;
    if (!this.span || !this.rows.length || !this.cols) {
      ctx.fillStyle = pal["ink-3"];
      ctx.textAlign = "center";
      ctx.textBaseline = "middle";
      ctx.fillText(this.note || "no stored spectra in this range yet", (L + R) / 2, (T + B) / 2);
      this._bands = [];
      border(ctx, { L, R, T, B });
      return;
    }
    // grey scale over the range's values: 3 decades below the largest (log amplitude)
    let top = 0;
    for (const r of this.rows) for (const v of r.values) if (v > top) top = v;
    const lgHi = Math.log10(top > 0 ? top : 1), lgLo = lgHi - 3;
    const lut = this._lutFor();
    const W = Math.max(1, Math.floor(R - L));
    const img = ctx.createImageData(W, 1);
    const { out, ys } = this._layout(T, B);
    this._bands = out;
    const off = document.createElement("canvas");
    off.width = W;
    off.height = 1;
    const octx = off.getContext("2d");
    const px = img.data;
    for (const { row, y0, y1 } of out) {
      if (y1 <= y0) continue;
      for (let p = 0; p < W; p++) {
        const v = row.values[Math.min(this.cols - 1, Math.floor((p / W) * this.cols))];
        let i = 0;
        if (v > 0) i = Math.round(255 * Math.min(1, Math.max(0, (Math.log10(v) - lgLo) / (lgHi - lgLo))));
        px.set(lut.subarray(4 * i, 4 * i + 4), 4 * p);
      }
      octx.putImageData(img, 0, 0);
      ctx.imageSmoothingEnabled = false;
      ctx.drawImage(off, 0, 0, W, 1, L, y0, R - L, y1 - y0);
      if (row.live) {
        ctx.fillStyle = pal.mark;
        ctx.fillRect(L - 4, y0, 3, Math.max(1, y1 - y0)); // live rows: a bar at the left edge
      }
    }
    if (this.picked !== null) {
      const b = out.find((o) => o.row.t_ns === this.picked);
      if (b) {
        ctx.strokeStyle = pal.select;
        ctx.lineWidth = 1.5;
        ctx.setLineDash([4, 3]);
        ctx.strokeRect(L + 0.5, b.y0 - 1.5, R - L - 1, b.y1 - b.y0 + 3);
        ctx.setLineDash([]);
      }
    }
    border(ctx, { L, R, T, B });

    // frequency axis
    const xs = new Scale(false).set(this.fmin, this.fmax, L, R);
    const xu = this.xUnit() || "Hz";
    this.canvas.dataset.xUnit = xu; // for people in devtools and the tests
    ctx.fillStyle = pal["ink-2"];
    ctx.textAlign = "center";
    ctx.textBaseline = "top";
    for (const f of linTicks(this.fmin, this.fmax, Math.max(2, Math.floor((R - L) / 80)))) {
      ctx.fillText(tickX(f, xu), xs.px(f), B + 4);
    }
    ctx.fillStyle = pal["ink-3"];
    ctx.textAlign = "left";
    ctx.fillText(`${xu === "order" ? "orders" : "Hz"} · ${fmtVal(10 ** lgLo)} … ${fmtVal(top)} ${this.unit} (log grey scale)`, L, B + 18);
    // time axis: site times of a few rows (the API's ISO 8601 with the site's offset)
    ctx.textAlign = "right";
    ctx.textBaseline = "middle";
    ctx.fillStyle = pal["ink-2"];
    let lastY = -Infinity;
    const secs = this.span[1] - this.span[0] < 6 * 3600e9; // short ranges: to the second
    for (let i = out.length - 1; i >= 0; i--) {
      const y = out[i].y0;
      if (y - lastY < 26 || y > B - 4) continue;
      lastY = y;
      ctx.fillText(shortTime(out[i].row.time, out[i].row.t_ns, secs), L - 8, Math.max(T + 6, y));
    }
    if (ys && this.hover && this.hover.x >= L && this.hover.x <= R) {
      const r = this._rowAt(this.hover.y);
      if (r) {
        const k = Math.min(this.cols - 1, Math.floor(((this.hover.x - L) / (R - L)) * this.cols));
        const f = this.fmin + (k + 0.5) * ((this.fmax - this.fmin) / this.cols);
        const text = `${shortTime(r.time, r.t_ns)}${r.live ? " (live)" : ""} · ${fmtX(f, this.xUnit())} · ${fmtVal(r.values[k])} · click: overlay on the spectrum`;
        ctx.font = `11px ${pal.mono}`;
        plateText(ctx, text, Math.min(this.hover.x + 10, R - 4), this.hover.y, {
          align: this.hover.x + 10 + ctx.measureText(text).width > R ? "right" : "left", fg: pal.ink, bg: pal.panel,
        });
      }
    }
  }
}

/** "12-02 17:05" (or with `seconds`, "17:05:09") from the API's ISO time (the site's
 *  offset kept), else from the browser's clock. */
export function shortTime(iso, t_ns, seconds = false) {
  if (iso) return seconds ? iso.slice(11, 19) : `${iso.slice(5, 10)} ${iso.slice(11, 16)}`;
  const d = new Date(Number(t_ns) / 1e6);
  const p = (n) => String(n).padStart(2, "0");
  return seconds ? `${p(d.getHours())}:${p(d.getMinutes())}:${p(d.getSeconds())}`
    : `${p(d.getMonth() + 1)}-${p(d.getDate())} ${p(d.getHours())}:${p(d.getMinutes())}`;
}
