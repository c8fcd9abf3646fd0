"""The alarm engine: every rule's state machine on incoming frames and channel states, its
acknowledgements, and the snapshot it resumes from after a restart (semantics in
``service.alarms``).

Pure logic with time passed in; knows nothing about storage, asyncio, HTTP or the hub."""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from typing import Any, NamedTuple

import numpy as np

from dsp.types import check_choice

from ..types import PushFrames
from .common import EngineBase, RuleState
from .events import AlarmEvent
from .rules import Rule
from .states import (
    _A,
    _D,
    _L,
    _N,
    _NS,
    CLOCK_JITTER_NS,
    SNAPSHOT_VERSION,
    AlarmState,
)

_STATES = tuple(st.value for st in AlarmState)


_CODE_STATES = (_N, _A, _D, _L)  # a state's code in the table: its index here
_CODE = {st: k for k, st in enumerate(_CODE_STATES)}
_RANK_OF_CODE = np.array([st.rank for st in _CODE_STATES], dtype=np.int64)
# the fields a snapshot keeps, in its order; those of the baseline are kept only while the
# rule's baseline settings are those they were learned with
_SAVED = ("state", "peak", "since_ns", "value", "value_ns", "acked", "acked_by", "acked_ns",
          "note", "shelved_until_ns", "shelved_ns", "shelved_by", "shelve_reason",
          "above_ns", "below_ns", "base", "learn_start_ns", "learn", "learn_stride",
          "learn_count")
_LEARNED_FIELDS = frozenset({"base", "learn_start_ns", "learn", "learn_stride", "learn_count"})


class _Table:
    """What every value of every rule changes, as arrays over the rules (row = an alarm's
    slot): the latest value and its time, since when each level has been exceeded
    (``above``) and undercut by its hysteresis (``below``), the state's code and the levels.
    ``has_*`` say which entries hold a value (None in the alarm's fields otherwise)."""

    def __init__(self, n: int) -> None:
        self.v = np.zeros(n)
        self.has_v = np.zeros(n, dtype=bool)
        self.vns: np.ndarray = np.zeros(n, dtype=np.int64)
        self.has_vns = np.zeros(n, dtype=bool)
        self.above: np.ndarray = np.zeros((n, 2), dtype=np.int64)
        self.has_above = np.zeros((n, 2), dtype=bool)
        self.below: np.ndarray = np.zeros((n, 2), dtype=np.int64)
        self.has_below = np.zeros((n, 2), dtype=bool)
        self.code = np.zeros(n, dtype=np.int64)
        self.lv = np.full((n, 2), np.nan)  # alert, danger; NaN: none (learning, signal)
        self.clear_k = np.zeros((n, 2))  # level·(1 − h) below which a level clears
        self.h = np.zeros(n)
        self.on_ns: np.ndarray = np.zeros(n, dtype=np.int64)
        self.off_ns: np.ndarray = np.zeros(n, dtype=np.int64)

    def hold(self, t_ns: int | None) -> None:
        """Make room for time ``t_ns``: beyond int64 (a producer's header at the end of the
        range) the time arrays become arrays of Python ints, slower but exact, for good."""
        if t_ns is not None and not _I64_MIN <= t_ns <= _I64_MAX and self.vns.dtype != object:
            self.vns, self.above, self.below, self.on_ns, self.off_ns = (
                a.astype(object) for a in (self.vns, self.above, self.below, self.on_ns,
                                           self.off_ns))

    def rows(self) -> _Rows:
        """The per-value fields as Python lists (value, its time, above, below, state code,
        with their has-flags), for reading many alarms at once."""
        return (self.v.tolist(), self.has_v.tolist(), self.vns.tolist(), self.has_vns.tolist(),
                self.above.tolist(), self.has_above.tolist(), self.below.tolist(),
                self.has_below.tolist(), self.code.tolist())


_Rows = tuple[list[Any], ...]
_I64_MIN, _I64_MAX = -(2**63), 2**63 - 1


