// Number, unit, frequency and time formatting shared by every view (times in the site's
// zone, set once from GET /api/v1/meta). Pure functions: no DOM, no network.

/** A value with 3 significant digits in fixed notation (exponent only below 1e-3 or at 1e6+). */
export function fmtVal(v, sig = 3) {
  if (v === null || v === undefined || !Number.isFinite(v)) return "—";
  const a = Math.abs(v);
  if (a === 0) return "0";
  if (a < 1e-3 || a >= 1e6) return v.toExponential(sig - 1);
  const digits = Math.max(0, sig - 1 - Math.floor(Math.log10(a)));
  return v.toFixed(Math.min(digits, 6));
}

/** Frequency in Hz, e.g. "148.4 Hz", "2.35 kHz". */
export function fmtHz(f, withUnit = true) {
  if (!Number.isFinite(f)) return "—";
  const a = Math.abs(f);
  let s;
  if (a >= 1000) s = (f / 1000).toFixed(a >= 10000 ? 1 : 2) + (withUnit ? " kHz" : "k");
  else if (a >= 100) s = f.toFixed(1) + (withUnit ? " Hz" : "");
  else if (a >= 10) s = f.toFixed(2) + (withUnit ? " Hz" : "");
  else s = f.toFixed(3) + (withUnit ? " Hz" : "");
  return s;
}

/** A frequency as given, to 6 significant digits: "0.3125 Hz", "500 Hz", "5 kHz", "1.28 kHz". */
export function fmtHzExact(f) {
  if (!Number.isFinite(f)) return "—";
  return Math.abs(f) >= 1000 ? `${+(f / 1000).toPrecision(6)} kHz` : `${+f.toPrecision(6)} Hz`;
}

/** A line's frequency in Hz to the resolution of its spacing `df` (up to 3 decimals). */
export function fmtHzAt(f, df) {
  if (!Number.isFinite(f)) return "—";
  const frac = String(df).split(".")[1] || "";
  return `${f.toFixed(Math.min(3, frac.length))} Hz`;
}

/** An axis tick label for an order of running speed: "1×", "2.5×", "0.5×". */
export function tickOrder(o) {
  return `${+o.toPrecision(3)}×`;
}

/** An axis tick label for a frequency (short: "500", "1k", "2.5k"). */
/** A point of a spectrum's x axis: a frequency ("148.4 Hz"), or on an order spectrum
 *  (x_unit "order") an order ("order 2.5"). */
export function fmtX(v, xUnit) {
  return xUnit === "order" ? `order ${+v.toPrecision(4)}` : fmtHz(v);
}

/** A tick label of a spectrum's x axis: tickHz, or an order as the spectrum labels it ("2.5×"). */
export function tickX(v, xUnit) {
  return xUnit === "order" ? `${+v.toPrecision(3)}×` : tickHz(v);
}

export function tickHz(f) {
  if (f >= 1000) {
    const k = f / 1000;
    return (Number.isInteger(k) ? k.toFixed(0) : fmtVal(k, 3).replace(/0+$/, "").replace(/\.$/, "")) + "k";
  }
  if (f >= 1) return Number.isInteger(f) ? String(f) : String(+f.toPrecision(3));
  return String(+f.toPrecision(2));
}

/** Amplitude type as shown next to a unit. */
export function ampLabel(a) {
  return { rms: "RMS", peak: "pk", "peak-to-peak": "pk-pk" }[a] ?? (a || "");
}

/** "mm/s RMS", "g pk". */
export function unitLabel(unit, amplitude) {
  const u = unit === "m/s2" ? "m/s²" : unit === "um" ? "µm" : unit;
  return amplitude ? `${u} ${ampLabel(amplitude)}` : u;
}

// --- times: every time is shown in the site's zone (service.timezone, from GET /api/v1/meta),
// not the browser's, with the zone's offset where a full time is written.
const zoneState = { name: "UTC", parts: null };

/** Show times in IANA zone `name` from now on (states.js calls it with the service's zone). */
export function setSiteZone(name) {
  try {
    new Intl.DateTimeFormat("en-GB", { timeZone: name }); // RangeError for an unknown zone
  } catch {
    name = "UTC";
  }
  zoneState.name = name;
  zoneState.parts = new Intl.DateTimeFormat("en-GB", {
    timeZone: name, year: "numeric", month: "2-digit", day: "2-digit", hour: "2-digit",
    minute: "2-digit", second: "2-digit", hourCycle: "h23", timeZoneName: "longOffset",
  });
}
setSiteZone("UTC");

