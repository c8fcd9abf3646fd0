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
  samples) starting where r(t) passes a whole number, high for 10 %, plus 20 mV of noise.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from .simulated import (
    _NOISE_BLOCK,
    _STREAM_NOISE,
    G_N,
    _stable_key,
    noise_sigma_for_velocity,
)

__all__ = ["VARSPEED_CHANNELS", "VariableSpeedModel", "variable_speed_site"]

VARSPEED_CHANNELS: tuple[str, ...] = ("v1-fan-h", "v1-tacho")
RPM_MID, RPM_SWING = 1200.0, 300.0  # 900 … 1500 r/min
# (order, velocity mm/s RMS): 1X (a little imbalance), 2X, blade pass of a 7-blade fan
ORDERS_MM_S: tuple[tuple[float, float], ...] = ((1.0, 2.0), (2.0, 0.6), (7.0, 0.8))
NOISE_MM_S = 0.4  # broadband velocity RMS over 10–1000 Hz
TACHO_V = 5.0
TACHO_NOISE_V = 0.02


class VariableSpeedModel:
    """The variable-speed fan, rendered as float32 ``[C, n]``: rows follow ``channel_ids``
    (accelerometer in g, tacho in V). Thread-safe (no mutable state)."""

    def __init__(self, *, fs: float, ramp_s: float = 120.0, seed: int = 1,
                 channels: Sequence[str] | None = None) -> None:
        if not ramp_s > 0:
            raise ValueError(f"speed_ramp_s={ramp_s!r} must be > 0 s")
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

    def rpm(self, t_s: np.ndarray | float) -> np.ndarray:
        """Running speed at model time ``t_s`` (s), r/min."""
        return RPM_MID - RPM_SWING * np.cos(np.pi * np.asarray(t_s) / self.ramp_s)

    def revolutions(self, t_s: np.ndarray | float) -> np.ndarray:
        """Revolutions turned since t = 0 at ``t_s`` (s): the integral of rpm/60."""
        t = np.asarray(t_s, dtype=np.float64)
        w = np.pi / self.ramp_s
        return RPM_MID / 60.0 * t - RPM_SWING / 60.0 * np.sin(w * t) / w

    def fault_severity(self, t_s: float) -> float:
        """No scripted fault on this machine: 0."""
        return 0.0

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
            else:
                ph = r - np.floor(r)
                up = np.clip(ph / 0.05, 0.0, 1.0)
                down = np.clip((0.2 - ph) / 0.05, 0.0, 1.0)
                out[row] += TACHO_V * np.minimum(up, down)
            out[row] += self.noise[cid] * self._noise(cid, first_index, n)
        return out.astype(np.float32)

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
                        channels: Sequence[str] | None = None, **_: object) -> VariableSpeedModel:
    """The variable-speed fan; ``fault_start_s``/``fault_ramp_s`` (the demo site's) are
    accepted and unused: this machine has no scripted fault."""
    return VariableSpeedModel(fs=fs, ramp_s=speed_ramp_s, seed=seed, channels=channels)
