"""Spectral history: stored spectra (codec, rows, queries), tier thinning and the disk bound.

Functions of a connection (the writer's or a reader's) and plain arrays; knows the history
table, not threads, frames, the hub or HTTP (the service hands it power spectra as arrays).

Codec: a power spectrum P[q] (input unit², RMS² per line) is kept as 16-bit codes of its
level in dB re 1 unit², in steps of :data:`DB_STEP` = 0.02 dB from :data:`DB_FLOOR`
(code = round((10·log10 P − DB_FLOOR)/DB_STEP)), compressed with zlib. Decoding gives every
line within ±0.01 dB of the power stored (±0.23 % in power, half that in amplitude); code 0
stands for a power at or below the floor (10⁻⁴⁰, read back as 0), levels above
DB_FLOOR + 1310.7 dB are clipped there. Measured on the simulated plant's interval means
(``python -m tests.service.history_sizes``): 1.0/1.9/3.8/7.8 kB for 800/1600/3200/6400 lines,
against 2.8/5.5/11.1/22.1 kB for float32 + zlib; float16 of dB is ~9 % smaller, but its
step grows with |dB| (0.03 dB from 32 to 64 dB, 0.06 dB beyond), whereas this one is the
same at every level.
"""

from __future__ import annotations

import sqlite3
import zlib
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = [
    "CODEC",
    "DB_FLOOR",
    "DB_STEP",
    "ROW_OVERHEAD_BYTES",
    "HistoryPolicy",
    "HistoryRow",
    "decode",
    "encode",
]

NS = 1_000_000_000
DB_STEP = 0.02
DB_FLOOR = -400.0
CODEC = "u16-0.02dB-zlib"
# a row's columns, index entries and the part of a page it leaves unused: 2.5 kB rows take
# a 4 KiB page each (python -m tests.service.history_sizes measures it); used without dbstat
ROW_OVERHEAD_BYTES = 1600
_U16 = np.dtype("<u2")
_META_COLS = (
    "f0_hz", "df_hz", "fmax_hz", "input_unit", "unit", "amplitude", "lowcut_hz",
    "window", "enbw_bins",
)
_LIST_COLS = ("id", "t_ns", "span_ns", "reason", "step_s", "frames", "averages", "event_id",
              "lines")


def encode(power: np.ndarray) -> bytes:
    """The stored bytes of a power spectrum (1-D, input unit²; see the module docstring)."""
    p = np.asarray(power, dtype=np.float64)
    if p.ndim != 1 or p.size == 0:
        raise ValueError(f"a power spectrum must be 1-D and not empty, got shape {p.shape}")
    if not np.all(np.isfinite(p)) or np.any(p < 0):
        raise ValueError("a power spectrum must be finite and >= 0")
    with np.errstate(divide="ignore"):
        db = 10.0 * np.log10(p)
    codes = np.round((db - DB_FLOOR) / DB_STEP)
    codes = np.clip(np.nan_to_num(codes, nan=0.0, neginf=0.0), 0, 65535).astype(_U16)
    return zlib.compress(codes.tobytes(), 9)


def decode(data: bytes) -> np.ndarray:
    """The power spectrum (float64, input unit²) of :func:`encode`'s bytes."""
    return codes_power(decode_codes(data))


def decode_codes(data: bytes) -> np.ndarray:
    """The 16-bit codes of :func:`encode`'s bytes: increasing with the power, so the largest
    of several spectra's codes is the code of their largest power (pooling needs no power)."""
    return np.frombuffer(zlib.decompress(data), dtype=_U16)


def codes_power(codes: np.ndarray) -> np.ndarray:
    """Power (float64, input unit²) of 16-bit codes."""
    c = np.asarray(codes)
    p = 10.0 ** ((DB_FLOOR + DB_STEP * c.astype(np.float64)) / 10.0)
    p[c == 0] = 0.0
    return p


