// What state a channel or alarm is in, and how it is shown: a word, a shape and (only
// when abnormal) a colour class. The sets of states and what each means come from the
// service (GET /api/v1/meta, loaded once by loadStates() at start); only the presentation
// is here. No DOM beyond returning markup strings.

import { API, getJSON } from "./api.js";
import { setSiteZone } from "./fmt.js";

// How each state is shown, ordered most to least severe. `cls` picks the colour in app.css;
// `shape` the glyph; `rank` orders states for "worst of". `help` (the tooltip) is the
// service's meaning once loadStates() has run; the texts here are for the states only the
// dashboard has (`latched` as the badge of a held alarm, `unknown` before the first answer).
export const STATES = {
  danger: { word: "DANGER", shape: "diamond", cls: "s-danger", rank: 7 },
  alert: { word: "ALERT", shape: "triangle", cls: "s-alert", rank: 6 },
  failed: { word: "FAILED", shape: "slashed", cls: "s-fault", rank: 5.5 },
  fault: { word: "SENSOR FAULT", shape: "slashed", cls: "s-fault", rank: 5 },
  nosignal: { word: "NO SIGNAL", shape: "dashed", cls: "s-nodata", rank: 4.5 },
  latched: { word: "LATCHED", shape: "hollow-triangle", cls: "s-latched", rank: 4, help: "the value has cleared but the alarm waits for an acknowledgement" },
  gap: { word: "GAP", shape: "square", cls: "s-quality", rank: 2 },
  overrun: { word: "OVERRUN", shape: "square", cls: "s-quality", rank: 2 },
  ok: { word: "OK", shape: "ring", cls: "s-ok", rank: 0, help: "running, no alarm" },
  unknown: { word: "…", shape: "dashed", cls: "s-nodata", rank: -1, help: "waiting for the service" },
};

// Presentation keys whose name differs from the service's state name (the keys are also the
// `data-state` attributes app.css styles).
const SHOWN_AS = { "no-signal": "nosignal", "sensor-fault": "fault", normal: "ok" };

// The service's channel data-quality states → the keys above, and whether each is live.
// Filled by loadStates(); until then every status shows as "unknown".
export const STATUS_TO_STATE = {};
const LIVE = {};
// alarm states and channel states (the two sets "status" and "transition" events name)
const EVENT_STATE = {};

/** Load the state sets and their meanings from GET /api/v1/meta (once, at start, after
 *  sign-in: the route reads like any other). Retries every 2 s until the service answers. */
export async function loadStates() {
  for (;;) {
    try {
      applyMeta(await getJSON(`${API}/meta`));
      return;
    } catch {
      await new Promise((r) => setTimeout(r, 2000));
    }
  }
}

function applyMeta(meta) {
  setSiteZone(meta.timezone || "UTC"); // every time on the page is shown in the site's zone
  for (const c of meta.channel_statuses) {
    const key = SHOWN_AS[c.name] ?? c.name;
    STATUS_TO_STATE[c.name] = key;
    EVENT_STATE[c.name] = key;
    LIVE[c.name] = c.live;
    if (STATES[key]) {
      STATES[key].live = c.live ? undefined : false;
      if (key !== "ok") STATES[key].help = c.meaning + (c.suspends_alarms ? "; its alarms are frozen" : "");
    }
  }
  for (const a of meta.alarm_states) {
    const key = SHOWN_AS[a.name] ?? a.name;
    EVENT_STATE[a.name] = key;
    if (STATES[key] && key !== "ok" && key !== "latched") STATES[key].help = a.meaning;
  }
}

/** The state key of a "from"/"to" state of an event: an alarm state, or a channel's
 *  data-quality state for "status" events; "ok" for anything else. */
export function eventStateKey(name) {
  return EVENT_STATE[name] ?? "ok";
}

/** Is a channel status one whose values are live (new and trustworthy)? */
export function isLive(status) {
  return LIVE[status] !== false;
}

/** The state key of an alarm entry from /api/v1/alarms. */
export function alarmStateKey(a) {
  if (a.state === "danger") return "danger";
  if (a.state === "alert") return "alert";
  if (a.state === "latched" || (a.latched && a.state === "normal")) return "latched";
  return "ok";
}

/** Worst state of a channel: its status combined with its active alarms. A channel
 *  whose values are not live shows that first: an alarm it holds is then not current. */
export function channelStateKey(status, alarms) {
  let key = STATUS_TO_STATE[status] ?? "unknown";
  if (!isLive(status)) return key;
  for (const a of alarms || []) {
    const k = alarmStateKey(a);
    if (STATES[k].rank > STATES[key].rank) key = k;
  }
  return key;
}

/** Inline SVG glyph for a state (14 px, inherits colour from CSS `color`). */
export function glyph(key, size = 14) {
  const s = STATES[key] ?? STATES.unknown;
  const body = {
    diamond: '<path d="M8 1.2 14.8 8 8 14.8 1.2 8Z" fill="currentColor"/><path d="M8 4.6v4.6M8 10.8v1" stroke="#fff" stroke-width="1.7" stroke-linecap="round"/>',
    triangle: '<path d="M8 1.6 15 14.2H1Z" fill="currentColor"/><path d="M8 6v4M8 11.8v.6" stroke="#26221a" stroke-width="1.6" stroke-linecap="round"/>',
    "hollow-triangle": '<path d="M8 2.4 14.2 13.6H1.8Z" fill="none" stroke="currentColor" stroke-width="1.6" stroke-linejoin="round"/>',
    slashed: '<rect x="2" y="2" width="12" height="12" rx="1.5" fill="currentColor"/><path d="M4.6 11.4 11.4 4.6" stroke="#fff" stroke-width="1.8" stroke-linecap="round"/>',
    dashed: '<circle cx="8" cy="8" r="5.6" fill="none" stroke="currentColor" stroke-width="1.5" stroke-dasharray="2.6 2.2"/>',
    square: '<rect x="2.8" y="2.8" width="10.4" height="10.4" fill="none" stroke="currentColor" stroke-width="1.6"/>',
    ring: '<circle cx="8" cy="8" r="4.6" fill="none" stroke="currentColor" stroke-width="1.5"/>',
  }[s.shape];
  return `<svg class="glyph" viewBox="0 0 16 16" width="${size}" height="${size}" aria-hidden="true">${body}</svg>`;
}

/** A badge: glyph + word, with a tooltip explaining the state. */
export function badge(key, extra = "") {
  const s = STATES[key] ?? STATES.unknown;
  return `<span class="badge ${s.cls}" data-state="${key}" title="${s.help}">${glyph(key)}<span class="word">${s.word}</span>${extra}</span>`;
}
