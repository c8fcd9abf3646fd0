// Alarms and events on screen: alarm lists, event rows, and the acknowledge dialog (asks
// for an operator token once per browser session). Knows no view layout and no plotting.

import { ApiError, ackAlarm, token } from "./api.js";
import { fmtAge, fmtDateTime, fmtVal, fmtWhen, unitLabel } from "./fmt.js";
import { STATES, alarmStateKey, eventStateKey } from "./states.js";
import { badge, glyph, html, setHTML } from "./dom.js";
import { live, store } from "./shared.js";
import { chLabel, chTitle } from "./names.js";
import { ackMark, isShelveEvent, shelveButtons, shelveChange } from "./shelve.js";

const RANK = { danger: 3, alert: 2, latched: 1, ok: 0 };

/** The analysis profile an alarm rule watches when it is not its channel's primary one, else "". */
export function ruleProfile(a) {
  return a?.primary === false ? a.profile || "" : "";
}

/** What an alarm watches, in words: "bearing band", "overall", "1x tone", "1x band · narrow". */
export function what(a) {
  const p = ruleProfile(a);
  const w = a.kind === "overall" ? "overall" : a.kind === "signal" ? "loss of signal" : `${a.name} ${a.kind}`;
  return p ? `${w} · ${p}` : w;
}

/** Markup for the alarm list (most severe, then oldest first). */
export function alarmListHtml(alarms, { showChannel = true } = {}) {
  if (!alarms.length) return html`<li class="none"><span></span><span class="hint">${glyph("ok")} No active or latched alarms.</span></li>`;
  const now = Date.now();
  const sorted = [...alarms].sort((x, y) => RANK[alarmStateKey(y)] - RANK[alarmStateKey(x)] || (x.since_ns ?? 0) - (y.since_ns ?? 0));
  return html`${sorted.map((a) => {
    const k = alarmStateKey(a);
    const level = k === "danger" ? a.danger : k === "alert" ? a.alert : null;
    const sinceS = (now - (a.since_ns ?? 0) / 1e6) / 1000;
    const since = a.since_ns ? `since ${fmtSince(a.since_ns)}${sinceS >= 1 ? ` (${fmtAge(sinceS)})` : ""}` : "";
    const ackTxt = a.acked ? `acknowledged${a.acked_by ? ` by ${a.acked_by}` : ""}` : "not acknowledged";
    const chan = showChannel ? html`<a href="#/channel/${encodeURIComponent(a.channel)}" title="${chTitle(a.channel)}">${chLabel(a.channel, { withMachine: true })}</a> · ` : "";
    return html`<li data-rule="${a.rule}" data-state="${k}" data-acked="${a.acked ? "yes" : "no"}" class="${a.acked ? "acked" : "unacked"}">
      <span class="marks">${badge(k)}${ackMark(a)}</span>
      <span class="what">${chan}${what(a)}</span>
      <span class="acts">${a.acked ? "" : html`<button class="small" data-ack="${a.rule}">Acknowledge</button>`}${shelveButtons(a)}</span>
      <span class="sub">${a.kind === "signal" ? "no new spectra" : a.suspended ? `channel not live (${a.channel_status}); value not current` : `${fmtVal(a.value)} ${unitLabel(a.unit || "")}${level ? ` ≥ ${k} level ${fmtVal(level)}` : k === "latched" ? ` (cleared; was ${a.peak || "raised"})` : ""}`}
        · ${since} · <b>${ackTxt}</b>${a.note ? ` — “${a.note}”` : ""}</span>
    </li>`;
  })}`;
}

/** Time of day for today, date and time otherwise (site zone, with its offset). */
const fmtSince = fmtWhen;

/** One event-log row. `raises` events (into alert/danger) get an evidence button. */
export function eventRowHtml(ev, { showChannel = true } = {}) {
  const to = eventStateKey(ev.to_state);
  const from = eventStateKey(ev.from_state);
  const raising = ev.has_evidence ?? (ev.kind === "transition" && !ev.rule?.endsWith(".signal") && (RANK[to] ?? 0) > (RANK[from] ?? 0) && (to === "alert" || to === "danger"));
  const name = ev.rule?.startsWith(`${ev.channel}.`) ? ev.rule.slice(ev.channel.length + 1) : ev.rule;
  const change = ev.kind === "ack"
    ? `acknowledged`
    : isShelveEvent(ev) ? shelveChange(ev)
    : html`<span class="${STATES[from].cls}">${glyph(from, 12)} ${ev.from_state}</span> → <span class="${STATES[to].cls}">${glyph(to, 12)} <b>${ev.to_state}</b></span>`;
  return html`<tr data-event="${ev.id}">
    <td class="t">${fmtDateTime(ev.t_ns)}</td>
    ${showChannel ? html`<td><a href="#/channel/${encodeURIComponent(ev.channel)}" title="${chTitle(ev.channel)}">${chLabel(ev.channel, { withMachine: true })}</a></td>` : ""}
    <td>${name}</td>
    <td>${change}</td>
    <td>${ev.value === null || ev.value === undefined ? "" : `${fmtVal(ev.value)}${ev.level ? ` / ${fmtVal(ev.level)}` : ""} ${unitLabel(ev.unit || "")}`}</td>
    <td><span class="msg">${ev.message || ""}${byWhom(ev)}${ev.note ? `: “${ev.note}”` : ""}</span></td>
    <td>${raising ? html`<button class="small" data-evidence="${ev.id}">Evidence</button>` : ""}</td>
  </tr>`;
}

/** " — by NAME" after an event's message, unless the message already names them (an
 *  acknowledgement's says "acknowledged by NAME"). */
