// Display names of machines and channels, from /api/v1/channels (`name`, `machine_name`,
// `machine_group`; ids where nothing is configured). Every view names things through here,
// with the id kept at hand (title, small print). Reads the shared store; no network.

import { html } from "./dom.js";
import { store } from "./shared.js";

function chan(id) {
  return store.byId.get(id) ?? null;
}

/** A channel's display name (its id when it has none). */
export function chName(id) {
  return chan(id)?.name || id;
}

let names = { of: null, by: new Map() }; // machine id → name, rebuilt when /channels changes

/** A machine's display name, from any channel on it (the id when none is configured). */
export function machineName(machineId) {
  if (!machineId) return "(no machine)";
  if (names.of !== store.channels) {
    names = { of: store.channels, by: new Map() };
    for (const c of store.channels) if (c.machine && c.machine_name && !names.by.has(c.machine)) names.by.set(c.machine, c.machine_name);
  }
  return names.by.get(machineId) || machineId;
}

/** The machine id of a channel ("" when it names none). */
export function machineOf(id) {
  return chan(id)?.machine ?? "";
}

/** Markup: the channel's name with its id in small print beside it when they differ,
 *  e.g. "drive end, horizontal p1-de-h". `withMachine` puts the machine's name first. */
export function chLabel(id, { withMachine = false } = {}) {
  const name = chName(id);
  const m = withMachine && machineOf(id) ? html`${machineName(machineOf(id))} · ` : "";
  return name === id
    ? html`${m}<span class="cname">${id}</span>`
    : html`${m}<span class="cname">${name}</span> <span class="cid">${id}</span>`;
}

/** Plain text for a tooltip: "Cooling-water pump 1 · drive end, horizontal (p1-de-h)". */
export function chTitle(id) {
  const name = chName(id);
  const m = machineOf(id) ? `${machineName(machineOf(id))} · ` : "";
  return `${m}${name === id ? id : `${name} (${id})`}`;
}

/** Markup: a machine's name with its id in small print when they differ. */
export function machineLabel(machineId) {
  const name = machineName(machineId);
  return name === machineId || !machineId ? html`${name}` : html`${name} <span class="cid">${machineId}</span>`;
}

/** Keep `el`'s text the channel's machine and display name (they come with /channels, which
 *  may answer after the page is drawn). Returns {dispose()}. */
export function watchName(el, id, app) {
  const show = () => {
    const t = chTitle(id);
    el.textContent = t === id ? "" : t;
    el.title = t;
  };
  app.addEventListener("channels", show);
  show();
  return { dispose: () => app.removeEventListener("channels", show) };
}
