// Canvas plumbing shared by the plots: device-pixel sizing, redraw on animation frames,
// scales and tick choice, the palette read from CSS. No data, no network.

/** Colours and fonts, read once from CSS custom properties so app.css stays the one palette. */
export const pal = {};
export function loadPalette() {
  const cs = getComputedStyle(document.documentElement);
  for (const k of ["bg", "panel", "plot", "grid", "grid-2", "axis", "ink", "ink-2", "ink-3", "trace", "trace-2", "region",
    "alert", "alert-ink", "danger", "danger-ink", "fault", "mark", "select"]) {
    pal[k] = cs.getPropertyValue(`--${k}`).trim() || "#888";
  }
  pal.font = cs.getPropertyValue("--font-ui").trim() || "system-ui, sans-serif";
  pal.mono = cs.getPropertyValue("--font-num").trim() || pal.font;
}

/**
 * Keep a canvas sized to its CSS box in device pixels and redraw on animation frames only.
 * `draw(ctx, w, h)` gets a context scaled to CSS pixels. Call `invalidate()` after a change.
 */
export class Surface {
  constructor(canvas, draw) {
    this.canvas = canvas;
    this.ctx = canvas.getContext("2d", { alpha: false });
    this.drawFn = draw;
    this.w = 0;
    this.h = 0;
    this.dpr = 1;
    this._pending = false;
    this._disposed = false;
    this.hidden = false; // off screen: changes wait (see setHidden)
    this._stale = false;
    this.draws = 0;
    this.onResize = null;
    this._ro = new ResizeObserver((entries) => {
      const r = entries[0].contentRect;
      this._resize(r.width, r.height);
    });
    this._ro.observe(canvas);
  }

  _resize(w, h) {
    const dpr = window.devicePixelRatio || 1;
    w = Math.max(1, Math.floor(w));
    h = Math.max(1, Math.floor(h));
    if (w === this.w && h === this.h && dpr === this.dpr) return;
    this.w = w;
    this.h = h;
    this.dpr = dpr;
    this.canvas.width = Math.round(w * dpr);
    this.canvas.height = Math.round(h * dpr);
    // a resized canvas is cleared to black (alpha: false) until its next draw: plot colour now
    this.ctx.fillStyle = pal.plot || "#f5f5f2";
    this.ctx.fillRect(0, 0, this.canvas.width, this.canvas.height);
    this.onResize?.(w, h);
    this.invalidate();
  }

  /** Draw on the next animation frame (one frame callback for every surface of the page). */
  invalidate() {
    if (this.hidden) {
      this._stale = true; // drawn when shown again (setHidden(false))
      return;
    }
    if (this._pending) return;
    this._pending = true;
    dirty.add(this);
    if (!frame) frame = requestAnimationFrame(flush);
  }

  /** A surface off screen draws nothing; shown again, it draws once if anything changed. */
  setHidden(hidden) {
    this.hidden = hidden;
    if (!hidden && this._stale) {
      this._stale = false;
      this.invalidate();
    }
  }

  /** Draw now (a caller already inside an animation frame). Counts in `canvas.dataset.draws`. */
  drawNow() {
    this._pending = false;
    dirty.delete(this);
    if (this._disposed || !this.w || !this.h || !this.canvas.isConnected) return;
    this.ctx.setTransform(this.dpr, 0, 0, this.dpr, 0, 0);
    const t0 = performance.now();
    this.drawFn(this.ctx, this.w, this.h);
    this.draws += 1;
    this.canvas.dataset.draws = String(this.draws);
    // Opt-in draw timing for performance checks: set Surface.stats = [] in devtools.
    if (Surface.stats) Surface.stats.push([this.canvas.id || this.canvas.className, performance.now() - t0]);
  }

  // Keep `owner.hover` ({x, y} in CSS pixels, or null off the canvas) and redraw on moves.
  trackHover(owner) {
    owner.hover = null;
    this.canvas.addEventListener("pointermove", (e) => {
      owner.hover = { x: e.offsetX, y: e.offsetY };
      this.invalidate();
    });
    this.canvas.addEventListener("pointerleave", () => {
      owner.hover = null;
      this.invalidate();
    });
  }