function byWhom(ev) {
  return ev.acked_by && !(ev.message || "").includes(`by ${ev.acked_by}`) ? ` — by ${ev.acked_by}` : "";
}

/** A compact event entry for narrow side panels (the full log uses table rows). */
export function eventItemHtml(ev, { showChannel = true } = {}) {
  const to = eventStateKey(ev.to_state);
  const from = eventStateKey(ev.from_state);
  const raising = ev.has_evidence ?? (ev.kind === "transition" && !ev.rule?.endsWith(".signal") && (RANK[to] ?? 0) > (RANK[from] ?? 0) && (to === "alert" || to === "danger"));
  const name = ev.rule?.startsWith(`${ev.channel}.`) ? ev.rule.slice(ev.channel.length + 1) : ev.rule;
  const change = ev.kind === "ack"
    ? `acknowledged${ev.acked_by ? ` by ${ev.acked_by}` : ""}`
    : isShelveEvent(ev) ? shelveChange(ev)
    : html`<span class="${STATES[from].cls}">${glyph(from, 12)}</span> ${ev.from_state} → <span class="${STATES[to].cls}">${glyph(to, 12)}</span> <b>${ev.to_state}</b>`;
  const val = ev.value === null || ev.value === undefined ? "" : ` · ${fmtVal(ev.value)}${ev.level ? ` / ${fmtVal(ev.level)}` : ""} ${unitLabel(ev.unit || "")}`;
  return html`<li data-event="${ev.id}">
    <span class="t">${fmtSince(ev.t_ns)}</span>
    <span class="what">${showChannel ? html`<a href="#/channel/${encodeURIComponent(ev.channel)}" title="${chTitle(ev.channel)}">${chLabel(ev.channel, { withMachine: true })}</a> · ` : ""}${name}</span>
    <span class="acts">${raising ? html`<button class="small" data-evidence="${ev.id}">Evidence</button>` : ""}</span>
    <span class="sub">${change}${val}${ev.note ? ` — “${ev.note}”` : ""}</span>
  </li>`;
}

export function eventHeadHtml({ showChannel = true } = {}) {
  return html`<tr><th>time</th>${showChannel ? html`<th>channel</th>` : ""}<th>rule</th><th>change</th><th>value / level</th><th>message</th><th></th></tr>`;
}

// --- the acknowledge dialog -------------------------------------------------------------
let pending = null;

export function setupAck() {
  const dlg = document.getElementById("dlg-ack");
  const form = document.getElementById("ack-form");
  const msg = document.getElementById("ack-msg");
  const tokIn = document.getElementById("ack-token");
  document.getElementById("ack-forget").addEventListener("click", () => {
    token.set("");
    showTokenRow();
  });
  form.addEventListener("submit", async (e) => {
    if (e.submitter?.value === "cancel") return;
    e.preventDefault();
    if (!pending) return;
    const typed = tokIn.value.trim();
    const tok = typed || token.get();
    const btn = document.getElementById("ack-submit");
    btn.disabled = true;
    msg.className = "ack-msg";
    msg.textContent = "sending…";
    try {
      await ackAlarm(pending.rule, document.getElementById("ack-note").value, tok);
      if (typed) {
        token.set(typed); // acknowledged as the typed token's holder: signed in as them now
        window.dispatchEvent(new CustomEvent("quaver-token-changed"));
      }
      msg.className = "ack-msg ok";
      msg.textContent = "Acknowledged.";
      live.refreshPlant();
      setTimeout(() => dlg.open && dlg.close("done"), 700);
    } catch (err) {
      msg.textContent = ackError(err);
      if (err instanceof ApiError && (err.status === 401 || err.status === 403)) {
        showTokenRow(true); // another token may do it; the session keeps its own for reading
        tokIn.focus();
      }
    } finally {
      btn.disabled = false;
    }
  });
  document.addEventListener("click", (e) => {
    const b = e.target.closest("[data-ack]");
    if (!b) return;
    e.preventDefault();
    const rule = b.dataset.ack;
    const a = (store.alarms || []).find((x) => x.rule === rule) || { rule };
    openAck(a);
  });
}

function ackError(err) {
  if (!(err instanceof ApiError)) return "The service is not reachable; nothing was acknowledged.";
  switch (err.status) {
    case 401: return "Refused (401): a valid operator token is needed. Enter it in the Operator token field above.";
    case 403: return "Refused (403): this token may not acknowledge alarms (operator role needed). Enter an operator token in the field above.";
    case 404: return `Refused (404): ${err.detail}`;
    case 409: return `Nothing to acknowledge (409): ${err.detail}`;
    default: return `Refused (${err.status}): ${err.detail}`;
  }
}

function showTokenRow(ask = false) {
  const have = !!token.get() && !ask;
  document.getElementById("ack-token-row").hidden = have;
  document.getElementById("ack-forget").hidden = !have;
  document.getElementById("ack-token").value = "";
}

export function openAck(a) {
  pending = a;
  const dlg = document.getElementById("dlg-ack");
  const k = alarmStateKey(a);
  setHTML(document.getElementById("ack-what"), a.channel
    ? html`${badge(k)} <b>${a.channel}</b> · ${what(a)} — ${fmtVal(a.value)} ${unitLabel(a.unit || "")}`
    : a.rule);
  document.getElementById("ack-note").value = "";
  const msg = document.getElementById("ack-msg");
  msg.textContent = "";
  msg.className = "ack-msg";
  showTokenRow();
  dlg.showModal();
  (token.get() ? document.getElementById("ack-note") : document.getElementById("ack-token")).focus();
}
