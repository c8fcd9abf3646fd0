// Running speed on the dashboard: one small grey line "1 234 r/min · tacho" wherever a channel
// has a speed (its channel page, its plant card), coloured only when the speed is not known
// (no signal, sensor fault); and the page of a tacho channel, which has no spectrum: its
// speed, status and pulse counts, the channels it gives their speed to.
// Reads /channels (the shell's store), the bands messages' `speed` and GET /channels/{id}.

import { API, getJSON } from "./api.js";
import { fmtClock, fmtHz, fmtVal } from "./fmt.js";
import { badge, html, setHTML, updateHTML } from "./dom.js";
import { chName } from "./names.js";
import { app, channelState, store } from "./shared.js";

const TACHO_POLL_MS = 1000;
const WORDS = { ok: "", "no-signal": "no signal", "sensor-fault": "sensor fault" };

/** Whether channel `c` (a /channels entry) is a tacho: it measures speed, has no spectrum. */
export const isTacho = (c) => c?.kind === "tacho";

/**
 * The newest running speed of channel `c`: {rpm, source, status, varied, from, t_ns} or null.
 * A vibration channel's comes with each bands message of its primary profile (the frame's
 * speed), else from /channels; a tacho's from /channels, its rpm from the newest frame of a
 * channel it feeds when that is newer (same shaft, the frame's mean speed).
 */
export function speedOf(c) {
  if (!c?.speed) return null;
  const own = { ...c.speed, t_ns: c.latest?.timestamp_ns ?? 0 };
  const framed = (id) => {
    const m = store.bands.get(id);
    return m?.speed ? { ...m.speed, t_ns: m.timestamp_ns ?? 0 } : null;
  };
  if (!isTacho(c)) {
    const f = framed(c.id);
    return f && f.t_ns >= own.t_ns ? { ...own, ...f } : own;
  }
  if (own.status !== "ok") return own;
  for (const x of store.channels) {
    if (x.speed?.from !== c.id) continue;
    const f = framed(x.id);
    if (f && f.status === "ok" && f.rpm != null) return { ...own, rpm: f.rpm, t_ns: f.t_ns };
  }
  return own;
}

/** A tacho's value in the sidebar: "1 234 r/min" while its speed is ok, else what its speed
 *  status says ("no signal", "sensor fault"); `fallback` (the channel state's word) without
 *  a speed at all. */
export function sideSpeedText(c, fallback) {
  const sp = c?.speed;
  if (!sp) return fallback;
  if (sp.status === "ok" && sp.rpm != null && Number.isFinite(sp.rpm)) return `${Math.round(sp.rpm)} r/min`;
  return WORDS[sp.status] || fallback;
}

/** "1 234 r/min · tacho" (with "· no signal" or "· varied" when so); "" for no speed. */
export function speedText(sp) {
  if (!sp) return "";
  const rpm = sp.rpm != null && Number.isFinite(sp.rpm) ? `${Math.round(sp.rpm)} r/min` : "— r/min";
  const parts = [rpm, sp.source || ""];
  if (WORDS[sp.status]) parts.push(WORDS[sp.status]);
  else if (sp.varied) parts.push("varied within the frame");
  return parts.filter(Boolean).join(" · ");
}

/** The speed line's markup: grey; `abn` (coloured) when the speed is not known. */
export function speedHtml(sp) {
  if (!sp) return "";
  const abn = sp.status && sp.status !== "ok";
  const tip = sp.source === "tacho" ? `measured by the tacho${sp.from ? ` ${sp.from}` : ""}`
    : sp.source === "estimated" ? "estimated from the 1X line of the spectrum"
      : sp.source === "manual" ? "written by hand" : "the configured speed";
  return html`<span class="speed${abn ? " abn" : ""}" data-role="speed" data-rpm="${sp.rpm ?? ""}" data-source="${sp.source ?? ""}" data-status="${sp.status ?? ""}" title="running speed, ${tip}">${speedText(sp)}</span>`;
}

/**
 * A plant card of channel `c`: its speed line under the headline (made on first use), and
 * for a tacho the headline itself is the speed (it has no overall).
 */
