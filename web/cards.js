// The plant view's detail cards: one per channel, in machine sections. Only cards on screen
// (IntersectionObserver on the machine sections: a quarter of the targets of one per card at
// four channels a machine, and the observer's cost grows with its targets) get their canvases, update and draw; updates are coalesced into one
// animation frame. DOM and drawing of the cards; the data come from shared.js.

import { API, getJSON, qs } from "./api.js";
import { fmtClock, fmtHz, fmtVal, unitLabel } from "./fmt.js";
import { STATES, STATUS_TO_STATE, isLive } from "./states.js";
import { badge, glyph, html, join, setHTML, updateHTML } from "./dom.js";
import { BandBars, bandRows, topBands } from "./bars.js";
import { Spark, SPARK_MS, overallLimits } from "./sparkline.js";
import { ruleProfile } from "./alarms.js";
import { chName, machineLabel } from "./names.js";
import { alarmsFor, channelState, fetchWatched, history, overallRing, store } from "./shared.js";
import { showSpeed } from "./speed.js";

const SEEDS_AT_ONCE = 2; // trend requests in flight while cards come into view
// A sparkline spans ten minutes on a card about 260 px wide: 2.3 s a pixel.
export const SPARK_REDRAW_MS = 2500;
const seeded = new Set(); // channels whose sparkline got its stored ten minutes (this page)

export class Cards {
  /** `box`: the element that holds the machine sections; `tops()`: unit → shared sparkline top. */
  constructor(box, tops) {
    this.box = box;
    this.tops = tops;
    this.cards = new Map(); // channel → card entry
    this.sections = new Map(); // machine → section element
    this.inSection = new Map(); // section element → its card entries
    this.visible = new Set(); // cards on screen (or nearly)
    this.order = "";
    this.disposed = false;
    this.seedQueue = [];
    this.seeding = 0;
    this.io = new IntersectionObserver((entries) => this._seen(entries), { rootMargin: "300px 0px" });
  }

  /** (Re)build every section and card shell for `chans` grouped by `machines` (ids in order). */
  build(groups) {
    this._dropSurfaces();
    this.io.disconnect();
    this.visible.clear();
    this.cards.clear();
    this.inSection.clear();
    const parts = [];
    for (const [machine, chans] of groups) {
      parts.push(html`<section class="machine" data-machine="${machine}" id="m-${machine}"><h2><span class="mglyph"></span>${machineLabel(machine)} <span class="count">${chans.length} channel${chans.length > 1 ? "s" : ""}</span><span class="mack"></span></h2><div class="cards">`);
      for (const c of chans) {
        parts.push(html`<a class="card" href="#/channel/${encodeURIComponent(c.id)}" data-channel="${c.id}" data-state="unknown">
          <div class="row1"><span class="id" title="${c.id}">${chName(c.id)}</span><span class="st"></span></div>
          ${chName(c.id) !== c.id ? html`<div class="cid">${c.id}</div>` : ""}
          <div class="desc" title="${c.description}">${c.description || ""}</div>
          <div class="headline"><span class="overall" data-role="overall">—</span><span class="unit"></span><span class="what"></span></div>
          <canvas class="spark" aria-hidden="true"></canvas>
          <canvas class="minibars" aria-hidden="true"></canvas>
          <div class="note"></div>
        </a>`);
      }
      parts.push(html`</div></section>`);
    }
    setHTML(this.box, parts);
    this.sections = new Map([...this.box.querySelectorAll("section.machine")].map((s) => [s.dataset.machine, s]));
    this.order = [...this.sections.keys()].join(",");
    for (const el of this.box.querySelectorAll(".card")) {
      const e = {
        el, id: el.dataset.channel, shown: {}, bars: null, spark: null,
        overall: el.querySelector(".overall"), unit: el.querySelector(".unit"), what: el.querySelector(".what"),
        st: el.querySelector(".st"), note: el.querySelector(".note"),
      };
      this.cards.set(e.id, e);
      this._text(e, store.byId.get(e.id)); // every card shows its value from the start
      const sec = el.closest("section.machine");
      if (!this.inSection.has(sec)) this.inSection.set(sec, []);
      this.inSection.get(sec).push(e);
    }
    for (const sec of this.inSection.keys()) this.io.observe(sec);
  }

