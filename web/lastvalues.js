// A channel's last values once its data has stopped: its last bands and tones read from the
// REST API (the service keeps a channel's last frame), and the words that say they are not
// live. No DOM and no plotting.

import { API, getJSON, qs } from "./api.js";
import { fmtClock } from "./fmt.js";
import { STATES, STATUS_TO_STATE, isLive } from "./states.js";

/** The channel's last bands and tones messages (`profile` "" = its primary one), as
 *  GET /channels/{id}/bands and /tones give them: {bands, tones}, each null if none. */
export async function fetchLast(id, profile) {
  const get = (what) => getJSON(`${API}/channels/${encodeURIComponent(id)}/${what}${qs({ profile })}`).catch(() => null);
  const [bands, tones] = await Promise.all([get("bands"), get("tones")]);
  return { bands, tones };
}

/** For a channel `c` (a /channels entry) that is not live: "NO SIGNAL since 14:03:07 — last
 *  values from 14:02:59" (`last_ns`: the time of the values shown); "" while it is live. */
export function notLiveNote(c, last_ns) {
  if (!c || isLive(c.status)) return "";
  const word = STATES[STATUS_TO_STATE[c.status]]?.word ?? c.status;
  const since = c.status_since_ns ? ` since ${fmtClock(c.status_since_ns)}` : "";
  const from = last_ns ? ` — last values, from ${fmtClock(last_ns)}` : " — no values yet";
  return `${word}${since}${from}`;
}
