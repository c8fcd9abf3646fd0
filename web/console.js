// The console's page-wide pieces: the site time zone in the header (every time on the page is
// shown in it) and the shelve / acknowledge-all dialogs. Set up once by main.js after the
// service's meta is loaded; no view of its own.

import { siteZone, zoneLabel } from "./fmt.js";
import { setupShelve } from "./shelve.js";

export function setupConsole() {
  setupShelve();
  const conn = document.getElementById("conn");
  let tz = document.getElementById("tz");
  if (!tz && conn) {
    tz = document.createElement("span");
    tz.id = "tz";
    tz.className = "tz hint";
    conn.before(tz);
  }
  if (!tz) return;
  const show = () => {
    tz.textContent = `times: ${zoneLabel()}`;
    tz.dataset.zone = siteZone();
    tz.title = "Every time on this page is the site's wall time in this zone (service.timezone), not your computer's.";
  };
  show();
  setInterval(show, 60e3); // the offset changes at summer time
}
