"""Spectral history on the event loop: the mean power spectrum of each interval, per channel
and profile, and the spectrum of the moment at an alarm change, as rows for the store.

Knows frames and ``service.store.HistoryRow``; nothing of SQL, threads, HTTP or the engine.

The stored spectrum of an interval is the mean of the power spectra of every frame that
ended in it (a long Welch average: each frame's spectrum is already an average, linear or
exponential, and both have unit gain at 0 Hz, so the mean over many frames is the mean of
the underlying single-transform spectra over the interval, up to the average's start-up
at the interval's edges). Per frame this costs a dictionary look-up, a compare and one
vector add into a float64 sum; the row itself is made only when an interval closes and is
encoded on the store's writer thread.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from .store import HistoryRow
from .types import PushFrames, SpectralFrame

__all__ = ["SpectrumHistory", "alarm_row"]

NS = 1_000_000_000


@dataclass(slots=True)
class _Open:
    """The running sum of one (channel, profile)'s interval."""

    end_ns: int  # the interval's end: frames with end - step <= t_ns < end belong to it
    total: np.ndarray  # float64 sum of the frames' power
    frames: int
    last: SpectralFrame


@dataclass(slots=True)
class _OpenGroup:
    """The running sums of one analysis group's channels (pushes of the same channels and
    profile), one interval for all of them: a push's channels share its time."""

    end_ns: int
    total: np.ndarray  # float64 [C, Q]
    frames: np.ndarray  # int64 [C]: frames summed per channel (bad-quality ones are not)
    last: PushFrames  # the newest push that added to it


class SpectrumHistory:
    """Interval means of every (channel, profile), intervals aligned to multiples of
    ``interval_s`` since the Unix epoch on the frames' own clock (``t_ns``).

    :meth:`add` takes each block's frames and returns the rows of the intervals that
    closed: a later frame of the same (channel, profile) arrived, or the newest frame of any
    channel is a whole interval past its end (a channel that went silent). Frames whose
    ``quality`` is not "ok" are left out (their samples were bad)."""

    def __init__(self, interval_s: int) -> None:
        if not (isinstance(interval_s, int) and interval_s >= 1):
            raise ValueError(f"interval_s={interval_s!r} must be a whole number of s, at least 1")
        self.step_s = interval_s
        self.step_ns = self.step_s * NS
        self._open: dict[tuple[str, str], _Open] = {}
        self._groups: dict[tuple[tuple[str, ...], str], _OpenGroup] = {}
        self._newest_end_ns = 0

    def add_push(self, push: PushFrames) -> list[HistoryRow]:
        """:meth:`add` of a push's frames, as one array add for all its channels (a row
        per channel and interval, as :meth:`add` makes)."""
        closed: list[HistoryRow] = []
        step = self.step_ns
        t = push.t_ns
        end = t - t % step + step
        key = (push.channels, push.profile)
        ok = ~push.fault
        acc = self._groups.get(key)
        if acc is not None and acc.end_ns == end and acc.total.shape == push.power.shape:
            if ok.all():
                np.add(acc.total, push.power, out=acc.total)
            else:
                acc.total[ok] += push.power[ok]
            acc.frames += ok
            acc.last = push
        elif acc is None or end >= acc.end_ns:
            if acc is not None:
                closed += self._group_rows(acc)
            if ok.any():
                total = push.power.astype(np.float64)
                total[~ok] = 0.0
                self._groups[key] = _OpenGroup(end, total, ok.astype(np.int64), push)
            else:
                self._groups.pop(key, None)
            if end > self._newest_end_ns:
                self._newest_end_ns = end
                closed += self._close_quiet()
        # else: a push from before the open interval (the clock stepped back)
        return closed

    def _close_quiet(self) -> list[HistoryRow]:
        closed: list[HistoryRow] = []
        newest, step = self._newest_end_ns, self.step_ns
        for key, acc in list(self._open.items()):
            if acc.end_ns < newest - step:
                closed.append(self._row(acc))
                del self._open[key]
        for gkey, g in list(self._groups.items()):
            if g.end_ns < newest - step:
                closed += self._group_rows(g)
                del self._groups[gkey]
        return closed

    def _group_rows(self, g: _OpenGroup, *, partial: bool = False) -> list[HistoryRow]:
        push = g.last
        rows = []
        for c in np.flatnonzero(g.frames).tolist():
            n = int(g.frames[c])
            t_ns = push.t_ns if partial else g.end_ns
            rows.append(_row_of_push(push, c, g.total[c] / n, t_ns=t_ns,
                                     span_ns=t_ns - (g.end_ns - self.step_ns),
                                     step_s=self.step_s, frames=n))
        return rows

    def add(self, frames: Iterable[SpectralFrame]) -> list[HistoryRow]:
        closed: list[HistoryRow] = []
        step = self.step_ns
        newest = self._newest_end_ns
        for f in frames:
            if f.quality != "ok":
                continue
            t = f.t_ns
            end = t - t % step + step
            key = (f.channel, f.profile)
            acc = self._open.get(key)
            if acc is not None and acc.end_ns == end and acc.total.size == f.power.size:
                np.add(acc.total, f.power, out=acc.total)
                acc.frames += 1
                acc.last = f
                continue
            if acc is not None:
                if end < acc.end_ns:
                    continue  # a frame from before the open interval (clock stepped back)
                closed.append(self._row(acc))
            self._open[key] = _Open(end, f.power.astype(np.float64), 1, f)
            if end > newest:
                newest = end
        if newest > self._newest_end_ns:
            self._newest_end_ns = newest
            closed += self._close_quiet()
        return closed

    def flush(self) -> list[HistoryRow]:
        """Close every open interval now (at shut-down): each row ends at its newest frame."""
        rows = [self._row(acc, partial=True) for acc in self._open.values()]
        for g in self._groups.values():
            rows += self._group_rows(g, partial=True)
        self._open.clear()
        self._groups.clear()
        return rows

    def _row(self, acc: _Open, *, partial: bool = False) -> HistoryRow:
        f = acc.last
        t_ns = f.t_ns if partial else acc.end_ns
        return _row_of(f, acc.total / acc.frames, reason="interval", t_ns=t_ns,
                       span_ns=t_ns - (acc.end_ns - self.step_ns),
                       step_s=self.step_s, frames=acc.frames, event_id=None)


