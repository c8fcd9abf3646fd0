// A bounded history of one value: the mean of each fixed time step over a fixed span, in
// typed arrays allocated once (its memory never grows, however long the page stays open),
// plus the newest raw point. No DOM, no imports.

export class StepRing {
  /** `stepMs` per slot, `n` slots (the span is n × stepMs). */
  constructor(stepMs, n) {
    this.stepMs = stepMs;
    this.n = n;
    this.sum = new Float64Array(n);
    this.cnt = new Uint32Array(n);
    this.step = new Float64Array(n).fill(-1); // which step (t / stepMs, floored) each slot holds
    this.newest = -1; // the newest step seen
    this.last = null; // [t_ms, v] of the newest raw point
  }

  _slot(k) {
    const i = k % this.n;
    if (this.step[i] !== k) {
      this.step[i] = k;
      this.sum[i] = 0;
      this.cnt[i] = 0;
    }
    return i;
  }

  /** A live value at `t_ms`. */
  add(t_ms, v) {
    if (!Number.isFinite(v) || !(t_ms > 0)) return;
    const k = Math.floor(t_ms / this.stepMs);
    if (k <= this.newest - this.n) return; // older than the span
    const i = this._slot(k);
    this.sum[i] += v;
    this.cnt[i] += 1;
    if (k > this.newest) this.newest = k;
    if (!this.last || t_ms >= this.last[0]) this.last = [t_ms, v];
  }

  /** A stored step's mean (from the trend route) where the page saw nothing itself. */
  seed(t_ms, mean) {
    if (!Number.isFinite(mean)) return;
    const k = Math.floor(t_ms / this.stepMs);
    if (k <= this.newest - this.n) return;
    const i = k % this.n;
    if (this.step[i] === k && this.cnt[i] > 0) return; // live values win
    this._slot(k);
    this.sum[i] = mean;
    this.cnt[i] = 1;
    if (k > this.newest) this.newest = k;
  }

  /** [[t_ms, mean]] oldest first (each step at its middle), then the newest raw point. */
  points() {
    const out = [];
    if (this.newest < 0) return out;
    for (let k = this.newest - this.n + 1; k <= this.newest; k++) {
      const i = ((k % this.n) + this.n) % this.n;
      if (this.step[i] === k && this.cnt[i] > 0) out.push([(k + 0.5) * this.stepMs, this.sum[i] / this.cnt[i]]);
    }
    if (this.last && (!out.length || this.last[0] >= out.at(-1)[0])) out.push(this.last);
    return out;
  }

  /** The largest step mean in the span (0 when empty). */
  max() {
    let m = 0;
    for (let k = this.newest - this.n + 1; k <= this.newest; k++) {
      const i = ((k % this.n) + this.n) % this.n;
      if (this.step[i] === k && this.cnt[i] > 0) m = Math.max(m, this.sum[i] / this.cnt[i]);
    }
    return Math.max(m, this.last ? this.last[1] : 0);
  }
}
