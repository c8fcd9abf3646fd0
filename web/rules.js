// The rules view (#/rules): every alarm rule with its channel and machine, levels, hysteresis,
// delays, latch, value and state (ACK/UNACK, SHELVED), filtered by machine and state (the
// service filters: GET /api/v1/rules), searched and sorted here, paged; acknowledge-all of
// what is shown, shelve and unshelve per rule. No plotting.

import { API, getJSON, qs } from "./api.js";
import { fmtVal, fmtWhen, unitLabel } from "./fmt.js";
import { badge, html, setHTML, updateHTML } from "./dom.js";
import { what } from "./alarms.js";
import { alarmStateKey } from "./states.js";
import { ackMark, openAckAll, shelveButtons, shelvedMark, shelvedNote } from "./shelve.js";
import { chLabel, chTitle } from "./names.js";
import { app, live, store } from "./shared.js";

const PAGE = 100; // rows per page: hundreds of rules stay readable and quick to draw
const STATES = [["", "any state"], ["active", "active"], ["unacked", "active, not acknowledged"],
  ["acked", "active, acknowledged"], ["danger", "danger"], ["alert", "alert"], ["latched", "latched"],
  ["normal", "normal"], ["shelved", "shelved"]];
// column → [header, sort key of a row]
const COLS = {
  state: ["state", (r) => -(r.shelved ? 0.5 : { danger: 4, alert: 3, latched: 2 }[alarmStateKey(r)] ?? 0) - (r.acked ? 0 : 0.1)],
  machine: ["machine", (r) => r.machine_name || ""],
  channel: ["channel", (r) => r.channel_name || r.channel],
  watches: ["watches", (r) => what(r)],
  alert: ["alert", (r) => r.alert ?? Infinity],
  danger: ["danger", (r) => r.danger ?? Infinity],
  hyst: ["hyst.", (r) => r.hysteresis],
  delays: ["on / off delay", (r) => r.on_delay_s * 1e6 + r.off_delay_s],
  latch: ["latch", (r) => (r.latch ? 0 : 1)],
  value: ["value", (r) => r.value ?? -Infinity],
  since: ["since", (r) => r.since_ns ?? 0],
};

