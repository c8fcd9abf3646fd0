// The dashboard shell: shared state fed by the live link, header, channel sidebar, router.
// Knows no plot internals; views get data through `app` events and the `ctx` it hands them.

import { API, getJSON } from "./api.js";
import { Live } from "./live.js";
import { Surface, loadPalette } from "./plot.js";
import { STATES, alarmStateKey, badge, channelStateKey, glyph, isLive } from "./states.js";
import { esc, fmtHz, fmtVal } from "./fmt.js";
import * as overview from "./overview.js";
import * as channel from "./channel.js";
import * as eventsView from "./events.js";
import { ruleProfile, setupAck } from "./alarms.js";
import { setupEvidence } from "./evidence.js";
import { setupFilter } from "./filterview.js";
import { signIn } from "./signin.js";

const HISTORY_MS = 3600e3;
/** History key of the channel's overall (over its band named "overall", else lowcut…Fmax, as
 *  every frame says in overall_lo_hz/overall_hi_hz), apart from a band history of that name. */
export const FRAME = "(frame overall)";

/** Everything the views share. Views read it and listen to `app` events. */
export const app = new EventTarget();
const store = {
  channels: [],
  alarms: null, // active/latched alarm entries, or null when the service has no alarm route
  rules: new Map(), // "channel|profile|kind|name" → last alarm entry seen (remembers levels); profile "" = primary
  bands: new Map(), // channel → latest bands message of its primary profile; "channel|profile" → of another
  tones: new Map(), // the same for tones messages
  hist: new Map(), // channel → Map(name → [[t_ms, value], ...]) for this browser session ("profile/name" off the primary)
  conn: "connecting",
  downSince: 0,
};
const live = new Live();
const ctx = {
  store,
  live,
  app,
  nav: (hash) => (location.hash = hash),
  levels,
  rulesFor,
  primaryOf,
  fetchWatched,
  profileKey,
  bandsOf,
  tonesOf,
  channelState,
  alarmsFor,
  history,
  seedHistory,
  FRAME,
};

/** Levels and state of one rule: {alert, danger, unit, state, rule, acked} or null.
 *  `profile`: the analysis profile the value comes from (omitted or primary: the primary one). */
function levels(channelId, kind, name, profile = "") {
  return store.rules.get(ruleKey(channelId, profileKey(channelId, profile), kind, name)) ?? null;
}

/** Every rule of a channel that watches `kind` `name`, on any of its profiles:
 *  [{pk, profile, rule}] (pk "" and profile = the primary's name for the primary one). */
function rulesFor(channelId, kind, name) {
  const out = [];
  const head = `${channelId}|`;
  const tail = `|${kind}|${kind === "overall" ? "overall" : name}`;
  for (const [k, rule] of store.rules) {
    if (!k.startsWith(head) || !k.endsWith(tail) || k.length < head.length + tail.length) continue;
    const pk = k.slice(head.length, k.length - tail.length);
    if (pk.includes("|")) continue;
    out.push({ pk, profile: pk || primaryOf(channelId) || "", rule });
  }
  return out;
}

/** Bar rows (bandRows) whose value a rule watches on a profile the stream does not bring to
 *  this view: fetch that profile's bands over REST, at most every WATCHED_MS per profile, and
 *  keep them as the stream's messages are kept (the views redraw on the "bands" event). */
const WATCHED_MS = 3000;
const watchedAt = new Map();
function fetchWatched(channelId, rows) {
  const now = Date.now();
  for (const via of new Set(rows.filter((r) => r.via).map((r) => r.via))) {
    const k = `${channelId}|${via}`;
    if (now - (watchedAt.get(k) ?? 0) < WATCHED_MS) continue;
    watchedAt.set(k, now);
    getJSON(`${API}/channels/${encodeURIComponent(channelId)}/bands?profile=${encodeURIComponent(via)}`)
      .then((m) => {
        const pk = profileKey(channelId, m.profile);
        const old = store.bands.get(msgKey(channelId, pk));
        if (old && (old.seq ?? 0) >= (m.seq ?? 0)) return; // the stream's is as new
        store.bands.set(msgKey(channelId, pk), m);
        app.dispatchEvent(new CustomEvent("bands", { detail: m }));
      })
      .catch(() => {}); // a bar without its value still shows its rule's limits and state
  }
}

/** " · overall 10.00 Hz–1.00 kHz": the band the sidebar's number covers (one definition of the
 *  overall, named with its band wherever it is shown). */
function overallTitle(L) {
  return L?.overall_lo_hz != null ? ` · overall ${fmtHz(L.overall_lo_hz)}–${fmtHz(L.overall_hi_hz)}` : "";
}

