// The "line filter" dialog: one spectrum line's band-pass response for the window, in dB
// against offset in lines and Hz, from the service's /windows route. Knows no view or live data.

import { API, getJSON, qs } from "./api.js";
import { fmtHz, fmtVal } from "./fmt.js";
import { html, setHTML } from "./dom.js";
import { Scale, Surface, border, gridX, gridY, labelsY, linTicks, pal, plateText, plotArea } from "./plot.js";

let cur = null; // {window, n, df, q, f, enbw_bins}
let data = null; // {offset_bins, gain_db, figs, enbw, span}
let surface = null;

export function setupFilter() {
  surface = new Surface(document.getElementById("flt-plot"), draw);
  document.getElementById("flt-span").addEventListener("change", () => cur && load());
}

/** Open the dialog for one line: {window, n, df, q, f, enbw_bins}. */
export function openFilter(args) {
  cur = args;
  const dlg = document.getElementById("dlg-filter");
  document.getElementById("flt-title").textContent = `Line filter — line ${args.q} at ${fmtHz(args.f)}`;
  document.getElementById("flt-what").textContent =
    `Each line of the spectrum is the output of a band-pass filter: the ${args.window} window's transform centred on the line. ` +
    `A sine ν lines away from the centre reads the gain below on this line (leakage). N = ${args.n} samples, Δf = ${fmtHz(args.df)}.`;
  dlg.showModal();
  load();
}

/** One line's response for `window` over ±`span` lines (GET /windows/{window}/response):
 *  {offset_bins, gain_db} as Float64Arrays and the service's figures (enbw_bins,
 *  scalloping_loss_db, highest_sidelobe_db). Throws ApiError for a window it does not know. */
export async function lineResponse(window, n, span, pointsPerLine) {
  const j = await getJSON(`${API}/windows/${encodeURIComponent(window)}/response${qs({ n, span_bins: span, points_per_bin: pointsPerLine })}`);
  return { ...j, offset_bins: Float64Array.from(j.offset_bins), gain_db: Float64Array.from(j.gain_db, (v) => v ?? -300) };
}

async function load() {
  const span = Number(document.getElementById("flt-span").value);
  const { window: win, n } = cur;
  let r;
  try {
    r = await lineResponse(win, n, span, span <= 8 ? 32 : 16);
  } catch (e) {
    document.getElementById("flt-source").textContent = `no response from the service: ${e.detail ?? e.message}`;
    return;
  }
  // Widths are read off the plotted grid; the service gives the rest exactly.
  const figs = { ...widths(r.offset_bins, r.gain_db), scallop: r.scalloping_loss_db, sidelobe: r.highest_sidelobe_db };
  const enbw = r.enbw_bins;
  data = { ...r, figs, enbw, span };
  document.getElementById("flt-source").textContent = "response from the service";
  const f = [
    ["window", `${win}, N = ${n}`],
    ["ENBW", `${fmtVal(enbw)} lines = ${fmtHz(enbw * cur.df)}`],
    ["−3 dB width", `${fmtVal(figs.bw3)} lines = ${fmtHz(figs.bw3 * cur.df)}`],
    ["−6 dB width", `${fmtVal(figs.bw6)} lines`],
    ["scalloping loss", `${fmtVal(figs.scallop)} dB (a sine half a line off centre)`],
    ["highest sidelobe", Number.isFinite(figs.sidelobe) ? `${figs.sidelobe.toFixed(1)} dB` : "beyond the span"],
    ["passband of this line", `${fmtHz(cur.f - (figs.bw3 * cur.df) / 2)} … ${fmtHz(cur.f + (figs.bw3 * cur.df) / 2)} (−3 dB)`],
  ];
  setHTML(document.getElementById("flt-facts"), f.map(([k, v]) => html`<div><dt>${k}</dt><dd>${v}</dd></div>`));
  surface.invalidate();
}

/** −3 dB and −6 dB full widths (lines) of a response sampled symmetrically about 0. */
function widths(offset, db) {
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
  return { bw3: width(-3.0103), bw6: width(-6.0206) };
}

