"""``quaver bench --orders``: what an order profile costs and how exactly it reads, in-process.

Runs the service's own worker path (``service.pipeline.SourcePipeline.process``) on the
demo's variable-speed fan (``service.sources.varspeed``) with C accelerometer channels sharing
one tacho, without and with the demo's order profile, and reports the CPU per order frame,
against the CPU per frame of the demo's ``wide`` spectrum profile on the same samples (ratios
compare between machines, seconds do not). Then a 600 → 1800 r/min sweep of orders 1, 2 and
3.5 through the same path gives the order lines' amplitude error. Unlike the rest of
``bench/``, it imports the service (the pipeline, in this process), not just its wire format.
"""

from __future__ import annotations

import json
import math
import os
import platform
import sys
import time
from contextlib import AbstractContextManager, nullcontext
from typing import Any

import numpy as np

__all__ = ["main", "run"]

FS = 12800.0  # the demo's rate
BLOCK_S = 0.1  # the simulated source's block
ORDERS = {"kind": "order", "omax": 20.0, "lines": 800, "overlap": 0.5, "averages": 4,
          "speed_band_pct": 5.0}  # service/examples/demo.toml [profiles.orders]
SWEEP = ((1.0, 1.0), (2.0, 0.5), (3.5, 0.25))  # (order, peak g)


def _threads() -> AbstractContextManager[object]:
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return nullcontext()
    limits: AbstractContextManager[object] = threadpool_limits(limits=1)
    return limits


def _doc(channels: int, orders: bool, fs: float = FS) -> dict[str, Any]:
    fans = [f"fan{c}" for c in range(channels)]
    return {
        "analysis": {"fmax_hz": 5000.0, "lines": 1600, "overlap": 0.75, "unit": "velocity",
                     "averaging": "exponential", "averages": 8},
        "profiles": {"wide": {}, "orders": dict(ORDERS)},
        "sources": [{"id": "s", "kind": "tcp", "listen": "127.0.0.1:9", "format": "f32le",
                     "sample_rate_hz": fs, "channels": [*fans, "tacho"]}],
        "channels": [*({"id": f, "speed_from": "tacho",
                        "profiles": ["wide", "orders"] if orders else ["wide"]} for f in fans),
                     {"id": "tacho", "kind": "tacho", "rpm_min": 300.0, "rpm_max": 1800.0}],
        "bands": [{"channel": "*", "name": "1x", "lo_order": 0.8, "hi_order": 1.2}],
    }


class _Source:
    id = "s"

    def __init__(self) -> None:
        from service.types import SourceCounters

        self.counters = SourceCounters()


def _pipeline(doc: dict[str, Any]) -> tuple[Any, tuple[str, ...]]:
    from service.config import parse_config
    from service.pipeline import SourcePipeline, channel_states
    from service.profiles import ProfileBank

    cfg = parse_config(doc, source="bench")
    ids = tuple(doc["sources"][0]["channels"])
    states = channel_states(cfg, "s", ids)
    p = SourcePipeline(_Source(), states, None,  # type: ignore[arg-type]
                       lambda fs: ProfileBank(cfg, ids, fs), cfg=cfg)
    return p, ids


def _fan_blocks(channels: int, seconds: float) -> list[np.ndarray]:
    """The demo fan's samples (0.1 s blocks of [channels + 1, n]: the fan row repeated with a
    little gain spread, then the tacho)."""
    from service.sources.varspeed import VariableSpeedModel

    model = VariableSpeedModel(fs=FS, ramp_s=120.0)
    n = int(BLOCK_S * FS)
    gains = np.linspace(0.9, 1.1, channels, dtype=np.float32)[:, None]
    out = []
    for k in range(0, int(seconds * FS), n):
        x = model.render(k, n)
        out.append(np.vstack([x[0][None] * gains, x[1][None]]).astype(np.float32))
    return out


def _cpu(doc: dict[str, Any], blocks: list[np.ndarray], repeats: int
         ) -> tuple[float, dict[str, int]]:
    """Best CPU time (s) of feeding ``blocks``, and the frames made per profile."""
    from service.types import SampleBlock

    best = math.inf
    frames: dict[str, int] = {}
    n = blocks[0].shape[1]
    for _ in range(repeats):
        p, ids = _pipeline(doc)
        counts: dict[str, int] = {}
        t0 = time.process_time()
        for i, x in enumerate(blocks):
            for f in p.process(SampleBlock("s", ids, x, i * n, round(i * n / FS * 1e9), FS)):
                counts[f.profile] = counts.get(f.profile, 0) + 1
        best = min(best, time.process_time() - t0)
        frames = counts
    return best, frames


