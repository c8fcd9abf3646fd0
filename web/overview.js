// The plant view: channels by machine with state (word + shape), overall, history, main bands;
// alarms and events beside. Reads the shell's state and the events/trend routes; no plot code.

import { API, getJSON, qs } from "./api.js";
import { fmtClock, fmtHz, fmtVal, unitLabel } from "./fmt.js";
import { STATES, STATUS_TO_STATE, isLive } from "./states.js";
import { badge, glyph, html, join, setHTML, updateHTML } from "./dom.js";
import { BandBars, bandRows, topBands } from "./bars.js";
import { Spark, SPARK_MS, overallLimits, sharedTops } from "./sparkline.js";
import { alarmListHtml, eventItemHtml, ruleProfile } from "./alarms.js";
import { chName, machineLabel, machineName } from "./names.js";
import { openAckAll } from "./shelve.js";
import { alarmsFor, app, channelState, fetchWatched, FRAME, groupByMachine, history, live, seedHistory, store } from "./shared.js";

export function mount(root) {
  setHTML(root, html`
    <div class="ov" id="ov">
      <div>
        <div class="ch-head"><h1>Plant</h1><span class="hint" id="ov-sum"></span></div>
        <div id="ov-machines"></div>
      </div>
      <aside id="ov-side">
        <section class="panel" id="ov-alarms" hidden><header>Active and latched alarms</header><ul class="alarms" id="ov-alarm-list"></ul></section>
        <section class="panel" id="ov-events" hidden><header>Recent events <a class="hint" href="#/events">full log</a></header><ul class="evlist" id="ov-event-rows"></ul></section>
      </aside>
    </div>`);
  const cards = new Map(); // channel → {el, bars, spark, ...}
  let tops = new Map(); // unit → the shared sparkline scale of channels without a danger level
  let ids = "";
  let disposed = false;

  live.subscribe({ channels: "*", kinds: ["bands", "status", "alarms"], max_rate_hz: 1 });

  function build() {
    const m = document.getElementById("ov-machines");
    for (const c of cards.values()) {
      c.bars.surface.dispose();
      c.spark.surface.dispose();
    }
    cards.clear();
    const parts = [];
    for (const [machine, chans] of groupByMachine(store.channels)) {
      parts.push(html`<section class="machine" data-machine="${machine}"><h2><span class="mglyph"></span>${machineLabel(machine)} <span class="count">${chans.length} channel${chans.length > 1 ? "s" : ""}</span><span class="mack"></span></h2><div class="cards">`);
      for (const c of chans) {
        parts.push(html`<a class="card" href="#/channel/${encodeURIComponent(c.id)}" data-channel="${c.id}" data-state="unknown">
          <div class="row1"><span class="id" title="${c.id}">${chName(c.id)}</span><span class="st"></span></div>
          ${chName(c.id) !== c.id ? html`<div class="cid">${c.id}</div>` : ""}
          <div class="desc" title="${c.description}">${c.description || ""}</div>
          <div class="headline"><span class="overall" data-role="overall">—</span><span class="unit"></span><span class="what"></span></div>
          <canvas class="spark" aria-hidden="true"></canvas>
          <canvas class="minibars" aria-hidden="true"></canvas>
          <div class="note"></div>
        </a>`);
      }
      parts.push(html`</div></section>`);
    }
    setHTML(m, parts);
    for (const el of m.querySelectorAll(".card")) {
      const id = el.dataset.channel;
      const entry = {
        el, id, stateKey: "", bars: new BandBars(el.querySelector(".minibars"), { compact: true }),
        overall: el.querySelector(".overall"), unit: el.querySelector(".unit"), what: el.querySelector(".what"),
        st: el.querySelector(".st"), note: el.querySelector(".note"),
      };
      entry.spark = new Spark(el.querySelector(".spark"), () => {
        const unit = store.channels.find((c) => c.id === id)?.latest?.unit || "";
        return { pts: history(id, FRAME), limits: overallLimits(id), sharedTop: tops.get(unit), unit, stale: store.conn === "reconnecting" };
      });
      cards.set(id, entry);
    }
  }

  /** Fill the sparklines with the stored last ten minutes. */
  async function seedSparks() {
    for (const c of store.channels) {
      if (disposed || !c.latest) continue;
      const until = c.latest.timestamp_ns / 1e9;
      try {
        const j = await getJSON(`${API}/channels/${encodeURIComponent(c.id)}/trend${qs({ name: "overall", since: until - SPARK_MS / 1000, until, step: 10 })}`);
        seedHistory(c.id, FRAME, (j.points || []).map((p) => [p.t_ns / 1e6, p.mean]));
        if (disposed) return;
        cards.get(c.id)?.spark.surface.invalidate();
      } catch {
        return; // unreachable or failing: the sparklines fill from the live values
      }
    }
  }

  function update() {
    if (disposed) return; // a late event or answer after the view was left
    const chans = store.channels;
    const key = chans.map((c) => c.id).join(",");
    if (key !== ids) {
      ids = key;
      build();
      seedSparks();
    }
    const stale = store.conn === "reconnecting";
    tops = sharedTops(chans.map((c) => ({ id: c.id, unit: c.latest?.unit || "", pts: history(c.id, FRAME) })));
    let nAbn = 0;
    for (const c of chans) {
      const e = cards.get(c.id);
      if (!e) continue;
      const k = channelState(c);
      if (STATES[k].rank >= STATES.latched.rank) nAbn++;
      if (k !== e.stateKey) {
        e.stateKey = k;
        e.el.dataset.state = k;
        setHTML(e.st, badge(k));
      }
      const L = c.latest;
      e.overall.textContent = L ? fmtVal(L.overall) : "—";
      if (L) {
        e.overall.dataset.seq = L.seq;
        e.overall.dataset.value = L.overall;
      }
      e.unit.textContent = L ? unitLabel(L.unit, "rms") : "";
      e.what.textContent = !L || L.overall_lo_hz == null ? "overall" // the band comes with a frame
        : `overall ${fmtHz(L.overall_lo_hz)}–${fmtHz(L.overall_hi_hz)}`;
      const liveValues = isLive(c.status);
      e.el.classList.toggle("stale", stale || !liveValues);
      e.el.dataset.live = liveValues ? "yes" : "no";
      const notes = [];
      if (!liveValues) {
        // never a bare healthy number: say what the channel is, since when, and how old the value is
        const since = c.status_since_ns ? ` since ${fmtClock(c.status_since_ns)}` : "";
        const old = L ? ` · value from ${fmtClock(L.timestamp_ns)}` : "";
        notes.push(html`<span class="notlive">${STATES[k].word}${since}${old}</span>`);
      }
      if (c.fault) notes.push(html`${glyph(STATUS_TO_STATE[c.status] || "fault", 12)} ${c.fault}`);
      const al = alarmsFor(c.id).filter((a) => a.state !== "normal" || a.latched);
      if (al.length) notes.push(al.map((a) => `${a.kind === "overall" ? "overall" : a.name}${ruleProfile(a) ? ` (${ruleProfile(a)})` : ""} ${a.state}${a.acked ? " (ack)" : ""}`).join(", "));
      updateHTML(e.note, join(notes, " · "));
      const { named } = bandRows(c.id, store.bands.get(c.id));
      const top = topBands(named, 3);
      fetchWatched(c.id, top); // values of bars watched on another profile
      e.bars.setStale(stale);
      e.bars.setRows(top, store.bands.get(c.id)?.unit || "");
      e.spark.surface.invalidate();
    }
    for (const sec of document.querySelectorAll(".machine")) {
      let worst = "ok";
      for (const card of sec.querySelectorAll(".card")) {
        const k = card.dataset.state;
        if ((STATES[k]?.rank ?? -1) > STATES[worst].rank) worst = k;
      }
      // acknowledge-all of this machine's unacknowledged alarms (POST /alarms/ack {machine})
      const mid = sec.dataset.machine;
      const n = (store.alarms || []).filter((a) => !a.acked && store.channels.find((c) => c.id === a.channel)?.machine === mid).length;
      updateHTML(sec.querySelector(".mack"), n ? html`<button class="small" data-ack-machine="${mid}">Acknowledge all (${n})</button>` : "");
      const g = sec.querySelector(".mglyph");
      updateHTML(g, html`<span class="${STATES[worst].cls}" title="worst state: ${STATES[worst].word}">${glyph(worst)}</span>`);
    }
    const machines = groupByMachine(chans).size;
    document.getElementById("ov-sum").textContent = chans.length
      ? `${chans.length} channels on ${machines} machine${machines > 1 ? "s" : ""} · ${nAbn ? `${nAbn} need${nAbn > 1 ? "" : "s"} attention` : "all normal"}`
      : "waiting for the service…";
  }

  function renderAlarms() {
    const al = store.alarms;
    const box = document.getElementById("ov-alarms");
    box.hidden = al === null;
    if (al !== null) {
      updateHTML(document.getElementById("ov-alarm-list"), alarmListHtml(al));
    }
  }

  let lastEvents = null;
  /** The recent events, named with the machines' and channels' names as /channels gives them. */
  function renderEvents() {
    const tb = document.getElementById("ov-event-rows");
    if (tb && lastEvents) updateHTML(tb, lastEvents.length ? lastEvents.map((ev) => eventItemHtml(ev)) : html`<li class="empty">No events yet.</li>`);
  }

  let evBusy = false;
  async function loadEvents() {
    if (evBusy || disposed) return;
    evBusy = true;
    try {
      const j = await getJSON(`${API}/events?limit=12`);
      if (disposed) return; // the view was left while the answer was on its way
      lastEvents = j.events || [];
      renderEvents();
      document.getElementById("ov-events").hidden = false;
    } catch {
      /* keep what is shown */
    } finally {
      evBusy = false;
    }
    if (!disposed) renderAlarms();
  }

  const on = {
    channels: () => {
      update();
      renderEvents(); // the names may have come after the events
    },
    alarms: () => {
      renderAlarms();
      update();
    },
    bands: () => {
      if (!pendingBands) {
        pendingBands = requestAnimationFrame(() => {
          pendingBands = 0;
          if (!disposed) update();
        });
      }
    },
    conn: () => update(),
    tick: (() => {
      let n = 0;
      return () => {
        if (n++ % 5 === 0) loadEvents();
      };
    })(),
    "alarm-event": () => loadEvents(),
  };
  let pendingBands = 0; // the animation frame that will update the cards, or 0
  const machineAck = (e) => {
    const b = e.target.closest("[data-ack-machine]");
    if (!b) return;
    const mid = b.dataset.ackMachine;
    openAckAll({ machine: mid }, `every unacknowledged alarm of ${machineName(mid)} (${mid})`);
  };
  root.addEventListener("click", machineAck);
  for (const [k, f] of Object.entries(on)) app.addEventListener(k, f);
  update();
  renderAlarms();
  loadEvents();
  return {
    unmount() {
      disposed = true;
      cancelAnimationFrame(pendingBands);
      root.removeEventListener("click", machineAck);
      for (const [k, f] of Object.entries(on)) app.removeEventListener(k, f);
      for (const c of cards.values()) {
        c.bars.surface.dispose();
        c.spark.surface.dispose();
      }
    },
  };
}
