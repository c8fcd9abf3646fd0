// The live link: WebSocket subscription (binary spectra, JSON the rest), REST polling when the
// socket cannot open, reconnection, the plant-wide poll or resync. Emits events; no drawing.

import { API, askSignIn, getJSON, wsProtocols } from "./api.js";

const PLANT_POLL_MS = 2000;
// With the stream open and every channel's bands subscribed (the plant view) nothing is polled:
// values come with the bands, statuses with status messages, and each alarm event, status
// change or `rules` message (the rules were reloaded) fetches /alarms once. The page resyncs
// (/channels, /alarms) when the stream (re)opens only.
const CHANNELS_EMIT_MS = 1000; // values from bands messages reach the views at most this often
const DOWN_POLL_MS = 1000;
const WS_RETRY_MAX_MS = 8000;
const WS_ABSENT_RETRY_MS = 20000; // the service answers REST but has no socket route

/**
 * Decode a binary spectrum message: u32 LE header length L, L bytes of UTF-8 JSON, then
 * `count` float32 LE values. Returns {header, values: Float32Array}.
 */
export function decodeSpectrum(buf) {
  const dv = new DataView(buf);
  const L = dv.getUint32(0, true);
  const header = JSON.parse(new TextDecoder().decode(new Uint8Array(buf, 4, L)));
  const off = 4 + L;
  const count = header.count ?? Math.floor((buf.byteLength - off) / 4);
  let values;
  if (off % 4 === 0) values = new Float32Array(buf, off, count);
  else values = new Float32Array(buf.slice(off, off + 4 * count)); // typed arrays need alignment
  return { header, values };
}

export class Live extends EventTarget {
  constructor() {
    super();
    this.serviceUp = null; // null until the first answer
    this.wsOpen = false;
    this.ws = null;
    this.sub = null;
    this.channels = [];
    this.profiles = {}; // channel → its analysis profile names, primary first (from the stream's hello)
    this.alarms = null; // null until the first answer
    this.downSince = 0;
    this.attempts = 0;
    this._wsTimer = 0;
    this._wsBackoff = 500;
    this._due = new Map(); // poll key → next time (ms)
    this._busy = new Set();
    this._plantTimer = 0;
    this._plantBusy = false;
    this._plantSlow = false; // the stream covers the plant: no poll until it closes
    this._alarmsBusy = false;
    this._alarmsAgain = false;
    this._chTimer = 0;
    this._indexOf = null;
    this._index = new Map();
  }

  /** Whether the stream brings what the plant poll would (every channel's values). */
  _streamCoversPlant() {
    const s = this.sub;
    const kinds = s?.kinds || [];
    return this.wsOpen && !!s && (kinds.includes("overall") || (s.channels === "*" && kinds.includes("bands")));
  }

  get conn() {
    if (this.serviceUp === null) return "connecting";
    if (!this.serviceUp) return "reconnecting";
    return this.wsOpen ? "live" : "polling";
  }

  start() {
    this._plant();
    this._openSocket();
    setInterval(() => this._pollTick(), 100);
  }

  /**
   * Change what the open view wants: {channels: [...] | "*", kinds: [...], max_rate_hz, unit,
   * amplitude, profiles: [names] | "*" (omitted: each channel's primary profile)}.
   */
  subscribe(sub) {
    this.sub = sub;
    this._due.clear();
    if (this.wsOpen) this._send({ subscribe: sub });
    // a view that needs the poll again (its stream brings less): start it
    if (this._plantSlow && !this._streamCoversPlant() && !this._plantBusy) {
      clearTimeout(this._plantTimer);
      this._plantSlow = false;
      this._plantTimer = setTimeout(() => this._plant(), PLANT_POLL_MS);
    }
  }

