// The plant overview's tiles: one small tile per machine (worst state as shape and word, its
// worst overall against its limit, its data quality), in severity order, filtered. DOM of the
// tiles only; the summaries come from plantsum.js.

import { STATES } from "./states.js";
import { fmtVal } from "./fmt.js";
import { glyph, html, setHTML } from "./dom.js";
import { chName } from "./names.js";
import { matches } from "./plantsum.js";

/** "1.52 / 1.20 g" (value against the level it is shown against), or the value alone. */
export function worstText(w) {
  if (!w) return "no value";
  const u = w.unit ? ` ${w.unit}` : "";
  const last = w.stale ? "last " : ""; // never a bare number from a channel not live
  return w.limit ? `${last}${fmtVal(w.value)} / ${fmtVal(w.limit)}${u}` : `${last}${fmtVal(w.value)}${u} (no limit)`;
}

/** "data ok", "1 of 4 no-signal", "2 of 4 not ok". */
export function qualityText(m) {
  if (!m.notOk.length) return "data ok";
  const kinds = new Set(m.notOk.map((x) => x.status));
  return `${m.notOk.length} of ${m.chans.length} ${kinds.size === 1 ? [...kinds][0] : "not ok"}`;
}

export class Tiles {
  /** `box`: the element that holds the tiles; `onPick(machineId)`: a tile was clicked. */
  constructor(box, onPick) {
    this.box = box;
    this.tiles = new Map(); // machine id → {el, st, val, q, shown: {...}}
    this.order = "";
    this.ids = "";
    this._click = (e) => {
      const t = e.target.closest(".tile[data-machine]");
      if (!t) return;
      e.preventDefault();
      onPick(t.dataset.machine);
    };
    box.addEventListener("click", this._click);
  }

  _build(ms) {
    const sorted = [...ms].sort((a, b) => (a.id < b.id ? -1 : 1));
    setHTML(this.box, sorted.map((m) => html`<a class="tile" href="#/" data-machine="${m.id}" data-state="unknown" title="${m.name} (${m.id})${m.group ? ` · ${m.group}` : ""}">
      <span class="t-st"></span><span class="t-name">${m.name}</span>
      <span class="t-val" data-role="worst"></span><span class="t-q"></span></a>`));
    this.tiles.clear();
    for (const el of this.box.querySelectorAll(".tile")) {
      this.tiles.set(el.dataset.machine, { el, st: el.querySelector(".t-st"), val: el.querySelector(".t-val"), q: el.querySelector(".t-q"), shown: {} });
    }
    this.order = "";
  }

  /** Show `ms` (sorted by severity) under the filters `f`; touches only what changed. */
  update(ms, f) {
    const ids = ms.map((m) => m.id).sort().join(",");
    if (ids !== this.ids) {
      this.ids = ids;
      this._build(ms);
    }
    for (const m of ms) {
      const t = this.tiles.get(m.id);
      const s = t.shown;
      if (s.state !== m.state) {
        s.state = m.state;
        t.el.dataset.state = m.state;
        t.el.dataset.sev = m.sev;
        t.el.className = `tile ${STATES[m.state]?.cls ?? ""}`;
        setHTML(t.st, html`${glyph(m.state)}<span class="word">${STATES[m.state]?.word ?? m.state}</span>`);
      }
      const v = worstText(m.worst);
      if (s.val !== v) {
        s.val = v;
        t.val.textContent = v;
        t.val.title = m.worst ? `worst overall: ${chName(m.worst.channel)} (${m.worst.channel})` : "";
        t.val.dataset.ratio = m.worst?.ratio ?? "";
      }
      const q = qualityText(m);
      if (s.q !== q) {
        s.q = q;
        t.q.textContent = m.name !== m.id ? `${m.id} · ${q}` : q;
        t.q.dataset.quality = m.notOk.length ? "not-ok" : "ok";
      }
      const hide = !matches(m, f);
      if (s.hidden !== hide) t.el.hidden = s.hidden = hide;
    }
    const order = ms.map((m) => m.id).join(",");
    if (order !== this.order) {
      this.order = order;
      const frag = document.createDocumentFragment();
      for (const m of ms) frag.append(this.tiles.get(m.id).el);
      this.box.append(frag);
    }
  }

  dispose() {
    this.box.removeEventListener("click", this._click);
  }
}
