// What state a channel or alarm is in, and how it is shown: a word, a shape and (only
// when abnormal) a colour class. No network, no DOM beyond returning markup strings.

// Ordered most to least severe. `cls` picks the colour in app.css; `shape` the glyph.
export const STATES = {
  danger: { word: "DANGER", shape: "diamond", cls: "s-danger", rank: 7, help: "a value is at or above its danger level" },
  alert: { word: "ALERT", shape: "triangle", cls: "s-alert", rank: 6, help: "a value is at or above its alert level" },
  failed: { word: "FAILED", shape: "slashed", cls: "s-fault", rank: 5.5, live: false, help: "the source's pipeline failed and is being restarted; values are not live" },
  fault: { word: "SENSOR FAULT", shape: "slashed", cls: "s-fault", rank: 5, live: false, help: "the signal is not trustworthy (non-finite, beyond the sensor's range, flat or clipped); its alarms are frozen" },
  nosignal: { word: "NO SIGNAL", shape: "dashed", cls: "s-nodata", rank: 4.5, live: false, help: "no new spectrum for longer than the channel's stale_after_s; the value shown is old" },
  latched: { word: "LATCHED", shape: "hollow-triangle", cls: "s-latched", rank: 4, help: "the value has cleared but the alarm waits for an acknowledgement" },
  gap: { word: "GAP", shape: "square", cls: "s-quality", rank: 2, help: "samples were lost; the spectrum is being rebuilt" },
  overrun: { word: "OVERRUN", shape: "square", cls: "s-quality", rank: 2, help: "the analysis fell behind and dropped blocks" },
  ok: { word: "OK", shape: "ring", cls: "s-ok", rank: 0, help: "running, no alarm" },
  unknown: { word: "…", shape: "dashed", cls: "s-nodata", rank: -1, help: "waiting for the service" },
};

// The service's data-quality states (service/quality.py) → the keys above.
export const STATUS_TO_STATE = { ok: "ok", "no-signal": "nosignal", gap: "gap", "sensor-fault": "fault", overrun: "overrun", failed: "failed" };

/** Is a channel status one whose values are live (new and trustworthy)? */
export function isLive(status) {
  return STATES[STATUS_TO_STATE[status]]?.live !== false;
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
