// One channel in depth, for one of its analysis profiles: live spectrum, spectrogram, band
// bars, tones and peaks, trend, and this channel's alarms and events. Gets data from the
// shell's events; draws through the plots.

import { API, ApiError, getJSON, qs } from "./api.js";
import { mountWave } from "./waveform.js"; // the waveform panel (console)
import { defectMarkers, mountKurtogram } from "./kurtogram.js"; // envelope profiles
import { watchName } from "./names.js";
import { AMP_CHOICES, UNIT_CHOICES, ampLabel, fmtClock, fmtHz, fmtHzAt, fmtHzExact, fmtVal, unitLabel } from "./fmt.js";
import { badge, html, setHTML, updateHTML } from "./dom.js";
import { SpectrumPlot } from "./spectrum.js";
import { LISTED_PEAKS } from "./spectrumlabels.js";
import { Spectrogram } from "./spectrogram.js";
import { mountHistory } from "./history.js";
import { mountRunupPanel } from "./runup.js"; // run-up records of a channel fed by a tacho
import { BandBars, ThirdsChart, bandRows } from "./bars.js";
import { TrendChart } from "./trend.js";
import { alarmListHtml, eventItemHtml } from "./alarms.js";
import { openFilter } from "./filterview.js";
import { fetchLast, notLiveNote } from "./lastvalues.js";
import { speedHtml, speedOf } from "./speed.js"; // the running speed line
import { alarmsFor, app, bandsOf, channelState, fetchWatched, FRAME, levels, live, profileKey, store, tonesOf } from "./shared.js";

const BEARING = /^(bpfo|bpfi|bsf|ftf)/i;
const RANGES = { hour: 3600e3, day: 86400e3, month: 30 * 86400e3 };
const STALE_AFTER_MS = 5000;
const TREND_STEPS_S = [10, 60, 300, 600, 1800, 3600, 7200, 21600, 86400];
// An order spectrum is of acceleration only (its unit selector offers no velocity or displacement).
const ORDER_UNITS = ["g", "m/s2"];

/** The hash of a channel's view: `#/channel/<id>`, or `…?profile=<name>` off its primary profile. */
export function channelHash(id, profile = "") {
  return `#/channel/${encodeURIComponent(id)}${profile ? `?profile=${encodeURIComponent(profile)}` : ""}`;
}

/**
 * Mount the channel view of channel `id` in `root`. `profile`: the analysis profile to show
 * ("" = the channel's primary one). Returns {unmount(), probe} (probe: what is on screen).
 */