function draw(ctx, w, h) {
  const L = 52, R = w - 14, T = 26, B = h - 30;
  const box = { L, R, T, B };
  if (!data) {
    ctx.fillStyle = pal.panel;
    ctx.fillRect(0, 0, w, h);
    return;
  }
  plotArea(ctx, w, h, box);
  const { offset_bins: o, gain_db: g, span, figs } = data;
  let floor = -40;
  for (const v of g) if (v > -200) floor = Math.min(floor, v);
  floor = Math.max(-160, Math.floor(floor / 20) * 20);
  const xs = new Scale(false).set(-span, span, L, R);
  const ys = new Scale(false).set(floor, 5, B, T);
  // neighbouring line centres
  const centres = [];
  for (let k = -span; k <= span; k++) centres.push(k);
  gridX(ctx, xs, centres, box, (k) => (k === 0 ? pal.axis : pal.grid));
  const yt = linTicks(floor, 0, Math.floor((B - T) / 34));
  gridY(ctx, ys, yt, box);
  labelsY(ctx, ys, yt, box, (v) => `${v}`);
  ctx.textAlign = "center";
  ctx.textBaseline = "top";
  const every = span <= 8 ? 1 : span <= 16 ? 2 : 4;
  for (let k = -span; k <= span; k += every) {
    ctx.fillStyle = pal["ink-2"];
    ctx.fillText(`${k > 0 ? "+" : ""}${k}`, xs.px(k), B + 4);
    ctx.fillStyle = pal["ink-3"];
    ctx.textBaseline = "bottom";
    if (k % (every * 2) === 0 && Math.abs(k) < span) ctx.fillText(fmtHz(cur.f + k * cur.df, false), xs.px(k), T - 4);
    ctx.textBaseline = "top";
  }
  // ENBW: the rectangle of equal noise power
  ctx.fillStyle = pal.region;
  ctx.fillRect(xs.px(-data.enbw / 2), ys.px(0), xs.px(data.enbw / 2) - xs.px(-data.enbw / 2), B - ys.px(0));
  // −3 dB level and highest sidelobe
  for (const [lvl, dash, label] of [[-3.0103, [4, 3], "−3 dB"], [figs.sidelobe, [2, 3], `sidelobe ${figs.sidelobe.toFixed(1)} dB`]]) {
    if (!Number.isFinite(lvl) || lvl < floor) continue;
    const y = ys.px(lvl);
    ctx.strokeStyle = pal.mark;
    ctx.setLineDash(dash);
    ctx.beginPath();
    ctx.moveTo(L, y);
    ctx.lineTo(R, y);
    ctx.stroke();
    ctx.setLineDash([]);
    ctx.font = `10.5px ${pal.font}`;
    plateText(ctx, label, R - 4, y, { align: "right", fg: pal.mark, bg: pal.plot, pad: 2 });
  }
  // the response
  ctx.save();
  ctx.beginPath();
  ctx.rect(L, T, R - L, B - T);
  ctx.clip();
  ctx.strokeStyle = pal.trace;
  ctx.lineWidth = 1.4;
  ctx.beginPath();
  for (let i = 0; i < o.length; i++) {
    const y = ys.px(Math.max(g[i], floor - 10));
    if (i) ctx.lineTo(xs.px(o[i]), y);
    else ctx.moveTo(xs.px(o[i]), y);
  }
  ctx.stroke();
  ctx.restore();
  border(ctx, box);
  ctx.font = `11px ${pal.font}`;
  ctx.fillStyle = pal["ink-3"];
  ctx.textAlign = "left";
  ctx.textBaseline = "bottom";
  ctx.fillText("dB", 6, T - 4);
  ctx.textAlign = "right";
  ctx.fillText("Hz", R, T - 4);
  ctx.textBaseline = "bottom";
  ctx.fillText("offset from the line centre, lines   (shaded: ENBW)", R, h - 1);
}
