// The evidence dialog: the spectrum kept when an alarm was raised against the live one, the
// waveform around it, downloads. Reads only the events and spectrum routes; no shared state.

import { API, getJSON, qs } from "./api.js";
import { fmtDateTime, fmtHz, fmtVal, unitLabel } from "./fmt.js";
import { html, setHTML } from "./dom.js";
import { SpectrumPlot } from "./spectrum.js";
import { Scale, Surface, border, gridX, labelsX, linTicks, pal, plotArea } from "./plot.js";
import { store } from "./shared.js";
import { chTitle } from "./names.js";

let plot = null;
let wave = null;
let waveData = null;
let timer = 0;
let current = null;

export function setupEvidence() {
  const dlg = document.getElementById("dlg-evidence");
  const readout = document.getElementById("ev-readout");
  plot = new SpectrumPlot(document.getElementById("ev-spec"), {
    onHover: (i) => {
      readout.textContent = i ? `${fmtHz(i.f)} · then ${fmtVal(i.v)} · now ${fmtVal(i.then)} ${unitLabel(i.unit, i.amplitude)}` : "";
    },
  });
  plot.show.peaks = true;
  wave = new Surface(document.getElementById("ev-wave"), drawWave);
  dlg.addEventListener("close", () => {
    clearInterval(timer);
    current = null;
  });
  document.addEventListener("click", (e) => {
    const b = e.target.closest("[data-evidence]");
    if (!b) return;
    e.preventDefault();
    openEvidence(b.dataset.evidence);
  });
}

/** The labels drawn on the evidence spectrum (its key among them), for people and tests. */
export function evidenceLabels() {
  return plot?.labels ?? [];
}

export async function openEvidence(eventId) {
  const dlg = document.getElementById("dlg-evidence");
  const what = document.getElementById("ev-what");
  current = eventId;
  what.textContent = "loading…";
  setHTML(document.getElementById("ev-downloads"), "");
  document.getElementById("ev-wave-fig").hidden = true;
  plot.setOverlay(null);
  plot.data = null;
  plot.view = null;
  plot.surface.invalidate();
  if (!dlg.open) dlg.showModal();
  let ev, e;
  try {
    [ev, e] = await Promise.all([
      getJSON(`${API}/events/${encodeURIComponent(eventId)}/evidence?format=json`, { timeoutMs: 20000 }),
      getJSON(`${API}/events/${encodeURIComponent(eventId)}`),
    ]);
  } catch (err) {
    what.textContent = `No evidence for event ${eventId}: ${err.detail ?? err.message}`;
    return;
  }
  if (current !== eventId) return;
  setHTML(what, html`<b title="${e.channel}">${chTitle(e.channel)}</b> · ${e.rule} · ${e.from_state} → <b>${e.to_state}</b> at ${fmtDateTime(e.t_ns)} · value ${fmtVal(e.value)} / level ${fmtVal(e.level)} ${unitLabel(e.unit || "")}${e.message ? html`<br><span class="hint">${e.message}</span>` : ""}`);
  const s = ev.spectrum;
  if (s?.values) {
    plot.setData({ f0: s.f0_hz, df: s.df_hz, values: Float32Array.from(s.values, (v) => v ?? NaN), unit: s.unit, amplitude: s.amplitude, t_ns: s.t_ns ?? e.t_ns, label: "then (at the event)" });
    plot.resetView(false);
    const ch = store.channels.find((c) => c.id === e.channel);
    plot.setMarkers({ speedHz: (ch?.speed_rpm || 0) / 60, bearing: [] });
    const refresh = async () => {
      try {
        const now = await getJSON(`${API}/channels/${encodeURIComponent(e.channel)}/spectrum${qs({ unit: s.unit, amplitude: s.amplitude, profile: e.profile || s.profile })}`);
        if (current === eventId) plot.setOverlay({ f0: now.f0_hz, df: now.df_hz, values: Float32Array.from(now.values, (v) => v ?? NaN), label: "now" });
      } catch {
        /* the live one is optional */
      }
    };
    refresh();
    clearInterval(timer);
    timer = setInterval(refresh, 2000);
  }
  const wf = ev.waveform;
  waveData = null;
  if (wf?.samples?.length) {
    waveData = { fs: wf.fs, t0_ns: wf.t0_ns, samples: Float32Array.from(wf.samples, (v) => v ?? NaN), unit: wf.unit || "", event_ns: e.t_ns };
    document.getElementById("ev-wave-fig").hidden = false;
    wave.invalidate();
  }
  const base = `${API}/events/${encodeURIComponent(eventId)}/evidence`;
  const link = (q, label) => html`<a href="${base}?${q}" download data-auth>${label}</a>`;
  setHTML(document.getElementById("ev-downloads"), html`Download: waveform ${link("format=wav", "WAV")} · ${link("format=csv&part=waveform", "CSV")} · ${link("format=npy&part=waveform", "NPY")} — spectrum then ${link("format=csv&part=spectrum", "CSV")} · ${link("format=npy&part=spectrum", "NPY")}`);
}

function drawWave(ctx, w, h) {
  const d = waveData;
  const L = 58, R = w - 14, T = 8, B = h - 22;
  const box = { L, R, T, B };
  if (!d) {
    ctx.fillStyle = pal.panel;
    ctx.fillRect(0, 0, w, h);
    return;
  }
  plotArea(ctx, w, h, box);
  const n = d.samples.length;
  const dur = n / d.fs;
  const t0 = (d.t0_ns - d.event_ns) / 1e9;
  let mx = 0;
  for (const v of d.samples) if (Math.abs(v) > mx) mx = Math.abs(v);
  mx = mx || 1;
  const xs = new Scale(false).set(t0, t0 + dur, L, R);
  const ys = new Scale(false).set(-mx * 1.05, mx * 1.05, B, T);
  const xt = linTicks(t0, t0 + dur, 8);
  gridX(ctx, xs, xt, box, (t) => (t === 0 ? pal.ink : pal.grid));
  labelsX(ctx, xs, xt, box, (t) => `${t > 0 ? "+" : ""}${+t.toFixed(3)} s`, { dy: 4 });
  // min/max per pixel column
  const W = Math.floor(R - L);
  ctx.strokeStyle = pal.trace;
  ctx.beginPath();
  for (let p = 0; p < W; p++) {
    const a = Math.floor((p / W) * n), b = Math.max(a + 1, Math.floor(((p + 1) / W) * n));
    let lo = Infinity, hi = -Infinity;
    for (let k = a; k < b && k < n; k++) {
      const v = d.samples[k];
      if (v < lo) lo = v;
      if (v > hi) hi = v;
    }
    ctx.moveTo(L + p + 0.5, ys.px(hi));
    ctx.lineTo(L + p + 0.5, ys.px(lo) + 0.5);
  }
  ctx.stroke();
  border(ctx, box);
  ctx.fillStyle = pal["ink-3"];
  ctx.textAlign = "right";
  ctx.textBaseline = "middle";
  ctx.fillText(fmtVal(mx), L - 6, ys.px(mx));
  ctx.fillText(fmtVal(-mx), L - 6, ys.px(-mx));
  ctx.textAlign = "left";
  ctx.textBaseline = "top";
  ctx.fillText(`${d.unit} · ${fmtVal(d.fs, 5)} samples/s · 0 s = the event`, L + 4, T + 2);
}
