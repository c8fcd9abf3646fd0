// Spectral history on the channel page: the history waterfall (stored spectra over a range
// from hours to a year, the live part appended as frames arrive), a picked time's stored
// spectrum overlaid on the live one, and the spectrogram opened full from history.
// Reads /channels/{id}/waterfall and /history over REST; draws through waterfall.js.

import { API, getJSON, qs } from "./api.js";
import { fmtVal, unitLabel } from "./fmt.js";
import { html, setHTML } from "./dom.js";
import { Waterfall, poolColumns, shortTime } from "./waterfall.js";

const HOUR = 3600e3;
export const HISTORY_RANGES = { "1 h": HOUR, "6 h": 6 * HOUR, "1 day": 24 * HOUR, "7 days": 168 * HOUR, "30 days": 720 * HOUR, "1 year": 8760 * HOUR };
const MAX_SGRAM_VALUES = 2e6; // spectrogram prefill: at most rows × lines values fetched

function decode(b64, rows, cols) {
  const bin = atob(b64);
  const bytes = new Uint8Array(bin.length);
  for (let i = 0; i < bin.length; i++) bytes[i] = bin.charCodeAt(i);
  const all = new Float32Array(bytes.buffer);
  return Array.from({ length: rows }, (_, r) => all.subarray(r * cols, (r + 1) * cols));
}

/** ISO-like text of a time at a UTC offset in minutes (the site's, as the API wrote it). */
function isoAt(t_ns, offsetMin) {
  return new Date(Number(t_ns) / 1e6 + offsetMin * 60e3).toISOString();
}

function offsetOf(iso) {
  const m = /([+-])(\d\d):(\d\d)$/.exec(iso || "");
  return m ? (m[1] === "-" ? -1 : 1) * (60 * +m[2] + +m[3]) : null;
}

/**
 * Mount the history panel in `figure` for channel `id`. `plot`: the live SpectrumPlot (the
 * picked spectrum is overlaid on it); `sg`: the Spectrogram (filled from history on the
 * first live spectrum); `view()`: {unit, amplitude, profile, xUnit} the page shows.
 */
