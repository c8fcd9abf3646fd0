// What the views share: the live link, the state it feeds (channels, alarms and their
// levels, bands/tones per channel and profile, this session's histories) and the queries the
// views ask of it. Views import what they use from here and listen to `app` events
// (channels, alarms, bands, tones, spectrum, alarm-event, conn, tick). No DOM.

import { API, getJSON } from "./api.js";
import { Live } from "./live.js";
import { channelStateKey } from "./states.js";
import { ruleProfile } from "./alarms.js";
import { StepRing } from "./ring.js";

// A channel's overall history in the page: ten-second means over ten minutes (what a plant
// card's sparkline shows), in a ring of fixed size per channel, so a page left open for
// days at a thousand channels holds as much as after ten minutes.
export const SPARK_STEP_MS = 10e3;
export const SPARK_STEPS = 60;
/** History key of the channel's overall (over its band named "overall", else lowcut…Fmax, as
 *  every frame says in overall_lo_hz/overall_hi_hz), apart from a band history of that name. */
export const FRAME = "(frame overall)";

/** The views listen to it (see above). */
export const app = new EventTarget();
export const store = {
  channels: [],
  alarms: null, // active/latched alarm entries, or null when the service has no alarm route
  alarmsKnown: false, // the alarm list has been asked for once (answered or not)
  rules: new Map(), // "channel|profile|kind|name" → last alarm entry seen (remembers levels); profile "" = primary
  bands: new Map(), // channel → latest bands message of its primary profile; "channel|profile" → of another
  tones: new Map(), // the same for tones messages
  hist: new Map(), // channel → StepRing of its primary profile's overall (this session, seeded from /trend)
  byId: new Map(), // channel id → its /channels entry
  conn: "connecting",
  downSince: 0,
};
export const live = new Live();
/** Levels and state of one rule: {alert, danger, unit, state, rule, acked} or null.
 *  `profile`: the analysis profile the value comes from (omitted or primary: the primary one). */
export function levels(channelId, kind, name, profile = "") {
  return store.rules.get(ruleKey(channelId, profileKey(channelId, profile), kind, name)) ?? null;
}

/** Every rule of a channel that watches `kind` `name`, on any of its profiles:
 *  [{pk, profile, rule}] (pk "" and profile = the primary's name for the primary one). */
export function rulesFor(channelId, kind, name) {
  const out = [];
  const head = `${channelId}|`;
  const tail = `|${kind}|${kind === "overall" ? "overall" : name}`;
  for (const k of ruleKeysOf(channelId)) {
    if (!k.startsWith(head) || !k.endsWith(tail) || k.length < head.length + tail.length) continue;
    const pk = k.slice(head.length, k.length - tail.length);
    if (pk.includes("|")) continue;
    out.push({ pk, profile: pk || primaryOf(channelId) || "", rule: store.rules.get(k) });
  }
  return out;
}

// The keys of store.rules by channel (ids have no "|"), so that a channel's rules are not
// looked for among every rule of the plant (a card's bars ask for each of their bands). Keys
// are only ever added to store.rules: the index is made again when their number changes.
let ruleIndex = { size: -1, by: new Map() };
function ruleKeysOf(channelId) {
  if (ruleIndex.size !== store.rules.size) {
    const by = new Map();
    for (const k of store.rules.keys()) {
      const ch = k.slice(0, k.indexOf("|"));
      if (!by.has(ch)) by.set(ch, []);
      by.get(ch).push(k);
    }
    ruleIndex = { size: store.rules.size, by };
  }
  return ruleIndex.by.get(channelId) ?? [];
}

/** Bar rows (bandRows) whose value a rule watches on a profile the stream does not bring to
 *  this view: fetch that profile's bands over REST, at most every WATCHED_MS per profile, and
 *  keep them as the stream's messages are kept (the views redraw on the "bands" event). */