  _seen(entries) {
    if (this.disposed) return;
    for (const en of entries) {
      for (const e of this.inSection.get(en.target) || []) this._show(e, en.isIntersecting);
    }
    this.onShow?.();
  }

  /** A card comes into view (or nearly: the observer's margin) or leaves it. */
  _show(e, on) {
    if (on) {
      this.visible.add(e);
      if (!e.spark) this._canvases(e);
      e.spark.surface.setHidden(false);
      e.bars.surface.setHidden(false);
      e.shown = {}; // whatever changed while it was away is shown now
      this._queueSeed(e.id);
    } else {
      this.visible.delete(e);
      e.spark?.surface.setHidden(true);
      e.bars?.surface.setHidden(true);
    }
  }

  /** A card's canvases, made when it first comes into view (a card never seen costs none). */
  _canvases(e) {
    e.bars = new BandBars(e.el.querySelector(".minibars"), { compact: true });
    const id = e.id;
    e.spark = new Spark(e.el.querySelector(".spark"), () => {
      const unit = store.byId.get(id)?.latest?.unit || "";
      return { pts: history(id), limits: overallLimits(id), sharedTop: this.tops().get(unit), unit, stale: store.conn === "reconnecting" };
    });
  }

  /** Fill a sparkline with the stored last ten minutes (once per channel and page). */
  _queueSeed(id) {
    if (seeded.has(id)) return;
    seeded.add(id);
    this.seedQueue.push(id);
    this._nextSeed();
  }

  async _nextSeed() {
    if (this.seeding >= SEEDS_AT_ONCE || !this.seedQueue.length || this.disposed) return;
    const id = this.seedQueue.shift();
    const c = store.byId.get(id);
    if (!c?.latest) {
      seeded.delete(id); // no value yet: try when it is seen again
      this._nextSeed();
      return;
    }
    this.seeding++;
    const until = c.latest.timestamp_ns / 1e9;
    try {
      const j = await getJSON(`${API}/channels/${encodeURIComponent(id)}/trend${qs({ name: "overall", since: until - SPARK_MS / 1000, until, step: 10 })}`);
      const ring = overallRing(id);
      for (const p of j.points || []) ring.seed(p.t_ns / 1e6, p.mean);
      if (!this.disposed) this.cards.get(id)?.spark?.surface.invalidate();
    } catch {
      /* unreachable or failing: the sparkline fills from the live values */
    } finally {
      this.seeding--;
    }
    this._nextSeed();
  }

  /** Update the cards on screen whose values or state changed (call inside one animation
   *  frame). The bars redraw when what they show changes (bars.js setRows); a sparkline, a
   *  line of ten-second means where one pixel is more than two seconds, redraws with new
   *  values at most once per SPARK_REDRAW_MS — every card in the same frame, on the page's
   *  clock — and at once when its levels, state, scale or the connection change. */
  refresh(now = performance.now()) {
    const conn = store.conn;
    const stale = conn === "reconnecting";
    const tick = Math.floor(now / SPARK_REDRAW_MS);
    for (const e of this.visible) {
      const c = store.byId.get(e.id);
      if (!c) continue;
      this._text(e, c);
      const s = e.shown;
      const bm = store.bands.get(e.id);
      const levelsChanged = store.alarms !== s.drawnAlarms; // levels come with the alarms
      const lim = overallLimits(e.id);
      // what the sparkline shows besides its points: a change of it redraws at once
      const look = `${s.state}|${conn}|${this.tops().get(c.latest?.unit || "")}|${lim.alert}|${lim.danger}`;
      if (bm?.seq !== s.bandsSeq || levelsChanged || look !== s.look) {
        s.bandsSeq = bm?.seq;
        const { named } = bandRows(e.id, bm);
        const top = topBands(named, 3);
        fetchWatched(e.id, top); // values of bars watched on another profile
        e.bars.setStale(stale);
        e.bars.setRows(top, bm?.unit || "");
      }
      const seq = c.latest?.seq;
      if (look !== s.look || s.sparkTick === undefined || (seq !== s.sparkSeq && tick !== s.sparkTick)) {
        s.sparkTick = tick;
        s.sparkSeq = seq;
        e.spark.surface.invalidate();
      }
      s.drawnAlarms = store.alarms;
      s.look = look;
    }
  }

