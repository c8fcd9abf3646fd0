// The alarms-and-events view: active/latched alarms with acknowledgement, and the event log
// (newest first, paged, by channel). No plotting; alarm markup comes from alarms.js.

import { API, getJSON, qs } from "./api.js";
import { html, setHTML, updateHTML } from "./dom.js";
import { alarmListHtml, eventHeadHtml, eventRowHtml } from "./alarms.js";
import { app, live, store } from "./shared.js";
import { openAckAll, shelvedPanel } from "./shelve.js";
import { chTitle } from "./names.js";

export function mount(root) {
  const params = new URLSearchParams(location.hash.split("?")[1] || "");
  let channel = params.get("channel") || "";
  setHTML(root, html`
    <div class="ch-head"><h1>Alarms and events</h1></div>
    <section class="panel" id="ev-alarms-panel"><header>Active and latched alarms <span id="ev-ackall"></span></header><ul class="alarms" id="ev-alarms"></ul></section>
    <section class="panel" id="ev-shelved-panel"></section>
    <section class="panel" id="ev-log-panel"><header>Event log
        <label class="hint">channel <select id="ev-channel"><option value="">all</option></select></label>
        <span class="hint" id="ev-count"></span></header>
      <table class="events"><thead>${eventHeadHtml()}</thead><tbody id="ev-rows"></tbody></table>
      <div class="pager"><button id="ev-older" hidden>Older events</button><span class="hint" id="ev-state"></span></div>
    </section>`);
  const $ = (s) => root.querySelector(s);
  const unackedActive = () => (store.alarms || []).filter((a) => !a.acked).map((a) => a.rule);
  const shelved = shelvedPanel($("#ev-shelved-panel"), unackedActive);
  $("#ev-alarms-panel").addEventListener("click", (e) => {
    if (!e.target.closest("[data-ackall-active]")) return;
    const ids = unackedActive();
    openAckAll({ rules: ids }, `${ids.length} active alarm${ids.length === 1 ? "" : "s"} not yet acknowledged`);
  });
  let events = [];
  let nextBefore = null;
  let busy = false;

  live.subscribe({ channels: "*", kinds: ["status", "alarms"], max_rate_hz: 1 });

  function renderAlarms() {
    const al = store.alarms;
    $("#ev-alarms-panel").hidden = al === null;
    if (al === null) return;
    updateHTML($("#ev-alarms"), alarmListHtml(al));
    updateHTML($("#ev-ackall"), shelved.ackAllButton()); // shelve.js: acknowledge-all of this list
  }

  function fillChannels() {
    const sel = $("#ev-channel");
    const ids = store.channels.map((c) => c.id);
    if (sel.dataset.ids === ids.join(",")) return;
    sel.dataset.ids = ids.join(",");
    setHTML(sel, html`<option value="">all</option>${ids.map((i) => html`<option value="${i}">${chTitle(i)}</option>`)}`);
    sel.value = channel;
  }

  function renderEvents() {
    setHTML($("#ev-rows"), events.length ? events.map((e) => eventRowHtml(e)) : html`<tr><td colspan="7" class="empty">No events${channel ? ` on ${channel}` : ""}.</td></tr>`);
    $("#ev-older").hidden = nextBefore === null || nextBefore === undefined;
    $("#ev-count").textContent = `${events.length} shown`;
  }

  /** Newest page (refresh) or the next older page (`older`). */
  async function load(older = false) {
    if (busy) return;
    busy = true;
    try {
      const j = await getJSON(`${API}/events${qs({ channel, limit: 50, before_id: older ? nextBefore : null })}`);
      if (!root.querySelector("#ev-state")) return; // the view was left while this loaded
      const page = j.events || [];
      if (older) events = events.concat(page);
      else {
        // keep older pages already loaded; merge the newest page in front
        const seen = new Set(page.map((e) => e.id));
        events = page.concat(events.filter((e) => !seen.has(e.id) && e.id < (page[page.length - 1]?.id ?? Infinity)));
      }
      if (older || nextBefore === null) nextBefore = j.next_before_id ?? null;
      renderEvents();
      $("#ev-state").textContent = "";
    } catch (e) {
      const st = $("#ev-state");
      if (st) st.textContent = `could not load events: ${e.message}`;
    } finally {
      busy = false;
    }
  }

  $("#ev-channel").addEventListener("change", (e) => {
    channel = e.target.value;
    events = [];
    nextBefore = null;
    history.replaceState(null, "", `#/events${channel ? `?channel=${encodeURIComponent(channel)}` : ""}`);
    load();
  });
  $("#ev-older").addEventListener("click", () => load(true));

  let n = 0;
  const on = {
    alarms: renderAlarms,
    channels: fillChannels,
    "alarm-event": () => {
      load();
      shelved.load();
    },
    // events arrive pushed over the stream ("alarm-event"); poll only while it is down
    tick: () => {
      if (!live.wsOpen && !(n++ % 5)) load();
    },
  };
  for (const [k, f] of Object.entries(on)) app.addEventListener(k, f);
  renderAlarms();
  fillChannels();
  load();
  return {
    unmount() {
      for (const [k, f] of Object.entries(on)) app.removeEventListener(k, f);
      shelved.dispose();
    },
  };
}