export function mount(root) {
  const params = new URLSearchParams(location.hash.split("?")[1] || "");
  const f = {
    machine: params.get("machine") || "",
    state: params.get("state") || "",
    q: params.get("q") || "",
    sort: params.get("sort") || "state",
    desc: params.get("desc") === "1",
    page: 0,
  };
  setHTML(root, html`
    <div class="ch-head"><h1>Alarm rules</h1><span class="hint" id="rl-sum"></span></div>
    <section class="panel rules-panel">
      <header class="rl-filters">
        <label class="hint">machine <select id="rl-machine"><option value="">all</option></select></label>
        <label class="hint">state <select id="rl-state">${STATES.map(([v, t]) => html`<option value="${v}">${t}</option>`)}</select></label>
        <label class="hint">search <input id="rl-q" type="search" placeholder="channel, rule, band…" size="18"></label>
        <button class="small" id="rl-ackall" disabled>Acknowledge all shown</button>
      </header>
      <div class="rl-scroll"><table class="rules" id="rl-table">
        <thead><tr>${Object.entries(COLS).map(([k, [t]]) => html`<th data-sort="${k}" tabindex="0" aria-sort="none">${t}</th>`)}<th></th></tr></thead>
        <tbody id="rl-rows"><tr><td colspan="12" class="empty">loading…</td></tr></tbody>
      </table></div>
      <div class="pager"><button id="rl-prev" class="small">‹ previous</button><span class="hint" id="rl-page"></span><button id="rl-next" class="small">next ›</button><span class="hint" id="rl-state-msg"></span></div>
    </section>`);
  const $ = (s) => root.querySelector(s);
  $("#rl-state").value = f.state;
  $("#rl-q").value = f.q;
  let rows = [];
  let shown = [];
  let busy = false;
  let disposed = false;

  live.subscribe({ channels: "*", kinds: ["status", "alarms"], max_rate_hz: 1 });

  function fillMachines() {
    const sel = $("#rl-machine");
    const m = new Map();
    for (const c of store.channels) if (c.machine && !m.has(c.machine)) m.set(c.machine, c.machine_name || c.machine);
    const key = [...m.keys()].join(",");
    if (sel.dataset.ids === key) return;
    sel.dataset.ids = key;
    setHTML(sel, html`<option value="">all</option>${[...m].map(([id, name]) => html`<option value="${id}">${name}${name !== id ? ` (${id})` : ""}</option>`)}`);
    sel.value = f.machine;
  }

  function keepHash() {
    const h = `#/rules${qs({ machine: f.machine, state: f.state, q: f.q, sort: f.sort === "state" ? "" : f.sort, desc: f.desc ? 1 : "" })}`;
    if (location.hash !== h) history.replaceState(null, "", h);
  }

  function render() {
    const q = f.q.trim().toLowerCase();
    const hit = (r) => !q || [r.rule, r.channel, r.channel_name, r.machine, r.machine_name, r.name, r.profile, r.shelve_reason]
      .some((s) => (s || "").toLowerCase().includes(q));
    const key = COLS[f.sort]?.[1] ?? COLS.state[1];
    shown = rows.filter(hit);
    shown.sort((a, b) => {
      const x = key(a), y = key(b);
      const c = typeof x === "string" ? x.localeCompare(y) : x - y;
      return (f.desc ? -c : c) || a.rule.localeCompare(b.rule);
    });
    const pages = Math.max(1, Math.ceil(shown.length / PAGE));
    f.page = Math.min(f.page, pages - 1);
    const page = shown.slice(f.page * PAGE, (f.page + 1) * PAGE);
    updateHTML($("#rl-rows"), page.length ? page.map(rowHtml) : html`<tr><td colspan="12" class="empty">No rules match.</td></tr>`);
    for (const th of root.querySelectorAll("th[data-sort]")) {
      th.setAttribute("aria-sort", th.dataset.sort === f.sort ? (f.desc ? "descending" : "ascending") : "none");
    }
    $("#rl-page").textContent = `${shown.length ? f.page * PAGE + 1 : 0}–${f.page * PAGE + page.length} of ${shown.length}`;
    $("#rl-prev").disabled = f.page === 0;
    $("#rl-next").disabled = f.page >= pages - 1;
    const unacked = shown.filter((r) => r.state !== "normal" && !r.acked);
    const b = $("#rl-ackall");
    b.disabled = !unacked.length;
    b.textContent = `Acknowledge all shown (${unacked.length})`;
    const nAct = rows.filter((r) => r.state !== "normal").length;
    const nSh = rows.filter((r) => r.shelved).length;
    $("#rl-sum").textContent = `${rows.length} rule${rows.length === 1 ? "" : "s"}${f.machine || f.state ? " match the filters" : ""} · ${nAct} active · ${nSh} shelved`;
  }

  async function load() {
    if (busy || disposed) return;
    busy = true;
    try {
      const j = await getJSON(`${API}/rules${qs({ machine: f.machine, state: f.state })}`);
      if (disposed) return;
      rows = j;
      $("#rl-state-msg").textContent = "";
      render();
    } catch (e) {
      if (!disposed) $("#rl-state-msg").textContent = `could not load the rules: ${e.message}`;
    } finally {
      busy = false;
    }
  }

  const refilter = () => {
    f.page = 0;
    keepHash();
    load();
  };
  $("#rl-machine").addEventListener("change", (e) => {
    f.machine = e.target.value;
    refilter();
  });
  $("#rl-state").addEventListener("change", (e) => {
    f.state = e.target.value;
    refilter();
  });
  $("#rl-q").addEventListener("input", (e) => {
    f.q = e.target.value;
    f.page = 0;
    keepHash();
    render();
  });
  const sortBy = (th) => {
    if (f.sort === th.dataset.sort) f.desc = !f.desc;
    else [f.sort, f.desc] = [th.dataset.sort, false];
    keepHash();
    render();
  };
  for (const th of root.querySelectorAll("th[data-sort]")) {
    th.addEventListener("click", () => sortBy(th));
    th.addEventListener("keydown", (e) => (e.key === "Enter" || e.key === " ") && (e.preventDefault(), sortBy(th)));
  }
  $("#rl-prev").addEventListener("click", () => {
    f.page = Math.max(0, f.page - 1);
    render();
  });
  $("#rl-next").addEventListener("click", () => {
    f.page += 1;
    render();
  });
  $("#rl-ackall").addEventListener("click", () => {
    const ids = shown.filter((r) => r.state !== "normal" && !r.acked).map((r) => r.rule);
    const where = f.machine ? ` of ${root.querySelector(`#rl-machine option[value="${CSS.escape(f.machine)}"]`)?.textContent || f.machine}` : "";
    openAckAll({ rules: ids }, `${ids.length} unacknowledged alarm${ids.length === 1 ? "" : "s"}${where} shown in this view${ids.length <= 6 ? `: ${ids.join(", ")}` : ""}`);
  });

  const on = {
    channels: () => {
      fillMachines();
      render(); // names may have come
    },
    "alarm-event": () => load(),
    tick: (() => {
      let n = 0;
      return () => n++ % 3 || load();
    })(),
  };
  for (const [k, fn] of Object.entries(on)) app.addEventListener(k, fn);
  const changed = () => load();
  window.addEventListener("quaver-rules-changed", changed);
  fillMachines();
  load();
  return {
    unmount() {
      disposed = true;
      for (const [k, fn] of Object.entries(on)) app.removeEventListener(k, fn);
      window.removeEventListener("quaver-rules-changed", changed);
    },
    probe: { view: "rules", get filters() { return { ...f }; }, get shown() { return shown.map((r) => r.rule); } },
  };
}