function ruleKey(channelId, pk, kind, name) {
  return `${channelId}|${pk}|${kind}|${kind === "overall" ? "overall" : name}`;
}

/** A channel's primary analysis profile: the first of /channels' `profiles`, else the stream's hello. */
function primaryOf(channelId) {
  const c = store.channels.find((x) => x.id === channelId);
  return c?.profiles?.[0]?.name ?? live.profiles?.[channelId]?.[0] ?? null;
}

/** "" for a channel's primary profile (or a service without profiles), else the profile's name. */
function profileKey(channelId, profile) {
  if (!profile) return "";
  const p = primaryOf(channelId);
  return p === null || profile === p ? "" : profile;
}

const msgKey = (channelId, pk) => (pk ? `${channelId}|${pk}` : channelId);
/** The latest bands / tones message of a channel's profile (default: the primary one). */
function bandsOf(channelId, profile = "") {
  return store.bands.get(msgKey(channelId, profileKey(channelId, profile)));
}
function tonesOf(channelId, profile = "") {
  return store.tones.get(msgKey(channelId, profileKey(channelId, profile)));
}

function alarmsFor(channelId) {
  return (store.alarms || []).filter((a) => a.channel === channelId);
}

function channelState(c) {
  return channelStateKey(c.status, alarmsFor(c.id));
}

/** This session's values of `name` (FRAME or a band) of a channel's profile (default: primary). */
function history(channelId, name, profile = "") {
  return store.hist.get(channelId)?.get(histKey(profileKey(channelId, profile), name)) ?? [];
}

const histKey = (pk, name) => (pk ? `${pk}/${name}` : name);

/** Put stored points (older than what this session saw) in front of a history. */
function seedHistory(channelId, name, pts) {
  let m = store.hist.get(channelId);
  if (!m) store.hist.set(channelId, (m = new Map()));
  const a = m.get(name) || [];
  const first = a.length ? a[0][0] : Infinity;
  m.set(name, pts.filter((p) => p[0] < first).concat(a));
}

function remember(channelId, name, t_ms, v) {
  if (!Number.isFinite(v) || !t_ms) return;
  let m = store.hist.get(channelId);
  if (!m) store.hist.set(channelId, (m = new Map()));
  let a = m.get(name);
  if (!a) m.set(name, (a = []));
  const last = a[a.length - 1];
  if (last && t_ms - last[0] < 1000) return;
  a.push([t_ms, v]);
  while (a.length && a[0][0] < t_ms - HISTORY_MS) a.shift();
}

// --- live feeds -------------------------------------------------------------------------
live.addEventListener("channels", (e) => {
  store.channels = e.detail;
  for (const c of store.channels) {
    if (c.latest) remember(c.id, FRAME, c.latest.timestamp_ns / 1e6, c.latest.overall);
  }
  renderSide();
  app.dispatchEvent(new CustomEvent("channels", { detail: store.channels }));
});

live.addEventListener("alarms", (e) => {
  const list = e.detail;
  store.alarms = list === null ? null : list.filter((a) => a.state !== "normal" || a.latched);
  for (const a of list || []) store.rules.set(ruleKey(a.channel, ruleProfile(a), a.kind, a.name), a);
  // A rule that left the active list is back to normal: keep its levels, drop its state.
  if (list) {
    const act = new Set(list.map((a) => a.rule));
    for (const [k, r] of store.rules) if (!act.has(r.rule) && r.state !== "normal") store.rules.set(k, { ...r, state: "normal", latched: false });
  }
  renderAlarmSummary();
  renderSide();
  app.dispatchEvent(new CustomEvent("alarms", { detail: store.alarms }));
});

live.addEventListener("bands", (e) => {
  const m = e.detail;
  const pk = profileKey(m.channel, m.profile);
  store.bands.set(msgKey(m.channel, pk), m);
  const t = (m.timestamp_ns ?? 0) / 1e6;
  for (const b of m.bands || []) if (!b.name.startsWith("third ")) remember(m.channel, histKey(pk, b.name), t, b.value);
  if (pk) remember(m.channel, histKey(pk, FRAME), t, m.overall); // the primary's comes with /channels
  // Some services put levels on the bands themselves.
  for (const b of m.bands || []) {
    if (b.alert !== undefined || b.danger !== undefined) {
      const k = ruleKey(m.channel, pk, "band", b.name);
      store.rules.set(k, { ...(store.rules.get(k) || { state: "normal" }), channel: m.channel, kind: "band", name: b.name, alert: b.alert, danger: b.danger, unit: m.unit });
    }
  }
  app.dispatchEvent(new CustomEvent("bands", { detail: m }));
});
live.addEventListener("tones", (e) => {
  store.tones.set(msgKey(e.detail.channel, profileKey(e.detail.channel, e.detail.profile)), e.detail);
  app.dispatchEvent(new CustomEvent("tones", { detail: e.detail }));
});
live.addEventListener("spectrum", (e) => app.dispatchEvent(new CustomEvent("spectrum", { detail: e.detail })));
live.addEventListener("alarm", (e) => app.dispatchEvent(new CustomEvent("alarm-event", { detail: e.detail })));
live.addEventListener("conn", (e) => {
  store.conn = e.detail.conn;
  if (e.detail.downSince) store.downSince = e.detail.downSince;
  renderConn(e.detail);
  app.dispatchEvent(new CustomEvent("conn", { detail: e.detail }));
});

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
    b.textContent = `No contact with the service since ${new Date(store.downSince || Date.now()).toLocaleTimeString([], { hour12: false })} — reconnecting` +
      (d.attempts > 1 ? ` (attempt ${d.attempts})` : "") + ". Values on screen are not live.";
  } else {
    b.hidden = true;
  }
  document.body.classList.toggle("is-stale", conn === "reconnecting");
}

