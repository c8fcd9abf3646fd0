"""Running speed: tacho pulses (hysteresis trigger, sub-sample edges, plausibility) and the
1X line of a spectrum; the speed per revolution and its status, streaming or in one go.

Knows nothing about sockets, files, the service or its config: arrays in, arrays out."""

from __future__ import annotations

from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
from scipy.ndimage import maximum_filter1d, minimum_filter1d

from .tones import find_peaks
from .types import WindowName, check_choice
from .windows import DEFAULT_KAISER_BETA

__all__ = [
    "SPEED_STATUSES", "TACHO_EDGES", "SpeedStatus", "TachoEdge", "TachoPush", "TachoSettings",
    "TachoTracker", "speed_from_spectrum", "tacho_edges",
]

# sensor-fault while at least NOISY_EXTRA of the last NOISY_WINDOW candidate pulses were extra
# (our choice: a clean tacho has none; one glitch now and then is tolerated)
NOISY_WINDOW, NOISY_EXTRA = 16, 4

SpeedStatus = Literal["ok", "no-signal", "sensor-fault"]
TachoEdge = Literal["rising", "falling"]
SPEED_STATUSES: tuple[str, ...] = get_args(SpeedStatus)
TACHO_EDGES: tuple[str, ...] = get_args(TachoEdge)


@dataclass(frozen=True)
class TachoSettings:
    """How pulses are found in a tacho signal and which ones are believed.

    The trigger is a hysteresis (Schmitt) trigger: a pulse starts when the signal rises to
    the upper threshold after it has been at or below the lower one. With ``level`` None
    (auto) both follow the signal: mid = (max + min)/2 and span = max − min over the last
    1.5 pulse periods at ``rpm_min``, thresholds mid ± ``hysteresis``·span/2 — so a DC
    drift slower than that moves them along — and no pulse is looked for while the span is
    below ``min_swing``. With ``level`` set, the thresholds are ``level`` ± ``hysteresis``/2
    in signal units.

    Parameters
    ----------
    pulses_per_rev : int, optional
        Pulses per revolution k ≥ 1 (default 1), assumed about evenly spaced.
    rpm_min, rpm_max : float, optional
        Plausible running speed, r/min (defaults 30 and 30 000).
    level : float, optional
        Fixed trigger level in signal units; None (default): auto.
    hysteresis : float, optional
        Auto: fraction of the span between the thresholds, (0, 1) (default 0.5); fixed
        level: the distance between them in signal units (> 0).
    min_swing : float, optional
        Auto: smallest peak-to-peak swing taken as pulses, signal units (default 1.0, for
        pulses of a few volts: noise alone must stay below it).
    max_change : float, optional
        Largest relative change of the pulse period from one pulse to the next (default
        0.25): a shorter interval is an extra pulse (dropped); about n periods (n ≤
        ``max_missing`` + 1, within the same tolerance) are n − 1 missed pulses (bridged);
        anything else is a fault.
    max_missing : int, optional
        Consecutive missed pulses bridged (default 2).
    edge : {'rising', 'falling'}, optional
        Which edge marks a pulse (default rising).
    """

    pulses_per_rev: int = 1
    rpm_min: float = 30.0
    rpm_max: float = 30000.0
    level: float | None = None
    hysteresis: float = 0.5
    min_swing: float = 1.0
    max_change: float = 0.25
    max_missing: int = 2
    edge: TachoEdge = "rising"

    def __post_init__(self) -> None:
        check_choice("edge", self.edge, TACHO_EDGES)
        if int(self.pulses_per_rev) != self.pulses_per_rev or self.pulses_per_rev < 1:
            raise ValueError(f"pulses_per_rev={self.pulses_per_rev!r} must be an integer ≥ 1")
        if not (0 < self.rpm_min < self.rpm_max < np.inf):
            raise ValueError(
                f"rpm_min={self.rpm_min!r}, rpm_max={self.rpm_max!r}: need 0 < rpm_min < rpm_max"
            )
        if self.level is None and not (0 < self.hysteresis < 1):
            raise ValueError(f"hysteresis={self.hysteresis!r} must be a fraction in (0, 1) "
                             "with an automatic level")
        if self.level is not None and not (np.isfinite(self.level) and self.hysteresis > 0):
            raise ValueError(f"level={self.level!r}, hysteresis={self.hysteresis!r}: a fixed "
                             "level needs a finite level and a hysteresis > 0 in signal units")
        if not self.min_swing >= 0:
            raise ValueError(f"min_swing={self.min_swing!r} must be ≥ 0")
        if not (0 < self.max_change < 0.5):
            raise ValueError(f"max_change={self.max_change!r} must be in (0, 0.5)")
        if int(self.max_missing) != self.max_missing or self.max_missing < 0:
            raise ValueError(f"max_missing={self.max_missing!r} must be an integer ≥ 0")

    def pulse_period_s(self, rpm: float) -> float:
        """Time between pulses at ``rpm`` r/min, s.

        Parameters
        ----------
        rpm : float
            Running speed, r/min.

        Returns
        -------
        float
            60/(rpm·k), s.
        """
        return 60.0 / (rpm * self.pulses_per_rev)


