// Text on a plot without overlaps: every label asks for a place (where it would go, the
// moves it may make, a priority); the most important are placed first, each at the first
// of its places that is free, and a label that finds none is left out. Knows canvas text
// metrics only: no data, no scales.

/** Do boxes `a` and `b` ({x0, y0, w, h}) overlap (edges that only touch do not)? */
export function overlaps(a, b) {
  return a.x0 < b.x0 + b.w && b.x0 < a.x0 + a.w && a.y0 < b.y0 + b.h && b.y0 < a.y0 + a.h;
}

/** The box of label `a` drawn at its own x, y (as plateText in plot.js draws a plate). */
function boxOf(ctx, a) {
  const tw = a.w ?? ctx.measureText(a.text).width;
  const pad = a.pad ?? (a.bg ? 3 : 1);
  const w = tw + 2 * pad;
  const h = a.h ?? (a.bg ? 15 : a.size + 3);
  const x0 = a.align === "right" ? a.x - tw - pad : a.align === "center" ? a.x - w / 2 : a.x - pad;
  const y0 = a.base === "top" ? a.y - 2 : a.base === "bottom" ? a.y - h + 2 : a.y - h / 2;
  return { x0, y0, w, h };
}

export class Labels {
  constructor() {
    this.asks = [];
  }

  /**
   * Ask for a label. `a`: {text, x, y, size (px), font (canvas font), align (left | center |
   * right), base (top | middle | bottom), fg, bg (a plate's colour, or none), prio (higher is
   * placed first), moves ([[dx, dy], …] tried in turn; default [[0, 0]]), kind and value (kept
   * with the placed label, for people and tests), paint(ctx, box) (draws it instead of text),
   * w, h (a box of its own size)}.
   */
  add(a) {
    this.asks.push({ align: "left", base: "middle", prio: 0, ...a, seq: this.asks.length });
  }

  /** Place every label, draw the placed ones, and return them: [{kind, text, value, x0, y0, w, h}]. */
  draw(ctx) {
    const order = [...this.asks].sort((p, q) => q.prio - p.prio || p.seq - q.seq);
    const placed = [];
    for (const a of order) {
      ctx.font = a.font;
      const b = boxOf(ctx, a);
      for (const [dx, dy] of a.moves ?? [[0, 0]]) {
        const box = { x0: b.x0 + dx, y0: b.y0 + dy, w: b.w, h: b.h };
        if (placed.some((p) => overlaps(p.box, box))) continue;
        placed.push({ a, box, dx, dy });
        break;
      }
    }
    for (const { a, box, dx, dy } of placed) {
      if (a.paint) {
        a.paint(ctx, box);
        continue;
      }
      ctx.font = a.font;
      if (a.bg) {
        ctx.fillStyle = a.bg;
        ctx.fillRect(box.x0, box.y0, box.w, box.h);
      }
      ctx.fillStyle = a.fg;
      ctx.textAlign = a.align;
      ctx.textBaseline = a.base;
      ctx.fillText(a.text, a.x + dx, a.y + dy);
    }
    return placed.map(({ a, box }) => ({ kind: a.kind ?? "", text: a.text, value: a.value ?? null, ...box }));
  }
}