  /** Fetch the alarm list once (after an alarm event or a status change; coalesced). */
  async refreshAlarms() {
    if (this._alarmsBusy) {
      this._alarmsAgain = true;
      return;
    }
    this._alarmsBusy = true;
    try {
      await this._alarms();
    } finally {
      this._alarmsBusy = false;
    }
    if (this._alarmsAgain) {
      this._alarmsAgain = false;
      this.refreshAlarms();
    }
  }

  async _alarms() {
    try {
      const al = await getJSON(`${API}/alarms?all=true`, { timeoutMs: 4000 });
      this.alarms = Array.isArray(al) ? al : al.alarms ?? [];
    } catch (e) {
      if (!(e instanceof TypeError)) console.warn("alarms:", e.message);
    }
    this._emit("alarms", this.alarms);
  }

  /** A bands message of a channel's primary profile: its values are the channel's latest. */
  _latestFromBands(m) {
    const i = this._at(m.channel);
    if (i < 0) return;
    const c = this.channels[i];
    const primary = c.profiles?.[0]?.name ?? this.profiles[m.channel]?.[0];
    if (primary && m.profile && m.profile !== primary) return;
    if (c.latest && (c.latest.seq ?? -1) >= (m.seq ?? 0) && c.latest.timestamp_ns >= m.timestamp_ns) return;
    this.channels[i] = {
      ...c,
      latest: {
        ...(c.latest || {}), seq: m.seq, timestamp_ns: m.timestamp_ns, timestamp: m.timestamp, quality: m.quality,
        unit: m.unit, overall: m.overall, overall_lo_hz: m.overall_lo_hz, overall_hi_hz: m.overall_hi_hz,
      },
    };
    // a stream that brings `overall` messages tells the views once a second anyway
    if (!this._chTimer && !this.sub?.kinds?.includes("overall")) {
      this._chTimer = setTimeout(() => {
        this._chTimer = 0;
        this._emit("channels", this.channels);
      }, CHANNELS_EMIT_MS);
    }
  }

  /** The index of a channel in `channels` (-1: none); a map, not a search per message. */
  _at(id) {
    if (this._indexOf !== this.channels) {
      this._indexOf = this.channels;
      this._index = new Map(this.channels.map((c, i) => [c.id, i]));
    }
    return this._index.get(id) ?? -1;
  }

  /** An `overall` message: every channel's status and newest overall (once a second). */
  _overall(m) {
    let statusChanged = false;
    for (const u of m.channels || []) {
      const i = this._at(u.id);
      if (i < 0) continue;
      const c = this.channels[i];
      let next = c;
      if (c.status !== u.status || (u.fault ?? null) !== (c.fault ?? null)) {
        next = { ...next, status: u.status, fault: u.fault ?? null, status_since_ns: u.since_ns ?? c.status_since_ns };
        statusChanged = true;
      }
      if (u.seq != null && !(c.latest && (c.latest.seq ?? -1) >= u.seq && c.latest.timestamp_ns >= u.timestamp_ns)) {
        next = {
          ...next,
          latest: {
            ...(c.latest || {}), seq: u.seq, timestamp_ns: u.timestamp_ns, quality: u.quality, unit: u.unit,
            overall: u.overall, overall_lo_hz: u.overall_lo_hz, overall_hi_hz: u.overall_hi_hz,
          },
        };
      }
      if (next !== c) this.channels[i] = next;
    }
    this._emit("channels", this.channels);
    if (statusChanged) this.refreshAlarms(); // a rule of a channel not live is suspended
  }

  /** Ask for the plant poll now (e.g. after an acknowledgement). */
  refreshPlant() {
    this._plantSlow = false;
    clearTimeout(this._plantTimer);
    this._plantTimer = setTimeout(() => this._plant(), 0);
  }

  _emit(type, detail) {
    this.dispatchEvent(new CustomEvent(type, { detail }));
  }