export function mount(root, id, { profile = "" } = {}) {
  const chan = () => store.channels.find((c) => c.id === id);
  const prefs = JSON.parse(localStorage.getItem("quaver.view") || "{}");
  const st = {
    unit: "", amplitude: "", hold: false, meta: null, lastSpec: 0, lastT: 0, range: prefs.range || "hour",
    trendName: FRAME, tones: null,
    profile, // "" = the primary profile; else the name of the one shown
    fresh: true, // the next spectrum starts a new frequency axis
    profileNote: "",
  };
  // The channel's analysis profiles (primary first) as /channels describes them; [] when the
  // service has none. `cur` is the name of the one shown (null while unknown).
  const profiles = () => chan()?.profiles ?? [];
  const primaryName = () => profiles()[0]?.name ?? live.profiles?.[id]?.[0] ?? null;
  const cur = () => st.profile || primaryName();
  const curProfile = () => profiles().find((p) => p.name === cur()) ?? null;
  // A message is this view's when it is of this channel and of the profile shown (a service
  // without profiles sends none: take it).
  const mine = (m) => m.channel === id && (m.profile === undefined || cur() === null || m.profile === cur());
  /** The running speed now (null without one): the newest of /channels' and the frame's the
   *  bands shown were placed at. */
  const speedNow = () => {
    const sp = speedOf(chan());
    const b = st.bands;
    return b?.speed && (b.timestamp_ns ?? 0) >= (sp?.t_ns ?? 0)
      ? { ...(sp || {}), ...b.speed, t_ns: b.timestamp_ns } : sp;
  };
  /** 1X in Hz for the markers and orders: the speed now, else the configured one, else 0. */
  const speedHz = () => (speedNow()?.rpm || chan()?.speed_rpm || 0) / 60;
  setHTML(root, html`
    <div class="ch-head">
      <h1 id="ch-id">${id}</h1><span class="ch-name" id="ch-name"></span><span class="desc" id="ch-desc"></span><span id="ch-badge"></span><span class="hint" id="ch-fault"></span>
      <div class="big"><span class="overall" id="ch-overall" data-role="overall">—</span><span class="unit" id="ch-unit"></span></div>
    </div>
    <div class="speedline" id="ch-speed"></div>
    <dl class="facts" id="ch-facts"></dl>
    <p class="lastnote" id="ch-lastnote" role="status" hidden></p>
    <div class="toolbar profile-pick" id="profile-pick" hidden>
      <span class="lbl" id="profile-lbl" title="the channel's analysis profiles: each has its own Fmax, lines and bands; everything below follows the one chosen">Analysis profile</span>
      <span class="seg" role="group" aria-labelledby="profile-lbl" id="seg-profile"></span>
      <span class="hint">spectrum, bands, tones and trend below are the chosen profile's; the other views show the primary one</span>
    </div>
    <div class="toolbar" role="toolbar" aria-label="spectrum display">
      <label>Unit <select id="sel-unit"><option value="">as analysed</option>${UNIT_CHOICES.map((u) => html`<option value="${u}">${unitLabel(u)}</option>`)}</select></label>
      <label>Amplitude <select id="sel-amp"><option value="">as analysed</option>${AMP_CHOICES.map((a) => html`<option value="${a}">${ampLabel(a)}</option>`)}</select></label>
      <span class="seg" role="group" aria-label="amplitude scale"><button data-ya="lin">lin</button><button data-ya="log">log</button></span>
      <span class="seg" role="group" aria-label="frequency scale"><button data-xa="lin">lin Hz</button><button data-xa="log">log Hz</button></span>
      <span class="toggles">
        <label title="band regions with their alert and danger levels (key B)"><input type="checkbox" data-show="bands" checked>bands</label>
        <label title="running-speed harmonics 1X, 2X, … (key H)"><input type="checkbox" data-show="harmonics" checked>1X…</label>
        <label title="bearing defect frequencies from tones named bpfo/bpfi/bsf/ftf (key D)"><input type="checkbox" data-show="bearing" checked>bearing</label>
        <label title="largest peaks labelled (key P)"><input type="checkbox" data-show="peaks" checked>peaks</label>
      </span>
      <button id="btn-reset" title="show the whole spectrum (key 0, or double-click)">Whole range</button>
      <button id="btn-hold" aria-pressed="false" title="freeze the spectrum and spectrogram (key Space)">Hold</button>
      <button id="btn-filter" title="the band-pass filter that one line of this spectrum is">Line filter…</button>
    </div>
    <div class="ch-grid">
      <div>
        <figure class="panel"><figcaption>Spectrum <span class="hint">wheel: zoom · drag: pan · shift+wheel or ↑↓: amplitude · ← →, + −, 0 · L/F: log · click: pick a line</span><span class="readout" id="readout"></span></figcaption>
          <canvas id="spec" class="plot-spec" tabindex="0" aria-label="averaged spectrum of ${id}; use the arrow keys, plus and minus to move and zoom"></canvas>
          <p class="spec-cap" id="spec-cap" aria-live="polite"></p></figure>
        <figure class="panel" id="kg-panel" hidden></figure>
        <figure class="panel"><figcaption>Spectrogram <span class="hint">newest at the top; same frequency axis as above</span></figcaption><canvas id="sgram" class="plot-sgram"></canvas></figure>
        <figure class="panel" id="hist-panel"></figure>
        <figure class="panel"><figcaption>Trend
            <select id="sel-trend" aria-label="value to trend"></select>
            <span class="seg" role="group" aria-label="period">${Object.keys(RANGES).map((r) => html`<button data-range="${r}">${r === "month" ? "30 days" : `1 ${r}`}</button>`)}</span>
            <span class="hint" id="trend-note"></span></figcaption>
          <canvas id="trend" class="plot-trend"></canvas></figure>
        <figure class="panel" id="wave-panel"></figure>
        <figure class="panel" id="runup-panel" hidden></figure>
      </div>
      <div>
        <section class="panel" id="bands-panel"><header>Bands <span class="hint" id="bands-unit"></span></header><canvas id="bars" class="plot-bars"></canvas>
          <header id="thirds-head">Third-octave bands</header><canvas id="thirds" class="plot-thirds"></canvas></section>
        <section class="panel" id="ch-alarms-panel" hidden><header>Alarms on this channel</header><ul class="alarms" id="ch-alarms"></ul></section>
        <section class="panel" id="tones-panel"><header>Tones and peaks <span class="hint" id="tones-unit"></span></header><table class="tones" id="tones"></table></section>
        <section class="panel" id="ch-events-panel"><header>Events <a class="hint" href="#/events?channel=${encodeURIComponent(id)}">full log</a></header>
          <ul class="evlist" id="ch-events"></ul></section>
      </div>
    </div>`);

  const $ = (s) => root.querySelector(s);
  const isEnvelope = () => curProfile()?.kind === "envelope";
  /** An order profile: its x values are orders (x_unit "order"), 1X is order 1. */
  const isOrder = () => curProfile()?.x_unit === "order";
  /** Where 1X sits on the shown x axis: order 1 in an order spectrum, else the speed in Hz. */
  const oneX = () => (isOrder() ? 1 : speedHz());
  const kgPanel = mountKurtogram($("#kg-panel"), id, { profile: () => cur(), active: isEnvelope });
  const runups = mountRunupPanel($("#runup-panel"), id);
  const extras = [mountWave($("#wave-panel"), id), watchName($("#ch-name"), id, app), kgPanel, runups]; // console
  const readout = $("#readout");
  const specCanvas = $("#spec");
  const sg = new Spectrogram($("#sgram"), { rows: 200, xUnit: () => plot.xUnit });
  const plot = new SpectrumPlot($("#spec"), {
    onView: (v) => sg.setView(v),
    onHover: (info) => {
      const df = st.meta?.df_hz ?? plot.data?.df ?? 1;
      setText(readout, info
        ? (isOrder()
          ? `order ${info.f.toFixed(Math.min(3, (String(df).split(".")[1] || "").length))} (line ${info.q}) · ${fmtVal(info.v)} ${unitLabel(info.unit, info.amplitude)}`
          : `${fmtHzAt(info.f, df)} (line ${info.q}) · ${info.order !== null ? `${info.order.toFixed(2)}X · ` : ""}${fmtVal(info.v)} ${unitLabel(info.unit, info.amplitude)}`)
        : "");
    },
    onPick: ({ q, f }) => {
      readout.textContent = `picked line ${q} at ${isOrder() ? `order ${+f.toFixed(3)}` : fmtHz(f)} — “Line filter…” shows its response`;
    },
    onKey: (e) => key(e),
  });
  const hist = mountHistory($("#hist-panel"), { id, plot, sg, view: () => ({ unit: st.unit, amplitude: st.amplitude, profile: st.profile, xUnit: plot.xUnit }) });
  plot.logAmp = prefs.logAmp ?? true;
  plot.logFreq = prefs.logFreq ?? false;
  for (const k of Object.keys(plot.show)) if (prefs[`show_${k}`] === false) plot.show[k] = false;
  const bars = new BandBars($("#bars"));
  const thirds = new ThirdsChart($("#thirds"));
  const trend = new TrendChart($("#trend"));

  function savePrefs() {
    const p = { logAmp: plot.logAmp, logFreq: plot.logFreq, range: st.range };
    for (const [k, v] of Object.entries(plot.show)) p[`show_${k}`] = v;
    localStorage.setItem("quaver.view", JSON.stringify(p));
  }

  function syncToolbar() {
    for (const b of root.querySelectorAll("[data-ya]")) b.setAttribute("aria-pressed", String((b.dataset.ya === "log") === plot.logAmp));
    for (const b of root.querySelectorAll("[data-xa]")) b.setAttribute("aria-pressed", String((b.dataset.xa === "log") === plot.logFreq));
    for (const i of root.querySelectorAll("[data-show]")) i.checked = plot.show[i.dataset.show];
    for (const b of root.querySelectorAll("[data-range]")) b.setAttribute("aria-pressed", String(b.dataset.range === st.range));
    $("#btn-hold").setAttribute("aria-pressed", String(st.hold));
    $("#btn-hold").textContent = st.hold ? "Held — resume" : "Hold";
  }

  function subscribe() {
    const p = cur();
    live.subscribe({ channels: [id], kinds: ["spectrum", "bands", "tones", "status", "alarms"], max_rate_hz: 10, unit: st.unit || undefined, amplitude: st.amplitude || undefined, profiles: p ? [p] : undefined });
  }

  // --- analysis profiles ------------------------------------------------------------------
  /** Show profile `name` ("" or the primary's name: the primary one); keeps it in the URL. */
  function setProfile(name) {
    const p = name && name !== primaryName() ? name : "";
    if (p === st.profile) return;
    st.profile = p;
    window.history.replaceState(null, "", channelHash(id, p));
    syncUnitChoices();
    // Everything drawn belongs to the old profile: start again from its latest messages.
    st.meta = null;
    st.lastSpec = 0;
    st.tones = null;
    st.bands = null;
    st.hold = false;
    st.fresh = true;
    plot.data = null;
    plot.view = null;
    plot.selected = null;
    plot.top = null;
    plot.setBands([]);
    plot.setServerPeaks(null);
    plot.setXUnit(curProfile()?.x_unit);
    plot.setMarkers({ speedHz: oneX(), bearing: [] });
    sg.clear();
    hist.reload();
    kgPanel.refresh();
    for (const k of ["seq", "profile", "f0Hz", "dfHz"]) delete specCanvas.dataset[k];
    bars.setRows([], "");
    thirds.setRows([], "");
    toneKey = "";
    setHTML($("#tones"), "");
    readout.textContent = "";
    bandsAt = tonesAt = 0;
    trendNames = "";
    const have = curProfile()?.bands;
    if (st.trendName !== FRAME && have && !have.includes(st.trendName)) {
      st.trendName = FRAME;
      trendChosen = false;
    }
    syncToolbar();
    renderProfiles();
    renderHead();
    subscribe();
    loadMeta();
    loadLast();
    loadTrend();
    const b = bandsOf(id, cur());
    if (b && mine(b)) onBands(b, true);
    const t = tonesOf(id, cur());
    if (t && mine(t)) onTones(t, true);
  }

  let profBtnKey = "";
  /** The profile buttons (only when the channel has more than one) and the URL's choice checked. */
  function renderProfiles() {
    const list = profiles();
    if (list.length && st.profile) {
      if (st.profile === primaryName()) {
        st.profile = ""; // the primary one is the default: keep the URL plain
        window.history.replaceState(null, "", channelHash(id));
      } else if (!list.some((p) => p.name === st.profile)) {
        st.profileNote = `no profile “${st.profile}” on this channel; showing ${primaryName()}`;
        setProfile("");
        return;
      }
    }
    const pick = $("#profile-pick");
    pick.hidden = list.length < 2;
    const key = list.map((p) => `${p.name}:${profileSummary(p)}`).join("|");
    const seg = $("#seg-profile");
    if (key !== profBtnKey) {
      profBtnKey = key;
      setHTML(seg, list.map((p) => html`<button data-profile="${p.name}" title="${profileSummary(p)}">${p.name}</button>`));
    }
    for (const b of seg.querySelectorAll("[data-profile]")) b.setAttribute("aria-pressed", String(b.dataset.profile === cur()));
    if (syncUnitChoices()) setUnit(""); // the profile list came after a velocity unit was chosen
    renderCaption();
  }

  /** Under the spectrum: what the profile shown analyses (Fmax, lines, Δf, decimation). */
  function renderCaption() {
    const P = curProfile();
    const m = st.meta;
    const fmax = P?.fmax_hz ?? m?.fmax_hz;
    const df = P?.df_hz ?? m?.df_hz;
    const lines = P?.lines ?? m?.lines;
    const el = $("#spec-cap");
    if (fmax === undefined || df === undefined) {
      setText(el, st.profileNote);
      return;
    }
    const parts = [];
    if (P && profiles().length > 1) parts.push(`${P.name} profile${P.primary ? " (primary)" : ""}`);
    const R = P?.decimation ?? 1;
    if (isOrder()) {
      // an order spectrum: orders of the tacho's speed, resampled at constant shaft angle
      parts.push(`orders to ${+fmax.toPrecision(4)}×`, `${lines} lines`, `Δ ${+df.toPrecision(3)} order`);
      if (P?.revs_per_frame) parts.push(`${+P.revs_per_frame.toPrecision(3)} revolutions per transform`);
      if (P?.speed_from) parts.push(`angle from ${P.speed_from}`);
      if (P?.speed_band_pct) parts.push(`averages within ±${P.speed_band_pct} % speed`);
    } else {
      parts.push(`Fmax ${fmtHzExact(fmax)}`, `${lines} lines`, `Δf ${fmtHzExact(df)}`);
      if (P?.frame_s) parts.push(`${+P.frame_s.toPrecision(3)} s per transform`);
      if (R > 1) parts.push(`decimated ×${R} (analysed at ${fmtHzExact(P.sample_rate_hz)})`);
    }
    if (P?.fmax_asked_hz && Math.abs(P.fmax_asked_hz - fmax) > 1e-9 * fmax) parts.push(`${fmtHzExact(P.fmax_asked_hz)} asked`);
    setText(el, parts.join(" · ") + (st.profileNote ? ` — ${st.profileNote}` : ""));
    el.dataset.profile = P?.name ?? "";
    el.dataset.fmaxHz = fmax;
    el.dataset.dfHz = df;
    el.dataset.lines = lines;
    el.dataset.decimation = R;
    el.dataset.xUnit = P?.x_unit ?? "Hz";
  }

  function key(e) {
    const k = e.key.toLowerCase();
    const toggles = { b: "bands", h: "harmonics", d: "bearing", p: "peaks" };
    if (k === "l") plot.setLogAmp(!plot.logAmp);
    else if (k === "f") plot.setLogFreq(!plot.logFreq);
    else if (toggles[k]) plot.setShow(toggles[k], !plot.show[toggles[k]]);
    else if (k === " ") setHold(!st.hold);
    else return;
    e.preventDefault();
    savePrefs();
    syncToolbar();
  }

  function setHold(h) {
    st.hold = h;
    syncToolbar();
    staleCheck();
  }

  // --- toolbar wiring ---------------------------------------------------------------
  $("#sel-unit").addEventListener("change", (e) => setUnit(e.target.value));
  function setUnit(u) {
    st.unit = u;
    sg.clear();
    hist.reload();
    plot.top = null;
    subscribe();
    loadMeta();
  }
  /** An order spectrum is of acceleration only: its profile offers no velocity or displacement
   *  unit, and one chosen on another profile falls back to the profile's own. True when the
   *  unit was changed so. */
  function syncUnitChoices() {
    const order = isOrder();
    const sel = $("#sel-unit");
    for (const o of sel.options) if (o.value) o.hidden = o.disabled = order && !ORDER_UNITS.includes(o.value);
    if (!order || !st.unit || ORDER_UNITS.includes(st.unit)) return false;
    sel.value = "";
    st.unit = "";
    return true;
  }
  $("#sel-amp").addEventListener("change", (e) => {
    st.amplitude = e.target.value;
    sg.clear();
    hist.reload();
    subscribe();
    loadMeta();
  });
  $("#seg-profile").addEventListener("click", (e) => {
    const b = e.target.closest("button[data-profile]");
    if (!b) return;
    st.profileNote = "";
    setProfile(b.dataset.profile);
  });
  root.querySelector('[role="toolbar"]').addEventListener("click", (e) => {
    const b = e.target.closest("button");
    if (!b) return;
    if (b.dataset.ya) plot.setLogAmp(b.dataset.ya === "log");
    if (b.dataset.xa) plot.setLogFreq(b.dataset.xa === "log");
    savePrefs();
    syncToolbar();
  });
  root.querySelector('[role="toolbar"]').addEventListener("change", (e) => {
    const s = e.target.dataset.show;
    if (s) {
      plot.setShow(s, e.target.checked);
      savePrefs();
    }
  });
  $("#btn-reset").addEventListener("click", () => plot.resetView());
  $("#btn-hold").addEventListener("click", () => setHold(!st.hold));
  $("#btn-filter").addEventListener("click", () => {
    const m = st.meta;
    const c = chan();
    if (!m || !c) return;
    const q = plot.selected ?? plot.peaks?.[0]?.q ?? Math.round(m.lines / 2);
    const n = m.n ?? curProfile()?.n ?? Math.round((m.sample_rate_hz ?? c.sample_rate_hz) / m.df_hz);
    openFilter({ window: m.window, n, df: m.df_hz, q, f: m.f0_hz + q * m.df_hz, enbw_bins: m.enbw_bins, channel: id });
  });
  root.querySelector("#sel-trend").addEventListener("change", (e) => {
    st.trendName = e.target.value;
    trendChosen = true;
    loadTrend();
  });
  for (const b of root.querySelectorAll("[data-range]")) {
    b.addEventListener("click", () => {
      st.range = b.dataset.range;
      savePrefs();
      syncToolbar();
      loadTrend();
    });
  }

  // --- data ---------------------------------------------------------------------------
  /** Bands and tones from REST until the stream brings any: a channel whose data stopped
   *  still shows its last values (marked not live by renderLive). */
  async function loadLast() {
    const asked = st.profile;
    const { bands, tones } = await fetchLast(id, asked);
    if (!alive || asked !== st.profile) return; // the view or the profile changed meanwhile
    if (bands && !st.bands && mine(bands)) onBands(bands, true);
    if (tones && !st.tones && mine(tones)) onTones(tones, true);
    renderLive();
  }

  /** A channel that is not live: its state and since when above the values, which are
   *  greyed (bands, tones, peaks and the spectrum keep their last values). */
  function renderLive() {
    const last = st.tones?.timestamp_ns ?? st.bands?.timestamp_ns ?? st.lastT;
    const note = notLiveNote(chan(), last);
    const el = $("#ch-lastnote");
    el.hidden = !note;
    setText(el, note);
    for (const p of ["#bands-panel", "#tones-panel"]) $(p).classList.toggle("notlive", !!note);
    return note;
  }

  async function loadMeta() {
    const asked = st.profile;
    const again = () => setTimeout(() => alive && asked === st.profile && loadMeta(), 1000);
    try {
      const j = await getJSON(`${API}/channels/${encodeURIComponent(id)}/spectrum${qs({ unit: st.unit, amplitude: st.amplitude, profile: asked })}`);
      if (!alive || asked !== st.profile) return; // the view or the profile changed meanwhile
      const { values, ...meta } = j;
      if (!mine(meta)) return again(); // not the profile's yet (its name was still unknown)
      st.meta = meta;
      if (!st.lastSpec) onSpectrum({ header: { ...meta, kind: "spectrum" }, values: Float32Array.from(values, (v) => v ?? NaN) });
      renderFacts();
      renderCaption();
    } catch (e) {
      if (!alive || asked !== st.profile) return;
      if (e instanceof ApiError && e.status === 503) again();
      else if (e instanceof ApiError && e.status === 404 && asked && /profile/i.test(e.detail)) {
        st.profileNote = e.detail; // e.g. an old link naming a profile this channel no longer runs
        setProfile("");
      }
    }
  }

  function onSpectrum({ header: h, values }) {
    if (!mine(h)) return;
    st.lastSpec = Date.now();
    st.lastT = h.timestamp_ns;
    if (st.hold) return;
    const d = { f0: h.f0_hz, df: h.df_hz, values, unit: h.unit, amplitude: h.amplitude, t_ns: h.timestamp_ns, lowcut_hz: st.meta?.lowcut_hz, seq: h.seq, profile: h.profile ?? "" };
    plot.setXUnit(h.x_unit);
    plot.setData(d);
    // which frame is on screen, of which profile, on which lines (for people and tests)
    specCanvas.dataset.seq = h.seq;
    specCanvas.dataset.profile = h.profile ?? "";
    specCanvas.dataset.f0Hz = h.f0_hz;
    specCanvas.dataset.dfHz = h.df_hz;
    specCanvas.dataset.xUnit = h.x_unit ?? "Hz";
    sg.push(d);
    hist.onSpectrum(d);
    if (st.fresh || !plot.view) {
      st.fresh = false;
      plot.resetView(); // a new axis: the whole range, and the spectrogram follows
    }
    if (sg.view === null) plot._viewChanged();
    staleCheck();
  }

  // Text and bars change at the stream's rate (up to 10/s); people read them at ~2/s, and
  // every DOM change costs layout and paint. Spectra stay at full rate; these are throttled.
  const TEXT_PERIOD_MS = 500;
  let bandsAt = 0, tonesAt = 0;

  function onBands(m, force = false) {
    if (!mine(m)) return;
    st.bands = m;
    const { named, thirds: th } = bandRows(id, m);
    fetchWatched(id, named); // values of bars watched on another profile
    plot.setBands(named);
    const now = performance.now();
    if (!force && now - bandsAt < TEXT_PERIOD_MS / 2) return;
    bandsAt = now;
    bars.setRows(named, m.unit);
    thirds.setRows(th, m.unit);
    renderSpeed();
    $("#thirds-head").hidden = $("#thirds").hidden = !th.length; // e.g. a narrow profile has none
    setText($("#bands-unit"), `${unitLabel(m.unit, "rms")} · ticks: alert and danger levels`);
    fillTrendNames(named);
  }

  let toneKey = "";
  function onTones(m, force = false) {
    if (!mine(m)) return;
    st.tones = m;
    const f1 = oneX();
    // an envelope spectrum marks the defect frequencies, harmonics and BPFI's ±1X sidebands
    const bearing = isEnvelope() ? defectMarkers(m.tones, f1)
      : (m.tones || []).filter((t) => BEARING.test(t.name)).map((t) => ({ name: t.name, f: t.frequency_hz }));
    plot.setMarkers({ speedHz: f1, bearing });
    const now = performance.now();
    if (!force && now - tonesAt < TEXT_PERIOD_MS) return;
    tonesAt = now;
    plot.setServerPeaks(m); // with the table: a peak's label and its row show the same numbers
    const sp = oneX();
    const ord = (f) => (sp > 0 && Number.isFinite(f) && f / sp < 100 ? `${(f / sp).toFixed(2)}X` : "");
    const tones = m.tones || [];
    const peaks = (m.peaks || []).slice(0, LISTED_PEAKS);
    const shape = tones.map((t) => t.name).join("|") + `/${peaks.length}`;
    const table = $("#tones");
    if (shape !== toneKey) {
      // the table's shape changed: build it once, then only its cells' text changes
      toneKey = shape;
      const row = (name) => html`<tr><td>${name}</td><td></td><td></td><td></td></tr>`;
      setHTML(table, html`<tr><th>name</th><th>frequency</th><th>order</th><th>amplitude</th></tr>${tones.map((t) => row(t.name))}${
        peaks.length ? html`<tr class="sep"><td colspan="4">largest peaks</td></tr>` : ""}${peaks.map(() => row(""))}`);
    }
    const rows = table.querySelectorAll("tr:not(.sep)");
    [...tones.map((t) => [t.frequency_hz, t.amplitude]), ...peaks.map((p) => [p.frequency_hz, p.amplitude])].forEach(([f, a], i) => {
      const c = rows[i + 1]?.cells;
      if (!c) return;
      // an order spectrum's x values are orders: the frequency is at the speed now
      setText(c[1], isOrder() ? (speedHz() > 0 ? fmtHz(f * speedHz()) : "—") : fmtHz(f));
      setText(c[2], ord(f));
      setText(c[3], fmtVal(a));
    });
    setText($("#tones-unit"), unitLabel(m.unit, m.amplitude));
  }

  function renderHead() {
    const c = chan();
    const u0 = c?.latest?.unit;
    const opt = $("#sel-unit").options[0];
    if (u0 && opt.textContent !== `${unitLabel(u0)} (channel)`) opt.textContent = `${unitLabel(u0)} (channel)`;
    if (!c) {
      setText($("#ch-desc"), store.channels.length ? "no such channel" : "");
      return;
    }
    setText($("#ch-desc"), c.description || "");
    const k = channelState(c);
    updateHTML($("#ch-badge"), badge(k));
    setText($("#ch-fault"), c.fault || "");
    const P = curProfile();
    const L = P && !P.primary ? P.latest : c.latest; // the overall of the profile shown
    const o = $("#ch-overall");
    setText(o, L ? fmtVal(L.overall) : "—");
    if (L) {
      o.dataset.seq = L.seq;
      o.dataset.value = L.overall;
    }
    // One overall per channel and profile, always named with the band it covers.
    setText($("#ch-unit"), L ? `${unitLabel(L.unit, "rms")} overall ${overallBand(L)}${P && !P.primary ? ` (${P.name})` : ""}` : "");
    renderProfiles();
    renderFacts();
    renderSpeed();
  }

  function renderSpeed() {
    updateHTML($("#ch-speed"), speedHtml(speedNow()));
  }

  /** "10–1000 Hz": the band an overall covers, from a frame summary or bands message. */
  function overallBand(m) {
    if (m?.x_unit === "order" && m.overall_lo_hz != null && m.overall_hi_hz != null) {
      return `orders ${+m.overall_lo_hz.toPrecision(3)}–${+m.overall_hi_hz.toPrecision(3)}`;
    }
    return m?.overall_lo_hz != null && m?.overall_hi_hz != null
      ? `${fmtHz(m.overall_lo_hz)}–${fmtHz(m.overall_hi_hz)}` : "";
  }

  function renderFacts() {
    const c = chan();
    const m = st.meta;
    const f = [];
    const rpm = speedHz() * 60;
    if (rpm > 0) f.push(["speed", `${fmtVal(rpm, 4)} r/min · 1X ${fmtHz(rpm / 60)}`]);
    if (m && isOrder()) {
      f.push(["lines", `${m.lines} · orders to ${+m.fmax_hz.toPrecision(4)}× · Δ ${+m.df_hz.toPrecision(3)} order`]);
      f.push(["window", `${m.window} · ENBW ${fmtVal(m.enbw_bins)} lines`]);
      f.push(["averaging", `${m.averaging ?? ""} ${m.averages}`]);
    } else if (m) {
      f.push(["lines", `${m.lines} · Fmax ${fmtHzExact(m.fmax_hz)} · Δf ${fmtHzExact(m.df_hz)}`]);
      f.push(["window", `${m.window} · ENBW ${fmtVal(m.enbw_bins)} lines`]);
      f.push(["averaging", `${m.averaging ?? ""} ${m.averages}`]);
      const L = curProfile()?.primary === false ? bandsOf(id, cur()) : c?.latest;
      f.push(["overall band", L?.overall_lo_hz != null
        ? `${fmtHz(L.overall_lo_hz)}–${fmtHz(L.overall_hi_hz)}`
        : `${fmtHz(m.lowcut_hz)}–${fmtHz(m.fmax_hz)}`]);
    }
    if (c) f.push(["sample rate", `${fmtVal(c.sample_rate_hz, 5)} Hz`]);
    if (c) f.push(["status", c.status]);
    f.push(["updated", st.lastT ? fmtClock(st.lastT) : "—"]);
    updateHTML($("#ch-facts"), f.map(([k, v]) => html`<div><dt>${k}</dt><dd>${v}</dd></div>`));
  }

  function staleCheck() {
    let s = "";
    if (store.conn === "reconnecting") s = `no contact since ${fmtClock(store.downSince * 1e6)}`;
    else if (st.hold) s = `held at ${fmtClock(st.lastT)}`;
    else if (st.lastSpec && Date.now() - st.lastSpec > STALE_AFTER_MS) s = `no new spectrum for ${Math.round((Date.now() - st.lastSpec) / 1000)} s`;
    const note = renderLive();
    if (note && !st.hold) s = note;
    plot.setStale(s);
    bars.setStale(store.conn === "reconnecting" || !!note);
  }

  function renderAlarms() {
    const al = store.alarms;
    $("#ch-alarms-panel").hidden = al === null;
    if (al === null) return;
    updateHTML($("#ch-alarms"), alarmListHtml(alarmsFor(id), { showChannel: false }));
  }

  let evBusy = false;
  async function loadEvents() {
    if (evBusy || !alive) return;
    evBusy = true;
    try {
      const j = await getJSON(`${API}/events${qs({ channel: id, limit: 10 })}`);
      if (!alive) return;
      st.events = j.events || [];
      const tb = $("#ch-events");
      if (tb) updateHTML(tb, st.events.length ? st.events.map((ev) => eventItemHtml(ev, { showChannel: false })) : html`<li class="empty">No events on this channel.</li>`);
    } catch {
      /* keep */
    } finally {
      evBusy = false;
    }
  }

  // --- trend --------------------------------------------------------------------------
  let trendNames = "";
  let trendChosen = false;
  function fillTrendNames(named) {
    if (!trendChosen) {
      // Until someone picks, show what most likely matters: the worst band with alarm levels.
      const ranked = named.filter((b) => b.danger > 0).sort((a, b) => rankOf(b.state) - rankOf(a.state));
      if (ranked.length && ranked[0].name !== st.trendName) {
        st.trendName = ranked[0].name;
        trendNames = "";
        trendAt = 0; // load it on the next tick
      }
    }
    const names = named.map((b) => b.name);
    const band = overallBand(st.bands);
    const joined = `${band}|${names.join("|")}`;
    if (joined === trendNames) return;
    trendNames = joined;
    const sel = $("#sel-trend");
    setHTML(sel, html`<option value="${FRAME}">overall ${band}</option>${names.map((n) => html`<option value="${n}"${n === st.trendName ? html` selected` : ""}>${n} band</option>`)}`);
    sel.value = st.trendName;
  }

  let trendBusy = false;
  let trendAt = 0;
  let trendAgain = false;
  async function loadTrend() {
    if (!alive) return;
    if (trendBusy) {
      trendAgain = true; // a choice changed meanwhile: load once more when this one ends
      return;
    }
    trendBusy = true;
    trendAt = Date.now();
    try {
      await loadTrendNow();
    } finally {
      trendBusy = false;
    }
    if (trendAgain) {
      trendAgain = false;
      loadTrend();
    }
  }

  async function loadTrendNow() {
    const asked = st.profile;
    const prof = cur();
    const span = RANGES[st.range];
    const nowMs = st.lastT ? st.lastT / 1e6 : Date.now();
    const isFrame = st.trendName === FRAME;
    const rule = isFrame ? levels(id, "overall", "overall", prof) : levels(id, "band", st.trendName, prof);
    const unit = bandsOf(id, prof)?.unit || curProfile()?.unit || chan()?.latest?.unit || "";
    // rule ids name a profile other than the primary one (README, HTTP API)
    const head = profileKey(id, prof) ? `${id}.${profileKey(id, prof)}` : id;
    const ruleId = isFrame ? `${head}.overall` : `${head}.band.${slug(st.trendName)}`;
    let evList = st.events || [];
    try {
      evList = (await getJSON(`${API}/events${qs({ channel: id, since: Math.round((nowMs - span) * 1e6), limit: 500 })}`)).events || [];
    } catch {
      /* markers are a bonus */
    }
    const evs = evList.filter((e) => e.kind === "transition" && e.rule === ruleId)
      .map((e) => ({ t_ms: e.t_ns / 1e6, state: e.to_state, text: `${e.from_state} → ${e.to_state} at ${fmtVal(e.value)}` }));
    const base = { range: [nowMs - span, nowMs], unit, alert: rule?.alert, danger: rule?.danger, events: evs };
    const name = isFrame ? "overall" : `band:${st.trendName}`;
    // about 600 points or fewer, on steps a store keeping 10 s / 1 min / 1 h buckets can give
    const stepS = TREND_STEPS_S.find((x) => (span / 1000) / x <= 600) ?? 86400;
    const url = (step) => `${API}/channels/${encodeURIComponent(id)}/trend${qs({ name, since: (nowMs - span) / 1000, until: nowMs / 1000, step, profile: asked })}`;
    try {
      let j;
      try {
        j = await getJSON(url(stepS));
      } catch (e) {
        if (!(e instanceof ApiError) || e.status === 404) throw e;
        j = await getJSON(url(null)); // the service did not like the step: let it choose
      }
      if (!alive || asked !== st.profile) return; // the view or profile changed; loadTrend runs again
      const pts = (j.points || []).map((p) => ({ t_ms: p.t_ns / 1e6, mean: p.mean, min: p.min, max: p.max }));
      trend.set({ ...base, points: pts });
      $("#trend-note").textContent = `stored history, ${fmtStep(j.step_s ?? stepS)} steps`;
    } catch (e) {
      if (!alive || asked !== st.profile) return;
      if (e instanceof ApiError && e.status === 404) {
        trend.set({ ...base, points: [] });
        $("#trend-note").textContent = "nothing stored under this name yet";
      } // else unreachable or failing: keep what is drawn
    }
  }

  // --- events from the app ----------------------------------------------------------
  const on = {
    spectrum: (e) => onSpectrum(e.detail),
    bands: (e) => onBands(e.detail),
    tones: (e) => onTones(e.detail),
    channels: () => {
      renderHead();
      if (st.tones) onTones(st.tones, true);
    },
    alarms: () => {
      renderAlarms();
      renderHead();
      const m = bandsOf(id, cur());
      if (m) onBands(m, true);
    },
    conn: () => {
      staleCheck();
      if (store.conn !== "reconnecting" && !st.meta) loadMeta();
    },
    "alarm-event": () => loadEvents(),
    tick: () => {
      staleCheck();
      renderFacts();
      if (Date.now() - trendAt > 15000) loadTrend();
      if (!live.wsOpen && !(tickN++ % 5)) loadEvents(); // pushed while the stream is up
    },
  };
  let tickN = 0;
  let alive = true; // false once unmounted: late answers are dropped
  for (const [k, f] of Object.entries(on)) app.addEventListener(k, f);
  syncToolbar();
  subscribe();
  loadMeta();
  renderHead();
  renderAlarms();
  renderProfiles();
  const m0 = bandsOf(id, cur());
  if (m0) onBands(m0);
  const t0 = tonesOf(id, cur());
  if (t0) onTones(t0);
  loadLast();
  loadEvents().then(loadTrend);
  return {
    /** What is on screen, for people in devtools and for the tests (window.quaver.view). */
    probe: {
      profile: () => cur(),
      spectrum: () => {
        const d = plot.data;
        return d && { seq: d.seq, profile: d.profile, f0_hz: d.f0, df_hz: d.df, unit: d.unit, amplitude: d.amplitude, values: Array.from(d.values) };
      },
      view: () => plot.view && { ...plot.view },
      bands: () => st.bands && { profile: st.bands.profile, names: (st.bands.bands || []).map((b) => b.name) },
      history: () => hist.probe(),
      kurtogram: () => kgPanel.probe(),
      markers: () => plot.bearing.map((b) => ({ ...b })), // bearing / defect markers drawn
      bars: () => bars.rows.map((r) => ({ name: r.name, value: r.value, alert: r.alert, danger: r.danger, state: r.state, via: r.via })),
      labels: () => plot.labels.map((l) => ({ ...l })), // every text drawn on the spectrum, with its box
      axis: () => ({ unit: plot.xUnit, ticks: [...(plot.xTicks || [])] }), // the x axis drawn
      xPx: (v) => plot.xs?.px(v) ?? null, // where x value v (Hz or order) is drawn, CSS px
      notLive: () => $("#ch-lastnote").hidden ? "" : $("#ch-lastnote").textContent,
      speed: () => speedNow(), // the running speed shown ({rpm, source, status, …} or null)
      runups: () => runups.probe(), // ids of the run-up records listed
    },
    unmount() {
      alive = false;
      for (const [k, f] of Object.entries(on)) app.removeEventListener(k, f);
      plot.surface.dispose();
      sg.surface.dispose();
      hist.dispose();
      bars.surface.dispose();
      thirds.surface.dispose();
      trend.surface.dispose();
      for (const x of extras) x.dispose();
    },
  };
}

