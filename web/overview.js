// The plant view: the plant at a glance first (a tile per machine, most severe first, with
// filters), then the machines' channel cards (drawn only on screen); alarms and events beside.
// Wires the shared state to tiles.js and cards.js; no plot code.

import { API, getJSON } from "./api.js";
import { html, setHTML, updateHTML } from "./dom.js";
import { sharedTops } from "./sparkline.js";
import { onNextFrame } from "./plot.js";
import { alarmListHtml, eventItemHtml } from "./alarms.js";
import { machineName } from "./names.js";
import { openAckAll } from "./shelve.js";
import { app, groupByMachine, live, store } from "./shared.js";
import { bySeverity, counts, machineSummaries, matches } from "./plantsum.js";
import { Tiles } from "./tiles.js";
import { Cards } from "./cards.js";

// The stream brings every channel's status and overall once a second in one `overall` message
// (the tiles, values and sparklines), every alarm event, and the bands of the cards on screen
// only (their bars), at 1 per second; the subscription follows the scrolling.
const BANDS_RATE_HZ = 1;
const SUB_MAX_CHANNELS = 150; // more cards on screen than this (a subscription is ≤ 4 KiB): all
const SUB_DELAY_MS = 250; // scrolling settles before the subscription changes
// the tiles and the summary line are recomputed at most this often: a little under the
// `overall` message's second, so its jitter does not cost a frame of its own
const SUMMARY_MS = 800;
// A bands message does not ask for a frame of its own: the cards on screen are refreshed with
// the next `overall` message (once a second, with the tiles and the sidebar), or after CARDS_MS
// without one, so the page paints about once a second instead of once per message; and never
// more often than every CARDS_MIN_MS, however fast messages come.
const CARDS_MS = 1000;
const CARDS_MIN_MS = 500;
const FILTER_STATES = [["", "all states"], ["abnormal", "needs attention"], ["danger", "danger"], ["alert", "alert"], ["latched", "latched"], ["quality", "data not ok"], ["normal", "normal"]];