export function showSpeed(card, c) {
  const sp = speedOf(c);
  let el = card.querySelector(":scope > .speedline");
  if (!el && sp) {
    el = document.createElement("div");
    el.className = "speedline";
    card.querySelector(".headline")?.after(el);
  }
  if (el) updateHTML(el, speedHtml(sp));
  if (!isTacho(c)) return;
  card.dataset.kind = "tacho";
  const o = card.querySelector(".overall");
  if (o) o.textContent = sp?.rpm != null ? String(Math.round(sp.rpm)) : WORDS[sp?.status] || "—";
  const u = card.querySelector(".unit");
  if (u) u.textContent = sp?.rpm != null ? "r/min" : "";
  const w = card.querySelector(".what");
  if (w) w.textContent = "running speed";
  for (const cv of card.querySelectorAll("canvas")) cv.hidden = true; // no spectrum, no overall
}

/** The channel page of tacho channel `id` in `root`. Returns {unmount(), probe}. */
export function mountTacho(root, id) {
  const chan = () => store.channels.find((c) => c.id === id);
  setHTML(root, html`
    <div class="ch-head">
      <h1 id="ch-id">${id}</h1><span class="ch-name" id="ch-name"></span><span class="desc" id="ch-desc"></span><span id="ch-badge"></span><span class="hint" id="ch-fault"></span>
      <div class="big"><span class="overall" id="tacho-rpm" data-role="rpm">—</span><span class="unit" id="tacho-unit"></span></div>
    </div>
    <div class="speedline" id="ch-speed"></div>
    <dl class="facts" id="ch-facts"></dl>
    <p class="hint">A tacho channel measures the shaft's speed from its pulses: it has no spectrum, bands or overall. The channels it gives their speed to place their orders at it, frame by frame.</p>`);
  const $ = (s) => root.querySelector(s);
  let alive = true;
  let timer = 0;
  let fresh = null; // the newest GET /channels/{id}, newer than the shell's list

  function render() {
    const c = fresh ?? chan();
    if (!c) return;
    setText($("#ch-name"), c.name && c.name !== c.id ? chName(id) : "");
    setText($("#ch-desc"), c.description || "");
    updateHTML($("#ch-badge"), badge(channelState(c)));
    setText($("#ch-fault"), c.fault || "");
    const sp = fresh?.speed ? { ...fresh.speed } : speedOf(c);
    const rpm = sp?.rpm != null && Number.isFinite(sp.rpm) ? sp.rpm : null;
    const big = $("#tacho-rpm");
    setText(big, rpm !== null ? String(Math.round(rpm)) : WORDS[sp?.status] || "—");
    big.dataset.rpm = rpm ?? "";
    big.dataset.status = sp?.status ?? "";
    big.classList.toggle("abn", !!sp && sp.status !== "ok");
    setText($("#tacho-unit"), rpm !== null ? `r/min · ${fmtHz(rpm / 60)}` : "");
    updateHTML($("#ch-speed"), speedHtml(sp));
    const p = sp?.pulses;
    const fed = store.channels.filter((x) => x.speed?.from === id);
    const f = [["speed status", WORDS[sp?.status] || sp?.status || "—"]];
    if (p) f.push(["pulses", `${p.accepted} accepted · ${p.extra} extra · ${p.missing} missing (bridged) · ${p.faults} faults`]);
    if (fed.length) f.push(["speed of", html`${fed.map((x, i) => html`${i ? ", " : ""}<a href="#/channel/${encodeURIComponent(x.id)}">${chName(x.id)}</a>`)}`]);
    f.push(["sample rate", `${fmtVal(c.sample_rate_hz, 5)} Hz`]);
    f.push(["status", c.status]);
    f.push(["updated", fresh ? fmtClock(Date.now() * 1e6) : "—"]);
    updateHTML($("#ch-facts"), f.map(([k, v]) => html`<div><dt>${k}</dt><dd>${v}</dd></div>`));
  }

  async function poll() {
    try {
      const c = await getJSON(`${API}/channels/${encodeURIComponent(id)}`, { timeoutMs: 4000 });
      if (!alive) return;
      fresh = c;
      render();
    } catch {
      /* unreachable: the shell says so; keep what is shown */
    }
    if (alive) timer = setTimeout(poll, TACHO_POLL_MS);
  }

  const on = () => alive && render();
  app.addEventListener("channels", on);
  render();
  poll();
  return {
    unmount() {
      alive = false;
      clearTimeout(timer);
      app.removeEventListener("channels", on);
    },
    probe: { tacho: true, id },
  };
}

function setText(el, text) {
  if (el.textContent !== text) el.textContent = text;
}