  _setUp(up) {
    const before = this.conn;
    if (up) {
      this.serviceUp = true;
      this.attempts = 0;
    } else {
      if (this.serviceUp !== false) this.downSince = Date.now();
      this.serviceUp = false;
      this.attempts += 1;
    }
    if (this.conn !== before || !up) this._emit("conn", { conn: this.conn, downSince: this.downSince, attempts: this.attempts });
    if (up && before === "reconnecting" && !this.ws) this._openSocketSoon(0);
  }

  // --- plant-wide poll: every channel's status and latest overall, and the alarms -----
  async _plant() {
    clearTimeout(this._plantTimer);
    this._plantTimer = 0;
    this._plantBusy = true;
    let ok = false;
    try {
      const ch = await getJSON(`${API}/channels`, { timeoutMs: 4000 });
      this.channels = ch;
      ok = true;
      this._setUp(true);
      this._emit("channels", ch);
      await this._alarms();
    } catch (e) {
      if (!(e instanceof TypeError)) console.warn("channels:", e.message);
      this._setUp(false);
    } finally {
      this._plantBusy = false;
    }
    this._plantSlow = ok && this._streamCoversPlant();
    // the stream keeps the page current: no timer (subscribe() starts the poll again for a
    // view whose stream brings less, the socket's close for a lost stream)
    if (!this._plantSlow) this._plantTimer = setTimeout(() => this._plant(), ok ? PLANT_POLL_MS : DOWN_POLL_MS);
  }

  // --- WebSocket -------------------------------------------------------------------
  _openSocketSoon(ms) {
    clearTimeout(this._wsTimer);
    this._wsTimer = setTimeout(() => this._openSocket(), ms);
  }

  _openSocket() {
    if (this.ws) return;
    const url = `${location.protocol === "https:" ? "wss" : "ws"}://${location.host}${API}/stream`;
    let ws;
    try {
      ws = new WebSocket(url, wsProtocols());
    } catch {
      this._openSocketSoon(WS_ABSENT_RETRY_MS);
      return;
    }
    ws.binaryType = "arraybuffer";
    this.ws = ws;
    ws.onopen = () => {
      this.wsOpen = true;
      this._wsBackoff = 500;
      this._setUp(true);
      this._emit("conn", { conn: this.conn });
      if (this.sub) this._send({ subscribe: this.sub });
      this.refreshPlant(); // (re)connected: resync once, then the stream keeps the page current
    };
    ws.onmessage = (ev) => this._onMessage(ev.data);
    ws.onclose = (ev) => {
      this.ws = null;
      // 1008: the service refused this token (withdrawn or demoted by a reload, or none given)
      if (ev.code === 1008 && /token/.test(ev.reason || "")) askSignIn(`The live stream was closed: ${ev.reason}.`);
      const wasOpen = this.wsOpen;
      this.wsOpen = false;
      if (wasOpen) {
        // The stream broke: say so at once, then let REST tell whether the service is up.
        this._setUp(false);
        this.refreshPlant();
        this._openSocketSoon(this._wsBackoff);
      } else if (this.serviceUp) {
        this._emit("conn", { conn: this.conn });
        this._openSocketSoon(WS_ABSENT_RETRY_MS); // REST works, the socket does not: poll
      } else {
        this._openSocketSoon(this._wsBackoff);
      }
      this._wsBackoff = Math.min(WS_RETRY_MAX_MS, this._wsBackoff * 2);
    };
    ws.onerror = () => {}; // onclose follows and decides
  }

  _send(obj) {
    try {
      this.ws?.send(JSON.stringify(obj));
    } catch {
      /* closing; onclose handles it */
    }
  }

