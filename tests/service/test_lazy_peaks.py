"""A frame's peaks are found only when read, for every channel of its push at once, and are
the analyzer's peaks.

The pipeline runs in-process on synthetic blocks (no sockets); the sine parameters are the
reference."""

from __future__ import annotations

import gc
import math
import threading
import tomllib
import types
from pathlib import Path

import numpy as np
import pytest

from service.app import Service
from service.config import Config
from service.types import FramePeaks, PeakSettings, PushPeaks, SampleBlock, ToneValue
from tests.service.conftest import to_toml

FS = 2560.0  # Hz; Fmax 1000 Hz, 400 lines: df = 2.5 Hz (fs = 2.56·Fmax, common practice)
BLOCK = 256


def make_pipeline(tmp_path: Path, channels: int):  # type: ignore[no-untyped-def]
    doc = {
        "service": {"listen": "127.0.0.1:1", "data_dir": str(tmp_path)},
        "analysis": {"fmax_hz": 1000.0, "lines": 400, "averaging": "exponential",
                     "averages": 2, "unit": "acceleration", "output_unit": "g",
                     "amplitude": "peak", "peaks": 3},
        "sources": [{"id": "s", "kind": "tcp", "listen": "127.0.0.1:2", "format": "framed",
                     "sample_rate_hz": FS, "channels": [f"c{i}" for i in range(channels)]}],
    }
    svc = Service(Config.model_validate(tomllib.loads(to_toml(doc))), None)
    return svc, svc.pipelines[0]


def feed(p, x: np.ndarray) -> list:  # type: ignore[no-untyped-def]
    ids = tuple(f"c{i}" for i in range(x.shape[0]))
    frames = []
    for k in range(0, x.shape[1], BLOCK):
        blk = SampleBlock("s", ids, x[:, k:k + BLOCK], k, 1_700_000_000_000_000_000, FS)
        frames = p.process(blk) or frames
    return frames


def test_peaks_are_found_when_read_and_equal_the_analyzers(tmp_path: Path) -> None:
    svc, p = make_pipeline(tmp_path, 3)
    k = np.arange(int(4 * FS))
    # channel c carries a sine of peak (c + 1)·0.1 g at an off-line frequency (123.4 Hz is
    # 49.36 lines): the interpolated peak must give it back (Harris 1978: Hann scalloping
    # would otherwise cost up to 1.42 dB)
    amps = np.array([0.1, 0.2, 0.3])
    x = (amps[:, None] * np.sin(2 * np.pi * 123.4 * k / FS)).astype(np.float32)
    frames = feed(p, x)
    assert [f.channel for f in frames] == ["c0", "c1", "c2"]
    push = frames[0].peaks._push  # type: ignore[attr-defined]
    assert isinstance(frames[0].peaks, FramePeaks) and push._rows is None  # not yet found
    # plain data only: the push's spectra, the settings of the moment and a module-level
    # function; nothing that reaches the live analyzer (which goes on changing)
    held = [r for r in gc.get_referents(push) if r is not None and r is not PushPeaks]
    assert {type(r) for r in held} <= {np.ndarray, PeakSettings, types.FunctionType,
                                       type(threading.Lock())}, held
    assert push.settings.n == p.bank.groups[0].analyzer.grid.n
    top = frames[1].peaks[0]
    assert push._rows is not None and all(f.peaks._push is push for f in frames)  # type: ignore[attr-defined]
    assert top.frequency_hz == pytest.approx(123.4, abs=0.05 * FS / 1024)  # ±0.05 line
    assert 20 * math.log10(top.value / 0.2) == pytest.approx(0.0, abs=0.1)  # ±0.1 dB
    an = p.bank.groups[0].analyzer
    ref = an.peaks()
    for c, f in enumerate(frames):
        got = list(f.peaks)
        assert len(got) == 3 and all(isinstance(t, ToneValue) for t in got)
        # the analyzer's own read-out of the same average, up to float32 rounding
        np.testing.assert_allclose([t.frequency_hz for t in got], ref.frequency_hz[c], rtol=1e-6)
        np.testing.assert_allclose([t.value for t in got], ref.amplitude_rms[c], rtol=1e-5)
    assert frames[0].peaks == tuple(frames[0].peaks) and frames[0].peaks != frames[1].peaks
    svc.store.close()


def test_push_peaks_are_computed_once_whatever_thread_reads_first() -> None:
    calls = []
    gate = threading.Barrier(8)

    def compute() -> list[tuple[ToneValue, ...]]:
        calls.append(1)
        return [(ToneValue("", 10.0 * c, 1.0),) for c in range(8)]

    settings = PeakSettings("g", 1.0, "hann", 16, "velocity", "rms", 1, 0.0, 14.0)
    push = PushPeaks(np.zeros((8, 9), np.float32), settings, lambda power, s: compute())
    seen: list[tuple[ToneValue, ...]] = [()] * 8

    def read(c: int) -> None:
        gate.wait(timeout=10)
        seen[c] = tuple(FramePeaks(push, c))

    threads = [threading.Thread(target=read, args=(c,)) for c in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=10)
    assert len(calls) == 1
    assert [s[0].frequency_hz for s in seen] == [10.0 * c for c in range(8)]
    assert len(FramePeaks(push, 3)) == 1 and FramePeaks(push, 3)[0:1] == seen[3]
