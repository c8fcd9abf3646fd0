"""The generated plant of ``quaver bench --dashboard``: machines of an invented scenario, their
channels, the sources feeding them, the abnormal machines and the config document.

Knows the config file shape only (as a document ``bench.harness`` writes as TOML).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["ALERT_GAIN", "DANGER_GAIN", "PlantPlan", "config_doc"]

PER_SOURCE = 16  # channels per TCP source (as ``quaver bench --service``)
# The feeder's signal has an overall RMS near 0.38 g over 2 Hz…1 kHz (bench.feeder._signal:
# 0.5 g at 24.75 Hz, 0.2 g aliased to 560.3 Hz at 2560 Hz, 0.05 g noise); gains 2 and 4
# put a machine's every channel over the alert (0.6 g) or the danger (1.2 g) level.
ALERT_LEVEL_G = 0.6
DANGER_LEVEL_G = 1.2
ALERT_GAIN = 2.0
DANGER_GAIN = 4.0
KINDS = ("Feed pump", "Cooling fan", "Air compressor", "Conveyor drive", "Mixer gearbox",
         "Vacuum blower", "Boiler feed pump", "Extract fan")
AREAS = ("area-north", "area-south", "area-east", "area-west")


@dataclass(frozen=True)
class PlantPlan:
    """``channels`` spread over ``machines`` (as evenly as they go); ``danger`` and ``alert``
    machines, chosen with ``seed`` spread through the plant (not the first ones), are fed
    at 4× and 2× the normal amplitude."""

    channels: int = 256
    machines: int = 64
    danger: int = 3
    alert: int = 10
    fs_hz: float = 2560.0
    lines: int = 400
    overlap: float = 0.5
    block_s: float = 0.1
    seed: int = 18
    token: str = field(default="", repr=False)

    def __post_init__(self) -> None:
        if self.machines < 1 or self.channels < self.machines:
            raise ValueError(f"need 1 <= machines <= channels, got {self.machines} machines "
                             f"for {self.channels} channels")
        if self.danger < 0 or self.alert < 0 or self.danger + self.alert > self.machines:
            raise ValueError(f"danger + alert machines ({self.danger} + {self.alert}) must not "
                             f"exceed the machines ({self.machines})")

    @property
    def fmax_hz(self) -> float:
        return self.fs_hz / 2.56  # common practice: fs = 2.56·Fmax

    @property
    def frames_per_s(self) -> float:
        """Analysis frames per second of one channel: fs / hop, N = 2.56·lines."""
        n = int(round(2.56 * self.lines))  # common practice: N = 2.56·lines
        return self.fs_hz / max(1, int(round(n * (1.0 - self.overlap))))

    @property
    def block(self) -> int:
        return int(round(self.block_s * self.fs_hz))

    def machine_ids(self) -> list[str]:
        return [f"m{i + 1:03d}" for i in range(self.machines)]

    def machine_name(self, i: int) -> str:
        return f"{KINDS[i % len(KINDS)]} {i // len(KINDS) + 1}"

    def abnormal(self) -> tuple[list[str], list[str]]:
        """(danger machine ids, alert machine ids): a seeded draw without the first
        machine when there is room, so the sort order, not the id order, must bring them up."""
        ids = self.machine_ids()
        pool = ids[1:] if len(ids) > self.danger + self.alert else ids
        picks = [str(m) for m in np.random.default_rng(self.seed).permutation(pool)]
        return (sorted(picks[: self.danger]), sorted(picks[self.danger : self.danger + self.alert]))

    def channel_machines(self) -> list[tuple[str, str]]:
        """(channel id, machine id) for every channel, machine by machine."""
        ids = self.machine_ids()
        base, extra = divmod(self.channels, self.machines)
        out = []
        for i, mid in enumerate(ids):
            for j in range(base + (i < extra)):
                out.append((f"{mid}-c{j + 1}", mid))
        return out

    def sources(self) -> dict[str, list[str]]:
        """Source id → its channel ids (``PER_SOURCE`` each, the last may have fewer)."""
        chans = [c for c, _ in self.channel_machines()]
        return {f"feed-{k // PER_SOURCE:03d}": chans[k : k + PER_SOURCE]
                for k in range(0, len(chans), PER_SOURCE)}

    def gains(self) -> dict[str, list[float]]:
        """Source id → the amplitude factor of each of its channels."""
        danger, alert = self.abnormal()
        of = dict(self.channel_machines())
        g = {m: DANGER_GAIN for m in danger} | {m: ALERT_GAIN for m in alert}
        return {sid: [g.get(of[c], 1.0) for c in chans] for sid, chans in self.sources().items()}


def config_doc(plan: PlantPlan) -> dict[str, Any]:
    """The service config: framed TCP sources on ``"auto"`` ports, one channel per sensor with
    its machine, [[machines]] with names and groups, five bands (one named 'overall'), one
    overall alarm rule for every channel and a viewer token (its SHA-256)."""
    fmax = plan.fmax_hz
    edges = [10.0, 100.0, 250.0, 500.0, 0.999 * fmax]
    bands = [{"name": f"b{i + 1}", "lo_hz": lo, "hi_hz": hi}
             for i, (lo, hi) in enumerate(zip(edges, edges[1:], strict=False))]
    bands.append({"name": "overall", "lo_hz": 10.0, "hi_hz": 0.999 * fmax})
    machines = plan.machine_ids()
    doc: dict[str, Any] = {
        "analysis": {"fmax_hz": fmax, "lines": plan.lines, "overlap": plan.overlap,
                     "window": "hann", "averaging": "exponential", "averages": 4,
                     "unit": "acceleration"},
        "sources": [{"id": sid, "kind": "tcp", "format": "framed", "listen": "auto",
                     "sample_rate_hz": plan.fs_hz, "channels": chans}
                    for sid, chans in plan.sources().items()],
        "channels": [{"id": cid, "machine": mid, "speed_rpm": 1485.0}
                     for cid, mid in plan.channel_machines()],
        "machines": [{"id": mid, "name": plan.machine_name(i), "group": AREAS[i % len(AREAS)]}
                     for i, mid in enumerate(machines)],
        "bands": bands,
        "alarms": [{"overall": True, "alert": ALERT_LEVEL_G, "danger": DANGER_LEVEL_G}],
    }
    if plan.token:
        doc["tokens"] = [{"name": "dashboard-bench", "role": "viewer",
                          "sha256": hashlib.sha256(plan.token.encode()).hexdigest()}]
    return doc