def accuracy(seconds: float = 30.0) -> dict[str, Any]:
    """A 600 → 1800 r/min sweep of orders 1, 2, 3.5 (1, 0.5, 0.25 g peak) with its tacho
    through the pipeline: each order line's largest error against the sine's RMS A/√2, dB,
    over every order frame, and whether every line sat on its order."""
    from service.spectra import spectrum_values
    from service.types import SampleBlock

    fs = 5120.0
    doc = _doc(1, True, fs)
    doc["analysis"]["fmax_hz"] = 2000.0
    doc["profiles"]["orders"] = {**ORDERS, "omax": 10.0, "lines": 400,
                                 "speed_band_pct": 100.0}
    doc["channels"][1]["rpm_max"] = 3000.0
    p, ids = _pipeline(doc)
    t = np.arange(int(seconds * fs)) / fs
    r = 10.0 * t + (20.0 / (2 * seconds)) * t**2  # revolutions: 10 → 30 rev/s
    fan = sum(a * np.cos(2 * np.pi * o * r) for o, a in SWEEP)
    x = np.vstack([fan, 5.0 * ((r % 1.0) < 0.1)]).astype(np.float32)
    worst, on_line, count = 0.0, True, 0
    n = 512
    for k in range(0, x.shape[1], n):
        for f in p.process(SampleBlock("s", ids, x[:, k:k + n], k, 0, fs)):
            if f.profile != "orders":
                continue
            count += 1
            v, _, _ = spectrum_values(f, "g", "rms")
            for o, a in SWEEP:
                q = int(round(o / f.df_hz))
                on_line &= int(np.argmax(v[q - 4:q + 5])) == 4
                worst = max(worst, abs(20 * math.log10(float(v[q]) / (a / math.sqrt(2)))))
    return {"sweep": "600 → 1800 r/min in 30 s, orders 1, 2, 3.5, fs 5120 Hz, omax 10, "
                     "400 lines", "frames": count, "max_error_db": worst,
            "lines_on_their_order": bool(on_line)}


def run(channel_counts: tuple[int, ...] = (1, 8), seconds: float = 20.0,
        repeats: int = 3) -> dict[str, Any]:
    """CPU per frame of the order profile and of the wide profile, per channel count."""
    cases = []
    with _threads():
        for c in channel_counts:
            blocks = _fan_blocks(c, seconds)
            base, f_base = _cpu(_doc(c, False), blocks, repeats)
            both, f_both = _cpu(_doc(c, True), blocks, repeats)
            n_orders = f_both.get("orders", 0)
            n_wide = f_base.get("wide", 0)
            order_ms = 1e3 * (both - base) / max(n_orders, 1)
            wide_ms = 1e3 * base / max(n_wide, 1)
            cases.append({
                "channels": c, "signal_s": seconds, "order_frames": n_orders,
                "wide_frames": n_wide, "order_ms_per_frame": order_ms,
                "wide_ms_per_frame": wide_ms, "ratio_per_frame": order_ms / wide_ms,
                "order_ms_per_s": 1e3 * (both - base) / seconds,
                "wide_ms_per_s": 1e3 * base / seconds,
            })
        acc = accuracy()
    return {
        "machine": {"python": sys.version.split()[0], "numpy": np.__version__,
                    "cpu": platform.processor() or platform.machine(),
                    "cores_available": os.cpu_count()},
        "setup": ("the demo's fan v1 at 12.8 kHz (900 ↔ 1500 r/min), C fan channels on one "
                  "tacho, 0.1 s blocks through SourcePipeline.process on one core; the order "
                  "profile omax 20, 800 lines, 50 % overlap (a frame per 20 revolutions) "
                  "against the wide profile, Fmax 5 kHz, 1600 lines, 75 % overlap (a frame "
                  "per 0.08 s); a channel's order frames are counted per channel"),
        "cases": cases,
        "accuracy": acc,
    }


def format_report(r: dict[str, Any]) -> str:
    lines = [f"quaver bench --orders: {r['setup']}", "",
             f"{'channels':>8} {'order ms/frame':>15} {'wide ms/frame':>14} {'ratio':>7} "
             f"{'order ms/s':>11} {'wide ms/s':>10}"]
    for c in r["cases"]:
        lines.append(f"{c['channels']:>8} {c['order_ms_per_frame']:>15.3f} "
                     f"{c['wide_ms_per_frame']:>14.3f} {c['ratio_per_frame']:>7.2f} "
                     f"{c['order_ms_per_s']:>11.2f} {c['wide_ms_per_s']:>10.2f}")
    a = r["accuracy"]
    lines += ["", f"accuracy ({a['sweep']}): {a['frames']} order frames, every line on its "
              f"order: {a['lines_on_their_order']}, largest amplitude error "
              f"{a['max_error_db']:.4f} dB"]
    return "\n".join(lines)


def main(channel_counts: tuple[int, ...] = (1, 8), seconds: float | None = None,
         repeats: int | None = None, as_json: bool = False) -> int:
    r = run(channel_counts, 20.0 if seconds is None else seconds,
            3 if repeats is None else repeats)
    print(json.dumps(r, indent=2) if as_json else format_report(r))
    return 0
