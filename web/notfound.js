// Views for what does not exist: a route the dashboard has no view for, a channel the
// service does not have. Each names what was asked for and links back; reads nothing but
// the channels' display names.

import { html, setHTML } from "./dom.js";
import { chTitle } from "./names.js";

/** The view of a route (`#/settings`) that is not one of the dashboard's. */
export function mountRoute(root, hash) {
  setHTML(root, html`<section class="notfound" data-notfound="route" role="alert">
    <h1>No such view</h1>
    <p>This dashboard has no view <code>${hash}</code>.</p>
    <p><a href="#/">Back to the plant overview</a> · <a href="#/events">Alarms &amp; events</a></p>
  </section>`);
  return { unmount() {}, probe: { notFound: () => ({ kind: "route", what: hash }) } };
}

/** The view of a channel id the service does not list; `known`: the ids it does. */
export function mountChannel(root, id, known) {
  setHTML(root, html`<section class="notfound" data-notfound="channel" role="alert">
    <h1>No channel '${id}'</h1>
    <p>The service has no channel of that id${known.length ? html` (it has ${known.length}: ${known.map((c, i) => html`${i ? ", " : ""}<a href="#/channel/${encodeURIComponent(c)}" title="${chTitle(c)}">${c}</a>`)})` : ""}.</p>
    <p><a href="#/">Back to the plant overview</a></p>
  </section>`);
  return { unmount() {}, probe: { notFound: () => ({ kind: "channel", what: id }) } };
}
