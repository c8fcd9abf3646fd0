"""The simulated plant: a deterministic signal model of an invented pumping station, and a
source that streams it in real time (or faster) for ``quaver demo`` and for tests.

Knows nothing about the pipeline, the spectral engine, config files or the API.

The site ("Tarn Hollow pumping station", our own invention) has two centrifugal pumps
driven by motors (p1, p2) and a cooling fan driven through a single-stage gearbox (f1).
Signals are acceleration in g. Every component is a function of the *absolute* sample
index k (t = k/fs), so a stream rendered in any chunks equals one long render:

* tones (1X, 2X, vane pass, blade pass, gear mesh and its sidebands, bearing-defect
  harmonics): phase 2π·frac(f·k/fs + φ/2π), amplitude a_healthy + a_fault·s(t);
* bearing-defect impacts: impact j of a defect at rate r happens at t_j = (j + ε_j)/r, with
  ε_j ~ N(0, jitter) (the random slip of rolling elements, about 1 % of the spacing;
  Randall & Antoni 2011) and a strength with a 10 % standard deviation between impacts. Each
  impact rings a resonance: a·exp(−ζω_n·τ)·sin(ω_d·τ), τ = t − t_j ≥ 0, ω_d = ω_n√(1−ζ²).
  (ε_j, amplitude) come from a generator seeded by (seed, defect, j // 256), so any impact
  can be recomputed without the ones before it;
* broadband noise: Gaussian, white in acceleration, drawn per channel in fixed blocks of
  4096 samples from a generator seeded by (seed, channel, block number) — counter-based, so
  re-rendering any span gives the same samples.

The scripted fault has severity s(t) = clip((t − fault_start_s)/fault_ramp_s, 0, 1).
"""

from __future__ import annotations

import asyncio
import math
import re
import time
import zlib
from collections.abc import AsyncIterator, Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from dsp.kinematics import BearingFrequencies, bearing_frequencies, gear_mesh_hz

from ..types import SampleBlock, SourceCounters

__all__ = [
    "DEMO_CHANNELS",
    "G_N",
    "SCENARIOS",
    "BearingGeometry",
    "ChannelInfo",
    "ImpactTrain",
    "PlantModel",
    "Resonance",
    "SimulatedSource",
    "Tone",
    "build_scenario",
    "demo_site",
    "g_peak_for_velocity",
    "noise_sigma_for_velocity",
]

G_N = 9.80665  # standard acceleration of gravity, m/s² (3rd CGPM, 1901)

_NOISE_BLOCK = 4096  # samples per counter-based noise block
_IMPACT_CHUNK = 256  # impacts per counter-based chunk of slip jitter and amplitudes
_BURST_FLOOR = 1e-7  # a burst is cut where its envelope has fallen to this fraction
_STREAM_NOISE = 1
_STREAM_IMPACT = 2
_ID_RE = re.compile(r"^[a-z0-9][a-z0-9_-]*$")


# ---------------------------------------------------------------------------------------
# Site description


@dataclass(frozen=True, slots=True)
class BearingGeometry:
    """A rolling-element bearing: element count, diameters in mm, contact angle in degrees."""

    n_elements: int
    element_diameter_mm: float
    pitch_diameter_mm: float
    contact_angle_deg: float = 0.0

    def frequencies(self, shaft_hz: float) -> BearingFrequencies:
        """Defect frequencies in Hz for a shaft turning at ``shaft_hz`` (outer race fixed):
        :func:`dsp.kinematics.bearing_frequencies` (Randall & Antoni 2011)."""
        return bearing_frequencies(
            self.n_elements, self.element_diameter_mm, self.pitch_diameter_mm,
            self.contact_angle_deg, shaft_hz,
        )


@dataclass(frozen=True, slots=True)
class ChannelInfo:
    """One measurement point: id (url-safe), machine, where the sensor sits, the shaft
    speed it sees in r/min, and the nearest bearing (None if not modelled). Unit: g."""

    id: str
    machine: str
    description: str
    speed_rpm: float
    bearing: BearingGeometry | None = None

    @property
    def shaft_hz(self) -> float:
        """Running speed in Hz (1X)."""
        return self.speed_rpm / 60.0


