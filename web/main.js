// The dashboard shell: header, channel sidebar, router. Knows no plot internals; views get
// their data from shared.js and the `app` events.

import { app, channelState, groupByMachine, live, store } from "./shared.js";
import { Surface, loadPalette } from "./plot.js";
import { STATES, alarmStateKey, isLive, loadStates } from "./states.js";
import { fmtClock, fmtHz, fmtVal } from "./fmt.js";
import { badge, glyph, html, setHTML, updateHTML } from "./dom.js";
import * as overview from "./overview.js";
import * as channel from "./channel.js";
import * as eventsView from "./events.js";
import { setupAck } from "./alarms.js";
import { setupEvidence } from "./evidence.js";
import { setupFilter } from "./filterview.js";
import { signIn } from "./signin.js";
import { chName, chTitle, machineLabel } from "./names.js";
import * as rulesView from "./rules.js";
import { setupConsole } from "./console.js";
import * as notFound from "./notfound.js";
import { isTacho, mountTacho, sideSpeedText } from "./speed.js";
import { mountRunup, runupRoute } from "./runup.js";

app.addEventListener("channels", () => {
  // a channel view opened before the list came, or of a channel that has gone: say so
  const ch = view && channelRoute(); // (none before init's first route)
  if (ch && ((view?.probe?.notFound?.()?.kind === "channel") !== !knownChannel(ch.id)
    || !!view?.probe?.waiting || !!view?.probe?.tacho !== tachoChannel(ch.id))) route();
  else renderSide();
});
app.addEventListener("alarms", () => {
  renderAlarmSummary();
  renderSide();
});
app.addEventListener("conn", (e) => renderConn(e.detail));

/** " · overall 10.00 Hz–1.00 kHz": the band the sidebar's number covers (one definition of the
 *  overall, named with its band wherever it is shown). */
function overallTitle(L) {
  return L?.overall_lo_hz != null ? ` · overall ${fmtHz(L.overall_lo_hz)}–${fmtHz(L.overall_hi_hz)}` : "";
}


// --- header ------------------------------------------------------------------------------
function renderConn(d) {
  const el = document.getElementById("conn");
  const conn = d.conn;
  el.dataset.conn = conn;
  const text = {
    connecting: "connecting…",
    live: "live",
    polling: "live (polling)",
    reconnecting: "reconnecting…",
  }[conn];
  el.querySelector(".conn-text").textContent = text;
  el.title = {
    live: "Streaming from the service over a WebSocket.",
    polling: "The service's stream is not available; values are fetched every second or so.",
    reconnecting: "The service does not answer; trying again.",
    connecting: "",
  }[conn];
  const b = document.getElementById("banner");
  if (conn === "reconnecting") {
    b.hidden = false;
    b.textContent = `No contact with the service since ${fmtClock((store.downSince || Date.now()) * 1e6)} — reconnecting` +
      (d.attempts > 1 ? ` (attempt ${d.attempts})` : "") + ". Values on screen are not live.";
  } else {
    b.hidden = true;
  }
  document.body.classList.toggle("is-stale", conn === "reconnecting");
}

function renderAlarmSummary() {
  const el = document.getElementById("alarm-sum");
  if (store.alarms === null) {
    setHTML(el, "");
    return;
  }
  const n = { danger: 0, alert: 0, latched: 0 };
  let unacked = 0;
  for (const a of store.alarms) {
    const k = alarmStateKey(a);
    if (k in n) n[k]++;
    if (!a.acked) unacked++;
  }
  const parts = Object.entries(n).filter(([, c]) => c).map(([k, c]) => html`<a href="#/events" title="${STATES[k].help}">${badge(k, html` <span class="num">${c}</span>`)}</a>`);
  setHTML(el, parts.length
    ? html`${parts}${unacked ? html`<span class="hint">${unacked} not acknowledged</span>` : ""}`
    : html`<span class="hint">${glyph("ok")} no active alarms</span>`);
}

// --- sidebar -----------------------------------------------------------------------------
// The rows are rewritten only when a state, name or the current channel changes; the values
// (which change every few seconds on every channel) are patched in place, so a plant of a
// thousand channels does not rebuild a thousand links each time.
let sideValues = new Map(); // channel id → its value's <span>
let sideOf = null; // the channel list the rows were built from
let sideKey = ""; // and the states, bands and current channel they show
function renderSide() {
  const cur = currentChannel();
  const vals = [];
  const keys = [cur];
  for (const c of store.channels) {
    const k = channelState(c);
    keys.push(k, c.latest?.overall_lo_hz, c.latest?.overall_hi_hz);
    // a tacho has no overall: its speed, or what its speed status says (no signal …)
    vals.push([c.id, isTacho(c) ? sideSpeedText(c, STATES[k].word.toLowerCase())
      : c.latest && isLive(c.status) ? fmtVal(c.latest.overall) : STATES[k].word.toLowerCase()]);
  }
  const key = keys.join("|");
  // the rows' markup is made only when the list, a state, a band or the current channel changed
  if (store.channels !== sideOf || key !== sideKey) {
    sideOf = store.channels;
    sideKey = key;
    const parts = [];
    for (const [machine, chans] of groupByMachine(store.channels)) {
      parts.push(html`<h3 data-machine="${machine}" title="${machine}"><span>${machineLabel(machine)}</span></h3>`);
      for (const c of chans) {
        const k = channelState(c);
        const abn = STATES[k].rank >= STATES.latched.rank;
        parts.push(html`<a class="ch ${abn ? "abn" : ""} ${STATES[k].cls}" href="#/channel/${encodeURIComponent(c.id)}" data-channel="${c.id}" data-state="${k}" title="${chTitle(c.id)}${c.description ? ` — ${c.description}` : ""} — ${STATES[k].word}${overallTitle(c.latest)}"${c.id === cur ? html` aria-current="page"` : ""}>${glyph(k)}<span>${chName(c.id)}</span><span class="v"></span></a>`);
      }
    }
    const side = document.getElementById("side");
    if (updateHTML(side, parts)) sideValues = new Map([...side.querySelectorAll("a.ch")].map((a) => [a.dataset.channel, a.querySelector(".v")]));
  }
  for (const [id, text] of vals) {
    const el = sideValues.get(id);
    if (el && el.textContent !== text) el.textContent = text;
  }
}

