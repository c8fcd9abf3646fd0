// Shelving and acknowledge-all on screen: the ACK/UNACK and SHELVED marks (shape + word), the
// shelve, unshelve and acknowledge-all dialogs (POST /alarms/{rule}/shelve, /unshelve,
// /alarms/ack) and shelve rows of the event log. Knows no view layout and no plotting.

import { API, ApiError, getJSON, postJSON, token } from "./api.js";
import { fmtDateTime, fmtWhen, zoneLabel } from "./fmt.js";
import { html, setHTML, trusted } from "./dom.js";
import { live } from "./shared.js";
import { chTitle } from "./names.js";

// Marks: a shape and a word each, never colour alone. Unacknowledged: a filled square in a
// bold frame, "UNACK"; acknowledged: a hollow square with a tick, thin dotted frame, "ACK";
// shelved: a bracketed bar (a shelf), "SHELVED".
const SVG = {
  unack: '<rect x="3" y="3" width="10" height="10" fill="currentColor"/>',
  ack: '<rect x="2.8" y="2.8" width="10.4" height="10.4" fill="none" stroke="currentColor" stroke-width="1.4"/><path d="M5 8.2 7.2 10.4 11.2 5.6" fill="none" stroke="currentColor" stroke-width="1.6"/>',
  shelved: '<path d="M2 3v10M14 3v10M2 9.5h12" fill="none" stroke="currentColor" stroke-width="1.8"/><rect x="4.5" y="5" width="7" height="3.2" fill="currentColor"/>',
};
const markGlyph = (k) => trusted(`<svg class="glyph" viewBox="0 0 16 16" width="13" height="13" aria-hidden="true">${SVG[k]}</svg>`);

/** Markup: the acknowledgement mark of an active alarm ("UNACK" / "ACK"); nothing when normal. */
export function ackMark(a) {
  if (!a || (a.state === "normal" && !a.latched)) return "";
  return a.acked
    ? html`<span class="ackmark ack" data-ack-state="ack" title="acknowledged${a.acked_by ? ` by ${a.acked_by}` : ""}">${markGlyph("ack")}ACK</span>`
    : html`<span class="ackmark unack" data-ack-state="unack" title="not acknowledged">${markGlyph("unack")}UNACK</span>`;
}

/** Markup: the SHELVED mark of a shelved rule, with until when and why in its title. */
export function shelvedMark(a) {
  if (!a?.shelved) return "";
  return html`<span class="shelvemark" data-shelved="yes" title="shelved by ${a.shelved_by} until ${fmtDateTime(a.shelved_until_ns)}: ${a.shelve_reason}">${markGlyph("shelved")}SHELVED</span>`;
}

/** Markup: "until 14:05:00 +01:00 — reason (by who)" for a shelved rule. */
export function shelvedNote(a) {
  if (!a?.shelved) return "";
  return html`<span class="shelve-note">until ${fmtWhen(a.shelved_until_ns)} — “${a.shelve_reason}” (by ${a.shelved_by})</span>`;
}

/** Markup: a Shelve or Unshelve button for a rule (operators; others are refused by the service). */
export function shelveButtons(a) {
  return a.shelved
    ? html`<button class="small" data-unshelve="${a.rule}">Unshelve</button>`
    : html`<button class="small quiet" data-shelve="${a.rule}">Shelve…</button>`;
}

const SHELVE_WORDS = { shelve: "shelved", unshelve: "unshelved", "shelve-expired": "shelve ended" };
export function isShelveEvent(ev) {
  return ev.kind in SHELVE_WORDS;
}

/** Markup for the "change" of a shelve event in the event log. */
export function shelveChange(ev) {
  return html`<span class="shelvemark" data-event-kind="${ev.kind}">${markGlyph("shelved")}${SHELVE_WORDS[ev.kind].toUpperCase()}</span>${ev.acked_by ? ` by ${ev.acked_by}` : ""}`;
}

// --- dialogs -----------------------------------------------------------------------------
const DURATIONS = [["30 min", 1800], ["1 h", 3600], ["2 h", 7200], ["4 h", 14400], ["8 h", 28800],
  ["12 h", 43200], ["1 day", 86400], ["2 days", 172800], ["7 days (the most)", 604800]];