/** One profile in a line (a button's tooltip): "Fmax 500 Hz · 1600 lines · Δf 0.3125 Hz · decimated ×10". */
function profileSummary(p) {
  if (p.fmax_hz === undefined) return `${p.name}: no spectrum yet`;
  if (p.x_unit === "order") return `orders to ${+p.fmax_hz.toPrecision(4)}× · ${p.lines} lines · Δ ${+p.df_hz.toPrecision(3)} order · angle from ${p.speed_from}`;
  return `Fmax ${fmtHzExact(p.fmax_hz)} · ${p.lines} lines · Δf ${fmtHzExact(p.df_hz)}${p.decimation > 1 ? ` · decimated ×${p.decimation}` : ""}`;
}

function rankOf(state) {
  return { danger: 3, alert: 2, latched: 1 }[state] ?? 0;
}

/** Set text only when it differs (an unchanged DOM costs nothing to lay out). */
function setText(el, text) {
  if (el && el.textContent !== text) el.textContent = text;
}

function fmtStep(s) {
  return s >= 3600 ? `${s / 3600} h` : s >= 60 ? `${s / 60} min` : `${s} s`;
}

function slug(name) {
  return name.toLowerCase().replace(/[^a-z0-9._-]+/g, "-").replace(/^-+|-+$/g, "") || "x";
}