class _Alarm(RuleState):
    """Run-time state of one rule (everything :meth:`AlarmEngine.snapshot` keeps). The
    fields every value changes (value, value_ns, above_ns, below_ns, state) live in the
    engine's :class:`_Table`, row ``i``; the rest are plain attributes."""

    __slots__ = ("rule", "_t", "_i", "peak", "since_ns", "acked", "acked_by", "acked_ns",
                 "note", "shelved_until_ns", "shelved_ns", "shelved_by", "shelve_reason",
                 "_base", "learn_start_ns", "learn", "learn_stride", "learn_count")

    def __init__(self, rule: Rule, table: _Table, i: int) -> None:
        self.rule, self._t, self._i = rule, table, i
        self.peak: AlarmState = _N
        self.since_ns: int | None = None
        self.acked = False
        self.acked_by = ""
        self.acked_ns: int | None = None
        self.note = ""
        self.shelved_until_ns: int | None = None  # shelved until then (service.alarms.shelving)
        self.shelved_ns: int | None = None
        self.shelved_by = ""
        self.shelve_reason = ""
        # the baseline learned or being learned: restored only while the rule's baseline
        # settings are those it was learned with
        self._base: float | None = None  # learned baseline median
        self.learn_start_ns: int | None = None
        self.learn: list[float] = []
        self.learn_stride = 1
        self.learn_count = 0
        r = rule
        table.h[i] = r.hysteresis
        table.on_ns[i] = round(r.on_delay_s * _NS)
        table.off_ns[i] = round(r.off_delay_s * _NS)
        self._set_levels()

    def move(self, table: _Table, i: int) -> None:
        """Carry this alarm's row into ``table`` at row ``i`` (the rule set changed)."""
        old, j = self._t, self._i
        for name in ("v", "has_v", "vns", "has_vns", "above", "has_above", "below",
                     "has_below", "code"):
            getattr(table, name)[i] = getattr(old, name)[j]
        self._t, self._i = table, i
        table.h[i] = self.rule.hysteresis
        table.on_ns[i] = round(self.rule.on_delay_s * _NS)
        table.off_ns[i] = round(self.rule.off_delay_s * _NS)
        self._set_levels()

    def _set_levels(self) -> None:
        t, i = self._t, self._i
        lv = self.levels
        t.lv[i] = (math.nan, math.nan) if lv is None else lv
        h = self.rule.hysteresis
        t.clear_k[i] = (math.nan, math.nan) if lv is None else (lv[0] * (1 - h), lv[1] * (1 - h))

    # -- the fields kept in the table ---------------------------------------------------
    @property
    def state(self) -> AlarmState:
        return _CODE_STATES[self._t.code[self._i]]

    @state.setter
    def state(self, st: AlarmState) -> None:
        self._t.code[self._i] = _CODE[st]

    @property
    def value(self) -> float | None:
        return float(self._t.v[self._i]) if self._t.has_v[self._i] else None

    @value.setter
    def value(self, v: float | None) -> None:
        self._t.has_v[self._i] = v is not None
        self._t.v[self._i] = 0.0 if v is None else v

    @property
    def value_ns(self) -> int | None:
        return int(self._t.vns[self._i]) if self._t.has_vns[self._i] else None

    @value_ns.setter
    def value_ns(self, t_ns: int | None) -> None:
        self._t.hold(t_ns)
        self._t.has_vns[self._i] = t_ns is not None
        self._t.vns[self._i] = 0 if t_ns is None else t_ns

    @property
    def above_ns(self) -> list[int | None]:  # alert, danger
        t, i = self._t, self._i
        return [int(t.above[i, k]) if t.has_above[i, k] else None for k in (0, 1)]

    @above_ns.setter
    def above_ns(self, v: list[int | None]) -> None:
        t, i = self._t, self._i
        for k in (0, 1):
            t.hold(v[k])
            t.has_above[i, k] = v[k] is not None
            t.above[i, k] = v[k] or 0

    @property
    def below_ns(self) -> list[int | None]:
        t, i = self._t, self._i
        return [int(t.below[i, k]) if t.has_below[i, k] else None for k in (0, 1)]

    @below_ns.setter
    def below_ns(self, v: list[int | None]) -> None:
        t, i = self._t, self._i
        for k in (0, 1):
            t.hold(v[k])
            t.has_below[i, k] = v[k] is not None
            t.below[i, k] = v[k] or 0

    @property
    def base(self) -> float | None:
        return self._base

    @base.setter
    def base(self, v: float | None) -> None:
        self._base = v
        self._set_levels()

    def saved(self, rows: _Rows | None = None) -> dict[str, Any]:
        """Every field but the rule, JSON-safe, plus the baseline settings it was learned
        with (one alarm of :meth:`AlarmEngine.snapshot`; ``rows``: the engine's table as
        lists, ``_Table.rows()``, read instead of the arrays)."""
        if rows is None:
            rows = self._t.rows()
        i = self._i
        v, has_v, vns, has_vns, above, has_above, below, has_below, code = rows
        ab, hab, be, hbe = above[i], has_above[i], below[i], has_below[i]
        return {
            "state": _CODE_STATES[code[i]].value, "peak": self.peak.value,
            "since_ns": self.since_ns,
            "value": v[i] if has_v[i] else None, "value_ns": vns[i] if has_vns[i] else None,
            "acked": self.acked, "acked_by": self.acked_by, "acked_ns": self.acked_ns,
            "note": self.note, "shelved_until_ns": self.shelved_until_ns,
            "shelved_ns": self.shelved_ns, "shelved_by": self.shelved_by,
            "shelve_reason": self.shelve_reason,
            "above_ns": [ab[0] if hab[0] else None, ab[1] if hab[1] else None],
            "below_ns": [be[0] if hbe[0] else None, be[1] if hbe[1] else None],
            "base": self._base, "learn_start_ns": self.learn_start_ns,
            "learn": list(self.learn), "learn_stride": self.learn_stride,
            "learn_count": self.learn_count,
            "baseline": self.rule.baseline.as_dict() if self.rule.baseline else None,
        }

    def resume(self, s: Mapping[str, Any]) -> None:
        """Take the fields :meth:`saved` wrote; the learned ones only if the baseline
        settings are the same. ValueError for a state outside the closed set."""
        bl = self.rule.baseline
        same_baseline = bl is not None and s["baseline"] == bl.as_dict()
        for name in _SAVED:
            if name in _LEARNED_FIELDS and not same_baseline or name not in s:
                continue  # (a snapshot from before shelving has no shelve fields)
            v, now = s[name], getattr(self, name)
            if isinstance(now, AlarmState):
                v = AlarmState(check_choice(name, v, _STATES))
            elif isinstance(now, list):
                v = list(v)
            elif isinstance(now, bool):
                v = bool(v)
            elif name in ("learn_stride", "learn_count"):
                v = int(v)
            setattr(self, name, v)