  dispose() {
    this._ro.disconnect();
    dirty.delete(this); // no drawing after the view is gone
    this._disposed = true;
    this._pending = true; // and none asked for later
  }
}
Surface.stats = null;

// The surfaces to draw at the next animation frame: one requestAnimationFrame for all of them,
// after the callbacks views asked for (onNextFrame), which may invalidate surfaces of their own.
const dirty = new Set();
const before = new Set();
let frame = 0;

/** Run `fn` at the next animation frame, before the surfaces draw (the page's one frame
 *  callback). Returns a function that cancels it. */
export function onNextFrame(fn) {
  before.add(fn);
  if (!frame) frame = requestAnimationFrame(flush);
  return () => before.delete(fn);
}

function flush() {
  frame = 0;
  const fns = [...before];
  before.clear();
  for (const f of fns) {
    try {
      f();
    } catch (e) {
      console.error(e);
    }
  }
  const now = [...dirty];
  dirty.clear();
  for (const s of now) {
    try {
      s.drawNow();
    } catch (e) {
      console.error(e); // one broken plot does not stop the others
    }
  }
}

/** Linear or logarithmic map from a value range [lo, hi] to a pixel range [p0, p1]. */
export class Scale {
  constructor(log = false) {
    this.log = log;
    this.lo = 0;
    this.hi = 1;
    this.p0 = 0;
    this.p1 = 1;
  }
  set(lo, hi, p0, p1) {
    this.lo = lo;
    this.hi = hi;
    this.p0 = p0;
    this.p1 = p1;
    this._a = this.log ? Math.log10(lo) : lo;
    this._k = (p1 - p0) / ((this.log ? Math.log10(hi) : hi) - this._a);
    return this;
  }
  px(v) {
    return this.p0 + ((this.log ? Math.log10(v) : v) - this._a) * this._k;
  }
  val(p) {
    const t = this._a + (p - this.p0) / this._k;
    return this.log ? 10 ** t : t;
  }
}

/** "Nice" linear ticks covering [lo, hi], about `n` of them (steps 1, 2, 2.5, 5 × 10^k). */
export function linTicks(lo, hi, n = 6) {
  const span = hi - lo;
  if (!(span > 0)) return [lo];
  const raw = span / Math.max(1, n);
  const mag = 10 ** Math.floor(Math.log10(raw));
  const step = [1, 2, 2.5, 5, 10].map((m) => m * mag).find((s) => s >= raw) ?? 10 * mag;
  const out = [];
  for (let v = Math.ceil(lo / step - 1e-9) * step; v <= hi + step * 1e-9; v += step) out.push(+v.toPrecision(12));
  return out;
}

/** Log ticks on [lo, hi]: decades always; 2 and 5 between them when `px` per decade allows. */
export function logTicks(lo, hi, pxPerDecade = 200) {
  const major = [];
  const minor = [];
  const mults = pxPerDecade > 240 ? [2, 3, 5] : pxPerDecade > 90 ? [2, 5] : [];
  for (let e = Math.floor(Math.log10(lo)); e <= Math.ceil(Math.log10(hi)); e++) {
    const d = 10 ** e;
    if (d >= lo * (1 - 1e-9) && d <= hi * (1 + 1e-9)) major.push(+d.toPrecision(12));
    for (const m of [2, 3, 4, 5, 6, 7, 8, 9]) {
      const v = +(m * d).toPrecision(12);
      if (v < lo || v > hi) continue;
      if (mults.includes(m)) major.push(v);
      else minor.push(v);
    }
  }
  return { major: major.sort((a, b) => a - b), minor };
}

/** Round `v` up to a nice number (1, 2, 2.5, 5 × 10^k). */
export function niceCeil(v) {
  if (!(v > 0)) return 1;
  const mag = 10 ** Math.floor(Math.log10(v));
  for (const m of [1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8, 10]) if (m * mag >= v * (1 - 1e-12)) return m * mag;
  return 10 * mag;
}