function renderAlarmSummary() {
  const el = document.getElementById("alarm-sum");
  if (store.alarms === null) {
    el.innerHTML = "";
    return;
  }
  const n = { danger: 0, alert: 0, latched: 0 };
  let unacked = 0;
  for (const a of store.alarms) {
    const k = alarmStateKey(a);
    if (k in n) n[k]++;
    if (!a.acked) unacked++;
  }
  const parts = Object.entries(n).filter(([, c]) => c).map(([k, c]) => `<a href="#/events" title="${STATES[k].help}">${badge(k, ` <span class="num">${c}</span>`)}</a>`);
  el.innerHTML = parts.length
    ? parts.join("") + (unacked ? `<span class="hint">${unacked} not acknowledged</span>` : "")
    : `<span class="hint">${glyph("ok")} no active alarms</span>`;
}

// --- sidebar -----------------------------------------------------------------------------
let sideKey = "";
function renderSide() {
  const el = document.getElementById("side");
  const cur = currentChannel();
  const groups = groupByMachine(store.channels);
  const html = [];
  for (const [machine, chans] of groups) {
    html.push(`<h3><span>${esc(machine)}</span></h3>`);
    for (const c of chans) {
      const k = channelState(c);
      const abn = STATES[k].rank >= STATES.latched.rank;
      html.push(`<a class="ch ${abn ? "abn" : ""} ${STATES[k].cls}" href="#/channel/${encodeURIComponent(c.id)}" data-channel="${esc(c.id)}" data-state="${k}" title="${esc(c.description)} — ${STATES[k].word}${overallTitle(c.latest)}"${c.id === cur ? ' aria-current="page"' : ""}>${glyph(k)}<span>${esc(c.id)}</span><span class="v">${c.latest && isLive(c.status) ? fmtVal(c.latest.overall) : STATES[k].word.toLowerCase()}</span></a>`);
    }
  }
  const s = html.join("");
  if (s !== sideKey) {
    el.innerHTML = s;
    sideKey = s;
  }
}

export function groupByMachine(chans) {
  const m = new Map();
  for (const c of chans) {
    const k = c.machine || "(no machine)";
    if (!m.has(k)) m.set(k, []);
    m.get(k).push(c);
  }
  return m;
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

function route() {
  view?.unmount?.();
  const main = document.getElementById("main");
  main.innerHTML = "";
  const ch = channelRoute();
  let which = "plant";
  if (ch) {
    which = "channel";
    view = channel.mount(main, ctx, ch.id, { profile: ch.profile });
  } else if (location.hash.startsWith("#/events")) {
    which = "events";
    view = eventsView.mount(main, ctx);
  } else {
    view = overview.mount(main, ctx);
  }
  for (const a of document.querySelectorAll("[data-nav]")) {
    if (a.dataset.nav === which) a.setAttribute("aria-current", "page");
    else a.removeAttribute("aria-current");
  }
  window.quaver.view = view?.probe ?? null;
  sideKey = "";
  renderSide();
}

async function init() {
  await signIn(); // with tokens configured nothing is read before the service accepts one
  loadPalette();
  setupAck(ctx);
  setupEvidence(ctx);
  setupFilter(ctx);
  for (const d of document.querySelectorAll("dialog")) {
    d.addEventListener("click", (e) => {
      if (e.target.closest("[data-close]")) d.close();
    });
  }
  // for people poking around in devtools (and the browser tests): `view` is what the open
  // view chooses to show of itself (the channel view: its profile and the spectrum on screen)
  window.quaver = { live, store, Surface, view: null, version: 1 };
  window.addEventListener("hashchange", route);
  route();
  live.start();
  setInterval(() => app.dispatchEvent(new CustomEvent("tick")), 1000);
}

init();
