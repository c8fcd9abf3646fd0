// The equivalent band-pass filter of one spectrum line, computed from the window's samples
// (when the service has no /windows route). Pure maths: no DOM, no network.
//
// For periodic (DFT-even) window samples w[k], k = 0…N−1, a sine ν lines away from a line's
// centre reads |W(ν)|/|W(0)| on that line, W(ν) = Σ w[k]·exp(−2πi·ν·k/N) (Harris 1978).

const COSINE_SUMS = {
  rectangular: [1],
  hann: [0.5, 0.5],
  hamming: [0.54, 0.46],
  "blackman-harris": [0.35875, 0.48829, 0.14128, 0.01168], // 4-term, Harris 1978
  flattop: [0.21557895, 0.41663158, 0.277263158, 0.083578947, 0.006947368], // as scipy ships it
};
export const WINDOW_NAMES = [...Object.keys(COSINE_SUMS), "kaiser"];
export const KAISER_BETA = 8.6;

function besselI0(x) {
  // Power series; converges fast for the β used here (terms fall below 1e-17 of the sum).
  let sum = 1, term = 1;
  const q = (x * x) / 4;
  for (let k = 1; k < 200; k++) {
    term *= q / (k * k);
    sum += term;
    if (term < sum * 1e-17) break;
  }
  return sum;
}

/** Periodic window of `n` samples (Float64Array), like scipy.signal.get_window(..., fftbins=True). */
export function windowSamples(name, n, beta = KAISER_BETA) {
  const w = new Float64Array(n);
  if (name === "kaiser") {
    const i0b = besselI0(beta);
    for (let k = 0; k < n; k++) {
      const r = (2 * k) / n - 1; // the symmetric n+1 window with its last sample dropped
      w[k] = besselI0(beta * Math.sqrt(Math.max(0, 1 - r * r))) / i0b;
    }
    return w;
  }
  const a = COSINE_SUMS[name];
  if (!a) throw new Error(`window=${JSON.stringify(name)} is not one of ${WINDOW_NAMES.join(", ")}`);
  for (let k = 0; k < n; k++) {
    let s = 0;
    for (let m = 0; m < a.length; m++) s += (m % 2 ? -1 : 1) * a[m] * Math.cos((2 * Math.PI * m * k) / n);
    w[k] = s;
  }
  return w;
}

/**
 * Gain of one line's filter, 20·lg|W(ν)/W(0)| in dB, at ν = −span…+span lines in steps of
 * 1/pointsPerLine. Returns {offset_bins: Float64Array, gain_db: Float64Array}.
 */
export function windowResponse(name, n, span = 8, pointsPerLine = 16, beta = KAISER_BETA) {
  const w = windowSamples(name, n, beta);
  let s1 = 0;
  for (let k = 0; k < n; k++) s1 += w[k];
  const m = Math.round(2 * span * pointsPerLine) + 1;
  const off = new Float64Array(m);
  const db = new Float64Array(m);
  const half = (m - 1) / 2;
  for (let j = 0; j <= half; j++) {
    const nu = j / pointsPerLine;
    // Direct sum, with the phase recomputed every 64 samples to keep rounding small.
    let re = 0, im = 0;
    const th = (-2 * Math.PI * nu) / n;
    for (let k0 = 0; k0 < n; k0 += 64) {
      let c = Math.cos(th * k0), s = Math.sin(th * k0);
      const dc = Math.cos(th), ds = Math.sin(th);
      const k1 = Math.min(n, k0 + 64);
      for (let k = k0; k < k1; k++) {
        re += w[k] * c;
        im += w[k] * s;
        const c2 = c * dc - s * ds;
        s = s * dc + c * ds;
        c = c2;
      }
    }
    const g = 20 * Math.log10(Math.max(Math.hypot(re, im) / s1, 1e-300));
    // |W(−ν)| = |W(ν)| for a real window
    off[half + j] = nu;
    off[half - j] = -nu;
    db[half + j] = g;
    db[half - j] = g;
  }
  return { offset_bins: off, gain_db: db };
}

/** Figures read off a response: −3 dB and −6 dB full widths (lines), scalloping loss, highest sidelobe. */
export function responseFigures(offset, db) {
  const mid = (offset.length - 1) / 2;
  const width = (level) => {
    for (let j = mid; j < offset.length - 1; j++) {
      if (db[j + 1] < level) {
        const t = (level - db[j]) / (db[j + 1] - db[j]);
        return 2 * (offset[j] + t * (offset[j + 1] - offset[j]));
      }
    }
    return NaN;
  };
  let j = mid;
  while (j < offset.length - 1 && db[j + 1] <= db[j]) j++; // to the first null
  let side = -Infinity;
  for (let i = j; i < offset.length; i++) side = Math.max(side, db[i]);
  const hi = offset.findIndex((o) => o >= 0.5);
  return { bw3: width(-3.0103), bw6: width(-6.0206), scallop: hi >= 0 ? -db[hi] : NaN, sidelobe: side, nullAt: offset[j] };
}

/** ENBW in lines, N·Σw²/(Σw)² (Harris 1978). */
export function enbwBins(name, n, beta = KAISER_BETA) {
  const w = windowSamples(name, n, beta);
  let s1 = 0, s2 = 0;
  for (let k = 0; k < n; k++) {
    s1 += w[k];
    s2 += w[k] * w[k];
  }
  return (n * s2) / (s1 * s1);
}
