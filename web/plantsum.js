// The plant at a glance: each machine's worst state, its worst overall against its limit and
// its data quality, the severity order and the filters of the plant view. Reads the shared
// store; no DOM, no network.

import { STATES, alarmStateKey, isLive } from "./states.js";
import { alarmsFor, channelState, groupByMachine } from "./shared.js";
import { overallLimits } from "./sparkline.js";

/** Severity classes, most severe first: the plant view's sort and its state filter. */
export const SEVERITY = ["danger", "alert", "latched", "quality", "normal"];
const SEV_OF = { danger: "danger", alert: "alert", latched: "latched", ok: "normal", unknown: "normal" };
/** A state key → its severity class (sensor fault, no signal, failed, gap, overrun: quality). */
export const severityOf = (key) => SEV_OF[key] ?? "quality";

/**
 * One summary per machine: {id, name, group, chans: [ids], state (worst state key), sev, held
 * (rank of the worst alarm held), worst: {channel, value, limit, unit, ratio, stale} | null,
 * notOk: [channel states not ok], search}. A value of a channel whose data are not live is
 * taken only when no live one is, and is `stale` (shown as the last value).
 * `ratio` is the value over the channel's lowest limit (alert, else danger) and orders machines
 * of the same severity; `limit` is the level the value is shown against (danger once at or over
 * it, else the lowest one).
 */
export function machineSummaries(chans) {
  const out = [];
  for (const [id, list] of groupByMachine(chans)) {
    let state = "ok";
    let worst = null;
    let held = -1; // the rank of the worst alarm its channels hold, live or frozen
    const notOk = [];
    const words = [id];
    for (const c of list) {
      const k = channelState(c);
      if ((STATES[k]?.rank ?? -1) > (STATES[state]?.rank ?? -1)) state = k;
      if (c.status && c.status !== "ok") notOk.push({ channel: c.id, status: c.status });
      words.push(c.id, c.name || "");
      for (const a of alarmsFor(c.id)) held = Math.max(held, STATES[alarmStateKey(a)]?.rank ?? -1);
      const L = c.latest;
      if (!L || !Number.isFinite(L.overall)) continue;
      const stale = !isLive(c.status); // its last value, shown as such
      const lim = overallLimits(c.id);
      const low = Math.min(...lim.alert, ...lim.danger);
      const dmin = Math.min(...lim.danger);
      const ratio = Number.isFinite(low) && low > 0 ? L.overall / low : null;
      const limit = Number.isFinite(dmin) && L.overall >= dmin ? dmin : Number.isFinite(low) ? low : null;
      const cand = { channel: c.id, value: L.overall, limit, unit: L.unit || "", ratio, stale };
      if (!worst || (worst.stale && !stale) || (worst.stale === stale && ((cand.ratio ?? -1) > (worst.ratio ?? -1) || (cand.ratio === null && worst.ratio === null && cand.value > worst.value)))) worst = cand;
    }
    if (list.every((c) => !c.status)) state = "unknown";
    const first = list[0];
    const name = first.machine_name || id;
    words.push(name);
    out.push({ id, name, group: first.machine_group || "", chans: list.map((c) => c.id), state, sev: severityOf(state), held, worst, notOk, search: words.join(" ").toLowerCase() });
  }
  return out;
}

/** Most severe first, then the worst alarm held (a machine whose data are not ok may hold a
 *  frozen danger alarm: it comes before one that holds none), then the highest value against
 *  its limit (to the percent, so that noise does not shuffle the list), then the machine id.
 *  Sorts in place and returns `ms`. */
export function bySeverity(ms) {
  const r = (m) => (m.worst?.ratio == null ? -1 : Math.round(m.worst.ratio * 100));
  return ms.sort((a, b) => SEVERITY.indexOf(a.sev) - SEVERITY.indexOf(b.sev) || b.held - a.held || r(b) - r(a) || (a.id < b.id ? -1 : a.id > b.id ? 1 : 0));
}

/** The filters: {state: "" | "abnormal" | a SEVERITY class, group: "" | name, q: text}. */
export function matches(m, f) {
  if (f.state === "abnormal" && m.sev === "normal") return false;
  if (f.state && f.state !== "abnormal" && m.sev !== f.state) return false;
  if (f.group && m.group !== f.group) return false;
  const q = (f.q || "").trim().toLowerCase();
  return !q || q.split(/\s+/).every((w) => m.search.includes(w));
}

/** Counts per severity class: {danger, alert, latched, quality, normal}. */
export function counts(ms) {
  const n = Object.fromEntries(SEVERITY.map((s) => [s, 0]));
  for (const m of ms) n[m.sev]++;
  return n;
}