  /** A card's words: state, overall, unit, band, notes (only what changed is written). */
  _text(e, c) {
    if (!c) return;
    const s = e.shown;
    const k = channelState(c);
    if (k !== s.state) {
      s.state = k;
      e.el.dataset.state = k;
      setHTML(e.st, badge(k));
    }
    const L = c.latest;
    if (s.seq !== L?.seq || s.status !== c.status || s.conn !== store.conn) {
      s.seq = L?.seq;
      // a text is written only when it reads differently (a write costs style and layout)
      setText(e.overall, L ? fmtVal(L.overall) : "—");
      if (L) {
        e.overall.dataset.seq = L.seq;
        e.overall.dataset.value = L.overall;
      }
      setText(e.unit, L ? unitLabel(L.unit, "rms") : "");
      setText(e.what, !L || L.overall_lo_hz == null ? "overall" // the band comes with a frame
        : `overall ${fmtHz(L.overall_lo_hz)}–${fmtHz(L.overall_hi_hz)}`);
    }
    if (s.status !== c.status || s.conn !== store.conn || s.alarms !== store.alarms || s.fault !== c.fault) {
      s.status = c.status;
      s.conn = store.conn;
      s.alarms = store.alarms;
      s.fault = c.fault;
      const liveValues = isLive(c.status);
      e.el.classList.toggle("stale", store.conn === "reconnecting" || !liveValues);
      e.el.dataset.live = liveValues ? "yes" : "no";
      const notes = [];
      if (!liveValues) {
        // never a bare healthy number: say what the channel is, since when, and how old the value is
        const since = c.status_since_ns ? ` since ${fmtClock(c.status_since_ns)}` : "";
        const old = L ? ` · value from ${fmtClock(L.timestamp_ns)}` : "";
        notes.push(html`<span class="notlive">${STATES[k].word}${since}${old}</span>`);
      }
      if (c.fault) notes.push(html`${glyph(STATUS_TO_STATE[c.status] || "fault", 12)} ${c.fault}`);
      const al = alarmsFor(c.id).filter((a) => a.state !== "normal" || a.latched);
      if (al.length) notes.push(al.map((a) => `${a.kind === "overall" ? "overall" : a.name}${ruleProfile(a) ? ` (${ruleProfile(a)})` : ""} ${a.state}${a.acked ? " (ack)" : ""}`).join(", "));
      updateHTML(e.note, join(notes, " · "));
    }
    showSpeed(e.el, c); // the running speed line; a tacho's card shows its speed instead
  }

  /** Sections in `ids` order, `show(id)` false ones hidden; each section's worst state and
   *  acknowledge-all button. `ms`: machine summaries by id. */
  arrange(ids, show, ms, unacked) {
    for (const [id, sec] of this.sections) {
      const hide = !show(id);
      if (sec.hidden !== hide) sec.hidden = hide;
      const m = ms.get(id);
      if (!m) continue;
      const k = `${m.state}|${unacked.get(id) || 0}`;
      if (sec.dataset.shown === k) continue;
      sec.dataset.shown = k;
      const n = unacked.get(id) || 0;
      // acknowledge-all of this machine's unacknowledged alarms (POST /alarms/ack {machine})
      updateHTML(sec.querySelector(".mack"), n ? html`<button class="small" data-ack-machine="${id}">Acknowledge all (${n})</button>` : "");
      updateHTML(sec.querySelector(".mglyph"), html`<span class="${STATES[m.state].cls}" title="worst state: ${STATES[m.state].word}">${glyph(m.state)}</span>`);
    }
    const order = ids.join(",");
    if (order !== this.order) {
      this.order = order;
      const frag = document.createDocumentFragment();
      for (const id of ids) if (this.sections.has(id)) frag.append(this.sections.get(id));
      this.box.append(frag);
    }
  }

  _dropSurfaces() {
    for (const e of this.cards.values()) {
      e.bars?.surface.dispose();
      e.spark?.surface.dispose();
    }
  }

  dispose() {
    this.disposed = true;
    this.io.disconnect();
    this._dropSurfaces();
  }
}

/** Write `text` into `el` unless it already reads so. */
function setText(el, text) {
  if (el.textContent !== text) el.textContent = text;
}