// --- router ------------------------------------------------------------------------------
let view = null;
/** The channel view's hash: `#/channel/<id>` or `#/channel/<id>?profile=<name>`. */
function channelRoute() {
  const m = /^#\/channel\/([^?]+)(?:\?(.*))?$/.exec(location.hash);
  return m ? { id: decodeURIComponent(m[1]), profile: new URLSearchParams(m[2] || "").get("profile") || "" } : null;
}

function currentChannel() {
  return channelRoute()?.id ?? null;
}

/** False only when the service's channel list is in and does not hold `id`. */
function knownChannel(id) {
  return !store.channels.length || store.channels.some((c) => c.id === id);
}

/** Whether `id` is a tacho channel (its page shows its speed, it has no spectrum). */
function tachoChannel(id) {
  return isTacho(store.channels.find((c) => c.id === id));
}

/** The plant view's hashes: none, `#`, `#/` (with or without a query). */
function isPlant(hash) {
  return /^(#\/?)?(\?.*)?$/.test(hash);
}

function route() {
  view?.unmount?.();
  const main = document.getElementById("main");
  setHTML(main, "");
  const ch = channelRoute();
  const ru = runupRoute(location.hash);
  let which = "plant";
  if (ru) {
    which = "channel"; // a run-up record belongs to its channel
    view = mountRunup(main, ru.id, ru.rid);
  } else if (ch) {
    which = "channel";
    if (!store.channels.length) {
      // which kind of channel it is comes with the list (a tacho has no spectrum to ask for)
      setHTML(main, html`<p class="hint" id="ch-waiting">waiting for the service's channel list…</p>`);
      view = { probe: { waiting: true } };
    } else if (!knownChannel(ch.id)) {
      view = notFound.mountChannel(main, ch.id, store.channels.map((c) => c.id));
    } else {
      view = tachoChannel(ch.id) ? mountTacho(main, ch.id) : channel.mount(main, ch.id, { profile: ch.profile });
    }
  } else if (location.hash.startsWith("#/rules")) {
    which = "rules"; // the rules view (web/rules.js)
    view = rulesView.mount(main);
  } else if (location.hash.startsWith("#/events")) {
    which = "events";
    view = eventsView.mount(main);
  } else if (isPlant(location.hash)) {
    view = overview.mount(main);
  } else {
    which = "";
    let asked = location.hash;
    try {
      asked = decodeURIComponent(asked);
    } catch {
      /* a malformed escape: show it as it is */
    }
    view = notFound.mountRoute(main, asked);
  }
  for (const a of document.querySelectorAll("[data-nav]")) {
    if (a.dataset.nav === which) a.setAttribute("aria-current", "page");
    else a.removeAttribute("aria-current");
  }
  window.quaver.view = view?.probe ?? null;
  delete document.getElementById("side").dataset.h; // the current channel changed: redraw
  sideOf = null;
  renderSide();
}

/** Resolves when the first channel list is in, the service is found unreachable, or after
 *  `ms`, whichever comes first. */
function firstChannels(ms) {
  if (store.channels.length) return Promise.resolve();
  return new Promise((resolve) => {
    const done = () => {
      clearTimeout(timer);
      app.removeEventListener("channels", done);
      app.removeEventListener("conn", onConn);
      resolve();
    };
    const onConn = (e) => e.detail.conn === "reconnecting" && done();
    const timer = setTimeout(done, ms);
    app.addEventListener("channels", done);
    app.addEventListener("conn", onConn);
  });
}

async function init() {
  await signIn(); // with tokens configured nothing is read before the service accepts one
  await loadStates(); // the state sets and their meanings (GET /api/v1/meta)
  loadPalette();
  setupAck();
  setupEvidence();
  setupFilter();
  setupConsole(); // shelve, unshelve and acknowledge-all dialogs; the site zone in the header
  for (const d of document.querySelectorAll("dialog")) {
    d.addEventListener("click", (e) => {
      if (e.target.closest("[data-close]")) d.close();
    });
  }
  // A channel's page depends on its kind (a tacho has no spectrum to ask for), which comes
  // with the channel list: for a channel link, ask for the list first (a few seconds at most).
  const early = !!channelRoute();
  if (early) {
    live.start();
    await firstChannels(4000);
  }
  // for people poking around in devtools (and the browser tests): `view` is what the open
  // view chooses to show of itself (the channel view: its profile and the spectrum on screen);
  // set once the first view is about to mount
  window.quaver = { live, store, Surface, view: null, version: 1 };
  window.addEventListener("hashchange", route);
  route();
  if (!early) live.start();
  setInterval(() => app.dispatchEvent(new CustomEvent("tick")), 1000);
}

init();