const WATCHED_MS = 3000;
const watchedAt = new Map();
export function fetchWatched(channelId, rows) {
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

function ruleKey(channelId, pk, kind, name) {
  return `${channelId}|${pk}|${kind}|${kind === "overall" ? "overall" : name}`;
}

/** A channel's primary analysis profile: the first of /channels' `profiles`, else the stream's hello. */
export function primaryOf(channelId) {
  const c = store.byId.get(channelId);
  return c?.profiles?.[0]?.name ?? live.profiles?.[channelId]?.[0] ?? null;
}

/** "" for a channel's primary profile (or a service without profiles), else the profile's name. */
export function profileKey(channelId, profile) {
  if (!profile) return "";
  const p = primaryOf(channelId);
  return p === null || profile === p ? "" : profile;
}

const msgKey = (channelId, pk) => (pk ? `${channelId}|${pk}` : channelId);
/** The latest bands / tones message of a channel's profile (default: the primary one). */
export function bandsOf(channelId, profile = "") {
  return store.bands.get(msgKey(channelId, profileKey(channelId, profile)));
}
export function tonesOf(channelId, profile = "") {
  return store.tones.get(msgKey(channelId, profileKey(channelId, profile)));
}

let alarmIndex = { of: undefined, by: new Map() };
/** A channel's active/latched alarms (indexed once per alarm list, not searched per call). */
export function alarmsFor(channelId) {
  if (alarmIndex.of !== store.alarms) {
    const by = new Map();
    for (const a of store.alarms || []) {
      if (!by.has(a.channel)) by.set(a.channel, []);
      by.get(a.channel).push(a);
    }
    alarmIndex = { of: store.alarms, by };
  }
  return alarmIndex.by.get(channelId) ?? [];
}

export function channelState(c) {
  return channelStateKey(c.status, alarmsFor(c.id));
}

/** The ring of a channel's overall (primary profile): this session's values and stored ones. */
export function overallRing(channelId) {
  let r = store.hist.get(channelId);
  if (!r) store.hist.set(channelId, (r = new StepRing(SPARK_STEP_MS, SPARK_STEPS)));
  return r;
}

/** This session's overall of a channel ([[t_ms, value]], ten-second means then the newest). */
export function history(channelId) {
  return store.hist.get(channelId)?.points() ?? [];
}

function remember(channelId, t_ms, v) {
  const r = overallRing(channelId);
  if (r.last && t_ms <= r.last[0]) return; // the same frame again
  r.add(t_ms, v);
}

// --- live feeds -------------------------------------------------------------------------
live.addEventListener("channels", (e) => {
  store.channels = e.detail;
  store.byId = new Map(store.channels.map((c) => [c.id, c]));
  for (const c of store.channels) {
    if (c.latest) remember(c.id, c.latest.timestamp_ns / 1e6, c.latest.overall);
  }
  app.dispatchEvent(new CustomEvent("channels", { detail: store.channels }));
});

live.addEventListener("alarms", (e) => {
  const list = e.detail;
  store.alarmsKnown = true;
  // a shelved rule's alarm is not annunciated (shown under Shelved instead)
  store.alarms = list === null ? null : list.filter((a) => (a.state !== "normal" || a.latched) && !a.shelved);
  for (const a of list || []) store.rules.set(ruleKey(a.channel, ruleProfile(a), a.kind, a.name), a);
  // A rule that left the active list is back to normal: keep its levels, drop its state.
  if (list) {
    const act = new Set(list.map((a) => a.rule));
    for (const [k, r] of store.rules) if (!act.has(r.rule) && r.state !== "normal") store.rules.set(k, { ...r, state: "normal", latched: false });
  }
  app.dispatchEvent(new CustomEvent("alarms", { detail: store.alarms }));
});

live.addEventListener("bands", (e) => {
  const m = e.detail;
  const pk = profileKey(m.channel, m.profile);
  store.bands.set(msgKey(m.channel, pk), m);
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
  app.dispatchEvent(new CustomEvent("conn", { detail: e.detail }));
});

/** Channels grouped by machine, in the order /channels lists them. */
export function groupByMachine(chans) {
  const m = new Map();
  for (const c of chans) {
    const k = c.machine || "(no machine)";
    if (!m.has(k)) m.set(k, []);
    m.get(k).push(c);
  }
  return m;
}
