// Signing in: the token prompt when the service asks for one, "signed in as <name> (role)"
// and sign-out in the header. Knows the token store and /session; no view or plot.

import { ApiError, askSignIn, authHeaders, token, whoAmI } from "./api.js";

let shown = false;

/** Resolve once the service lets this browser read: at once when it asks for no token or the
 *  kept one is good; otherwise after the prompt (the page reloads after a sign-in). */
export async function signIn() {
  // A link "…/#token=T" (the demo prints one) signs in at once: the fragment never leaves the
  // browser, and it is taken out of the address bar and the history straight away.
  if (location.hash.startsWith("#token=")) {
    token.set(decodeURIComponent(location.hash.slice("#token=".length)));
    history.replaceState(null, "", `${location.pathname}${location.search}#/`);
  }
  const dlg = document.getElementById("dlg-signin");
  document.getElementById("signin-form").addEventListener("submit", onSubmit);
  document.getElementById("signout").addEventListener("click", () => {
    token.set("");
    location.reload();
  });
  window.addEventListener("quaver-signin", (e) => prompt(e.detail?.reason));
  dlg.addEventListener("cancel", (e) => e.preventDefault()); // no half-empty page behind it
  document.addEventListener("click", openWithToken);
  window.addEventListener("quaver-token-changed", () => whoAmI().then(renderWho, () => {}));
  try {
    const me = await whoAmI();
    renderWho(me);
    return me;
  } catch (e) {
    if (e instanceof ApiError && e.status === 401) {
      prompt(token.get() ? "The token kept for this session is no longer accepted." : "This service asks for a token.");
      return new Promise(() => {}); // the page reloads once signed in
    }
    return null; // unreachable: the live link shows that and retries
  }

  async function onSubmit(e) {
    e.preventDefault();
    const typed = document.getElementById("signin-token").value.trim();
    const msg = document.getElementById("signin-msg");
    if (!typed) return;
    try {
      await whoAmI(typed);
      token.set(typed);
      dlg.close();
      location.reload(); // every panel and the stream start again with the token
    } catch (err) {
      msg.textContent = err instanceof ApiError && err.status === 401
        ? "Not accepted (401): this token is unknown to the service."
        : err instanceof ApiError ? `Refused (${err.status}): ${err.detail}` : "The service is not reachable.";
    }
  }
}

function prompt(reason) {
  const dlg = document.getElementById("dlg-signin");
  document.getElementById("signin-why").textContent = reason || "This service asks for a token.";
  if (!shown || !dlg.open) {
    shown = true;
    token.set("");
    renderWho(null);
    document.getElementById("signin-msg").textContent = "";
    document.getElementById("signin-token").value = "";
    if (!dlg.open) dlg.showModal();
    document.getElementById("signin-token").focus();
  }
}

function renderWho(me) {
  const el = document.getElementById("who");
  const signedIn = !!(me && me.name);
  el.hidden = !signedIn;
  document.getElementById("who-text").textContent = signedIn ? `signed in as ${me.name} (${me.role})` : "";
}

/** A plain link cannot carry the token: links marked `data-auth` (downloads, the health
 *  page) are fetched with it and handed to the browser as a blob (saved or opened). */
async function openWithToken(e) {
  const a = e.target.closest("a[data-auth]");
  if (!a || !token.get()) return; // without a token the service asks for none: a plain link
  e.preventDefault();
  const r = await fetch(a.href, { headers: authHeaders(), cache: "no-store" });
  if (r.status === 401) {
    askSignIn("The service asks for a token.");
    return;
  }
  const url = URL.createObjectURL(await r.blob());
  const tmp = document.createElement("a");
  tmp.href = url;
  if (a.hasAttribute("download")) {
    const m = /filename="?([^";]+)"?/.exec(r.headers.get("content-disposition") || "");
    tmp.download = m ? m[1] : a.href.split("/").pop().split("?")[0];
  } else {
    tmp.target = "_blank";
  }
  tmp.click();
  setTimeout(() => URL.revokeObjectURL(url), 60000);
}
