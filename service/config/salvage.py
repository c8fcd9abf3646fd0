"""Salvaging a config that failed its models: the entries that did validate, and what the
failed ones leave in doubt, so one run reports the model errors and the cross-checks together.

Knows nothing about files, sockets, storage or the cross-checks' own rules."""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from pydantic import ValidationError

from .models import Config

LIST_TABLES = ("sources", "channels", "bands", "tones", "alarms", "tokens", "machines", "notify")
_ENTRY_REF = re.compile(r"(?<![\w.])(" + "|".join(LIST_TABLES) + r")\[(\d+)\]")
_ROUNDS = 4  # a salvaged dict that still fails is salvaged again, a bounded number of times


@dataclass
class Doubts:
    """What the entries that failed their models leave unknown; the cross-checks skip what
    depends on it instead of reporting its consequences (a band 'missing' because its own
    entry failed)."""

    failed: dict[str, set[int]] = field(default_factory=dict)  # table -> failed indices
    tables: set[str] = field(default_factory=set)  # tables with a failure ('service', ...)
    fields: set[str] = field(default_factory=set)  # 'analysis.fmax_hz', 'service.listen', ...
    channels: set[str] = field(default_factory=set)  # channels of failed sources/entries
    all_channels: bool = False  # a failed source whose channels cannot be read
    all_settings: bool = False  # a failed [[channels]] entry whose id cannot be read
    profiles: set[str] = field(default_factory=set)  # profile names whose entry failed
    bands: set[tuple[str, str | None]] = field(default_factory=set)  # (channel, name|None=any)
    tones: set[tuple[str, str | None]] = field(default_factory=set)
    kept: dict[str, list[int]] = field(default_factory=dict)  # table -> original index per kept

    def any_failed(self, table: str) -> bool:
        return bool(self.failed.get(table)) or table in self.tables

    def source(self, ch: str) -> bool:
        """Might channel ``ch`` be a channel of a source that failed?"""
        return self.all_channels or ch in self.channels

    def channel(self, ch: str) -> bool:
        """Are channel ``ch``'s source or settings ('*': any channel's) in doubt?"""
        if self.all_channels or self.all_settings:
            return True
        return ch in self.channels or (ch == "*" and bool(self.channels))

    def field(self, key: str) -> bool:
        """Is ``key`` ('analysis.fmax_hz') in doubt: it failed, or its whole table did?"""
        table = key.split(".")[0]
        whole = table in self.tables and not any(f.startswith(table + ".") for f in self.fields)
        return key in self.fields or whole

    def fmax(self, ch: str) -> bool:
        """Is the Fmax of channel ``ch`` ('*' = any) in doubt (so what lies above it)?"""
        return self.channel(ch) or self.field("analysis.fmax_hz") or bool(self.profiles)

    def value(self, kind: str, ch: str, name: str) -> bool:
        """Is a band or tone ``name`` on ``ch`` in doubt (its entry failed)?"""
        pool = self.bands if kind == "band" else self.tones
        return any(
            (c == "*" or ch == "*" or c == ch) and (n is None or n == name) for c, n in pool
        )

    def renumber(self, problem: str) -> str:
        """Indices of the salvaged lists back to the file's (``bands[2]`` of the kept
        entries is ``bands[3]`` of the file when ``bands[1]`` failed)."""

        def sub(m: re.Match[str]) -> str:
            table, j = m.group(1), int(m.group(2))
            kept = self.kept.get(table)
            return f"{table}[{kept[j] if kept is not None and j < len(kept) else j}]"

        return _ENTRY_REF.sub(sub, problem)


def _str(x: Any) -> str | None:
    return x if isinstance(x, str) else None


def _note_failed_entry(d: Doubts, table: str, entry: Any, keys: set[str]) -> None:
    """What failed entry ``entry`` of ``table`` leaves in doubt; ``keys``: its keys that
    failed (their values say nothing)."""
    e = {k: v for k, v in entry.items() if k not in keys} if isinstance(entry, dict) else {}
    if table == "sources":
        chans = e.get("channels")
        if isinstance(chans, list) and chans and all(isinstance(c, str) for c in chans):
            d.channels.update(chans)
        else:
            d.all_channels = True
    elif table == "channels":
        cid = _str(e.get("id"))
        if cid is not None:
            d.channels.add(cid)
        else:
            d.all_settings = True
    elif table in ("bands", "tones"):
        ch = (_str(e.get("channel", "*")) if "channel" not in keys else None) or "*"
        name = _str(e.get("name"))
        if table == "bands" and e.get("octave") is not None:
            name = None  # an octave set's names are made from its prefix
        (d.bands if table == "bands" else d.tones).add((ch, name))


def _drop(raw: dict[str, Any], e: ValidationError, d: Doubts) -> dict[str, Any]:
    """``raw`` without what failed; notes the doubts that leaves."""
    bad: dict[str, set[int]] = {}
    keys: dict[tuple[str, int], set[str]] = {}  # (table, index) -> its keys that failed
    out = dict(raw)
    for err in e.errors():
        loc = err["loc"]
        top = str(loc[0]) if loc else ""
        second = loc[1] if len(loc) > 1 else None
        if top in LIST_TABLES and isinstance(second, int):
            bad.setdefault(top, set()).add(second)
            key = keys.setdefault((top, second), set())
            key.update(str(x) for x in loc[2:3])  # a source's tag (sources[0].tcp.x) as well
            key.update(str(x) for x in loc[3:4] if top == "sources")
        elif top == "profiles" and isinstance(second, str) and isinstance(out.get(top), dict):
            d.profiles.add(second)
            d.tables.add("profiles")
            out[top] = {k: v for k, v in out[top].items() if k != second}
        elif top not in LIST_TABLES and isinstance(second, str) and isinstance(
            out.get(top), dict
        ):  # a field of [service], [analysis], [history], …: that field's default stands in
            d.tables.add(top)
            d.fields.add(f"{top}.{second}")
            out[top] = {k: v for k, v in out[top].items() if k != second}
        else:  # a whole table of the wrong shape, or an unknown top-level key
            d.tables.add(top)
            out.pop(top, None)
            if top == "sources":
                d.all_channels = True
            elif top in ("bands", "tones"):
                (d.bands if top == "bands" else d.tones).add(("*", None))
    for table, idx in bad.items():
        entries = out.get(table)
        if not isinstance(entries, list):
            continue
        kept_before = d.kept.get(table, list(range(len(entries))))
        for i in idx:
            if i < len(entries):
                _note_failed_entry(d, table, entries[i], keys.get((table, i), set()))
                d.failed.setdefault(table, set()).add(kept_before[i])
        out[table] = [x for i, x in enumerate(entries) if i not in idx]
        d.kept[table] = [k for i, k in enumerate(kept_before) if i not in idx]
    return out


def salvage(raw: Mapping[str, Any], e: ValidationError) -> tuple[Config, Doubts] | None:
    """The config made of the entries that validate, with the doubts the rest leave; None
    if nothing sound is left to cross-check."""
    d = Doubts()
    data = dict(raw)
    for _ in range(_ROUNDS):
        data = _drop(data, e, d)
        try:
            return Config.model_validate(data), d
        except ValidationError as again:
            e = again
    return None
