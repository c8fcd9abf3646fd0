// REST access to the quaver service: JSON GETs with time-outs, the token the dashboard signed
// in with (sent on every request and the WebSocket), acknowledgements. Knows nothing about the page.

export const API = "/api/v1";

export class ApiError extends Error {
  constructor(status, detail, url) {
    super(`${status} ${detail}`);
    this.status = status;
    this.detail = detail;
    this.url = url;
  }
}

/** GET a JSON resource; throws ApiError for an HTTP error, TypeError when unreachable. */
export async function getJSON(path, { timeoutMs = 6000, signal } = {}) {
  const ctl = new AbortController();
  const timer = setTimeout(() => ctl.abort(), timeoutMs);
  signal?.addEventListener("abort", () => ctl.abort(), { once: true });
  try {
    const r = await fetch(path.startsWith("/") ? path : `${API}/${path}`, { signal: ctl.signal, cache: "no-store", headers: authHeaders() });
    if (r.status === 401) askSignIn("The service asks for a token.");
    if (!r.ok) throw new ApiError(r.status, await detailOf(r), path);
    return await r.json();
  } catch (e) {
    if (e.name === "AbortError") throw new TypeError(`timed out: ${path}`);
    throw e;
  } finally {
    clearTimeout(timer);
  }
}

async function detailOf(r) {
  try {
    const j = await r.json();
    if (typeof j.detail === "string") return j.detail;
    if (Array.isArray(j.detail)) return j.detail.map((d) => d.msg ?? JSON.stringify(d)).join("; ");
    return JSON.stringify(j);
  } catch {
    return r.statusText || "error";
  }
}

// The token the dashboard signed in with: kept for this browser session only (sessionStorage,
// so it goes when the tab closes), sent on every request and on the WebSocket. The API docs
// pages (/docs, /redoc) read the same key.
const TOKEN_KEY = "quaver.token";
export const token = {
  get: () => sessionStorage.getItem(TOKEN_KEY) || "",
  set: (t) => (t ? sessionStorage.setItem(TOKEN_KEY, t) : sessionStorage.removeItem(TOKEN_KEY)),
};

export function authHeaders(tok = token.get()) {
  return tok ? { Authorization: `Bearer ${tok}` } : {};
}

/** A browser cannot put Authorization on a WebSocket: the token goes as the subprotocol
 *  `bearer.<base64url(token)>` next to `quaver` (the one the server selects), never in the URL. */
export function wsProtocols(tok = token.get()) {
  if (!tok) return ["quaver"];
  const bytes = new TextEncoder().encode(tok);
  const b64 = btoa(String.fromCharCode(...bytes)).replace(/\+/g, "-").replace(/\//g, "_").replace(/=+$/, "");
  return ["quaver", `bearer.${b64}`];
}

/** Ask the page to show the sign-in prompt (web/signin.js listens). */
export function askSignIn(reason) {
  window.dispatchEvent(new CustomEvent("quaver-signin", { detail: { reason } }));
}

/** Who the service takes this browser for: {tokens, name, role}; throws ApiError (401: sign in). */
export async function whoAmI(tok = token.get()) {
  const r = await fetch(`${API}/session`, { cache: "no-store", headers: authHeaders(tok) });
  if (!r.ok) throw new ApiError(r.status, await detailOf(r), `${API}/session`);
  return r.json();
}

/**
 * Acknowledge an alarm rule. Returns the event; throws ApiError with status 401 (no or wrong
 * token), 403 (token without the operator role), 404, 409 (not active / already acknowledged).
 */
export async function ackAlarm(rule, note, tok) {
  const headers = { "Content-Type": "application/json", ...authHeaders(tok || token.get()) };
  const url = `${API}/alarms/${encodeURIComponent(rule)}/ack`;
  const r = await fetch(url, { method: "POST", headers, body: JSON.stringify({ note: note || "" }) });
  if (!r.ok) throw new ApiError(r.status, await detailOf(r), url);
  return r.json();
}

/** Query string from an object, skipping null/undefined/"" values. */
export function qs(params) {
  const p = new URLSearchParams();
  for (const [k, v] of Object.entries(params)) if (v !== null && v !== undefined && v !== "") p.set(k, String(v));
  const s = p.toString();
  return s ? `?${s}` : "";
}

/** POST a JSON body to an operator route; returns the answer's JSON. Throws ApiError (401 no
 *  or wrong token, 403 not an operator, 404, 409, 422 with the service's reason). */
export async function postJSON(path, body, tok) {
  const headers = { "Content-Type": "application/json", ...authHeaders(tok || token.get()) };
  const url = path.startsWith("/") ? path : `${API}/${path}`;
  const r = await fetch(url, { method: "POST", headers, body: JSON.stringify(body ?? {}) });
  if (!r.ok) throw new ApiError(r.status, await detailOf(r), url);
  return r.json();
}
