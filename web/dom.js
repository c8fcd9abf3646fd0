// Markup for the page, built one way: the `html` tagged template escapes every value put into
// it (text and attribute values alike) unless the value is already markup. This is the one
// place the dashboard escapes; no view writes `innerHTML` from a string of its own.
//
//   setHTML(el, html`<a href="#/channel/${encodeURIComponent(id)}">${id}</a> ${glyph("ok")}`)
//
// A value is put in as: Markup → as is; an array → each item by these rules, joined;
// null/undefined → nothing; anything else → String(value) with & < > " ' escaped.

import { badge as badgeString, glyph as glyphString } from "./states.js";

const ESC = { "&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;" };

/** A piece of markup (from `html` or `trusted`); `String(m)` is its text. */
export class Markup {
  constructor(text) {
    this.text = text;
  }
  toString() {
    return this.text;
  }
}

function part(v) {
  if (v instanceof Markup) return v.text;
  if (Array.isArray(v)) return v.map(part).join("");
  if (v === null || v === undefined) return "";
  return String(v).replace(/[&<>"']/g, (c) => ESC[c]);
}

/** Tagged template: the literal parts as written, every value escaped (see above). */
export function html(strings, ...values) {
  let s = strings[0];
  for (let i = 0; i < values.length; i++) s += part(values[i]) + strings[i + 1];
  return new Markup(s);
}

/** Items (each put in by the rules above) with `sep` between them, as one piece of markup. */
export function join(items, sep) {
  return new Markup(items.map(part).join(part(sep)));
}

/** Markup written by the dashboard itself and not built by `html` (the state glyphs). */
export function trusted(text) {
  return new Markup(String(text));
}

/** Replace an element's content with `markup` (Markup, or an array of it; a plain string
 *  goes in as text). */
export function setHTML(el, markup) {
  el.innerHTML = part(markup);
}

/** The same, skipped when `markup` is what this function put there last (a redraw with the
 *  same content keeps hover, focus and scroll). Returns whether it changed. */
export function updateHTML(el, markup) {
  const s = part(markup);
  if (el.dataset.h === s) return false;
  el.innerHTML = s;
  el.dataset.h = s;
  return true;
}

/** A state's glyph as markup (web/states.js draws it). */
export const glyph = (key, size) => trusted(glyphString(key, size));

/** A state's badge as markup; `extra` (markup) goes after the word. */
export const badge = (key, extra = "") => trusted(badgeString(key, String(extra)));