function dialogHtml() {
  return html`
<dialog id="dlg-shelve" aria-labelledby="shelve-title">
  <form method="dialog" id="shelve-form">
    <h2 id="shelve-title">Shelve alarm rule</h2>
    <p class="ack-what" id="shelve-what"></p>
    <p class="hint">A shelved rule still evaluates and logs, but its alarm is not shown as active until the shelve ends. At most 7 days.</p>
    <label>Reason (required)<textarea id="shelve-reason" rows="2" maxlength="1000" required placeholder="why this alarm is silenced"></textarea></label>
    <label>For <select id="shelve-for">${DURATIONS.map(([t, s]) => html`<option value="${s}"${s === 3600 ? " selected" : ""}>${t}</option>`)}<option value="until">until…</option></select></label>
    <label id="shelve-until-row" hidden>Until (site time, <span id="shelve-zone"></span>)<input id="shelve-until" type="datetime-local" step="60"></label>
    <label class="token-row" hidden>Operator token<input class="op-token" type="password" autocomplete="off" spellcheck="false"></label>
    <p class="ack-msg" id="shelve-msg" role="alert"></p>
    <div class="buttons">
      <button value="cancel" formnovalidate>Cancel</button>
      <button type="submit" id="shelve-submit" class="primary" value="ok">Shelve</button>
    </div>
  </form>
</dialog>
<dialog id="dlg-ackall" aria-labelledby="ackall-title">
  <form method="dialog" id="ackall-form">
    <h2 id="ackall-title">Acknowledge all</h2>
    <p class="ack-what" id="ackall-what"></p>
    <label>Note (optional)<textarea id="ackall-note" rows="2" maxlength="1000" placeholder="what you saw or did"></textarea></label>
    <label class="token-row" hidden>Operator token<input class="op-token" type="password" autocomplete="off" spellcheck="false"></label>
    <p class="ack-msg" id="ackall-msg" role="alert"></p>
    <div class="buttons">
      <button value="cancel" formnovalidate>Cancel</button>
      <button type="submit" id="ackall-submit" class="primary" value="ok">Acknowledge all</button>
    </div>
  </form>
</dialog>`;
}

let shelving = null; // the rule being shelved
let acking = null; // {body, text} of the acknowledge-all being asked

/** Put the dialogs in the page and listen for their buttons ([data-shelve], [data-unshelve],
 *  [data-ackall] anywhere in the page). Called once by console.js. */
export function setupShelve() {
  const holder = document.createElement("div");
  setHTML(holder, dialogHtml());
  document.body.append(...holder.children);
  const forSel = document.getElementById("shelve-for");
  forSel.addEventListener("change", () => {
    document.getElementById("shelve-until-row").hidden = forSel.value !== "until";
  });
  document.getElementById("shelve-form").addEventListener("submit", (e) => submit(e, "shelve", sendShelve));
  document.getElementById("ackall-form").addEventListener("submit", (e) => submit(e, "ackall", sendAckAll));
  document.addEventListener("click", (e) => {
    const s = e.target.closest("[data-shelve]");
    if (s) {
      e.preventDefault();
      openShelve(s.dataset.shelve);
      return;
    }
    const u = e.target.closest("[data-unshelve]");
    if (u) {
      e.preventDefault();
      unshelve(u.dataset.unshelve, u);
    }
  });
}

function openShelve(rule) {
  shelving = rule;
  const channel = rule.split(".")[0];
  setHTML(document.getElementById("shelve-what"), html`<b>${rule}</b><br><span class="hint">${chTitle(channel)}</span>`);
  document.getElementById("shelve-reason").value = "";
  document.getElementById("shelve-for").value = "3600";
  document.getElementById("shelve-until-row").hidden = true;
  document.getElementById("shelve-zone").textContent = zoneLabel();
  reset("shelve");
  document.getElementById("dlg-shelve").showModal();
  document.getElementById("shelve-reason").focus();
}

/** Ask to acknowledge every unacknowledged alarm of `body` ({rules} or {machine}); `text`
 *  says what in words ("3 alarms of Cooling-water pump 1"). */
export function openAckAll(body, text) {
  acking = { body };
  setHTML(document.getElementById("ackall-what"), html`${text}`);
  document.getElementById("ackall-note").value = "";
  reset("ackall");
  document.getElementById("dlg-ackall").showModal();
  document.getElementById("ackall-note").focus();
}

function reset(id) {
  const dlg = document.getElementById(`dlg-${id}`);
  const msg = document.getElementById(`${id}-msg`);
  msg.className = "ack-msg";
  msg.textContent = "";
  dlg.querySelector(".token-row").hidden = !!token.get();
  dlg.querySelector(".op-token").value = "";
}