# ---------------------------------------------------------------------------------------
# Signal components


@dataclass(frozen=True, slots=True)
class Tone:
    """A sinusoid on one channel: (healthy_g + fault_g·s(t))·sin(2π·freq_hz·t + phase_rad).

    Amplitudes are peak acceleration in g; s(t) is the fault severity 0…1."""

    channel: str
    label: str
    freq_hz: float
    healthy_g: float
    fault_g: float = 0.0
    phase_rad: float = 0.0


@dataclass(frozen=True, slots=True)
class Resonance:
    """How one channel answers a defect impact: a decaying sinusoid whose envelope starts at
    ``peak_g`` (g, at full severity), at ``freq_hz`` with damping ratio ``damping`` (0 < ζ < 1)."""

    channel: str
    peak_g: float
    freq_hz: float
    damping: float


@dataclass(frozen=True, slots=True)
class ImpactTrain:
    """Impacts from a localised defect at ``rate_hz`` (e.g. BPFO) on a shared timeline.

    ``jitter`` is the standard deviation of each impact's time offset as a fraction of the
    spacing 1/rate_hz (clipped to ±0.45); ``amplitude_spread`` the relative standard
    deviation of impact strength. Strength scales with the fault severity at the impact."""

    name: str
    rate_hz: float
    responses: tuple[Resonance, ...]
    jitter: float = 0.01
    amplitude_spread: float = 0.1


def g_peak_for_velocity(v_rms_mm_s: float, f_hz: float) -> float:
    """Peak acceleration in g of a sine at ``f_hz`` whose velocity is ``v_rms_mm_s`` RMS.

    v = a/(2πf) for a sine; RMS = peak/√2; 1 g = 9.80665 m/s²."""
    return v_rms_mm_s * 1e-3 * math.sqrt(2.0) * 2.0 * math.pi * f_hz / G_N


def noise_sigma_for_velocity(
    v_rms_mm_s: float, fs: float, lo_hz: float = 10.0, hi_hz: float = 1000.0
) -> float:
    """Standard deviation in g of white acceleration noise (sampled at ``fs`` Hz) whose
    velocity RMS over ``lo_hz``…``hi_hz`` is ``v_rms_mm_s``.

    One-sided PSD P (g²/Hz) flat to fs/2 has σ² = P·fs/2 and velocity power
    ∫ P·(g_n/2πf)² df = P·g_n²/(4π²)·(1/lo − 1/hi)."""
    v = v_rms_mm_s * 1e-3
    psd = v * v * 4.0 * math.pi**2 / (G_N**2 * (1.0 / lo_hz - 1.0 / hi_hz))
    return math.sqrt(psd * fs / 2.0)


def _stable_key(text: str) -> int:
    return zlib.crc32(text.encode("utf-8"))


# ---------------------------------------------------------------------------------------
# The model