@dataclass(frozen=True, slots=True)
class HistoryPolicy:
    """How long stored spectra are kept, in seconds of data time (``None``: forever).

    Interval rows are kept as they are for ``fine_s``; older ones are thinned to one row
    per ``coarse_step_s`` (their power-weighted mean, by the frames each holds) and kept
    for ``coarse_s``; alarm rows are never thinned and go after ``coarse_s``. Whenever the
    stored spectra exceed ``max_bytes`` (the file pages they take, :func:`stored_bytes`) the
    oldest eighth of the fine rows is thinned, and once none is left to thin the oldest
    eighth of all rows is dropped, until they fit."""

    fine_s: float | None = 30 * 86400
    coarse_s: float | None = 365 * 86400
    coarse_step_s: int = 3600
    max_bytes: int | None = 1024 * 2**20


@dataclass(frozen=True, slots=True)
class HistoryRow:
    """One spectrum to store: ``power`` (1-D, input unit², RMS² per line) on
    f[q] = f0_hz + q·df_hz, averaged over ``span_ns`` ending at ``t_ns`` from ``frames``
    frames; ``reason`` "interval" (``step_s`` = the interval) or "alarm" (``event_id``)."""

    channel: str
    profile: str
    t_ns: int
    span_ns: int
    reason: str
    step_s: int
    frames: int
    averages: int
    event_id: int | None
    f0_hz: float
    df_hz: float
    fmax_hz: float
    input_unit: str
    unit: str
    amplitude: str
    lowcut_hz: float
    window: str
    enbw_bins: float
    power: np.ndarray


_INSERT = (
    "INSERT INTO history(channel, profile, t_ns, span_ns, reason, step_s, frames, averages, "
    "event_id, lines, " + ", ".join(_META_COLS) + ", codec, data) VALUES ("
    + ", ".join("?" * (12 + len(_META_COLS))) + ")"
)


def insert_rows(c: sqlite3.Connection, rows: Sequence[HistoryRow]) -> list[int]:
    """Encode and insert ``rows`` (on the writer thread); their new ids."""
    ids = []
    for r in rows:
        if r.reason not in ("interval", "alarm"):
            raise ValueError(f"reason={r.reason!r} is not one of 'interval', 'alarm'")
        cur = c.execute(_INSERT, (
            r.channel, r.profile, int(r.t_ns), int(r.span_ns), r.reason, int(r.step_s),
            int(r.frames), int(r.averages), r.event_id, int(np.asarray(r.power).size) - 1,
            float(r.f0_hz), float(r.df_hz), float(r.fmax_hz), r.input_unit, r.unit,
            r.amplitude, float(r.lowcut_hz), r.window, float(r.enbw_bins), CODEC,
            encode(r.power),
        ))
        ids.append(int(cur.lastrowid or 0))
    return ids


def select_list(
    c: sqlite3.Connection, channel: str, profile: str, since_ns: int, until_ns: int,
    limit: int,
) -> list[dict[str, Any]]:
    """Rows of (channel, profile) with since_ns <= t_ns < until_ns, oldest first, without
    their spectra; at most ``limit`` (the newest ones when there are more)."""
    cols = ", ".join(_LIST_COLS)
    rows = c.execute(
        f"SELECT {cols} FROM (SELECT {cols} FROM history WHERE channel = ? AND profile = ? "
        "AND t_ns >= ? AND t_ns < ? ORDER BY t_ns DESC, id DESC LIMIT ?) ORDER BY t_ns, id",
        (channel, profile, int(since_ns), int(until_ns), int(limit)),
    ).fetchall()
    return [dict(zip(_LIST_COLS, r, strict=True)) for r in rows]


def count_rows(
    c: sqlite3.Connection, channel: str, profile: str, since_ns: int, until_ns: int
) -> int:
    return int(c.execute(
        "SELECT COUNT(*) FROM history WHERE channel = ? AND profile = ? AND t_ns >= ? "
        "AND t_ns < ?", (channel, profile, int(since_ns), int(until_ns)),
    ).fetchone()[0])