/** The site zone's IANA name. */
export function siteZone() {
  return zoneState.name;
}

/** The parts of a time in the site zone: {y, mo, d, h, mi, s, off} (off "+05:45"). */
export function zoneParts(t_ms) {
  const p = {};
  for (const x of zoneState.parts.formatToParts(new Date(t_ms))) p[x.type] = x.value;
  const off = (p.timeZoneName || "GMT").replace(/^(GMT|UTC)/, "") || "+00:00";
  return { y: p.year, mo: p.month, d: p.day, h: p.hour, mi: p.minute, s: p.second, off: off.replace("−", "-") };
}

/** The site zone's offset from UTC at a time, ms (+05:45 → 20 700 000). */
export function zoneOffsetMs(t_ms) {
  const m = /^([+-])(\d\d):(\d\d)$/.exec(zoneParts(t_ms).off);
  return m ? (m[1] === "-" ? -1 : 1) * (Number(m[2]) * 3600e3 + Number(m[3]) * 60e3) : 0;
}

/** The site zone's offset at a time, "+05:45", and its name: "Asia/Kathmandu (UTC+05:45)". */
export function zoneLabel(t_ms = Date.now()) {
  return `${zoneState.name} (UTC${zoneParts(t_ms).off})`;
}

/** Wall time of a ns timestamp in the site zone, "14:03:07". */
export function fmtClock(t_ns) {
  if (!t_ns) return "—";
  const p = zoneParts(Number(t_ns) / 1e6);
  return `${p.h}:${p.mi}:${p.s}`;
}

/** The site-zone day of a ns timestamp, "2026-12-02". */
export function fmtDay(t_ns) {
  const p = zoneParts(Number(t_ns) / 1e6);
  return `${p.y}-${p.mo}-${p.d}`;
}

/** Date, time and offset of a ns timestamp in the site zone, "2026-12-02 14:03:07 +05:45". */
export function fmtDateTime(t_ns) {
  if (!t_ns) return "—";
  const p = zoneParts(Number(t_ns) / 1e6);
  return `${p.y}-${p.mo}-${p.d} ${p.h}:${p.mi}:${p.s} ${p.off}`;
}

/** Time of day with the offset for today (site zone), date, time and offset otherwise. */
export function fmtWhen(t_ns) {
  if (!t_ns) return "—";
  const s = fmtDateTime(t_ns);
  return fmtDay(t_ns) === fmtDay(Date.now() * 1e6) ? s.slice(11) : s;
}

/** A duration in seconds as "45 s", "3 min", "2 h 5 min", "4 d". */
export function fmtAge(s) {
  if (!Number.isFinite(s)) return "—";
  s = Math.max(0, s);
  if (s < 90) return `${Math.round(s)} s`;
  if (s < 5400) return `${Math.round(s / 60)} min`;
  if (s < 172800) return `${Math.floor(s / 3600)} h ${Math.round((s % 3600) / 60)} min`;
  return `${Math.round(s / 86400)} d`;
}

// Same-quantity unit factors: value_in_b = value_in_a * factor. Between quantities
// (acceleration ↔ velocity ↔ displacement) the ratio depends on frequency, so none here.
const UNIT_BASE = {
  "mm/s": ["velocity", 1], "in/s": ["velocity", 25.4],
  "m/s2": ["acceleration", 1], g: ["acceleration", 9.80665], // ISO 80000-3: standard gravity
  um: ["displacement", 1], mil: ["displacement", 25.4], // 1 mil = 25.4 µm (exact)
};
const AMP_FACTOR = { rms: 1, peak: Math.SQRT2, "peak-to-peak": 2 * Math.SQRT2 }; // sine wave

/** Factor that turns an RMS value in unit `from` into `toAmp` in unit `to`, or null. */
export function convertFactor(from, to, toAmp = "rms", fromAmp = "rms") {
  const a = UNIT_BASE[from], b = UNIT_BASE[to];
  if (!a || !b || a[0] !== b[0]) return null;
  const af = AMP_FACTOR[toAmp] / AMP_FACTOR[fromAmp];
  if (!Number.isFinite(af)) return null;
  return (a[1] / b[1]) * af;
}

export const UNIT_CHOICES = ["mm/s", "in/s", "g", "m/s2", "um", "mil"];
export const AMP_CHOICES = ["rms", "peak", "peak-to-peak"];