export function mount(root) {
  setHTML(root, html`
    <div class="ov" id="ov">
      <div>
        <div class="ov-bar" id="ov-bar">
          <div class="ch-head"><h1>Plant</h1><span class="hint" id="ov-sum"></span></div>
          <div class="ov-filters" role="search">
            <span class="ov-counts" id="ov-counts"></span>
            <label>State <select id="ov-state">${FILTER_STATES.map(([v, t]) => html`<option value="${v}">${t}</option>`)}</select></label>
            <label>Group <select id="ov-group"><option value="">all groups</option></select></label>
            <input type="search" id="ov-q" placeholder="machine or channel…" aria-label="search machines and channels" spellcheck="false">
          </div>
        </div>
        <div id="ov-machines">
          <div class="tiles" id="ov-tiles" aria-label="machines, most severe first"></div>
          <p class="hint" id="ov-none" hidden>No machine matches the filters.</p>
          <h2 class="ov-detail">Channels by machine</h2>
          <div id="ov-cards"></div>
        </div>
      </div>
      <aside id="ov-side">
        <section class="panel" id="ov-alarms" hidden><header>Active and latched alarms</header><ul class="alarms" id="ov-alarm-list"></ul></section>
        <section class="panel" id="ov-events" hidden><header>Recent events <a class="hint" href="#/events">full log</a></header><ul class="evlist" id="ov-event-rows"></ul></section>
      </aside>
    </div>`);
  const $ = (id) => document.getElementById(id);
  const filters = { state: "", group: "", q: "" };
  let tops = new Map(); // unit → the shared sparkline scale of channels without a danger level
  let ids = "";
  let groups = "";
  let disposed = false;
  let summaries = [];
  let frame = null; // cancels the pending frame's work (plot.js onNextFrame), or null
  let summaryDue = true;
  let summaryAt = 0;
  let summaryTimer = 0;
  let cardsTimer = 0;
  let cardsAt = -Infinity;
  const cards = new Cards($("ov-cards"), () => tops);
  let subKey = "";
  let subTimer = 0;
  /** Take the bands of the cards on screen (or nearly), every channel's overall and alarms. */
  function subscribeShown() {
    subTimer = 0;
    if (disposed) return;
    const ids = [...cards.visible].map((e) => e.id).sort();
    const sub = { channels: ids.length > SUB_MAX_CHANNELS ? "*" : ids, kinds: ["bands", "alarms", "overall"], every_alarm: true, max_rate_hz: BANDS_RATE_HZ };
    const key = JSON.stringify(sub);
    if (key === subKey) return;
    subKey = key;
    live.subscribe(sub);
  }
  cards.onShow = () => {
    schedule(false);
    if (!subTimer) subTimer = setTimeout(subscribeShown, SUB_DELAY_MS);
  };
  const tiles = new Tiles($("ov-tiles"), (mid) => {
    const sec = document.getElementById(`m-${mid}`);
    if (sec) {
      sec.hidden = false;
      sec.scrollIntoView({ block: "start" });
      sec.querySelector(".card")?.focus({ preventScroll: true });
    }
  });

  subscribeShown();

  /** Ask for one animation frame; `summary`: the tiles need recomputing too. */
  function schedule(summary) {
    if (summary) summaryDue = true;
    if (!frame && !disposed) frame = onNextFrame(render);
  }

  function render() {
    frame = null;
    if (disposed) return; // a late event or answer after the view was left
    const chans = store.channels;
    // the machines are shown in severity order from the start, never in id order first
    if (!store.alarmsKnown) return;
    const key = chans.map((c) => c.id).join(",");
    if (key !== ids) {
      ids = key;
      cards.build(groupByMachine(chans));
      summaryDue = true;
    }
    const now = performance.now();
    if (summaryDue && now - summaryAt >= SUMMARY_MS) {
      summaryDue = false;
      summaryAt = now;
      summarize(chans);
    } else if (summaryDue && !summaryTimer) {
      summaryTimer = setTimeout(() => {
        summaryTimer = 0;
        schedule(false);
      }, SUMMARY_MS - (now - summaryAt));
    }
    if (now - cardsAt >= CARDS_MIN_MS) {
      cardsAt = now;
      clearTimeout(cardsTimer);
      cardsTimer = 0;
      cards.refresh(now);
    } else if (!cardsTimer) {
      cardsTimer = setTimeout(() => {
        cardsTimer = 0;
        schedule(false);
      }, CARDS_MIN_MS - (now - cardsAt));
    }
  }

  function summarize(chans) {
    summaries = bySeverity(machineSummaries(chans));
    tiles.update(summaries, filters);
    const byId = new Map(summaries.map((m) => [m.id, m]));
    const unacked = new Map();
    for (const a of store.alarms || []) {
      if (a.acked) continue;
      const mid = store.byId.get(a.channel)?.machine;
      if (mid) unacked.set(mid, (unacked.get(mid) || 0) + 1);
    }
    // the detail sections follow the tiles' severity order (not their value order: steadier)
    const order = summaries.map((m) => m.id);
    cards.arrange(order, (id) => matches(byId.get(id) ?? { sev: "normal", group: "", search: id }, filters), byId, unacked);
    const shown = summaries.filter((m) => matches(m, filters)).length;
    $("ov-none").hidden = shown > 0 || !summaries.length;
    const n = counts(summaries);
    updateHTML($("ov-counts"), [["danger", "danger"], ["alert", "alert"], ["latched", "latched"], ["quality", "data not ok"]]
      .filter(([k]) => n[k]).map(([k, word]) => html`<button type="button" class="quiet count-${k}" data-filter="${k}">${n[k]} ${word}</button>`));
    const gs = [...new Set(summaries.map((m) => m.group).filter(Boolean))].sort();
    if (gs.join(",") !== groups) {
      groups = gs.join(",");
      setHTML($("ov-group"), html`<option value="">all groups</option>${gs.map((g) => html`<option value="${g}">${g}</option>`)}`);
      $("ov-group").value = gs.includes(filters.group) ? filters.group : "";
    }
    tops = sharedTops(chans.map((c) => ({ id: c.id, unit: c.latest?.unit || "" })), (id) => store.hist.get(id)?.max() ?? 0);
    const nAbn = summaries.length - n.normal;
    $("ov-sum").textContent = chans.length
      ? `${chans.length} channels on ${summaries.length} machine${summaries.length > 1 ? "s" : ""} · ${nAbn ? `${nAbn} need${nAbn > 1 ? "" : "s"} attention` : "all normal"}${shown < summaries.length ? ` · ${shown} shown` : ""}`
      : "waiting for the service…";
  }

  function renderAlarms() {
    const al = store.alarms;
    $("ov-alarms").hidden = al === null;
    if (al !== null) updateHTML($("ov-alarm-list"), alarmListHtml(al));
  }

  let lastEvents = null;
  /** The recent events, named with the machines' and channels' names as /channels gives them. */
  function renderEvents() {
    const tb = $("ov-event-rows");
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
      $("ov-events").hidden = false;
    } catch {
      /* keep what is shown */
    } finally {
      evBusy = false;
    }
    if (!disposed) renderAlarms();
  }

  const on = {
    channels: () => {
      schedule(true);
      renderEvents(); // the names may have come after the events
    },
    alarms: () => {
      renderAlarms();
      schedule(true);
    },
    bands: () => {
      if (!cardsTimer) {
        cardsTimer = setTimeout(() => {
          cardsTimer = 0;
          schedule(false);
        }, CARDS_MS);
      }
    },
    conn: () => schedule(true),
    "alarm-event": () => loadEvents(),
  };
  const click = (e) => {
    const b = e.target.closest("[data-ack-machine]");
    if (b) {
      const mid = b.dataset.ackMachine;
      openAckAll({ machine: mid }, `every unacknowledged alarm of ${machineName(mid)} (${mid})`);
      return;
    }
    const f = e.target.closest("[data-filter]");
    if (f) {
      filters.state = $("ov-state").value = filters.state === f.dataset.filter ? "" : f.dataset.filter;
      refilter();
    }
  };
  function refilter() {
    summaryAt = 0; // at once, not at the next second
    schedule(true);
  }
  const onInput = () => {
    filters.state = $("ov-state").value;
    filters.group = $("ov-group").value;
    filters.q = $("ov-q").value;
    refilter();
  };
  root.addEventListener("click", click);
  root.addEventListener("input", onInput);
  for (const [k, f] of Object.entries(on)) app.addEventListener(k, f);
  schedule(true);
  renderAlarms();
  loadEvents();
  return {
    unmount() {
      disposed = true;
      frame?.(); // cancel the pending frame's work
      clearTimeout(summaryTimer);
      clearTimeout(subTimer);
      clearTimeout(cardsTimer);
      root.removeEventListener("click", click);
      root.removeEventListener("input", onInput);
      for (const [k, f] of Object.entries(on)) app.removeEventListener(k, f);
      tiles.dispose();
      cards.dispose();
    },
    probe: {
      /** Machine ids in the tiles' order, the shown ones only. */
      tiles: () => summaries.filter((m) => matches(m, filters)).map((m) => m.id),
      visibleCards: () => [...cards.visible].map((e) => e.id),
      filters: () => ({ ...filters }),
    },
  };
}