  _onMessage(data) {
    if (data instanceof ArrayBuffer) {
      const m = decodeSpectrum(data);
      this._emit("spectrum", m);
      return;
    }
    let m;
    try {
      m = JSON.parse(data);
    } catch {
      return;
    }
    switch (m.kind) {
      case "hello":
        if (m.profiles && typeof m.profiles === "object") this.profiles = m.profiles;
        break;
      case "bands":
        this._latestFromBands(m);
        this._emit(m.kind, m);
        break;
      case "tones":
        this._emit(m.kind, m);
        break;
      case "alarm":
      case "alarms":
        this._emit("alarm", m);
        this.refreshAlarms(); // the alarm list as it now is (levels, value, acknowledgement)
        break;
      case "rules": // the alarm rules were reloaded: their levels as they now are
        this.refreshAlarms();
        break;
      case "overall":
        this._overall(m);
        break;
      case "status": {
        // {"kind": "status", "channels": [{id, status, fault, since_ns}]} about once a second
        let changed = false;
        for (const u of m.channels || [m]) {
          const i = this._at(u.id ?? u.channel);
          if (i < 0) continue;
          const c = this.channels[i];
          if (c.status !== u.status || (u.fault ?? c.fault) !== c.fault) {
            this.channels[i] = { ...c, status: u.status, fault: u.fault ?? c.fault, status_since_ns: u.since_ns ?? c.status_since_ns };
            changed = true;
          }
        }
        if (changed) {
          this._emit("channels", this.channels);
          this.refreshAlarms(); // a rule of a channel not live is suspended
        }
        break;
      }
      case "error":
        console.warn("the service refused the subscription:", m.reason ?? m.message ?? m);
        break;
      default:
        break;
    }
  }

  // --- REST polling of the open view when there is no socket ------------------------
  _pollTick() {
    if (this.wsOpen || !this.serviceUp || !this.sub) return;
    const s = this.sub;
    const now = performance.now();
    const list = s.channels === "*" ? this.channels.map((c) => c.id) : s.channels || [];
    const one = list.length <= 2;
    // REST serves one profile per request: the one asked for when it is a single name
    const profile = Array.isArray(s.profiles) && s.profiles.length === 1 ? s.profiles[0] : "";
    const pq = (q) => {
      if (profile) q.set("profile", profile);
      const t = q.toString();
      return t ? `?${t}` : "";
    };
    for (const ch of list) {
      const hasData = this.channels.find((c) => c.id === ch)?.latest;
      if (!hasData) continue;
      if (s.kinds.includes("spectrum") && one) {
        const period = 1000 / Math.min(s.max_rate_hz || 4, 5);
        this._poll(`s:${ch}`, now, period, async () => {
          const q = new URLSearchParams({ format: "json" });
          if (s.unit) q.set("unit", s.unit);
          if (s.amplitude) q.set("amplitude", s.amplitude);
          const j = await getJSON(`${API}/channels/${encodeURIComponent(ch)}/spectrum${pq(q)}`);
          const { values, ...header } = j;
          header.kind = "spectrum";
          header.count = values.length;
          this._emit("spectrum", { header, values: Float32Array.from(values, (v) => v ?? NaN) });
        });
      }
      if (s.kinds.includes("bands")) {
        this._poll(`b:${ch}`, now, one ? 1000 : 2000, async () => {
          const j = await getJSON(`${API}/channels/${encodeURIComponent(ch)}/bands${pq(new URLSearchParams())}`);
          this._emit("bands", { kind: "bands", ...j });
        });
      }
      if (s.kinds.includes("tones") && one) {
        this._poll(`t:${ch}`, now, 1000, async () => {
          const j = await getJSON(`${API}/channels/${encodeURIComponent(ch)}/tones${pq(new URLSearchParams())}`);
          this._emit("tones", { kind: "tones", ...j });
        });
      }
    }
  }

  _poll(key, now, period, fn) {
    if (this._busy.has(key) || (this._due.get(key) ?? 0) > now) return;
    this._busy.add(key);
    this._due.set(key, now + period);
    fn()
      .catch((e) => {
        if (e instanceof TypeError) this.refreshPlant(); // unreachable: let the plant poll decide
      })
      .finally(() => this._busy.delete(key));
  }
}
