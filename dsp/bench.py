"""Engine benchmark: throughput and cost relative to the bare batched rfft of the same frames.

Knows nothing about the service; run as ``python -m dsp.bench`` or ``quaver bench``.

For each case the same float32 signal is pushed in 0.1 s blocks through the full engine
(filter bank, exponential averaging, bands, tracked tones, read-outs after every push) and,
in the same process, the frames the engine cut are transformed by bare ``scipy.fft.rfft``
in the same batches: that is the physical floor. Ratios are engine/floor. For comparison
the same work is done by recomputing ``scipy.signal.welch`` on a rolling buffer at every
hop, and by a per-frame Python loop (both timed on a subset and scaled per frame).

Times are the CPU time of the benchmarking thread (``time.thread_time``; BLAS and the FFT
are held to that one thread), best of the repeats: on an idle machine that is the wall
time, and on a shared one other processes' load does not count as the engine's.

A separate section prices a narrow profile (Fmax 500 Hz, 1600 lines) made by decimating
the same 51.2 kHz stream (``dsp.decimate``) against the wide profile on the same channels,
both per second of input.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from contextlib import AbstractContextManager, nullcontext
from dataclasses import asdict, dataclass

import numpy as np
import scipy
import scipy.fft
import scipy.signal

from .analyzer import Analyzer
from .bands import Band
from .chainplan import plan_chain
from .decimate import DecimationChain
from .grid import FrameGrid
from .spec import AnalysisSpec, ToneDef
from .windows import get_window

# CPU time of this thread: every stage runs in it (workers=1, BLAS limited to one thread).
_clock = time.thread_time


@dataclass
class CaseResult:
    name: str
    channels: int
    fs_hz: float
    n: int
    hop: int
    frames: int
    engine_s: float
    rfft_s: float
    ratio: float
    samples_per_s: float
    realtime_factor: float
    welch_ratio: float | None = None
    loop_ratio: float | None = None


def _make_signal(channels: int, n: int, fs: float, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    k = np.arange(n)
    x = rng.normal(0.0, 0.05, (channels, n)).astype(np.float32)
    x += (0.5 * np.sin(2 * np.pi * 24.75 * k / fs)).astype(np.float32)
    x += (0.2 * np.sin(2 * np.pi * 3120.3 * k / fs)).astype(np.float32)
    return x


def _spec(grid: FrameGrid) -> AnalysisSpec:
    bands = tuple(Band(f"b{i}", 10.0 + 500.0 * i, 500.0 + 500.0 * i) for i in range(15))
    bands += (Band("overall", 10.0, 1000.0),)
    tones = tuple(ToneDef(f"{h}x", order=float(h)) for h in range(1, 9))
    return AnalysisSpec(grid=grid, window="hann", averaging="exponential", averages=8,
                        unit="velocity", bands=bands, tones=tones, peaks=8)


def run_case(channels: int, *, fmax_hz: float = 20000.0, lines: int = 3200,
             seconds: float = 2.0, repeats: int = 3, compare: bool = True) -> CaseResult:
    """Benchmark one channel count; see the module docstring for what is measured."""
    grid = FrameGrid.from_fmax(fmax_hz, lines, overlap=0.75)
    n_samples = int(seconds * grid.fs)
    x = _make_signal(channels, n_samples, grid.fs)
    block = int(round(0.1 * grid.fs))
    starts = range(0, n_samples, block)

    def engine() -> float:
        an = Analyzer(_spec(grid), channels, speed_hz=np.full(channels, 24.75))
        t0 = _clock()
        for s in starts:
            if an.push(x[:, s : s + block]):
                an.spectrum()
                an.bands()
                an.tones()
        return _clock() - t0

    # The floor: the same frames, in the same batches, through bare rfft.
    an = Analyzer(_spec(grid), channels)
    batches: list[np.ndarray] = []
    w32 = get_window("hann", grid.n).astype(np.float32)
    held = np.empty((channels, 0), np.float32)
    for s in starts:
        buf = np.concatenate((held, x[:, s : s + block]), axis=1)
        p = (buf.shape[1] - grid.n) // grid.hop + 1 if buf.shape[1] >= grid.n else 0
        if p:
            view = np.lib.stride_tricks.sliding_window_view(buf, grid.n, axis=1)
            batches.append(_page_aligned(view[:, : (p - 1) * grid.hop + 1 : grid.hop] * w32))
        held = buf[:, p * grid.hop :]
        an.push(x[:, s : s + block])
    frames = sum(b.shape[0] * b.shape[1] for b in batches)

    def bare() -> float:
        t0 = _clock()
        for b in batches:
            scipy.fft.rfft(b, axis=-1, workers=1, overwrite_x=True)  # as the engine does
        return _clock() - t0

    # Interleaved, best of each: load from other processes hits both alike.
    engine_s, rfft_s = float("inf"), float("inf")
    for _ in range(repeats):
        engine_s = min(engine_s, engine())
        rfft_s = min(rfft_s, bare())
    res = CaseResult(
        name=f"{channels} ch", channels=channels, fs_hz=grid.fs, n=grid.n, hop=grid.hop,
        frames=frames, engine_s=engine_s, rfft_s=rfft_s, ratio=engine_s / rfft_s,
        samples_per_s=channels * n_samples / engine_s,
        realtime_factor=seconds / engine_s,
    )
    if compare:
        # The comparisons read up to 40 hops of one channel; give them their own signal.
        y = _make_signal(1, grid.n + 48 * grid.hop, grid.fs, seed=1)
        res.welch_ratio = _welch_per_frame(grid, y) / (rfft_s / frames)
        res.loop_ratio = _loop_per_frame(grid, y) / (rfft_s / frames)
    return res


def _page_aligned(a: np.ndarray) -> np.ndarray:
    """A C-contiguous float32 copy of ``a`` starting on a 4096-byte boundary.

    pocketfft's cost for a batch of 2–3 frames (one channel; they go one by one, not in
    SIMD lanes) varies by up to 40 % with where the batch starts in memory; page-aligned
    is the fastest measured, so the floor is never flattered by an unlucky placement."""
    raw = np.empty(a.size + 1024, dtype=np.float32)
    shift = (-raw.ctypes.data % 4096) // 4
    out = raw[shift : shift + a.size].reshape(a.shape)
    out[...] = a
    return out


def _welch_per_frame(grid: FrameGrid, x: np.ndarray, hops: int = 20) -> float:
    """Seconds per (frame, channel) for welch recomputed over 8 frames at every hop."""
    span = grid.n + 7 * grid.hop
    t0 = _clock()
    for i in range(hops):
        seg = x[0, i * grid.hop : i * grid.hop + span]
        scipy.signal.welch(seg, grid.fs, window="hann", nperseg=grid.n,
                           noverlap=grid.n - grid.hop, detrend=False)
    return (_clock() - t0) / hops


def _loop_per_frame(grid: FrameGrid, x: np.ndarray, frames: int = 40) -> float:
    """Seconds per (frame, channel) for a plain Python loop: window, rfft, average, bands."""
    w = get_window("hann", grid.n)
    f = grid.frequencies()
    avg = np.zeros(grid.bins)
    t0 = _clock()
    for p in range(frames):
        seg = x[0, p * grid.hop : p * grid.hop + grid.n]
        ps = 2 * np.abs(np.fft.rfft(seg * w)) ** 2 / w.sum() ** 2
        avg += (ps - avg) / 8
        for lo in range(16):
            avg[(f >= 10 + 500 * lo) & (f < 500 + 500 * lo)].sum()
    return (_clock() - t0) / frames


# -- narrow profile by decimation vs the wide profile ----------------------------------------


@dataclass
class DecimationResult:
    channels: int
    fs_hz: float
    factors: list[int]
    taps: list[int]
    fs_out_hz: float
    seconds: float
    wide_ms_per_s: float
    narrow_ms_per_s: float
    decimation_ms_per_s: float
    ratio: float  # narrow / wide


def _narrow_spec(grid: FrameGrid) -> AnalysisSpec:
    bands = tuple(Band(f"b{i}", 10.0 + 30.0 * i, 40.0 + 30.0 * i) for i in range(15))
    bands += (Band("overall", 10.0, 500.0),)
    tones = tuple(ToneDef(f"{h}x", order=float(h)) for h in range(1, 9))
    return AnalysisSpec(grid=grid, window="hann", averaging="exponential", averages=8,
                        unit="velocity", bands=bands, tones=tones, peaks=8)


def run_decimation_case(channels: int, *, seconds: float = 2.0,
                        repeats: int = 3) -> DecimationResult:
    """Cost per second of input of the narrow profile (decimate 51.2 kHz to Fmax 500 Hz, then
    1600 lines, 75 % overlap) and of the wide one (Fmax 20 kHz, 3200 lines) on ``channels``.

    Both start warm: the narrow analysis has been fed one frame (3.2 s) untimed, the wide one
    one frame, so the timed ``seconds`` (at least 1.6 s: two narrow hops) hold their
    steady-state share of frames. 0.1 s pushes with read-outs after each new frame, as in
    :func:`run_case`; best of ``repeats``, interleaved.
    """
    wide_grid = FrameGrid.from_fmax(20000.0, 3200, overlap=0.75)
    narrow_grid = FrameGrid.from_fmax(500.0, 1600, overlap=0.75)
    plan = plan_chain(wide_grid.fs, narrow_grid.fmax_hz)
    fs = wide_grid.fs
    warm = int(round(narrow_grid.n * plan.factor))  # one narrow frame of input samples
    timed_s = max(seconds, 2 * narrow_grid.hop_s)
    n_timed = int(round(timed_s * fs))
    x = _make_signal(channels, warm + n_timed, fs)
    block = int(round(0.1 * fs))
    speed = np.full(channels, 24.75)

    def wide() -> float:
        an = Analyzer(_spec(wide_grid), channels, speed_hz=speed)
        an.push(x[:, warm - wide_grid.n : warm])
        t0 = _clock()
        for s in range(warm, warm + n_timed, block):
            if an.push(x[:, s : s + block]):
                an.spectrum()
                an.bands()
                an.tones()
        return _clock() - t0

    def narrow(read: bool = True) -> float:
        chain = DecimationChain(channels, plan)
        an = Analyzer(_narrow_spec(narrow_grid), channels, speed_hz=speed)
        an.push(chain.push(x[:, :warm]))
        t0 = _clock()
        for s in range(warm, warm + n_timed, block):
            y = chain.push(x[:, s : s + block])
            if read and an.push(y):
                an.spectrum()
                an.bands()
                an.tones()
        return _clock() - t0

    wide_s = narrow_s = decim_s = float("inf")
    for _ in range(repeats):
        wide_s = min(wide_s, wide())
        narrow_s = min(narrow_s, narrow())
        decim_s = min(decim_s, narrow(read=False))
    per_s = 1e3 / timed_s
    chain = DecimationChain(1, plan)
    return DecimationResult(
        channels=channels, fs_hz=fs, factors=list(plan.factors),
        taps=[s.taps.size for s in chain.stages], fs_out_hz=plan.fs_out, seconds=timed_s,
        wide_ms_per_s=wide_s * per_s, narrow_ms_per_s=narrow_s * per_s,
        decimation_ms_per_s=decim_s * per_s, ratio=narrow_s / wide_s,
    )


def format_decimation(section: dict[str, object]) -> str:
    """The narrow-vs-wide section as a text table (ms of one core per second of input)."""
    lines = [f"narrow vs wide profile — {section['setup']}",
             f"{'case':>6} {'wide ms/s':>10} {'narrow ms/s':>12} {'decimation ms/s':>16} "
             f"{'narrow/wide':>12}"]
    for c in section["cases"]:  # type: ignore[attr-defined]
        lines.append(
            f"{str(c['channels']) + ' ch':>6} {c['wide_ms_per_s']:>10.2f}"
            f" {c['narrow_ms_per_s']:>12.2f} {c['decimation_ms_per_s']:>16.2f}"
            f" {c['ratio']:>12.3f}"
        )
    return "\n".join(lines)


def _threads_limited() -> AbstractContextManager[object]:
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional; the env variables below do the same for fresh processes
        return nullcontext()
    limits: AbstractContextManager[object] = threadpool_limits(limits=1)
    return limits


def run(channel_counts: tuple[int, ...] = (1, 8, 64), *, seconds: float = 2.0,
        repeats: int = 5) -> dict[str, object]:
    """Run every case on one core; return a JSON-ready report."""
    with _threads_limited():
        cases = [run_case(c, seconds=seconds, repeats=repeats) for c in channel_counts]
        narrow = [run_decimation_case(c, seconds=seconds, repeats=min(repeats, 3))
                  for c in channel_counts]
    plan = plan_chain(51200.0, 500.0)
    return {
        "machine": {"python": sys.version.split()[0], "numpy": np.__version__,
                    "scipy": scipy.__version__, "cpu": platform.processor() or platform.machine(),
                    "cores_available": os.cpu_count()},
        "setup": "3200 lines, Fmax 20 kHz (N=8192, fs=51.2 kHz), 75 % overlap, Hann, exponential "
                 "averaging (8), 16 bands, 8 tracked tones, 0.1 s pushes, one core (CPU time)",
        "cases": [asdict(c) for c in cases],
        "decimation": {
            "setup": f"51.2 kHz → ×{plan.factor} ({'·'.join(map(str, plan.factors))}) → "
                     f"{plan.fs_out:g} Hz, Fmax 500 Hz, 1600 lines vs Fmax 20 kHz, 3200 lines; "
                     "75 % overlap, 16 bands, 8 tones each; ms of one core per second of input",
            "cases": [asdict(c) for c in narrow],
        },
    }


def format_report(report: dict[str, object]) -> str:
    """The engine section as a text table (times in ms of CPU, ratios to the bare rfft)."""
    lines = [f"quaver engine benchmark — {report['setup']}",
             f"{'case':>6} {'frames':>7} {'engine ms':>10} {'rfft ms':>8} {'×rfft':>6} "
             f"{'Msamples/s':>11} {'×realtime':>10} {'welch ×rfft':>12} {'loop ×rfft':>11}"]
    for c in report["cases"]:  # type: ignore[attr-defined]
        lines.append(
            f"{c['name']:>6} {c['frames']:>7} {1e3 * c['engine_s']:>10.1f}"
            f" {1e3 * c['rfft_s']:>8.1f}"
            f" {c['ratio']:>6.2f} {c['samples_per_s'] / 1e6:>11.2f} {c['realtime_factor']:>10.1f}"
            f" {c['welch_ratio'] or float('nan'):>12.1f} {c['loop_ratio'] or float('nan'):>11.1f}"
        )
    if "decimation" in report:
        lines += ["", format_decimation(report["decimation"])]  # type: ignore[arg-type]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    """``quaver bench`` / ``python -m dsp.bench``: print the report (``--json``: as JSON); 0."""
    ap = argparse.ArgumentParser(prog="quaver bench", description=__doc__.splitlines()[0])
    ap.add_argument("--channels", default="1,8,64", help="comma-separated channel counts")
    ap.add_argument("--seconds", type=float, default=2.0, help="signal length per case, s")
    ap.add_argument("--repeats", type=int, default=5, help="best of this many runs")
    ap.add_argument("--short", action="store_true", help="quick run (CI): 1 and 8 channels, 0.5 s")
    ap.add_argument("--json", action="store_true", help="print the report as JSON")
    args = ap.parse_args(argv)
    counts = tuple(int(c) for c in args.channels.split(","))
    seconds, repeats = args.seconds, args.repeats
    if args.short:
        counts, seconds, repeats = (1, 8), 0.5, 1
    report = run(counts, seconds=seconds, repeats=repeats)
    print(json.dumps(report, indent=2) if args.json else format_report(report))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