function levelText(r, v) {
  if (v === null || v === undefined) return r.learning ? "learning" : "—";
  return fmtVal(v);
}

/** A level with its unit; a loss-of-signal rule shows "on loss" under the level it raises. */
function levelCell(r, v) {
  if (r.kind === "signal") return v ? "on loss" : "";
  const t = levelText(r, v);
  return v === null || v === undefined ? t : html`${t} <span class="u">${unitLabel(r.unit || "")}</span>`;
}

function rowHtml(r) {
  const k = alarmStateKey(r);
  const base = r.levels === "baseline" && r.baseline
    ? html` <span class="hint" title="baseline-derived: ${JSON.stringify(r.baseline)}">(baseline)</span>` : "";
  const value = r.kind === "signal" ? (r.value ? "lost" : "present") : r.suspended ? `not live (${r.channel_status})` : `${fmtVal(r.value)}`;
  return html`<tr data-rule="${r.rule}" data-state="${k}" data-machine="${r.machine}" data-channel="${r.channel}" data-acked="${r.acked ? "yes" : "no"}" data-shelved="${r.shelved ? "yes" : "no"}" class="${r.shelved ? "shelved" : ""}">
    <td class="st">${badge(k)}${ackMark(r)}${shelvedMark(r)}</td>
    <td title="${r.machine}">${r.machine_name || "—"}</td>
    <td title="${chTitle(r.channel)}"><a href="#/channel/${encodeURIComponent(r.channel)}">${chLabel(r.channel)}</a></td>
    <td>${what(r)}<span class="cid">${r.rule}</span></td>
    <td class="num">${levelCell(r, r.alert)}${base}</td>
    <td class="num">${levelCell(r, r.danger)}</td>
    <td class="num">${r.kind === "signal" ? "" : `${+(r.hysteresis * 100).toFixed(2)} %`}</td>
    <td class="num">${r.on_delay_s} s / ${r.off_delay_s} s</td>
    <td>${r.latch ? "latching" : "—"}</td>
    <td class="num">${value} ${r.kind === "signal" ? "" : unitLabel(r.unit || "")}</td>
    <td class="t">${r.since_ns ? fmtWhen(r.since_ns) : "—"}${r.shelved ? html`<br>${shelvedNote(r)}` : ""}</td>
    <td class="acts">${r.state !== "normal" && !r.acked ? html`<button class="small" data-ack="${r.rule}">Acknowledge</button>` : ""}${shelveButtons(r)}</td>
  </tr>`;
}
