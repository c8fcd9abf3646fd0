"""What a notification says: title and body of one event's message or of a digest, and the
idempotency key that names it.

Pure text from stored event rows and the config; knows nothing of SQL, threads or apprise."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any
from urllib.parse import quote

from ..config import Config
from ..names import channel_label
from ..timefmt import iso_time

__all__ = ["CAUTION", "Message", "idempotency_key", "render"]

CAUTION = (
    "quaver is a monitoring aid, not a machine-protection or safety system; this "
    "notification is best effort. Follow site rules and the machine maker's instructions."
)


@dataclass(frozen=True, slots=True)
class Message:
    title: str
    body: str
    key: str


def idempotency_key(store_id: str, grp: int, entry: str, digest: bool) -> str:
    """``quaver-<store id>-<event id>-<entry>`` (a digest: ``…-digest<first event id>-…``):
    the same for every attempt at one message, different for every other message."""
    return f"quaver-{store_id}-{'digest' if digest else ''}{grp}-{entry}"


def _num(x: Any) -> str:
    return "-" if x is None else f"{float(x):.4g}"


def _what(e: Mapping[str, Any]) -> str:
    """The headline of one event: 'DANGER raised', 'cleared to normal', 'sensor-fault' …"""
    kind, a, b = e["kind"], e["from_state"], e["to_state"]
    if kind == "ack":
        who = f" by {e['acked_by']}" if e.get("acked_by") else ""
        return f"{a.upper()} acknowledged{who}"
    if kind == "status":
        return f"channel {b} (was {a})"
    rank = {"normal": 0, "latched": 0, "alert": 1, "danger": 2}
    if rank.get(b, 0) > rank.get(a, 0):
        return f"{b.upper()} raised (was {a})"
    return f"{a.upper()} cleared, now {b}"


def _rule_name(e: Mapping[str, Any]) -> str:
    rule, ch = str(e["rule"]), str(e["channel"])
    return rule[len(ch) + 1:] if rule.startswith(ch + ".") else rule


def _value_line(e: Mapping[str, Any]) -> str:
    if e.get("value") is None:
        return ""
    unit = f" {e['unit']}" if e.get("unit") else ""
    rank = {"normal": 0, "latched": 0, "alert": 1, "danger": 2}
    to, frm = e["to_state"], e["from_state"]
    limit = ("limit" if e["kind"] != "transition" or rank.get(to, 0) > rank.get(frm, 0)
             else "clear level")
    name = to if rank.get(to, 0) > rank.get(frm, 0) else frm
    return f"Value: {_num(e['value'])}{unit}; {name} {limit} {_num(e.get('level'))}{unit}"


def _link(base: str | None, channel: str) -> str:
    if not base or not channel:
        return ""
    return f"{base.rstrip('/')}/#/channel/{quote(channel, safe='')}"


def render(
    cfg: Config,
    entry: str,
    rows: Sequence[Mapping[str, Any]],
    store_id: str,
    *,
    dashboard_url: str | None = None,
) -> Message:
    """The message of one outbox group: ``rows`` as :func:`service.store.outbox.select_due`
    gives them (one row, or every row of a digest), with their stored events."""
    tz = cfg.service.timezone
    first = rows[0]
    digest = bool(first["digest"])
    key = idempotency_key(store_id, int(first["grp"]), entry, digest)
    if not digest:
        e = first["event"]
        label = channel_label(cfg, e["channel"])
        value = _value_line(e)
        link = _link(dashboard_url, e["channel"])
        lines = [
            _what(e),
            f"Channel: {label}",
            f"Rule: {_rule_name(e)} ({e['rule']})",
            *([value] if value else []),
            f"Time: {iso_time(int(e['t_ns']), tz)}",
            f"Event: {e['message']}" + (f" — note: {e['note']}" if e.get("note") else ""),
            *([f"Dashboard: {link}"] if link else []),
            f"Key: {key}",
            "",
            CAUTION,
        ]
        title = f"quaver: {_what(e)} — {label}: {_rule_name(e)}"
        return Message(title, "\n".join(lines) + "\n", key)
    events = [r["event"] for r in rows]
    lines = [f"{len(events)} events reached '{entry}' within its digest window:", ""]
    for e in events:
        value = _value_line(e).removeprefix("Value: ")
        lines.append(f"- {iso_time(int(e['t_ns']), tz)} · {_what(e)} · "
                     f"{channel_label(cfg, e['channel'])} · {_rule_name(e)}"
                     + (f" · {value}" if value else ""))
    if dashboard_url:
        lines += ["", f"Dashboard: {dashboard_url}"]
    lines += ["", f"Key: {key}", "", CAUTION]
    return Message(f"quaver digest: {len(events)} events ({entry})", "\n".join(lines) + "\n", key)