def alarm_row(frame: SpectralFrame, event_id: int | None) -> HistoryRow:
    """The row of an alarm change: ``frame``'s averaged spectrum (copied) at its time."""
    return _row_of(frame, np.array(frame.power, dtype=np.float64), reason="alarm",
                   t_ns=frame.t_ns, span_ns=0, step_s=0, frames=1, event_id=event_id)


def _row_of_push(push: PushFrames, c: int, power: np.ndarray, *, t_ns: int, span_ns: int,
                 step_s: int, frames: int) -> HistoryRow:
    s = push.settings
    return HistoryRow(
        channel=push.channels[c], profile=s.profile, t_ns=int(t_ns), span_ns=int(span_ns),
        reason="interval", step_s=step_s, frames=frames, averages=int(push.averages),
        event_id=None, f0_hz=s.f0_hz, df_hz=s.df_hz, fmax_hz=s.fmax_hz,
        input_unit=s.input_unit, unit=s.unit, amplitude=s.amplitude, lowcut_hz=s.lowcut_hz,
        window=s.window, enbw_bins=s.enbw_bins, power=power,
    )


def _row_of(
    f: SpectralFrame, power: np.ndarray, *, reason: str, t_ns: int, span_ns: int,
    step_s: int, frames: int, event_id: int | None,
) -> HistoryRow:
    return HistoryRow(
        channel=f.channel, profile=f.profile, t_ns=int(t_ns), span_ns=int(span_ns),
        reason=reason, step_s=step_s, frames=frames, averages=int(f.averages),
        event_id=event_id, f0_hz=f.f0_hz, df_hz=f.df_hz, fmax_hz=f.fmax_hz,
        input_unit=f.input_unit, unit=f.unit, amplitude=f.amplitude, lowcut_hz=f.lowcut_hz,
        window=f.window, enbw_bins=f.enbw_bins, power=power,
    )