async function submit(e, id, send) {
  if (e.submitter?.value === "cancel") return;
  e.preventDefault();
  const dlg = document.getElementById(`dlg-${id}`);
  const msg = document.getElementById(`${id}-msg`);
  const btn = document.getElementById(`${id}-submit`);
  const tok = dlg.querySelector(".op-token").value.trim() || token.get();
  btn.disabled = true;
  msg.className = "ack-msg";
  msg.textContent = "sending…";
  try {
    msg.textContent = await send(tok);
    msg.className = "ack-msg ok";
    live.refreshPlant();
    window.dispatchEvent(new CustomEvent("quaver-rules-changed"));
    setTimeout(() => dlg.open && dlg.close("done"), 700);
  } catch (err) {
    msg.textContent = refusal(err);
    if (err instanceof ApiError && (err.status === 401 || err.status === 403)) {
      dlg.querySelector(".token-row").hidden = false; // another token may do it
      dlg.querySelector(".op-token").focus();
    }
  } finally {
    btn.disabled = false;
  }
}

async function sendShelve(tok) {
  const reason = document.getElementById("shelve-reason").value.trim();
  if (!reason) throw new Error("A reason is required.");
  const v = document.getElementById("shelve-for").value;
  const body = { reason };
  if (v === "until") {
    const t = document.getElementById("shelve-until").value; // site-local wall time, no offset
    if (!t) throw new Error("Choose the end time.");
    body.until = t.length === 16 ? `${t}:00` : t;
  } else body.duration_s = Number(v);
  const j = await postJSON(`alarms/${encodeURIComponent(shelving)}/shelve`, body, tok);
  return `Shelved until ${fmtDateTime(j.alarm.shelved_until_ns)}.`;
}

async function sendAckAll(tok) {
  const note = document.getElementById("ackall-note").value;
  const j = await postJSON("alarms/ack", { ...acking.body, note }, tok);
  return j.acknowledged ? `Acknowledged ${j.acknowledged} alarm${j.acknowledged > 1 ? "s" : ""}.` : "Nothing left to acknowledge.";
}

async function unshelve(rule, button) {
  button.disabled = true;
  try {
    await postJSON(`alarms/${encodeURIComponent(rule)}/unshelve`, {});
    live.refreshPlant();
    window.dispatchEvent(new CustomEvent("quaver-rules-changed"));
  } catch (err) {
    button.disabled = false;
    button.title = refusal(err);
    button.textContent = "Unshelve (refused)";
  }
}

function refusal(err) {
  if (!(err instanceof ApiError)) return err instanceof TypeError ? "The service is not reachable; nothing was changed." : err.message;
  switch (err.status) {
    case 401: return "Refused (401): a valid operator token is needed; enter it above.";
    case 403: return "Refused (403): this token may not do this (operator role needed); enter an operator token above.";
    default: return `Refused (${err.status}): ${err.detail}`;
  }
}


// --- the shelved list and acknowledge-all of the active list (the Alarms & events view) ----

/** Fill `el` (a panel) with the shelved rules (GET /alarms/shelved) and keep it current; its
 *  header gets an "Acknowledge all" button for the active alarms in `activeRules()`.
 *  Returns {load(), dispose()}. */
export function shelvedPanel(el, activeRules) {
  setHTML(el, html`<header>Shelved <span class="hint">still evaluated and logged, not shown as active</span></header><ul class="alarms" id="shelved-list"></ul>`);
  let busy = false;
  let gone = false;
  async function load() {
    if (busy || gone) return;
    busy = true;
    try {
      const list = await getJSON(`${API}/alarms/shelved`);
      const ul = el.querySelector("#shelved-list");
      if (!ul) return;
      updateList(ul, list);
    } catch {
      /* keep what is shown */
    } finally {
      busy = false;
    }
  }
  const changed = () => load();
  window.addEventListener("quaver-rules-changed", changed);
  load();
  return {
    load,
    ackAllButton() {
      const ids = activeRules();
      return ids.length
        ? html`<button class="small" data-ackall-active>Acknowledge all (${ids.length})</button>`
        : "";
    },
    dispose() {
      gone = true;
      window.removeEventListener("quaver-rules-changed", changed);
    },
  };
}

function updateList(ul, list) {
  const rows = list.map((a) => html`<li data-rule="${a.rule}" data-shelved="yes" data-state="${a.state}">
      <span class="marks">${shelvedMark(a)}</span>
      <span class="what"><a href="#/channel/${encodeURIComponent(a.channel)}" title="${chTitle(a.channel)}">${chTitle(a.channel)}</a> · ${a.kind === "overall" ? "overall" : a.kind === "signal" ? "loss of signal" : `${a.name} ${a.kind}`} <span class="hint">(${a.state})</span></span>
      <span class="acts">${shelveButtons(a)}</span>
      <span class="sub">${shelvedNote(a)}</span>
    </li>`);
  setHTML(ul, rows.length ? rows : html`<li class="none"><span></span><span class="hint">Nothing is shelved.</span></li>`);
}