def _full(r: Sequence[Any], codes: bool = False) -> dict[str, Any]:
    names = (*_LIST_COLS, "channel", "profile", *_META_COLS, "data")
    d = dict(zip(names, r, strict=True))
    data = d.pop("data")
    if codes:
        d["codes"] = decode_codes(data)
    else:
        d["power"] = decode(data)
    return d


_FULL = (
    f"SELECT {', '.join(_LIST_COLS)}, channel, profile, {', '.join(_META_COLS)}, data "
    "FROM history"
)


def select_one(c: sqlite3.Connection, row_id: int) -> dict[str, Any] | None:
    """One stored spectrum with its settings and ``power`` (float64), or None."""
    r = c.execute(_FULL + " WHERE id = ?", (int(row_id),)).fetchone()
    return None if r is None else _full(r)


def select_nearest(
    c: sqlite3.Connection, channel: str, profile: str, t_ns: int
) -> dict[str, Any] | None:
    """The stored spectrum of (channel, profile) nearest in time to ``t_ns``, or None."""
    best = None
    for op, order in (("<=", "DESC"), (">", "ASC")):
        r = c.execute(
            _FULL + f" WHERE channel = ? AND profile = ? AND t_ns {op} ? "
            f"ORDER BY t_ns {order}, id {order} LIMIT 1", (channel, profile, int(t_ns)),
        ).fetchone()
        if r is not None and (best is None or abs(r[1] - t_ns) < abs(best[1] - t_ns)):
            best = r
    return None if best is None else _full(best)


def select_spectra(
    c: sqlite3.Connection, channel: str, profile: str, since_ns: int, until_ns: int,
    codes: bool = False,
) -> list[dict[str, Any]]:
    """Every stored spectrum (decoded) of (channel, profile) in [since_ns, until_ns), oldest
    first; with ``codes`` their 16-bit codes instead of their power."""
    rows = c.execute(
        _FULL + " WHERE channel = ? AND profile = ? AND t_ns >= ? AND t_ns < ? ORDER BY t_ns, id",
        (channel, profile, int(since_ns), int(until_ns)),
    ).fetchall()
    return [_full(r, codes) for r in rows]


def stored_bytes(c: sqlite3.Connection) -> tuple[int, int]:
    """(rows, bytes) of the stored spectra: the pages the table and its indexes take in
    the file (SQLite's dbstat table), or where SQLite is built without it, the blobs plus
    :data:`ROW_OVERHEAD_BYTES` a row."""
    n, b = c.execute("SELECT COUNT(*), COALESCE(SUM(length(data)), 0) FROM history").fetchone()
    try:
        pages = c.execute(
            "SELECT COALESCE(SUM(pgsize), 0) FROM dbstat WHERE name IN "
            "('history', 'history_channel_t', 'history_age')"
        ).fetchone()[0]
    except sqlite3.OperationalError:  # no dbstat in this SQLite
        return int(n), int(b) + ROW_OVERHEAD_BYTES * int(n)
    return int(n), int(pages)


# -- retention ---------------------------------------------------------------------------