/** Draw text with a plate behind it (for labels over traces). */
export function plateText(ctx, text, x, y, { align = "left", base = "middle", fg, bg, pad = 3 } = {}) {
  ctx.textAlign = align;
  ctx.textBaseline = base;
  const m = ctx.measureText(text);
  const w = m.width + 2 * pad;
  const h = 15;
  const x0 = align === "left" ? x - pad : align === "right" ? x - m.width - pad : x - w / 2;
  const y0 = base === "middle" ? y - h / 2 : base === "top" ? y - 2 : y - h + 2;
  ctx.fillStyle = bg;
  ctx.fillRect(x0, y0, w, h);
  ctx.fillStyle = fg;
  ctx.fillText(text, x, y);
  return { x0, y0, w, h };
}

// --- axes: one way to draw a plot's area, grid, tick labels and border -------------------
// `box` is the plot area in CSS pixels, {L, R, T, B}; grid lines sit on half pixels so they
// are one pixel wide. Tick labels are 11 px monospace in the secondary ink.

/** The panel, then the plot area's background inside it. */
export function plotArea(ctx, w, h, { L, R, T, B }) {
  ctx.fillStyle = pal.panel;
  ctx.fillRect(0, 0, w, h);
  ctx.fillStyle = pal.plot;
  ctx.fillRect(L, T, R - L, B - T);
}

/** Vertical grid lines at `values` on scale `xs`; `colour` a colour or v → colour. */
export function gridX(ctx, xs, values, { T, B }, colour = pal.grid) {
  ctx.lineWidth = 1;
  for (const v of values) {
    const x = Math.round(xs.px(v)) + 0.5;
    ctx.strokeStyle = typeof colour === "function" ? colour(v) : colour;
    ctx.beginPath();
    ctx.moveTo(x, T);
    ctx.lineTo(x, B);
    ctx.stroke();
  }
}

/** Horizontal grid lines at `values` on scale `ys`; `colour` as for gridX. */
export function gridY(ctx, ys, values, { L, R }, colour = pal.grid) {
  ctx.lineWidth = 1;
  for (const v of values) {
    const y = Math.round(ys.px(v)) + 0.5;
    ctx.strokeStyle = typeof colour === "function" ? colour(v) : colour;
    ctx.beginPath();
    ctx.moveTo(L, y);
    ctx.lineTo(R, y);
    ctx.stroke();
  }
}

function tickFont(ctx, align, base) {
  ctx.font = `11px ${pal.mono}`;
  ctx.fillStyle = pal["ink-2"];
  ctx.textAlign = align;
  ctx.textBaseline = base;
}

/** Labels of y ticks left of the plot area (those inside its height), `fmt(v)` each. */
export function labelsY(ctx, ys, values, { L, T, B }, fmt) {
  tickFont(ctx, "right", "middle");
  for (const v of values) {
    const y = ys.px(v);
    if (y < T - 1 || y > B + 1) continue;
    ctx.fillText(fmt(v), L - 6, y);
  }
}

/** Labels of x ticks `dy` below the plot area, `fmt(v)` each. `spaced`: skip a label that
 *  would touch the one before it or fall outside the plot's width. */
export function labelsX(ctx, xs, values, { L, R, B }, fmt, { dy = 5, spaced = false } = {}) {
  tickFont(ctx, "center", "top");
  let lastX = -1e9;
  for (const v of values) {
    const x = xs.px(v);
    const s = fmt(v);
    if (spaced) {
      const half = ctx.measureText(s).width / 2 + 4;
      if (x - half < lastX || x < L - 2 || x > R + 2) continue;
      lastX = x + half;
    }
    ctx.fillText(s, x, B + dy);
  }
}

/** The plot area's border in the axis colour. */
export function border(ctx, { L, R, T, B }) {
  ctx.strokeStyle = pal.axis;
  ctx.lineWidth = 1;
  ctx.strokeRect(L + 0.5, T + 0.5, R - L - 1, B - T - 1);
}
