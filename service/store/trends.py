"""Trends: values aggregated in memory into buckets, merged into the tiers, and read back.

Knows the series, trend and trend_floor tables and bucket arithmetic; not threads beyond
its own lock, nor transactions (the writer runs :func:`merge_buckets` in one).
"""

from __future__ import annotations

import math
import sqlite3
import threading
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["TREND_STEPS_S", "Agg", "TrendBuckets", "trend_key"]

NS = 1_000_000_000
TREND_STEPS_S = (1, 2, 3, 4, 5, 6, 10, 12, 15, 20, 30)  # finest tier: must divide 60 s

_MERGE = """
INSERT INTO trend(step_s, series, t_ns, sum, min, max, count) VALUES (?, ?, ?, ?, ?, ?, ?)
ON CONFLICT(step_s, series, t_ns) DO UPDATE SET
    sum = sum + excluded.sum, min = min(min, excluded.min), max = max(max, excluded.max),
    count = count + excluded.count
"""

Key = tuple[str, str]  # (channel, series name)


def trend_key(profile: str, name: str) -> str:
    """The series name of value ``name`` (overall, band:<n>, tone:<n>) of an analysis
    profile other than the channel's primary one (whose series are the names themselves)."""
    return f"{profile}/{name}"


@dataclass(slots=True)
class Agg:
    """One bucket: start (ns) and sum, min, max and count of its values."""

    start_ns: int
    sum: float
    min: float
    max: float
    count: int

    @classmethod
    def of(cls, start_ns: int, v: float) -> Agg:
        return cls(start_ns, v, v, v, 1)

    def add(self, v: float) -> None:
        self.sum += v
        self.min = min(self.min, v)
        self.max = max(self.max, v)
        self.count += 1


@dataclass(slots=True)
class _Block:
    """The open buckets of a block of series that always arrive together (one push's
    channels × values), as arrays [C, K]; cells with count 0 have no bucket."""

    start_ns: int
    keys: Sequence[Sequence[Key]]  # [C][K]
    sum: np.ndarray
    min: np.ndarray
    max: np.ndarray
    count: np.ndarray

    @classmethod
    def of(cls, start_ns: int, keys: Sequence[Sequence[Key]], v: np.ndarray,
           fin: np.ndarray) -> _Block:
        return cls(start_ns, keys, np.where(fin, v, 0.0), np.where(fin, v, math.inf),
                   np.where(fin, v, -math.inf), fin.astype(np.int64))

    def rows(self) -> list[tuple[Key, Agg]]:
        start = self.start_ns
        out = []
        for kc, sc, lo, hi, nc in zip(self.keys, self.sum.tolist(), self.min.tolist(),
                                      self.max.tolist(), self.count.tolist(), strict=True):
            for key, su, mi, ma, n in zip(kc, sc, lo, hi, nc, strict=True):
                if n:
                    out.append((key, Agg(start, su, mi, ma, n)))
        return out


class TrendBuckets:
    """The open buckets of every series at ``step_s`` (thread-safe). :meth:`add` returns the
    buckets it closed: a later bucket of the same series arrived, the series went quiet for
    two steps of the newest data, or a late value (a bucket of its own, merged on write)."""

    def __init__(self, step_s: int) -> None:
        self.step_ns = int(step_s) * NS
        self._lock = threading.Lock()
        self._open: dict[Key, Agg] = {}
        self._blocks: dict[Hashable, _Block] = {}
        self._newest_ns: int | None = None

    def add_block(self, block: Hashable, keys: Sequence[Sequence[Key]], t_ns: int,
                  values: np.ndarray) -> list[tuple[Key, Agg]]:
        """:meth:`add` of a block of series that arrive together: ``values`` [C, K] at
        ``t_ns``, cell (c, k) the series ``keys[c][k]``; ``block`` names the block (the same
        name, the same keys). Array operations per call; the buckets it closes are what
        :meth:`add` would close for the same values, value by value (non-finite values are
        left out; a series' bucket closes when a later bucket of its block opens)."""
        step = self.step_ns
        t = int(t_ns)
        start = t - t % step
        v = np.asarray(values, dtype=np.float64)
        fin = np.isfinite(v)
        closed: list[tuple[Key, Agg]] = []
        with self._lock:
            b = self._blocks.get(block)
            if b is not None and (b.keys is not keys and b.keys != keys):
                closed += b.rows()  # another layout under the same name: start afresh
                b = None
            if b is None or start > b.start_ns:
                if b is not None:
                    closed += b.rows()
                self._blocks[block] = _Block.of(start, keys, v, fin)
            elif start == b.start_ns:
                vz = np.where(fin, v, 0.0)
                b.sum += vz
                np.minimum(b.min, np.where(fin, v, math.inf), out=b.min)
                np.maximum(b.max, np.where(fin, v, -math.inf), out=b.max)
                b.count += fin
            else:  # late: merges into the buckets already written
                for c, k in zip(*np.nonzero(fin), strict=True):
                    closed.append((keys[c][k], Agg.of(start, float(v[c, k]))))
            if self._newest_ns is None or start > self._newest_ns:
                self._newest_ns = start
                closed += self._close_quiet(start)
        return closed

    def _close_quiet(self, start: int) -> list[tuple[Key, Agg]]:
        """Close the series that went quiet: no value for two steps before ``start``."""
        closed: list[tuple[Key, Agg]] = []
        step = self.step_ns
        for key, b in list(self._open.items()):
            if b.start_ns < start - step:
                closed.append((key, b))
                del self._open[key]
        for name, blk in list(self._blocks.items()):
            if blk.start_ns < start - step:
                closed += blk.rows()
                del self._blocks[name]
        return closed

    def add(self, channel: str, t_ns: int, values: Mapping[str, float]) -> list[tuple[Key, Agg]]:
        step = self.step_ns
        t = int(t_ns)
        start = t - t % step
        closed: list[tuple[Key, Agg]] = []
        with self._lock:
            for name, value in values.items():
                v = float(value)
                if not math.isfinite(v):
                    continue
                key = (channel, name)
                b = self._open.get(key)
                if b is None:
                    self._open[key] = Agg.of(start, v)
                elif start == b.start_ns:
                    b.add(v)
                elif start > b.start_ns:
                    closed.append((key, b))
                    self._open[key] = Agg.of(start, v)
                else:  # late: merges into the bucket already written
                    closed.append((key, Agg.of(start, v)))
            if self._newest_ns is None or start > self._newest_ns:
                self._newest_ns = start
                closed += self._close_quiet(start)  # series that went quiet
        return closed

    def take_all(self) -> list[tuple[Key, Agg]]:
        """Close every open bucket (a later value for it merges in exactly)."""
        with self._lock:
            closed = list(self._open.items())
            for blk in self._blocks.values():
                closed += blk.rows()
            self._open.clear()
            self._blocks.clear()
        return closed


