"""The benchmark's arithmetic: expected frames and frame ends, skipped frames, percentiles,
latencies from send and arrival times, and the headroom search.

Pure functions of numbers; no I/O, no service.
"""

from __future__ import annotations

import bisect
import math
from collections.abc import Callable, Sequence
from typing import Any

__all__ = [
    "end_index_differences",
    "expected_frames",
    "index_of_time",
    "latencies_ns",
    "latency_figures",
    "newest_frame_ends",
    "percentile",
    "search_headroom",
    "skipped_frames",
]


def expected_frames(n_samples: int, n: int, hop: int) -> int:
    """Frames of ``n`` samples every ``hop`` samples cut from a run of ``n_samples``:
    floor((n_samples − n)/hop) + 1, or 0 when the run is shorter than one frame."""
    if n_samples < n:
        return 0
    return (n_samples - n) // hop + 1


def newest_frame_ends(block_ends: Sequence[int], n: int, hop: int) -> list[int]:
    """End indices (one past the last sample) of the newest frame after each block, for the
    blocks that completed at least one new frame: what a per-block publisher emits.

    ``block_ends`` are the cumulative sample counts after each block (increasing, the stream
    starting at index 0); frame p covers samples [p·hop, p·hop + n)."""
    out: list[int] = []
    done = 0
    for end in block_ends:
        f = expected_frames(int(end), n, hop)
        if f > done:
            out.append((f - 1) * hop + n)
            done = f
    return out


def end_index_differences(received_ends: Sequence[int],
                          expected_ends: Sequence[int]) -> tuple[int, int]:
    """(missing, unexpected): how many of ``expected_ends`` (sorted) between the first and the
    last received one are not in ``received_ends``, and how many distinct received ends are
    not expected at all. Frames before the first or after the last received one are not
    counted (a client may start or stop mid-stream)."""
    got = sorted(set(int(e) for e in received_ends))
    if not got:
        return 0, 0
    exp = list(expected_ends)
    lo = bisect.bisect_left(exp, got[0])
    hi = bisect.bisect_right(exp, got[-1])
    window = set(exp[lo:hi])
    return len(window - set(got)), len(set(got) - window)


def skipped_frames(received_ends: Sequence[int], expected_ends: Sequence[int]) -> int:
    """How many of ``expected_ends`` between the first and the last received one are missing
    from ``received_ends`` (a received end that is not expected counts as skipped too)."""
    return sum(end_index_differences(received_ends, expected_ends))


def percentile(values: Sequence[float], q: float) -> float:
    """The q-th percentile (q in [0, 100]) with linear interpolation between order
    statistics (Hyndman & Fan 1996 definition 7, numpy's default); NaN for no values."""
    if not 0.0 <= q <= 100.0:
        raise ValueError(f"q={q!r} must be in [0, 100]")
    xs = sorted(float(v) for v in values)
    if not xs:
        return math.nan
    h = (len(xs) - 1) * q / 100.0
    lo = math.floor(h)
    hi = min(lo + 1, len(xs) - 1)
    return xs[lo] + (h - lo) * (xs[hi] - xs[lo])


def index_of_time(t_ns: int, base_ns: int, fs: float) -> int:
    """Stream index whose header time is ``t_ns`` when index k is stamped base_ns + k·1e9/fs."""
    return int(round((int(t_ns) - int(base_ns)) * fs / 1e9))


def latencies_ns(
    arrivals: Sequence[tuple[int, int]],
    sends: Sequence[tuple[int, int]],
    *,
    base_ns: int,
    fs: float,
) -> list[int]:
    """Latency in ns of each spectrum message beyond its frame's own duration.

    ``arrivals``: (arrival wall time ns, message ``timestamp_ns``); ``sends``: (end index of a
    block, wall time ns after it was sent), ordered by end index. The message's end index
    e = round((timestamp_ns − base_ns)·fs/1e9); its newest sample e − 1 went out in the first
    block whose end index ≥ e. Messages with no matching block are left out."""
    ends = [e for e, _ in sends]
    out = []
    for arrival, t_ns in arrivals:
        e = index_of_time(t_ns, base_ns, fs)
        i = bisect.bisect_left(ends, e)
        if e <= 0 or i >= len(ends):
            continue
        out.append(int(arrival) - int(sends[i][1]))
    return out


def search_headroom(
    counts: Sequence[int], trial: Callable[[int], bool], *, step: int, refine: int = 2
) -> tuple[int, list[tuple[int, bool]]]:
    """The largest channel count that passes ``trial``, and every (count, passed) tried.

    Tries ``counts`` in rising order and stops at the first failure; then halves the interval
    between the last pass and that failure up to ``refine`` times, on multiples of ``step``
    (e.g. the channels per source) — below the first count too if that one fails; 0 when
    nothing tried passes. Assumes that a count that fails would also fail with more."""
    tried: list[tuple[int, bool]] = []
    best, fail = 0, None
    for c in sorted(counts):
        ok = trial(c)
        tried.append((c, ok))
        if not ok:
            fail = c
            break
        best = c
    for _ in range(refine):
        if fail is None or fail - best <= step:
            break
        mid = (best + fail) // 2 // step * step
        if mid <= best:
            break
        ok = trial(mid)
        tried.append((mid, ok))
        if ok:
            best = mid
        else:
            fail = mid
    return best, tried


def latency_figures(values_ns: Sequence[int]) -> dict[str, Any]:
    """Count, median, p99, max and min in ms of latencies in ns (None for none)."""
    ms = [v / 1e6 for v in values_ns]
    return {"count": len(ms), "median_ms": round(percentile(ms, 50), 3) if ms else None,
            "p99_ms": round(percentile(ms, 99), 3) if ms else None,
            "max_ms": round(max(ms), 3) if ms else None,
            "min_ms": round(min(ms), 3) if ms else None}
