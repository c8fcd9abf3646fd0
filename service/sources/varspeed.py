"""The simulated variable-speed fan (scenario "variable-speed"): a fan on a drive whose speed
ramps between 900 and 1500 r/min, with an accelerometer and a once-per-rev tacho.

Knows nothing about the pipeline, the spectral engine, config files or the API.

Invented for quaver's demo ("Tarn Hollow", fan v1 in the ventilation house). The speed is
rpm(t) = 1200 − 300·cos(π·t/ramp_s): one ramp 900 → 1500 r/min takes ``ramp_s``, then back.
The shaft has turned r(t) = 20·t − 5·(ramp_s/π)·sin(π·t/ramp_s) revolutions, so every
component is a pure function of the absolute sample index k (t = k/fs), and a stream
rendered in any chunks equals one long render:

* the accelerometer (g): orders 1, 2 and 7 (blade pass) whose *velocity* stays at a fixed
  RMS whatever the speed (acceleration peak = v·√2·2π·o·f(t)/g_n), plus white noise;
* the tacho (V): 0 → 5 V once per revolution, the rise a linear ramp over 5 % of a
  revolution (a few samples even at a low rate, so the trigger finds the edge between
  samples) starting where r(t) passes a whole number, high for 10 %, plus 20 mV of noise;
* optionally (``fault_start_s`` given) a growing outer-race defect of the fan-shaft bearing
  (:data:`FAN_V1_BEARING`, invented): impacts at BPFO *of the actual shaft speed*, i.e. at
  fixed shaft angles 1/BPFO_order of a revolution apart (strike j where r(t) =
  (j + ε_j)/BPFO_order, ε_j the 1 % slip jitter and a 10 % strength spread as the demo
  site's, Randall & Antoni 2011), each ringing the bearing housing's 2.6 kHz resonance; and
  BPFO ×1…3 as velocity tones growing with the severity s(t) = clip((t − fault_start_s)/
  fault_ramp_s, 0, 1) — what eventually moves the velocity overall (from about 2.3 to
  3.0 mm/s at s = 1: the demo's alert 2.8 is passed near s = 0.8).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from .simulated import (
    _BURST_FLOOR,
    _IMPACT_CHUNK,
    _NOISE_BLOCK,
    _STREAM_IMPACT,
    _STREAM_NOISE,
    G_N,
    BearingGeometry,
    _stable_key,
    noise_sigma_for_velocity,
)

__all__ = ["FAN_V1_BEARING", "VARSPEED_CHANNELS", "VariableSpeedModel", "variable_speed_site"]

VARSPEED_CHANNELS: tuple[str, ...] = ("v1-fan-h", "v1-tacho")
RPM_MID, RPM_SWING = 1200.0, 300.0  # 900 … 1500 r/min
# (order, velocity mm/s RMS): 1X (a little imbalance), 2X, blade pass of a 7-blade fan
ORDERS_MM_S: tuple[tuple[float, float], ...] = ((1.0, 2.0), (2.0, 0.6), (7.0, 0.8))
NOISE_MM_S = 0.4  # broadband velocity RMS over 10–1000 Hz
TACHO_V = 5.0
TACHO_NOISE_V = 0.02
# Invented deep-groove ball bearing of the fan shaft: 8 balls of 12.7 mm on a 56.5 mm pitch
# circle, contact angle 0 — BPFO 3.10 orders (its harmonics 6.2, 9.3 stay off 1X, 2X and
# the 7X blade pass), BPFI 4.90, BSF 2.17, FTF 0.39 (dsp.kinematics).
FAN_V1_BEARING = BearingGeometry(n_elements=8, element_diameter_mm=12.7, pitch_diameter_mm=56.5)
# the defect at full severity: BPFO ×1, ×2, ×3 velocity (mm/s RMS) and the housing resonance
# each strike rings (peak g, Hz, damping ratio)
FAULT_BPFO_MM_S: tuple[float, ...] = (1.1, 1.3, 0.9)
FAULT_RESONANCE = (2.0, 2600.0, 0.05)
FAULT_MIN_FS = 2.56 * 4000.0  # Hz: a scenario at a lower rate renders a healthy fan


class VariableSpeedModel:
    """The variable-speed fan, rendered as float32 ``[C, n]``: rows follow ``channel_ids``
    (accelerometer in g, tacho in V). Thread-safe (no mutable state)."""

    def __init__(self, *, fs: float, ramp_s: float = 120.0, seed: int = 1,
                 channels: Sequence[str] | None = None, fault_start_s: float | None = None,
                 fault_ramp_s: float = 180.0) -> None:
        if not ramp_s > 0:
            raise ValueError(f"speed_ramp_s={ramp_s!r} must be > 0 s")
        if fault_start_s is not None and not (math.isfinite(fault_start_s)
                                              and fault_start_s >= 0):
            raise ValueError(f"fault_start_s={fault_start_s!r} must be a number >= 0 s")
        if not (math.isfinite(fault_ramp_s) and fault_ramp_s > 0):
            raise ValueError(f"fault_ramp_s={fault_ramp_s!r} must be > 0 s")
        if fault_start_s is not None and fs < FAULT_MIN_FS:
            raise ValueError(f"fs={fs!r} Hz is too low for the fan's bearing fault (a 2.6 kHz "
                             f"resonance): it needs >= {FAULT_MIN_FS:g} Hz")
        if fs < 1024.0:  # blade pass reaches 175 Hz; the tacho edge wants fine steps
            raise ValueError(f"fs={fs!r} Hz is too low for the variable-speed fan: "
                             "it needs >= 1024 Hz")
        chosen = list(channels) if channels else list(VARSPEED_CHANNELS)
        unknown = [c for c in chosen if c not in VARSPEED_CHANNELS]
        if unknown:
            allowed = ", ".join(repr(c) for c in VARSPEED_CHANNELS)
            raise ValueError(f"channels {unknown} are not in the variable-speed fan; "
                             f"allowed: {allowed}")
        self.fs = float(fs)
        self.ramp_s = float(ramp_s)
        self.seed = int(seed)
        self.channel_ids: tuple[str, ...] = tuple(chosen)
        self.noise = {"v1-fan-h": noise_sigma_for_velocity(NOISE_MM_S, self.fs),
                      "v1-tacho": TACHO_NOISE_V}
        self.fault_start_s = fault_start_s  # None: a healthy fan
        self.fault_ramp_s = float(fault_ramp_s)
        self.bpfo_order = FAN_V1_BEARING.frequencies(1.0).bpfo_hz
        peak, f_n, zeta = FAULT_RESONANCE
        self._burst_len = math.ceil(-math.log(_BURST_FLOOR) / (zeta * 2 * math.pi * f_n)
                                    * self.fs)

    def rpm(self, t_s: np.ndarray | float) -> np.ndarray:
        """Running speed at model time ``t_s`` (s), r/min."""
        return RPM_MID - RPM_SWING * np.cos(np.pi * np.asarray(t_s) / self.ramp_s)

    def revolutions(self, t_s: np.ndarray | float) -> np.ndarray:
        """Revolutions turned since t = 0 at ``t_s`` (s): the integral of rpm/60."""
        t = np.asarray(t_s, dtype=np.float64)
        w = np.pi / self.ramp_s
        return RPM_MID / 60.0 * t - RPM_SWING / 60.0 * np.sin(w * t) / w

    def fault_severity(self, t_s: float) -> float:
        """Severity 0…1 of the bearing defect at model time ``t_s`` (0 without a fault)."""
        return float(self._severity(np.asarray(t_s, dtype=np.float64)))

    def _severity(self, t_s: np.ndarray) -> np.ndarray:
        if self.fault_start_s is None:
            return np.zeros_like(t_s, dtype=np.float64)
        return np.clip((t_s - self.fault_start_s) / self.fault_ramp_s, 0.0, 1.0)

    def time_at(self, revs: np.ndarray) -> np.ndarray:
        """Model time (s) at which the shaft has turned ``revs`` revolutions: r(t) inverted
        by Newton's method (r is strictly increasing, r' = rpm/60 >= 15 rev/s)."""
        target = np.asarray(revs, dtype=np.float64)
        t = target / (RPM_MID / 60.0)
        for _ in range(8):
            t = t - (self.revolutions(t) - target) / (self.rpm(t) / 60.0)
        return t

    def render(self, first_index: int, n: int) -> np.ndarray:
        """Samples first_index … first_index + n − 1 (t = k/fs), float32 ``[C, n]``."""
        if first_index < 0 or n < 0:
            raise ValueError(f"first_index={first_index} and n={n} must be >= 0")
        k = np.arange(first_index, first_index + n, dtype=np.int64)
        t = k / self.fs
        r = self.revolutions(t)
        f = self.rpm(t) / 60.0
        out = np.zeros((len(self.channel_ids), n), dtype=np.float64)
        for row, cid in enumerate(self.channel_ids):
            if cid == "v1-fan-h":
                for order, v in ORDERS_MM_S:
                    a_peak = v * 1e-3 * math.sqrt(2.0) * 2.0 * np.pi * order * f / G_N
                    cyc = order * r
                    out[row] += a_peak * np.cos(2.0 * np.pi * (cyc - np.floor(cyc)))
                if self.fault_start_s is not None:
                    sev = self._severity(t)
                    if sev.any():
                        for h, v in enumerate(FAULT_BPFO_MM_S, start=1):
                            o = h * self.bpfo_order
                            a_peak = v * 1e-3 * math.sqrt(2.0) * 2.0 * np.pi * o * f / G_N
                            cyc = o * r
                            out[row] += sev * a_peak * np.sin(
                                2.0 * np.pi * (cyc - np.floor(cyc)) + 0.5 * h)
                    self._add_strikes(out[row], first_index, n)
            else:
                ph = r - np.floor(r)
                up = np.clip(ph / 0.05, 0.0, 1.0)
                down = np.clip((0.2 - ph) / 0.05, 0.0, 1.0)
                out[row] += TACHO_V * np.minimum(up, down)
            out[row] += self.noise[cid] * self._noise(cid, first_index, n)
        return out.astype(np.float32)

    def _add_strikes(self, out: np.ndarray, first_index: int, n: int) -> None:
        """The outer-race strikes ringing the housing resonance, added into ``out``."""
        if n == 0:
            return
        fs, L, ob = self.fs, self._burst_len, self.bpfo_order
        r_lo = float(self.revolutions(max(0, first_index - L) / fs))
        r_hi = float(self.revolutions((first_index + n) / fs))
        j_lo = max(0, math.floor(r_lo * ob) - 1)
        j_hi = math.ceil(r_hi * ob) + 1
        c_lo, c_hi = j_lo // _IMPACT_CHUNK, j_hi // _IMPACT_CHUNK
        key = _stable_key("v1-fan-de-outer-race")
        offsets, strength = [], []
        for c in range(c_lo, c_hi + 1):  # counter-based, as the demo site's impact trains
            rng = np.random.default_rng([self.seed, _STREAM_IMPACT, key, c])
            offsets.append(np.clip(0.01 * rng.standard_normal(_IMPACT_CHUNK), -0.45, 0.45))
            strength.append(np.clip(1.0 + 0.1 * rng.standard_normal(_IMPACT_CHUNK), 0.0, None))
        j = np.arange(c_lo * _IMPACT_CHUNK, (c_hi + 1) * _IMPACT_CHUNK)
        t_j = self.time_at((j + np.concatenate(offsets)) / ob)
        amp = np.concatenate(strength) * self._severity(t_j)
        k_start = np.ceil(t_j * fs).astype(np.int64)
        keep = (amp > 0) & (k_start < first_index + n) & (k_start + L > first_index)
        if not keep.any():
            return
        t_j, amp, k_start = t_j[keep], amp[keep], k_start[keep]
        idx = k_start[:, None] + np.arange(L)[None, :]
        tau = idx / fs - t_j[:, None]
        inside = (idx >= first_index) & (idx < first_index + n)
        peak, f_n, zeta = FAULT_RESONANCE
        w_n = 2.0 * math.pi * f_n
        w_d = w_n * math.sqrt(1.0 - zeta**2)
        burst = np.exp(-zeta * w_n * tau) * np.sin(w_d * tau) * (peak * amp)[:, None]
        out += np.bincount((idx - first_index)[inside], weights=burst[inside], minlength=n)

    def _noise(self, cid: str, first_index: int, n: int) -> np.ndarray:
        """Unit white noise, counter-based per block of samples (as the demo site's)."""
        if n == 0:
            return np.zeros(0)
        b_lo = first_index // _NOISE_BLOCK
        b_hi = (first_index + n - 1) // _NOISE_BLOCK
        lo = first_index - b_lo * _NOISE_BLOCK
        key = _stable_key(cid)
        blocks = [np.random.default_rng([self.seed, _STREAM_NOISE, key, b]).standard_normal(
            _NOISE_BLOCK, dtype=np.float32) for b in range(b_lo, b_hi + 1)]
        return np.concatenate(blocks)[lo: lo + n].astype(np.float64)


def variable_speed_site(*, seed: int = 1, fs: float = 12800.0, speed_ramp_s: float = 120.0,
                        channels: Sequence[str] | None = None,
                        fault_start_s: float | None = None, fault_ramp_s: float = 180.0,
                        **_: object) -> VariableSpeedModel:
    """The variable-speed fan; its bearing defect starts at ``fault_start_s`` (None: a
    healthy fan) and grows to full severity over ``fault_ramp_s``. Below ``FAULT_MIN_FS``
    the fan stays healthy whatever ``fault_start_s`` says: the 2.6 kHz resonance its strikes
    ring needs a sample rate of at least 2.56 × 4 kHz (as the demo site)."""
    if fs < FAULT_MIN_FS:
        fault_start_s = None
    return VariableSpeedModel(fs=fs, ramp_s=speed_ramp_s, seed=seed, channels=channels,
                              fault_start_s=fault_start_s, fault_ramp_s=fault_ramp_s)