export function mountHistory(figure, { id, plot, sg, view }) {
  const saved = localStorage.getItem("quaver.historyRange");
  const st = { range: HISTORY_RANGES[saved] ? saved : "1 h", interval_s: 600, offset: null, loadedKey: "", pending: null, picked: null, sgFilled: false, sgBuffer: [], gen: 0 };
  setHTML(figure, html`<figcaption>History waterfall
      <span class="seg" role="group" aria-label="history range">${Object.keys(HISTORY_RANGES).map((r) => html`<button data-hrange="${r}">${r}</button>`)}</span>
      <span class="hint" id="hist-note">stored spectra, newest at the top; click a row to overlay it on the spectrum</span></figcaption>
    <canvas id="waterfall" class="plot-waterfall" aria-label="history waterfall of ${id}: time down, frequency across"></canvas>
    <p class="spec-cap" id="hist-legend" aria-live="polite"></p>`);
  const $ = (s) => figure.querySelector(s);
  const wf = new Waterfall($("#waterfall"), { onPick: (row) => pick(row), xUnit: () => view().xUnit });

  function sync() {
    for (const b of figure.querySelectorAll("[data-hrange]")) b.setAttribute("aria-pressed", String(b.dataset.hrange === st.range));
  }
  figure.addEventListener("click", (e) => {
    const b = e.target.closest("button[data-hrange]");
    if (b) {
      st.range = b.dataset.hrange;
      localStorage.setItem("quaver.historyRange", st.range);
      sync();
      load();
    }
    if (e.target.closest("button[data-unpick]")) unpick();
  });

  async function load() {
    const v = view();
    const span = HISTORY_RANGES[st.range];
    const now = Date.now();
    const canvas = $("#waterfall");
    const rows = Math.max(20, Math.min(400, Math.floor(canvas.clientHeight || 260)));
    const cols = Math.max(64, Math.min(1024, Math.floor(canvas.clientWidth || 600)));
    const key = `${st.range}|${v.unit}|${v.amplitude}|${v.profile}`;
    st.loadedKey = key;
    st.loaded = false;
    st.pending = null;
    wf.setNote("loading stored spectra…");
    try {
      const j = await getJSON(`${API}/channels/${encodeURIComponent(id)}/waterfall${qs({
        since: (now - span) / 1000, until: (now + span) / 1000, rows, cols, unit: v.unit, amplitude: v.amplitude, profile: v.profile, format: "base64" })}`, { timeoutMs: 20000 });
      if (key !== st.loadedKey) return; // a newer choice is loading
      st.interval_s = j.interval_s ?? st.interval_s;
      st.offset = offsetOf(j.times?.[0]) ?? st.offset;
      const vals = decode(j.data || "", j.rows, j.cols);
      // the range ends now (or at the newest stored spectrum, if the data's clock is ahead)
      // and starts at its length before, or at the oldest stored spectrum while less is kept
      const end = Math.max(now * 1e6, j.rows ? j.t_ns[j.rows - 1] : 0);
      const start = Math.max(end - span * 1e6, j.rows ? j.t0_ns[0] - st.interval_s * 1e9 : end - span * 1e6);
      wf.setHistory({
        rows: vals.map((values, r) => ({ t0_ns: j.t0_ns[r], t_ns: j.t_ns[r], time: j.times[r], pooled: j.pooled[r], values })),
        cols: j.cols, fmin: j.fmin_hz ?? 0, fmax: j.fmax_hz ?? 1, span: [start, end], maxSpan: span * 1e6,
        unit: unitLabel(j.unit, j.amplitude), amplitude: j.amplitude,
      });
      st.unit = j.unit;
      st.amplitude = j.amplitude;
      setText($("#hist-note"), j.spectra
        ? `${j.spectra} stored spectra (one per ${fmtInterval(st.interval_s)} and at alarm changes)${j.spectra > j.rows ? `, ${j.rows} rows of the largest values` : ""}; live rows marked at the left edge`
        : j.enabled === false ? "this service stores no spectra ([history] enabled = false): live rows only"
          : `nothing stored in the last ${st.range} yet: one spectrum is stored every ${fmtInterval(st.interval_s)}`);
      wf.setNote(j.spectra ? "" : "no stored spectra in this range yet");
      if (!j.spectra) wf.setHistory({ rows: [], cols: 0, fmin: 0, fmax: 1, span: null, maxSpan: span * 1e6, unit: "", amplitude: "" });
      st.loaded = true;
    } catch (e) {
      if (key === st.loadedKey) wf.setNote(`history not available: ${e.message}`);
    }
  }

  /** A live spectrum (the page's own, as drawn): appended as a row every row's worth of time. */
  function onSpectrum(d) {
    if (!st.sgFilled) {
      if (st.sgBuffer.length < sg.rows) st.sgBuffer.push(d);
      if (st.sgBuffer.length === 1) fillSpectrogram(d);
    }
    if (st.loaded && !wf.cols && d.values.length) {
      // nothing stored yet: the live rows start the waterfall, on the live spectrum's lines
      const canvas = $("#waterfall");
      wf.setHistory({ rows: [], cols: Math.max(64, Math.min(1024, Math.floor(canvas.clientWidth || 600))), fmin: 0,
        fmax: d.f0 + (d.values.length - 1) * d.df, span: [d.t_ns - st.interval_s * 1e9, d.t_ns],
        maxSpan: HISTORY_RANGES[st.range] * 1e6, unit: unitLabel(d.unit, d.amplitude), amplitude: d.amplitude });
      st.unit = d.unit;
      st.amplitude = d.amplitude;
    }
    if (!wf.span || !wf.cols || d.unit !== st.unit || d.amplitude !== st.amplitude) return;
    const rowNs = Math.max(1e9, wf.maxSpan / 400); // at most ~400 live rows in the range
    const pooled = poolColumns(d.values, d.f0, d.df, wf.fmin, wf.fmax, wf.cols);
    const p = st.pending;
    if (!p) {
      st.pending = { t0_ns: d.t_ns, t_ns: d.t_ns, values: pooled };
      return;
    }
    for (let k = 0; k < pooled.length; k++) if (pooled[k] > p.values[k]) p.values[k] = pooled[k];
    p.t_ns = d.t_ns;
    if (p.t_ns - p.t0_ns >= rowNs) {
      wf.appendLive({ ...p, time: st.offset === null ? null : isoAt(p.t_ns, st.offset) });
      st.pending = null;
    }
  }

  /** Open the spectrogram full: the stored spectra just before now, on the live lines. */
  async function fillSpectrogram(d) {
    const gen = st.gen;
    const n = d.values.length;
    const rows = Math.max(1, Math.min(sg.rows, Math.floor(MAX_SGRAM_VALUES / n)));
    const v = view();
    const now = Date.now();
    try {
      const j = await getJSON(`${API}/channels/${encodeURIComponent(id)}/waterfall${qs({
        since: (now - rows * st.interval_s * 1000 - 60e3) / 1000, until: Number(d.t_ns) / 1e9, rows, cols: n,
        fmin_hz: d.f0 - d.df / 2, fmax_hz: d.f0 + (n - 0.5) * d.df, unit: d.unit, amplitude: d.amplitude, profile: v.profile, format: "base64" })}`, { timeoutMs: 20000 });
      if (gen !== st.gen || st.sgFilled || !j.rows || j.cols !== n) return; // one column per line: the lines themselves
      const stored = decode(j.data, j.rows, j.cols);
      sg.clear();
      stored.forEach((values, r) => sg.push({ values, f0: d.f0, df: d.df, t_ns: j.t_ns[r] }));
      for (const b of st.sgBuffer) if (b.values.length === n && b.df === d.df) sg.push(b);
      sg.surface.canvas.dataset.historyRows = String(j.rows);
    } catch {
      /* the spectrogram fills from the live stream as before */
    } finally {
      if (gen === st.gen) {
        st.sgFilled = true;
        st.sgBuffer = [];
      }
    }
  }

  /** Overlay the stored spectrum nearest a waterfall row's time on the live spectrum. */
  async function pick(row) {
    const v = view();
    const live = plot.data;
    const unit = live?.unit || v.unit, amplitude = live?.amplitude || v.amplitude;
    try {
      // the newest stored spectrum in the row (a live row: the newest stored before it)
      const list = await getJSON(`${API}/channels/${encodeURIComponent(id)}/history${qs({ since: Number(row.t0_ns) / 1e9 - 1e-3 - (row.live ? 2 * st.interval_s : 0), until: Number(row.t_ns) / 1e9 + 1e-3, limit: 1, profile: v.profile })}`);
      const item = list.items?.[0];
      if (!item) return;
      const s = await getJSON(`${API}/channels/${encodeURIComponent(id)}/history/${item.id}${qs({ unit, amplitude })}`);
      const when = shortTime(s.time, s.t_ns);
      const what = s.reason === "alarm" ? `at an alarm change (event ${s.event_id})` : `mean of ${s.frames} frames over ${fmtInterval(s.span_s)}`;
      st.picked = s;
      wf.picked = row.t_ns;
      wf.surface.invalidate();
      plot.setOverlay({
        f0: s.f0_hz, df: s.df_hz, values: Float32Array.from(s.values, (x) => x ?? NaN),
        label: `stored ${when}`, dash: [6, 4], legend: ["live (solid)", `stored ${when} (dashed)`],
      });
      plot.canvas.dataset.overlay = `stored ${when}`;
      setHTML($("#hist-legend"), html`On the spectrum: <b>live</b> as a solid line, <b>stored ${when}</b> as a dashed line (${what}, ${fmtVal(s.values.reduce((a, b) => Math.max(a, b ?? 0), 0))} ${unitLabel(s.unit, s.amplitude)} at most). <button data-unpick>Remove the stored spectrum</button>`);
    } catch (e) {
      setText($("#hist-legend"), `could not read the stored spectrum: ${e.message}`);
    }
  }

  function unpick() {
    st.picked = null;
    wf.picked = null;
    wf.surface.invalidate();
    plot.setOverlay(null);
    delete plot.canvas.dataset.overlay;
    setText($("#hist-legend"), "");
  }

  sync();
  load();
  return {
    onSpectrum,
    /** The unit, amplitude or profile changed: load again, drop the overlay. */
    reload() {
      unpick();
      st.gen++; // the page cleared the spectrogram: fill it again for the new view
      st.sgFilled = false;
      st.sgBuffer = [];
      load();
    },
    probe: () => ({ range: st.range, rows: wf.rows.length, live: wf.rows.filter((r) => r.live).length, picked: st.picked && { id: st.picked.id, time: st.picked.time } }),
    dispose() {
      st.loadedKey = null; // a load on its way is dropped (it checks its key on return)
      st.gen++; // and so is a spectrogram fill
      wf.surface.dispose();
    },
  };
}

function fmtInterval(s) {
  return s >= 86400 ? `${+(s / 86400).toFixed(1)} d` : s >= 3600 ? `${+(s / 3600).toFixed(1)} h` : s >= 60 ? `${+(s / 60).toFixed(1)} min` : `${+s.toFixed(1)} s`;
}

function setText(el, text) {
  if (el && el.textContent !== text) el.textContent = text;
}