@dataclass(frozen=True)
class TachoPush:
    """What one block of tacho samples gave.

    Attributes
    ----------
    edges_s : ndarray
        float64, times of the pulses accepted in this block (bridged ones included), s from
        stream sample 0 (t = k/fs).
    bridged : ndarray
        bool, same length: the pulse was missing and put in by interpolation.
    rev_end_s : ndarray
        float64, end times of the revolutions completed in this block, s.
    rpm : ndarray
        float64, the mean speed over each of those revolutions, r/min (60/(t[i] − t[i−k])).
    status : {'ok', 'no-signal', 'sensor-fault'}
        At the end of the block.
    extra, missing, faults : int
        Pulses dropped as extra, pulses bridged, implausible jumps — in this block.
    """

    edges_s: np.ndarray
    bridged: np.ndarray
    rev_end_s: np.ndarray
    rpm: np.ndarray
    status: SpeedStatus
    extra: int
    missing: int
    faults: int


class TachoTracker:
    """Streaming pulse detection and speed from a tacho signal (one channel).

    ``push`` takes the samples block by block (any split gives the same pulses as one
    push: the trigger's state, the running min/max and the last sample carry over); a
    pulse's time is where the signal crosses the upper threshold, interpolated linearly
    between the two samples around it. Pulses then pass the plausibility rules of
    :class:`TachoSettings`. The last ``keep`` pulses stay for :meth:`mean_rpm` and
    :meth:`revolutions_at`.

    Time is s from stream sample 0 (t = k/fs); a pulse train interrupted (a fault, or no
    pulses for longer than the slowest plausible revolution) starts a new run, and
    revolutions are counted within a run only.

    With timing jitter σ_t (s, RMS) on each edge and a revolution of period T (s), the
    speed of one revolution has a relative error of √2·σ_t/T RMS (two independent edges).

    Parameters
    ----------
    fs : float
        Sample rate of the tacho signal, Hz.
    settings : TachoSettings, optional
        Trigger and plausibility rules.
    keep : int, optional
        Pulses kept for speed queries (default 4096).
    """

    def __init__(self, fs: float, settings: TachoSettings | None = None, keep: int = 4096):
        if not (np.isfinite(fs) and fs > 0):
            raise ValueError(f"fs={fs!r} must be a positive number of Hz")
        self.fs = float(fs)
        self.settings = settings or TachoSettings()
        self.keep = int(keep)
        s = self.settings
        self._t_max = s.pulse_period_s(s.rpm_min)  # longest plausible pulse period, s
        self._t_min = s.pulse_period_s(s.rpm_max)
        # running min/max over 1.5 of the longest pulse periods (odd, for a trailing window)
        self._w = int(np.ceil(1.5 * self._t_max * self.fs)) | 1
        self._k = 0
        self.reset()

    def reset(self, next_index: int | None = None) -> None:
        """Forget everything (a gap in the samples): the next push starts a new run.

        Parameters
        ----------
        next_index : int, optional
            Stream index of the next sample pushed (default: carry on counting).
        """
        if next_index is not None:
            self._k = int(next_index)
        self._hist = np.zeros(0)
        self._state = -1  # trigger: 1 high, 0 low, −1 not known yet
        self._prev: tuple[float, float] | None = None  # last sample and its upper threshold
        self._t = np.zeros(0)  # kept pulses, s
        self._run = np.zeros(0, dtype=np.int64)  # run number of each
        self._run_no = 0
        self._last: float | None = None  # newest accepted pulse, s
        self._period: float | None = None  # current pulse period, s
        self._good = 0  # plausible pulses since the last fault
        self._faulted = False
        self._relock = False  # the period lock was dropped: the next pulse starts a run
        self._recent: deque[bool] = deque(maxlen=NOISY_WINDOW)  # per candidate: was extra

    @property
    def next_index(self) -> int:
        """Stream index of the next sample expected."""
        return self._k

    @property
    def pulses_s(self) -> np.ndarray:
        """The kept pulses, s (a copy)."""
        return self._t.copy()

    def run_pulses_s(self) -> np.ndarray:
        """The kept pulses of the newest run (no break between them), s (a copy).

        Returns
        -------
        ndarray
            float64 pulse times, s from stream sample 0.
        """
        if not self._t.size:
            return self._t.copy()
        out: np.ndarray = self._t[self._run == self._run[-1]]
        return out.copy()

    def _thresholds(self, z: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
        s = self.settings
        if s.level is not None:
            return (np.full(n, s.level + s.hysteresis / 2), np.full(n, s.level - s.hysteresis / 2))
        origin = (self._w - 1) // 2  # window [k − w + 1, k]: only samples already seen
        hi = maximum_filter1d(z, self._w, origin=origin, mode="nearest")[-n:]
        lo = minimum_filter1d(z, self._w, origin=origin, mode="nearest")[-n:]
        mid, half = (hi + lo) / 2, s.hysteresis * (hi - lo) / 2
        dead = (hi - lo) < s.min_swing
        return np.where(dead, np.inf, mid + half), np.where(dead, -np.inf, mid - half)

    def _candidates(self, x: np.ndarray) -> np.ndarray:
        """Trigger times of this block, s."""
        n = x.size
        z = np.concatenate((self._hist, x))
        up, down = self._thresholds(z, n)
        self._hist = z[-(self._w - 1):] if self.settings.level is None else self._hist
        mark = np.where(x >= up, 1, np.where(x <= down, 0, -1))
        m = np.concatenate(([self._state], mark))
        idx = np.arange(n + 1)
        held = m[np.maximum.accumulate(np.where(m >= 0, idx, 0))]
        rise = np.flatnonzero((held[:-1] == 0) & (held[1:] == 1))  # sample `rise` of x is high
        prev_x = np.concatenate(([self._prev[0] if self._prev else x[0]], x[:-1]))
        a, b, u = prev_x[rise], x[rise], up[rise]
        frac = np.where(b > a, (u - a) / np.where(b > a, b - a, 1.0), 1.0)
        t = (self._k + rise - 1 + np.clip(frac, 0.0, 1.0)) / self.fs
        self._state = int(held[-1])
        self._prev = (float(x[-1]), float(up[-1]))
        return np.asarray(t, dtype=np.float64)

    def push(self, x: np.ndarray) -> TachoPush:
        """Feed the next block of tacho samples.

        Parameters
        ----------
        x : ndarray
            The samples, shape (n,), any unit (volts, counts …).

        Returns
        -------
        TachoPush
            Pulses accepted, revolutions completed and their speed (r/min), the status at
            the end of the block and what was dropped or bridged.
        """
        s = self.settings
        x = np.asarray(x, dtype=np.float64).ravel()
        if s.edge == "falling":
            x = -x
        cand = self._candidates(x) if x.size else np.zeros(0)
        self._k += x.size
        out_t: list[float] = []
        out_bridged: list[bool] = []
        out_run: list[int] = []
        extra = missing = faults = 0
        tol = s.max_change

        def start_run(t: float) -> None:
            self._recent.append(False)
            self._relock = False
            self._run_no += 1
            self._last, self._period = t, None
            out_t.append(t)
            out_bridged.append(False)
            out_run.append(self._run_no)

        for t in cand:
            last = self._last
            if last is None or self._relock or t - last > self._t_max * (s.max_missing + 1.5):
                start_run(t)  # first pulse, or after a silence: a new run
                continue
            dt = t - last
            period = self._period
            if period is None:
                if dt < self._t_min * (1 - tol):
                    extra += 1
                    self._recent.append(True)
                    continue
                if dt > self._t_max * (1 + tol):
                    start_run(t)
                    continue
                self._period = dt
            else:
                r = dt / period
                if r < 1 - tol:
                    extra += 1
                    self._recent.append(True)
                    if sum(self._recent) >= NOISY_EXTRA:
                        # extras keep coming: the lock may be on every other pulse (or on
                        # interference); drop it and acquire again from the next pulse, and
                        # call it a fault until 2k + 1 plausible pulses come in a row
                        self._relock, self._period = True, None
                        self._faulted, self._good = True, 0
                    continue
                n = int(round(r))
                if r > 1 + tol and not (2 <= n <= s.max_missing + 1 and abs(r / n - 1) <= tol):
                    faults += 1
                    self._faulted, self._good = True, 0
                    start_run(t)
                    continue
                n = max(n, 1)
                for j in range(1, n):  # missed pulses, evenly spaced
                    out_t.append(last + dt * j / n)
                    out_bridged.append(True)
                    out_run.append(self._run_no)
                missing += n - 1
                self._period = dt / n
            if not (self._t_min * (1 - tol) <= self._period <= self._t_max * (1 + tol)):
                faults += 1  # plausible step, implausible speed
                self._faulted, self._good = True, 0
                start_run(t)
                continue
            self._last = t
            out_t.append(t)
            out_bridged.append(False)
            out_run.append(self._run_no)
            self._recent.append(False)
            self._good += 1
            if self._good >= 2 * s.pulses_per_rev + 1:
                self._faulted = False
        edges = np.asarray(out_t, dtype=np.float64)
        runs = np.asarray(out_run, dtype=np.int64)
        self._t = np.concatenate((self._t, edges))[-self.keep:]
        self._run = np.concatenate((self._run, runs))[-self.keep:]
        rev_end, rpm = self._revolutions(min(edges.size, self._t.size))
        return TachoPush(edges, np.asarray(out_bridged, dtype=bool), rev_end, rpm,
                         self.status, extra, missing, faults)

    def _revolutions(self, new: int) -> tuple[np.ndarray, np.ndarray]:
        k = self.settings.pulses_per_rev
        t, run = self._t, self._run
        i = np.arange(max(t.size - new, k), t.size)
        ok = run[i] == run[i - k]
        i = i[ok]
        return t[i], 60.0 / (t[i] - t[i - k])

    @property
    def status(self) -> SpeedStatus:
        """``no-signal`` when no plausible pulse came for longer than (max_missing + 1.5)
        pulse periods at rpm_min (or none ever); ``sensor-fault`` after an implausible jump
        until 2k + 1 plausible pulses in a row, or while 4 or more of the last 16 candidate
        pulses were extra (interference that could pass for a tacho; the period lock is
        dropped then, so a lock on every other pulse does not last, and the fault holds
        until 2k + 1 plausible pulses come in a row); else ``ok``."""
        now = self._k / self.fs
        s = self.settings
        if self._last is None or now - self._last > self._t_max * (s.max_missing + 1.5):
            return "no-signal"
        if self._faulted or sum(self._recent) >= NOISY_EXTRA:
            return "sensor-fault"
        return "ok"

    def revolutions_at(self, t_s: np.ndarray) -> np.ndarray:
        """Revolutions counted from the first kept pulse of the newest run, at times ``t_s``
        (s), by linear interpolation between pulses; NaN outside that run.

        Parameters
        ----------
        t_s : ndarray
            Times, s from stream sample 0.

        Returns
        -------
        ndarray
            float64 revolutions (pulses ÷ k), the shape of ``t_s``.
        """
        t_s = np.asarray(t_s, dtype=np.float64)
        if self._t.size < 2:
            return np.full(t_s.shape, np.nan)
        sel = self._run == self._run[-1]
        te = self._t[sel]
        if te.size < 2:
            return np.full(t_s.shape, np.nan)
        revs = np.arange(te.size) / self.settings.pulses_per_rev
        out = np.interp(t_s, te, revs)
        return np.where((t_s >= te[0]) & (t_s <= te[-1]), out, np.nan)

    def mean_rpm(self, t0_s: float, t1_s: float) -> tuple[float, float]:
        """Mean speed over [t0_s, t1_s] and how much it varied there.

        The mean is revolutions turned ÷ time, over the part of the span the newest run of
        pulses covers (NaN if that is less than half the span); the variation is
        (max − min)/mean of the speeds of the revolutions that overlap the span.

        Parameters
        ----------
        t0_s, t1_s : float
            The span, s from stream sample 0 (e.g. one spectral frame).

        Returns
        -------
        tuple of float
            (mean speed r/min, relative variation ≥ 0); NaN, NaN when unknown.
        """
        k = self.settings.pulses_per_rev
        if self._t.size < k + 1:
            return _unknown()
        sel = self._run == self._run[-1]
        te = self._t[sel]
        if te.size < k + 1:
            return _unknown()
        a, b = max(t0_s, te[0]), min(t1_s, te[-1])
        if not (b - a >= 0.5 * (t1_s - t0_s)) or b <= a:
            return _unknown()
        r = np.interp([a, b], te, np.arange(te.size) / k)
        mean = 60.0 * (r[1] - r[0]) / (b - a)
        ends = te[k:]
        rpm = 60.0 / (ends - te[:-k])
        over = (ends > t0_s) & (te[:-k] < t1_s)
        var = float((rpm[over].max() - rpm[over].min()) / mean) if over.any() else 0.0
        return float(mean), var


def _unknown() -> tuple[float, float]:
    """(NaN, NaN): speed and variation unknown."""
    return (float("nan"), float("nan"))


def tacho_edges(x: np.ndarray, fs: float, settings: TachoSettings | None = None) -> TachoPush:
    """Pulses and speed per revolution of a whole tacho recording (one push of a
    :class:`TachoTracker`).

    Parameters
    ----------
    x : ndarray
        Tacho samples, shape (n,), any unit.
    fs : float
        Sample rate, Hz.
    settings : TachoSettings, optional
        Trigger and plausibility rules.

    Returns
    -------
    TachoPush
        Pulse times (s from the first sample), revolutions and speeds (r/min), status.

    Examples
    --------
    A 0–5 V once-per-rev pulse at 1500 r/min (25 Hz), 10 % duty, fs 10 kHz, for 1 s:

    >>> import numpy as np
    >>> fs = 10_000.0
    >>> t = np.arange(10_000) / fs
    >>> x = 5.0 * ((t * 25.0) % 1.0 < 0.1)
    >>> res = tacho_edges(x, fs)
    >>> res.status, round(float(res.rpm.mean()), 3)
    ('ok', 1500.0)
    """
    return TachoTracker(fs, settings).push(x)


def speed_from_spectrum(
    power: np.ndarray,
    df_hz: float,
    window: WindowName,
    n: int,
    rpm_min: float,
    rpm_max: float,
    *,
    beta: float = DEFAULT_KAISER_BETA,
    previous_rpm: Sequence[float] | np.ndarray | None = None,
    max_change: float = 0.1,
) -> np.ndarray:
    """Running speed estimated from vibration: the largest peak in [rpm_min, rpm_max]/60 Hz,
    its frequency interpolated through the window's transform (:func:`dsp.tones.find_peaks`).

    Taken as the 1X line, which holds where 1X is the largest line in the range: choose the
    range to leave out 2X and other strong lines. With ``previous_rpm`` the search narrows to
    ±``max_change`` of it (tracking), so a speed that moves slowly is followed.

    Parameters
    ----------
    power : ndarray
        One-sided power spectrum, rms² per line, shape (C, Q) or (Q,), f[q] = q·df_hz.
    df_hz : float
        Line spacing, Hz.
    window : str
        The window the frames were weighted by.
    n : int
        Frame length, samples.
    rpm_min, rpm_max : float
        Speed range searched, r/min.
    beta : float, optional
        Kaiser β, if the window is Kaiser.
    previous_rpm : array_like, optional
        The last estimate per channel, r/min (NaN: search the whole range).
    max_change : float, optional
        Relative half-width of the tracking range around ``previous_rpm`` (default 0.1).

    Returns
    -------
    ndarray
        float64 [C], the speed, r/min; NaN where no peak lies in the range.
    """
    p = np.atleast_2d(np.asarray(power))
    if not (0 < rpm_min < rpm_max):
        raise ValueError(f"rpm_min={rpm_min!r}, rpm_max={rpm_max!r}: need 0 < rpm_min < rpm_max")
    prev = (np.full(p.shape[0], np.nan) if previous_rpm is None
            else np.broadcast_to(np.asarray(previous_rpm, dtype=np.float64), (p.shape[0],)))
    out = np.full(p.shape[0], np.nan)
    for c in range(p.shape[0]):
        lo, hi = rpm_min, rpm_max
        if np.isfinite(prev[c]):
            lo, hi = max(lo, prev[c] * (1 - max_change)), min(hi, prev[c] * (1 + max_change))
        pk = find_peaks(p[c], df_hz, window, n, count=1, min_hz=lo / 60.0, max_hz=hi / 60.0,
                        beta=beta)
        f = float(pk.frequency_hz.ravel()[0]) if pk.frequency_hz.size else np.nan
        out[c] = 60.0 * f if np.isfinite(f) and f > 0 else np.nan
    return out