def _rows_of(rules: Sequence[Rule]) -> list[int]:
    """Each rule's row in the table: value rules grouped by channel (channels in the order
    they first appear, rules in their own order within), then the loss-of-signal rules. A
    push of a source's channels then usually reads one slice of rows."""
    pos = {ch: i for i, ch in enumerate(dict.fromkeys(r.channel for r in rules))}
    order = sorted(range(len(rules)),
                   key=lambda k: (rules[k].kind == "signal", pos[rules[k].channel], k))
    rows = [0] * len(rules)
    for row, k in enumerate(order):
        rows[k] = row
    return rows


class _Plan(NamedTuple):
    """The value rules a push layout feeds, in evaluation order (channel, then rule)."""

    slots: np.ndarray  # each rule's row in the engine's table
    cols: np.ndarray  # its value's flat index in the push's [C, 1 + B + T] values
    chan: np.ndarray  # its channel's index in the push
    alarms: list[_Alarm]
    sl: slice | None  # the same rows as one slice of the table, when they are consecutive
    sig_slots: np.ndarray  # the loss-of-signal rules of the push's channels: rows
    sig_chan: np.ndarray  # ... and their channels' indices in the push


class AlarmEngine(EngineBase["_Alarm"]):
    """Runs every rule's state machine on incoming frames; see the module docstring.
    Shelving and acknowledge-all come from :class:`~service.alarms.shelving.ShelvingMixin`."""

    def __init__(self, rules: Iterable[Rule]) -> None:
        self._alarms: dict[str, _Alarm] = {}
        self._by_channel: dict[str, list[_Alarm]] = {}
        rules = list(rules)
        self._table = _Table(len(rules))
        for r, row in zip(rules, _rows_of(rules), strict=True):
            if r.id in self._alarms:
                raise ValueError(f"rule id {r.id!r} is given twice")
            a = _Alarm(r, self._table, row)
            self._alarms[r.id] = a
            self._by_channel.setdefault(r.channel, []).append(a)
        self._suspended: dict[str, str] = {}  # channel → its suspending status
        self._plans: dict[tuple[object, ...], _Plan] = {}

    def replace_rules(self, rules: Iterable[Rule]) -> dict[str, list[str]]:
        """Swap in a new rule set (a config reload); returns the rule ids ``added``,
        ``changed``, ``removed`` and ``kept``.

        A rule whose id stays keeps its state (active, latched, acknowledged) and meets its
        new definition at the next frame; if its definition changed, pending on/off delays
        restart (and a changed baseline is learned again). A removed rule is dropped with
        its state, active or not; the caller says so."""
        new = list(rules)
        ids = [r.id for r in new]
        if len(set(ids)) != len(ids):
            twice = sorted({i for i in ids if ids.count(i) > 1})
            raise ValueError(f"rule ids given twice: {', '.join(twice)}")
        out: dict[str, list[str]] = {"added": [], "changed": [], "removed": [], "kept": []}
        alarms: dict[str, _Alarm] = {}
        by_channel: dict[str, list[_Alarm]] = {}
        table = _Table(len(new))
        if self._table.vns.dtype == object:  # times beyond int64 were seen: stay exact
            table.hold(_I64_MAX + 1)
        for r, k in zip(new, _rows_of(new), strict=True):
            a = self._alarms.get(r.id)
            if a is None:
                a = _Alarm(r, table, k)
                out["added"].append(r.id)
            else:
                if a.rule != r:
                    if a.rule.baseline != r.baseline:
                        a.base = None
                    a.rule = r
                    a.reset_pending()
                    out["changed"].append(r.id)
                else:
                    out["kept"].append(r.id)
                a.move(table, k)
            alarms[r.id] = a
            by_channel.setdefault(r.channel, []).append(a)
        out["removed"] = [i for i in self._alarms if i not in alarms]
        self._alarms, self._by_channel, self._table = alarms, by_channel, table
        self._plans.clear()
        return out


    # -- input ---------------------------------------------------------------------------

    def evaluate_push(
        self, push: PushFrames, statuses: Sequence[str], faults: Sequence[str],
        values: np.ndarray | None = None,
    ) -> list[tuple[AlarmEvent, int]]:
        """:meth:`evaluate` of every frame of ``push`` at once (``statuses[c]`` and
        ``faults[c]``: channel c's data-quality state and its cause), with array operations
        over the rules it feeds: levels, hysteresis and delays compared for all of them,
        Python only for the rules that change state, learn a baseline or see the clock go
        back. The same events, in the same order, as :meth:`evaluate` frame by frame
        (tests/service/test_alarms_vector.py); each with the index of its channel.
        ``values``: the push's [overall | bands | tones] if the caller has them already."""
        t_ns = int(push.t_ns)
        out: list[tuple[AlarmEvent, int]] = []
        plan = self._plan(push)
        tab = self._table
        tab.hold(t_ns)
        # Channel states: the common case, an "ok" channel not suspended whose signal rule
        # is normal, only records 0 at t_ns (what set_channel_status does for it), for all
        # such channels at once; any other channel goes through set_channel_status.
        suspended = self._suspended
        quiet = np.array([st == "ok" and ch not in suspended
                          for ch, st in zip(push.channels, statuses, strict=True)])
        sig = plan.sig_slots
        if sig.size:
            calm = quiet[plan.sig_chan] & (_RANK_OF_CODE[tab.code[sig]] == 0)
            done = sig[calm]
            tab.v[done] = 0.0
            tab.has_v[done] = True
            tab.vns[done] = t_ns
            tab.has_vns[done] = True
            quiet[plan.sig_chan[~calm]] = False
        for c in np.flatnonzero(~quiet).tolist():
            for e in self.set_channel_status(push.channels[c], statuses[c], t_ns,
                                             fault=faults[c]):
                out.append((e, c))
        if not plan.slots.size:
            return out
        if values is None:
            values = np.concatenate((push.bands[:, -1:], push.bands[:, :len(push.band_names)],
                                     push.tones), axis=1)
        v = values.ravel()[plan.cols]
        go = np.isfinite(v)
        if suspended:
            live = np.array([ch not in suspended for ch in push.channels])
            go &= live[plan.chan]
        s_all = plan.slots
        # Python for: a baseline still being learned, a time before the rule's last value
        lv = tab.lv[plan.sl] if plan.sl is not None else tab.lv[s_all]
        slow = np.isnan(lv[:, 0])
        vns_all = tab.vns[plan.sl] if plan.sl is not None else tab.vns[s_all]
        if int(vns_all.max()) > t_ns:
            slow |= (tab.has_vns[s_all] & (vns_all > t_ns)).astype(bool)
        slow &= go
        fast = go & ~slow
        s: slice | np.ndarray
        if plan.sl is not None and fast.all():  # the usual push: one slice of the table
            s, vv, rows = plan.sl, v, None
        else:
            rows = np.flatnonzero(fast)
            s, vv, lv = s_all[rows], v[rows], lv[rows]
        tab.v[s] = vv
        tab.has_v[s] = True
        tab.vns[s] = t_ns
        tab.has_vns[s] = True
        above = vv[:, None] >= lv
        below = vv[:, None] < tab.clear_k[s]
        ab, hab = tab.above[s], tab.has_above[s]
        be, hbe = tab.below[s], tab.has_below[s]
        ab = tab.above[s] = np.where(above & hab, ab, t_ns)
        tab.has_above[s] = above
        be = tab.below[s] = np.where(below & hbe, be, t_ns)
        tab.has_below[s] = below
        rank = _RANK_OF_CODE[tab.code[s]]
        on_ok = above & (t_ns - ab >= tab.on_ns[s][:, None]).astype(bool)
        off_ok = below & (t_ns - be >= tab.off_ns[s][:, None]).astype(bool)
        up = (on_ok[:, 1] & (rank < 2)) | (on_ok[:, 0] & (rank < 1))
        down = (off_ok[:, 0] & (rank >= 1)) | (off_ok[:, 1] & (rank >= 2))
        turn = up | down
        moving = np.flatnonzero(turn) if rows is None else rows[turn]
        if not (moving.size or slow.any()):
            return out
        todo = np.union1d(moving, np.flatnonzero(slow))  # in row order
        if not todo.size:
            return out
        unit = push.settings.unit
        alarms = plan.alarms
        moved = set(moving.tolist())
        ev_rows: list[tuple[int, AlarmEvent]] = []
        for r in todo.tolist():
            a = alarms[r]
            val = float(v[r])
            ev = (self._transition(a, val, t_ns, unit) if r in moved
                  else self._step(a, val, t_ns, unit))
            if ev is not None:
                ev_rows.append((r, self.noted(ev)))
        if ev_rows:  # each channel's status events first, then its rules' (as evaluate)
            chan = plan.chan
            merged = out + [(e, int(chan[r])) for r, e in ev_rows]
            merged.sort(key=lambda ec: ec[1])  # stable: keeps the order within a channel
            out = merged
        return out

    def _plan(self, push: PushFrames) -> _Plan:
        """Which value of a push each rule of its channels watches (made once per layout);
        ``sl`` when its rows are one slice of the table (``_rows_of``)."""
        key = (push.channels, push.profile, push.band_names, push.tone_names,
               push.primary.tobytes())
        plan = self._plans.get(key)
        if plan is not None:
            return plan
        nb = len(push.band_names)
        ncol = 1 + nb + len(push.tone_names)
        cols, chans, alarms, sig, sig_chan = [], [], [], [], []
        for c, ch in enumerate(push.channels):
            primary = bool(push.primary[c])
            for a in self._by_channel.get(ch, ()):
                r = a.rule
                if r.kind == "signal":
                    sig.append(a)
                    sig_chan.append(c)
                    continue
                if not (r.profile == push.profile or (
                        r.primary and primary and r.profile in ("", push.profile))):
                    continue
                if r.kind == "overall":
                    col = 0
                else:
                    names = push.band_names if r.kind == "band" else push.tone_names
                    if r.name not in names:
                        continue  # NaN: never evaluated
                    col = 1 + names.index(r.name) + (nb if r.kind == "tone" else 0)
                cols.append(c * ncol + col)
                chans.append(c)
                alarms.append(a)
        slots = np.array([a._i for a in alarms], dtype=np.int64)
        sl = None
        if slots.size and np.array_equal(slots, np.arange(slots[0], slots[0] + slots.size)):
            sl = slice(int(slots[0]), int(slots[0]) + slots.size)
        plan = _Plan(slots, np.array(cols, dtype=np.int64), np.array(chans, dtype=np.int64),
                     alarms, sl, np.array([a._i for a in sig], dtype=np.int64),
                     np.array(sig_chan, dtype=np.int64))
        self._plans[key] = plan
        return plan


    # -- output --------------------------------------------------------------------------

    def snapshot(self) -> dict[str, Any]:
        """JSON-safe state of every alarm (states, acknowledgements, pending delays, learned
        baselines and baseline learning) and of the faulted channels; see :meth:`restore`."""
        rows = self._table.rows()  # the table as lists once, not value by value
        alarms = {rid: a.saved(rows) for rid, a in self._alarms.items()}
        return {"version": SNAPSHOT_VERSION, "alarms": alarms, "suspended": dict(self._suspended)}


    # -- internals -----------------------------------------------------------------------
    def _step(self, a: _Alarm, v: float, t_ns: int, unit: str) -> AlarmEvent | None:
        if not math.isfinite(v):
            return None
        if a.value_ns is not None and t_ns < a.value_ns:
            if a.value_ns - t_ns <= CLOCK_JITTER_NS:
                t_ns = a.value_ns  # arrival-time jitter: time holds still
            else:  # the clock stepped back: pending delays (and learning) restart on it
                a.reset_pending()
        a.value, a.value_ns = v, int(t_ns)
        if a.rule.baseline is not None and a.base is None and not a.learn_value(v, t_ns):
            return None
        levels = a.levels
        assert levels is not None  # learned above
        h = a.rule.hysteresis
        above, below = a.above_ns, a.below_ns
        for k, level in enumerate(levels):
            if v >= level:
                above[k] = above[k] if above[k] is not None else t_ns
            else:
                above[k] = None
            if v < level * (1 - h):
                below[k] = below[k] if below[k] is not None else t_ns
            else:
                below[k] = None
        a.above_ns, a.below_ns = above, below
        return self._transition(a, v, t_ns, unit)

    def _transition(self, a: _Alarm, v: float, t_ns: int, unit: str) -> AlarmEvent | None:
        """The state change the rule's pending times call for at ``t_ns`` (value ``v``
        already recorded), and its event; None if the state stays."""
        above_ns, below_ns = a.above_ns, a.below_ns
        on_ns, off_ns = round(a.rule.on_delay_s * _NS), round(a.rule.off_delay_s * _NS)
        rank = a.state.rank
        target = rank
        for k in (2, 1):  # the most severe level that has qualified
            since = above_ns[k - 1]
            if k > rank and since is not None and t_ns - since >= on_ns:
                target = k
                break
        if target == rank:
            for k in (1, 2):  # the lowest level that has cleared long enough
                since = below_ns[k - 1]
                if k <= rank and since is not None and t_ns - since >= off_ns:
                    target = k - 1
                    break
        if target == rank:
            return None
        return self._move(a, target, v, t_ns, unit)