class PlantModel:
    """A deterministic multi-channel vibration signal: tones, defect impacts and noise.

    ``render(first_index, n)`` returns acceleration in g, float32 ``[C, n]``, for samples
    k = first_index … first_index + n − 1 at ``fs`` Hz (t = k/fs s). It is a pure function
    of (model, seed, k): rendering [0, a) then [a, b) equals rendering [0, b) to float32
    rounding. Thread-safe (no mutable state).
    """

    def __init__(
        self,
        channels: Sequence[ChannelInfo],
        *,
        fs: float,
        tones: Sequence[Tone] = (),
        impacts: Sequence[ImpactTrain] = (),
        noise_g: Mapping[str, float] | None = None,
        seed: int = 0,
        fault_start_s: float = 0.0,
        fault_ramp_s: float = 180.0,
    ) -> None:
        if not channels:
            raise ValueError("a plant model needs at least one channel")
        ids = [c.id for c in channels]
        for cid in ids:
            if not _ID_RE.match(cid):
                raise ValueError(
                    f"channel id {cid!r} is not url-safe: use lowercase letters, digits, "
                    "'-' and '_', starting with a letter or digit"
                )
        if len(set(ids)) != len(ids):
            raise ValueError(f"channel ids repeat: {ids}")
        if not (math.isfinite(fs) and fs > 0):
            raise ValueError(f"fs={fs!r} Hz must be a positive finite number")
        if not (math.isfinite(fault_ramp_s) and fault_ramp_s > 0):
            raise ValueError(f"fault_ramp_s={fault_ramp_s!r} must be a positive number of seconds")
        if not math.isfinite(fault_start_s):
            raise ValueError(f"fault_start_s={fault_start_s!r} must be finite")
        if not isinstance(seed, int) or seed < 0:
            raise ValueError(f"seed={seed!r} must be a non-negative integer")
        self.channels: tuple[ChannelInfo, ...] = tuple(channels)
        self.channel_ids: tuple[str, ...] = tuple(ids)
        self.fs = float(fs)
        self.seed = seed
        self.fault_start_s = float(fault_start_s)
        self.fault_ramp_s = float(fault_ramp_s)
        row = {cid: i for i, cid in enumerate(ids)}
        nyquist = self.fs / 2.0

        def _row(cid: str, what: str) -> int:
            if cid not in row:
                raise ValueError(f"{what} names channel {cid!r}, which is not one of {ids}")
            return row[cid]

        self.tones = tuple(tones)
        for t in self.tones:
            _row(t.channel, f"tone {t.label!r}")
            if not 0.0 < t.freq_hz < nyquist:
                raise ValueError(
                    f"tone {t.label!r} on {t.channel!r} at {t.freq_hz} Hz is outside "
                    f"0 < f < fs/2 = {nyquist} Hz"
                )
        n_t = len(self.tones)
        self._tone_cycles_per_sample = np.array([t.freq_hz / self.fs for t in self.tones])
        self._tone_phase_cycles = np.array([t.phase_rad / (2 * math.pi) for t in self.tones])
        # [C, T] mixing matrices: out = A_healthy @ S + (A_fault @ S)·s
        self._a_healthy = np.zeros((len(ids), n_t), dtype=np.float32)
        self._a_fault = np.zeros((len(ids), n_t), dtype=np.float32)
        for i, t in enumerate(self.tones):
            self._a_healthy[row[t.channel], i] = t.healthy_g
            self._a_fault[row[t.channel], i] = t.fault_g

        self.impacts = tuple(impacts)
        self._burst_len: list[int] = []
        for tr in self.impacts:
            if not tr.rate_hz > 0:
                raise ValueError(f"impact train {tr.name!r}: rate_hz={tr.rate_hz!r} must be > 0")
            if not 0.0 <= tr.jitter < 0.45:
                raise ValueError(f"impact train {tr.name!r}: jitter={tr.jitter!r} not in [0, 0.45)")
            longest = 1
            for r in tr.responses:
                _row(r.channel, f"impact train {tr.name!r}")
                if not 0.0 < r.damping < 1.0 or not 0.0 < r.freq_hz < nyquist:
                    raise ValueError(
                        f"impact train {tr.name!r} on {r.channel!r}: need 0 < damping < 1 and "
                        f"0 < freq_hz < {nyquist} Hz, got damping={r.damping}, "
                        f"freq_hz={r.freq_hz}"
                    )
                decay_s = -math.log(_BURST_FLOOR) / (r.damping * 2 * math.pi * r.freq_hz)
                longest = max(longest, math.ceil(decay_s * self.fs))
            self._burst_len.append(longest)
        self._rows = row

        self.noise_g = dict(noise_g or {})
        for cid, sigma in self.noise_g.items():
            _row(cid, "noise")
            if not sigma >= 0:
                raise ValueError(f"noise on {cid!r}: sigma={sigma!r} g must be >= 0")

    # -- fault schedule ------------------------------------------------------------------

    def fault_severity(self, t_s: float) -> float:
        """Scripted fault severity 0…1 at model time ``t_s`` seconds (t = k/fs).

        0 until ``fault_start_s``, then linear to 1 at ``fault_start_s + fault_ramp_s``."""
        return float(self._severity(np.asarray(t_s, dtype=np.float64)))

    def _severity(self, t_s: np.ndarray) -> np.ndarray:
        return np.clip((t_s - self.fault_start_s) / self.fault_ramp_s, 0.0, 1.0)

    # -- rendering -----------------------------------------------------------------------

    def render(self, first_index: int, n: int) -> np.ndarray:
        """Acceleration in g, float32 ``[C, n]``, for samples first_index … first_index+n−1.

        Rows follow ``channel_ids``; sample k is at t = k/fs seconds of model time."""
        first_index = int(first_index)
        n = int(n)
        if first_index < 0 or n < 0:
            raise ValueError(f"first_index={first_index} and n={n} must be >= 0")
        out = np.zeros((len(self.channel_ids), n), dtype=np.float64)
        if n == 0:
            return out.astype(np.float32)
        k = np.arange(first_index, first_index + n, dtype=np.int64)
        severity = self._severity(k / self.fs)
        if self.tones:
            cycles = np.multiply.outer(self._tone_cycles_per_sample, k.astype(np.float64))
            cycles += self._tone_phase_cycles[:, None]
            cycles -= np.floor(cycles)  # keep the argument small: exact phase at any k
            # float32 from here: a phase within [0, 2π) to ~4e-7 rad is plenty for
            # float32 output, and float32 sin is several times faster.
            s = cycles.astype(np.float32)
            s *= np.float32(2.0 * np.pi)
            np.sin(s, out=s)
            out += self._a_healthy @ s
            if severity.any():
                out += (self._a_fault @ s) * severity
        for train, burst_len in zip(self.impacts, self._burst_len, strict=True):
            self._add_impacts(out, train, burst_len, first_index, n)
        self._add_noise(out, first_index, n)
        return out.astype(np.float32)

    def _impact_chunk(self, train: ImpactTrain, chunk: int) -> tuple[np.ndarray, np.ndarray]:
        rng = np.random.default_rng(
            [self.seed, _STREAM_IMPACT, _stable_key(train.name), chunk]
        )
        offsets = np.clip(train.jitter * rng.standard_normal(_IMPACT_CHUNK), -0.45, 0.45)
        strength = np.clip(1.0 + train.amplitude_spread * rng.standard_normal(_IMPACT_CHUNK),
                           0.0, None)
        return offsets, strength

    def _add_impacts(
        self, out: np.ndarray, train: ImpactTrain, burst_len: int, first_index: int, n: int
    ) -> None:
        fs = self.fs
        # impacts whose bursts can touch [first_index, first_index + n); ±1 for the jitter
        j_lo = max(0, math.floor((first_index - burst_len) / fs * train.rate_hz) - 1)
        j_hi = math.ceil((first_index + n) / fs * train.rate_hz) + 1
        parts = [
            self._impact_chunk(train, c)
            for c in range(j_lo // _IMPACT_CHUNK, j_hi // _IMPACT_CHUNK + 1)
        ]
        j = np.arange((j_lo // _IMPACT_CHUNK) * _IMPACT_CHUNK,
                      (j_hi // _IMPACT_CHUNK + 1) * _IMPACT_CHUNK)
        offsets = np.concatenate([p[0] for p in parts])
        strength = np.concatenate([p[1] for p in parts])
        t_j = (j + offsets) / train.rate_hz
        strength = strength * self._severity(t_j)
        k_start = np.ceil(t_j * fs).astype(np.int64)
        keep = (
            (strength > 0)
            & (k_start < first_index + n)
            & (k_start + burst_len > first_index)
        )
        if not keep.any():
            return
        t_j, strength, k_start = t_j[keep], strength[keep], k_start[keep]
        idx = k_start[:, None] + np.arange(burst_len)[None, :]  # [J, L] absolute samples
        tau = idx / fs - t_j[:, None]
        inside = (idx >= first_index) & (idx < first_index + n)
        pos = (idx - first_index)[inside]
        for r in train.responses:
            w_n = 2.0 * math.pi * r.freq_hz
            w_d = w_n * math.sqrt(1.0 - r.damping**2)
            burst = np.exp(-r.damping * w_n * tau) * np.sin(w_d * tau)
            burst *= (r.peak_g * strength)[:, None]
            out[self._rows[r.channel]] += np.bincount(pos, weights=burst[inside], minlength=n)

    def _add_noise(self, out: np.ndarray, first_index: int, n: int) -> None:
        b_lo = first_index // _NOISE_BLOCK
        b_hi = (first_index + n - 1) // _NOISE_BLOCK
        base = b_lo * _NOISE_BLOCK
        lo, hi = first_index - base, first_index - base + n
        for cid, sigma in self.noise_g.items():
            if sigma == 0:
                continue
            key = _stable_key(cid)
            blocks = [
                np.random.default_rng([self.seed, _STREAM_NOISE, key, b]).standard_normal(
                    _NOISE_BLOCK, dtype=np.float32
                )
                for b in range(b_lo, b_hi + 1)
            ]
            out[self._rows[cid]] += sigma * np.concatenate(blocks)[lo:hi]


# ---------------------------------------------------------------------------------------
# The demo site (invented): Tarn Hollow pumping station

DEMO_FS = 12800.0  # Hz: 2.56 × Fmax 5000 Hz
PUMP_VANES = 6
FAN_BLADES = 7
GEAR_PINION_TEETH = 27  # on the motor (input) shaft
GEAR_WHEEL_TEETH = 55  # on the fan shaft; 27/55 share no factor (hunting-tooth pair)
P1_RPM = 1480.0
P2_RPM = 1476.0
F1_INPUT_RPM = 1485.0
F1_FAN_RPM = F1_INPUT_RPM * GEAR_PINION_TEETH / GEAR_WHEEL_TEETH  # 729 r/min

# Invented deep-groove ball bearings (contact angle 0).
PUMP_DE_BEARING = BearingGeometry(n_elements=9, element_diameter_mm=11.9, pitch_diameter_mm=52.5)
PUMP_NDE_BEARING = BearingGeometry(n_elements=8, element_diameter_mm=14.3, pitch_diameter_mm=60.0)
FAN_BEARING = BearingGeometry(n_elements=12, element_diameter_mm=15.9, pitch_diameter_mm=85.0)

DEMO_CHANNELS: tuple[ChannelInfo, ...] = (
    ChannelInfo("p1-de-h", "p1", "Pump 1 drive-end bearing, horizontal", P1_RPM,
                PUMP_DE_BEARING),
    ChannelInfo("p1-de-v", "p1", "Pump 1 drive-end bearing, vertical", P1_RPM,
                PUMP_DE_BEARING),
    ChannelInfo("p1-nde-h", "p1", "Pump 1 non-drive-end bearing, horizontal", P1_RPM,
                PUMP_NDE_BEARING),
    ChannelInfo("p2-de-h", "p2", "Pump 2 drive-end bearing, horizontal", P2_RPM,
                PUMP_DE_BEARING),
    ChannelInfo("f1-gb-h", "f1", "Fan 1 gearbox input bearing, horizontal", F1_INPUT_RPM,
                None),
    ChannelInfo("f1-fan-h", "f1", "Fan 1 fan-shaft bearing, horizontal", F1_FAN_RPM,
                FAN_BEARING),
)

SCENARIOS: tuple[str, ...] = ("demo", "variable-speed")


def demo_site(
    seed: int = 1,
    fault_ramp_s: float = 180.0,
    *,
    fault_start_s: float = 30.0,
    fs: float = DEMO_FS,
    channels: Sequence[str] | None = None,
) -> PlantModel:
    """The invented Tarn Hollow pumping station, acceleration in g at ``fs`` Hz.

    Healthy velocity overall (10–1000 Hz RMS) is about 1.0–1.4 mm/s on every channel. From
    ``fault_start_s`` for ``fault_ramp_s`` seconds pump p1's drive-end bearing develops an
    outer-race defect (impacts at BPFO ringing a 3.3 kHz resonance, BPFO harmonics) while a
    1X imbalance grows, taking p1-de-h's overall to about 5.7 mm/s (alert 2.8 is passed near
    s = 0.35, danger 4.5 near s = 0.75); p2 and f1 stay healthy.
    ``channels`` selects and orders a subset of :data:`DEMO_CHANNELS` ids (None or empty:
    all of them, in that order).
    """
    info = {c.id: c for c in DEMO_CHANNELS}
    if not channels:
        chosen = list(DEMO_CHANNELS)
    else:
        unknown = [c for c in channels if c not in info]
        if unknown:
            allowed = ", ".join(repr(c) for c in info)
            raise ValueError(f"channels {unknown} are not in the demo site; allowed: {allowed}")
        chosen = [info[c] for c in channels]
    chosen_ids = {c.id for c in chosen}
    if fs < 2.56 * 4000.0:
        raise ValueError(f"fs={fs!r} Hz is too low for the demo site: it needs >= 10240 Hz")

    tones: list[Tone] = []
    noise: dict[str, float] = {}

    def tone(cid: str, label: str, f_hz: float, v_mm_s: float, v_fault_mm_s: float = 0.0,
             phase_deg: float = 0.0) -> None:
        tones.append(Tone(cid, label, f_hz, g_peak_for_velocity(v_mm_s, f_hz),
                          g_peak_for_velocity(v_fault_mm_s, f_hz), math.radians(phase_deg)))

    # Pumps: 1X, 2X, vane pass; velocity RMS in mm/s. Fault: growing 1X imbalance whose
    # vector leads the healthy 1X by 40°, and BPFO harmonics — the low-frequency, periodic
    # part of the outer-race defect's response, modelled as plain tones (a simplification:
    # the impacts below carry the slip jitter, these lines do not).
    pump_levels = {
        #  id          1X    2X    VP    noise  imbalance@s=1  BPFO×1..4 @ s=1    phase
        "p1-de-h": (1.00, 0.45, 0.55, 0.45, 4.6, (0.60, 0.80, 0.65, 0.50), 0.0),
        "p1-de-v": (0.70, 0.35, 0.45, 0.45, 3.2, (0.36, 0.48, 0.39, 0.30), 90.0),
        "p1-nde-h": (0.85, 0.30, 0.40, 0.40, 3.9, (0.12, 0.16, 0.13, 0.10), 15.0),
        "p2-de-h": (1.10, 0.40, 0.60, 0.45, 0.0, (0.0, 0.0, 0.0, 0.0), 200.0),
    }
    for cid, (v1, v2, vp, vn, v_imb, bpfo_h, ph) in pump_levels.items():
        if cid not in chosen_ids:
            continue
        fr = info[cid].shaft_hz
        tone(cid, "1x", fr, v1, phase_deg=ph)
        tone(cid, "2x", 2 * fr, v2, phase_deg=ph + 70.0)
        tone(cid, "vane pass", PUMP_VANES * fr, vp, phase_deg=ph + 20.0)
        if v_imb:
            tone(cid, "imbalance", fr, 0.0, v_imb, phase_deg=ph + 40.0)
        bpfo = PUMP_DE_BEARING.frequencies(fr).bpfo_hz
        for h, v in enumerate(bpfo_h, start=1):
            if v:
                tone(cid, f"bpfo x{h}", h * bpfo, 0.0, v, phase_deg=30.0 * h)
        noise[cid] = noise_sigma_for_velocity(vn, fs)

    # Fan f1: gearbox input shaft 1485 r/min, 27/55 teeth; mesh = 27 × input rate with
    # sidebands at ±1X input (pinion) and ±1X output (wheel); fan 1X and blade pass.
    f_in = F1_INPUT_RPM / 60.0
    f_out = F1_FAN_RPM / 60.0
    mesh = gear_mesh_hz(GEAR_PINION_TEETH, f_in)
    mesh_g = g_peak_for_velocity(0.55, mesh)
    if "f1-gb-h" in chosen_ids:
        cid = "f1-gb-h"
        tone(cid, "1x", f_in, 0.60, phase_deg=10.0)
        tone(cid, "1x out", f_out, 0.35, phase_deg=130.0)
        tones.append(Tone(cid, "mesh", mesh, mesh_g, phase_rad=0.3))
        for label, df, rel in (("mesh-1x", -f_in, 0.25), ("mesh+1x", f_in, 0.25),
                               ("mesh-1x out", -f_out, 0.12), ("mesh+1x out", f_out, 0.12)):
            tones.append(Tone(cid, label, mesh + df, rel * mesh_g, phase_rad=0.3 + df / 10.0))
        tones.append(Tone(cid, "2x mesh", 2 * mesh, 0.4 * mesh_g, phase_rad=1.1))
        noise[cid] = noise_sigma_for_velocity(0.40, fs)
    if "f1-fan-h" in chosen_ids:
        cid = "f1-fan-h"
        tone(cid, "1x", f_out, 0.90, phase_deg=250.0)
        tone(cid, "blade pass", FAN_BLADES * f_out, 0.60, phase_deg=45.0)
        tones.append(Tone(cid, "mesh", mesh, 0.15 * mesh_g, phase_rad=2.0))
        noise[cid] = noise_sigma_for_velocity(0.40, fs)

    # p1 drive-end outer-race defect: impacts at BPFO ring the bearing housing resonance.
    responses = tuple(
        Resonance(cid, peak, f_hz, zeta)
        for cid, peak, f_hz, zeta in (
            ("p1-de-h", 3.0, 3300.0, 0.05),
            ("p1-de-v", 1.8, 2900.0, 0.06),
            ("p1-nde-h", 0.3, 3300.0, 0.05),
        )
        if cid in chosen_ids
    )
    impacts = []
    if responses:
        bpfo_p1 = PUMP_DE_BEARING.frequencies(P1_RPM / 60.0).bpfo_hz
        impacts.append(ImpactTrain("p1-de-outer-race", bpfo_p1, responses))

    return PlantModel(
        chosen, fs=fs, tones=tones, impacts=impacts, noise_g=noise, seed=seed,
        fault_start_s=fault_start_s, fault_ramp_s=fault_ramp_s,
    )


class SignalModel(Protocol):
    """What :class:`SimulatedSource` streams: a pure function of the sample index."""

    fs: float
    channel_ids: tuple[str, ...]

    def render(self, first_index: int, n: int) -> np.ndarray: ...

    def fault_severity(self, t_s: float) -> float: ...


def build_scenario(name: str, **kwargs: object) -> SignalModel:
    """Build a named simulated site; ``name`` is one of :data:`SCENARIOS`.

    Keyword arguments go to the scenario's factory (for "demo": :func:`demo_site`; for
    "variable-speed": :func:`service.sources.varspeed.variable_speed_site`)."""
    if name not in SCENARIOS:
        raise ValueError(f"scenario={name!r} is not one of {', '.join(map(repr, SCENARIOS))}")
    if name == "variable-speed":
        from .varspeed import variable_speed_site

        return variable_speed_site(**kwargs)  # type: ignore[arg-type]
    kwargs.pop("speed_ramp_s", None)
    return demo_site(**kwargs)  # type: ignore[arg-type]


# ---------------------------------------------------------------------------------------
# The source


class SimulatedSource:
    """Streams a :class:`PlantModel` as :class:`SampleBlock` s: ``async for b in source``.

    Blocks hold ``round(block_s·fs)`` samples per channel (acceleration in g). Block i
    (counting from 0) starts at sample ``start_index + i·n`` and is handed out no earlier
    than (i+1)·n/fs/``speed`` seconds after iteration began (``speed=0``: as fast as the
    consumer asks). ``t0_ns`` is plant time: ``clock()`` at the start plus the samples'
    offset at ``fs`` — wall time when ``speed=1``.

    Overflow: a consumer that falls more than ``queue_blocks`` blocks behind real time loses
    the oldest of them — the indices jump (the pipeline sees a gap) and ``counters.drops``
    counts the lost blocks. Rendering runs in a worker thread. One consumer at a time;
    :meth:`aclose` ends the stream promptly, also while it waits.
    """

    kind = "simulated"

    def __init__(
        self,
        source_id: str,
        model: SignalModel,
        *,
        block_s: float = 0.1,
        speed: float = 1.0,
        queue_blocks: int = 64,
        start_index: int = 0,
        clock: Callable[[], float] = time.time,
    ) -> None:
        if not (isinstance(speed, int | float) and math.isfinite(speed) and speed >= 0):
            raise ValueError(f"speed={speed!r} must be >= 0 (0: as fast as possible)")
        block_n = round(block_s * model.fs) if block_s > 0 else 0
        if block_n < 1:
            raise ValueError(f"block_s={block_s!r} s holds no sample at fs={model.fs} Hz")
        if queue_blocks < 1:
            raise ValueError(f"queue_blocks={queue_blocks!r} must be >= 1")
        if start_index < 0:
            raise ValueError(f"start_index={start_index!r} must be >= 0")
        self.id = source_id
        self.model = model
        self.channel_ids = model.channel_ids
        self.fs = model.fs
        self.block_n = block_n
        self.speed = float(speed)
        self.queue_blocks = int(queue_blocks)
        self.start_index = int(start_index)
        self.counters = SourceCounters()
        self._clock = clock
        self._next_block = 0
        self._start_loop_s: float | None = None
        self._start_ns = 0
        self._closed = False
        self._close_event = asyncio.Event()
        self.paced_waits = 0

    def __aiter__(self) -> AsyncIterator[SampleBlock]:
        return self

    async def __anext__(self) -> SampleBlock:
        if self._closed:
            raise StopAsyncIteration
        loop = asyncio.get_running_loop()
        if self._start_loop_s is None:
            self._start_loop_s = loop.time()
            self._start_ns = round(self._clock() * 1e9)
        if self.speed > 0:
            period_s = self.block_n / self.fs / self.speed
            elapsed_s = loop.time() - self._start_loop_s
            behind = math.floor(elapsed_s / period_s) - self._next_block
            if behind > self.queue_blocks:
                lost = behind - self.queue_blocks
                self._next_block += lost
                self.counters.drops += lost
            wait_s = (self._next_block + 1) * period_s - elapsed_s
            if wait_s > 0:
                self.paced_waits += 1
                try:
                    async with asyncio.timeout(wait_s):
                        await self._close_event.wait()
                except TimeoutError:
                    pass
                if self._closed:
                    raise StopAsyncIteration
        first_index = self.start_index + self._next_block * self.block_n
        data = await asyncio.to_thread(self.model.render, first_index, self.block_n)
        if self._closed:
            raise StopAsyncIteration
        self._next_block += 1
        self.counters.blocks += 1
        self.counters.samples += self.block_n
        self.counters.bytes += data.nbytes
        offset_ns = round((first_index - self.start_index) * 1e9 / self.fs)
        return SampleBlock(
            source_id=self.id,
            channel_ids=self.channel_ids,
            data=data,
            first_index=first_index,
            t0_ns=self._start_ns + offset_ns,
            fs=self.fs,
        )

    async def start(self) -> None:
        """Nothing to open: the plant is rendered on demand (the Source contract's start)."""

    async def aclose(self) -> None:
        """Stop the stream; a pending or later ``__anext__`` ends the iteration."""
        self._closed = True
        self._close_event.set()

    def status(self) -> dict[str, object]:
        """Plain-data state for the API: position, plant time (s), fault severity 0…1."""
        next_index = self.start_index + self._next_block * self.block_n
        t_s = next_index / self.fs
        return {
            "id": self.id,
            "kind": self.kind,
            "fs": self.fs,
            "channels": list(self.channel_ids),
            "block_samples": self.block_n,
            "speed": self.speed,
            "running": self._start_loop_s is not None and not self._closed,
            "closed": self._closed,
            "next_index": next_index,
            "plant_time_s": t_s,
            "fault_severity": self.model.fault_severity(t_s),
            "paced_waits": self.paced_waits,
            "counters": self.counters.as_dict(),
        }