def merge_buckets(
    c: sqlite3.Connection,
    ids: dict[Key, int],
    rows: list[tuple[Key, Agg]],
    tiers_s: tuple[int, ...],
) -> None:
    """Merge closed buckets into every tier; ``ids`` caches series ids of ``c``."""
    # One executemany per kind of statement: a 10 s flush of 64 channels is ~1600
    # series × 3 tiers, and a Python-level call per row keeps the GIL from the
    # pipeline threads meanwhile (series ids are looked up once per connection).
    new = list(dict.fromkeys(key for key, _ in rows if key not in ids))
    if new:
        c.executemany("INSERT OR IGNORE INTO series(channel, name) VALUES (?, ?)", new)
        for key in new:
            ids[key] = c.execute(
                "SELECT id FROM series WHERE channel = ? AND name = ?", key
            ).fetchone()[0]
    c.executemany(_MERGE, [
        (s, ids[key], b.start_ns - b.start_ns % (s * NS), b.sum, b.min, b.max, b.count)
        for key, b in rows
        for s in tiers_s
    ])


def pick_tier(
    c: sqlite3.Connection, tiers_s: tuple[int, ...], since_ns: int, step_s: int | None
) -> tuple[int, int]:
    """(tier read, step returned) in s for a range from ``since_ns`` (see ``Store.trend_step``)."""
    floors = dict(c.execute("SELECT step_s, t_ns FROM trend_floor").fetchall())
    covering = [s for s in tiers_s if floors.get(s, -math.inf) <= since_ns]
    base = covering[0] if covering else tiers_s[-1]
    if step_s is None:
        return base, base
    if not (isinstance(step_s, int) and step_s > 0 and step_s % tiers_s[0] == 0):
        raise ValueError(
            f"step_s={step_s!r} is not a positive multiple of the {tiers_s[0]} s "
            "trend step"
        )
    out = -(-step_s // base) * base
    tier = max(s for s in (covering or [base]) if s >= base and out % s == 0)
    return tier, out


def select_trend(
    c: sqlite3.Connection,
    tiers_s: tuple[int, ...],
    channel: str,
    name: str,
    since_ns: int,
    until_ns: int,
    step_s: int | None,
) -> list[tuple[int, float, float, float, int]]:
    """Trend points (t_ns, mean, min, max, count), oldest first (see ``Store.trend``)."""
    sid = c.execute(
        "SELECT id FROM series WHERE channel = ? AND name = ?", (channel, name)
    ).fetchone()
    if sid is None:
        return []
    tier, out = pick_tier(c, tiers_s, since_ns, step_s)
    out_ns = out * NS
    lo = int(since_ns) - int(since_ns) % out_ns
    hi = -(-int(until_ns) // out_ns) * out_ns
    rows = c.execute(
        "SELECT (t_ns / ?) * ? AS b, SUM(sum), MIN(min), MAX(max), SUM(count) "
        "FROM trend WHERE step_s = ? AND series = ? AND t_ns >= ? AND t_ns < ? "
        "GROUP BY b ORDER BY b",
        (out_ns, out_ns, tier, sid[0], lo, hi),
    ).fetchall()
    return [(int(b), s / n, mn, mx, int(n)) for b, s, mn, mx, n in rows]


def select_names(c: sqlite3.Connection, channel: str) -> list[str]:
    """Names with a stored trend on ``channel``, sorted."""
    rows = c.execute(
        "SELECT name FROM series WHERE channel = ? ORDER BY name", (channel,)
    ).fetchall()
    return [r[0] for r in rows]