def thin(c: sqlite3.Connection, before_ns: int, coarse_step_s: int) -> int:
    """Replace the interval rows finer than ``coarse_step_s`` that end before ``before_ns``
    by one row per coarse step (aligned to multiples of it since the Unix epoch) and per
    set-up (lines, Δf): their mean power weighted by each row's frames. Returns the rows
    removed (the rows added are not counted)."""
    step_ns = int(coarse_step_s) * NS
    # whole coarse steps only: rows up to the last step boundary before ``before_ns``
    before_ns = (int(before_ns) - 1) // step_ns * step_ns + 1
    groups = c.execute(
        "SELECT channel, profile, (t_ns - 1) / ? AS b, lines, df_hz, f0_hz, COUNT(*) "
        "FROM history WHERE reason = 'interval' AND step_s < ? AND t_ns < ? "
        "GROUP BY channel, profile, b, lines, df_hz, f0_hz",
        (step_ns, int(coarse_step_s), int(before_ns)),
    ).fetchall()
    removed = 0
    for channel, profile, b, lines, df_hz, f0_hz, _n in groups:
        lo, hi = int(b) * step_ns, (int(b) + 1) * step_ns  # rows with lo < t_ns <= hi
        rows = c.execute(
            f"SELECT id, frames, averages, span_ns, t_ns, {', '.join(_META_COLS)}, data "
            "FROM history WHERE reason = 'interval' AND step_s < ? AND channel = ? "
            "AND profile = ? AND t_ns > ? AND t_ns <= ? AND t_ns < ? AND lines = ? "
            "AND df_hz = ? AND f0_hz = ?",
            (int(coarse_step_s), channel, profile, lo, hi, int(before_ns), lines, df_hz,
             f0_hz),
        ).fetchall()
        if not rows:
            continue
        weights = np.array([max(1, r[1]) for r in rows], dtype=np.float64)
        power = sum(w * decode(r[-1]) for w, r in zip(weights, rows, strict=True))
        power = np.asarray(power) / weights.sum()
        first = min(r[4] - r[3] for r in rows)
        last = rows[-1]
        meta = dict(zip(_META_COLS, last[5:-1], strict=True))
        insert_rows(c, [HistoryRow(
            channel=channel, profile=profile, t_ns=hi, span_ns=hi - first,
            reason="interval", step_s=int(coarse_step_s), frames=int(weights.sum()),
            averages=int(last[2]), event_id=None, power=power, **meta,
        )])
        c.executemany("DELETE FROM history WHERE id = ?", [(r[0],) for r in rows])
        removed += len(rows)
    return removed


def apply_history_retention(
    c: sqlite3.Connection, policy: HistoryPolicy, now_ns: int | None = None
) -> dict[str, Any]:
    """Thin, drop by age, then hold the bound (see :class:`HistoryPolicy`); own
    transactions. ``now_ns`` defaults to the newest stored spectrum's time. Returns
    {"thinned", "deleted", "thinned_for_size", "deleted_for_size", "rows", "bytes"}."""
    if now_ns is None:
        now_ns = c.execute("SELECT MAX(t_ns) FROM history").fetchone()[0]
    report = {"thinned": 0, "deleted": 0, "thinned_for_size": 0, "deleted_for_size": 0}
    if now_ns is not None:
        c.execute("BEGIN IMMEDIATE")
        if policy.fine_s is not None:
            report["thinned"] = thin(c, int(now_ns) - round(policy.fine_s * NS),
                                     policy.coarse_step_s)
        if policy.coarse_s is not None:
            report["deleted"] = c.execute(
                "DELETE FROM history WHERE t_ns < ?", (int(now_ns) - round(policy.coarse_s * NS),)
            ).rowcount
        c.execute("COMMIT")
    rows, size = stored_bytes(c)
    while policy.max_bytes is not None and size > policy.max_bytes and rows:
        c.execute("BEGIN IMMEDIATE")
        fine = c.execute(
            "SELECT COUNT(*) FROM history WHERE reason = 'interval' AND step_s < ?",
            (policy.coarse_step_s,),
        ).fetchone()[0]
        if fine:
            t = c.execute(
                "SELECT t_ns FROM history WHERE reason = 'interval' AND step_s < ? "
                "ORDER BY t_ns LIMIT 1 OFFSET ?", (policy.coarse_step_s, max(0, fine // 8 - 1)),
            ).fetchone()[0]
            step_ns = policy.coarse_step_s * NS
            # whole coarse steps, so a thinned step is never split across passes
            report["thinned_for_size"] += thin(c, -(-int(t) // step_ns) * step_ns + 1,
                                               policy.coarse_step_s)
        else:
            t = c.execute(
                "SELECT t_ns FROM history ORDER BY t_ns LIMIT 1 OFFSET ?",
                (max(0, rows // 8 - 1),),
            ).fetchone()[0]
            report["deleted_for_size"] += c.execute(
                "DELETE FROM history WHERE t_ns <= ?", (int(t),)
            ).rowcount
        c.execute("COMMIT")
        rows, size = stored_bytes(c)
    report["rows"], report["bytes"] = rows, size
    return report
