"""Tests of ``quaver bench --service`` (the bench package): its pure helpers against outside
references, and the short run end to end against a real service on loopback.

Knows the load benchmark's report and helpers and the framed wire format; asserts counts and
invariants only — never timings (those belong in the benchmark's output)."""

from __future__ import annotations

import json
import struct
import zlib
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest

from bench import (
    FrameTemplate,
    end_index_differences,
    expected_frames,
    latencies_ns,
    newest_frame_ends,
    percentile,
    search_headroom,
    skipped_frames,
)
from service.cli import main as cli_main
from service.wire import FrameDecoder, decode_datagram

# --- pure helpers ---------------------------------------------------------------------------


def windows(n_samples: int, n: int, hop: int) -> int:
    """Frames of n samples every hop, counted by numpy itself (sliding_window_view)."""
    if n_samples < n:
        return 0
    return len(np.lib.stride_tricks.sliding_window_view(np.arange(n_samples), n)[::hop])


@pytest.mark.parametrize("n,hop", [(8192, 2048), (1024, 256), (16, 5), (10, 10)])
def test_expected_frames_matches_sliding_windows(n, hop):
    for n_samples in [0, n - 1, n, n + 1, n + hop - 1, n + hop, 3 * n + 7, 40_000]:
        # numpy.lib.stride_tricks.sliding_window_view: windows at 0, hop, 2·hop, ...
        assert expected_frames(n_samples, n, hop) == windows(n_samples, n, hop)


def test_newest_frame_ends_are_the_last_complete_window_after_each_block():
    n, hop, block = 16, 4, 6
    block_ends = [block * (b + 1) for b in range(10)]
    got = newest_frame_ends(block_ends, n, hop)
    # Brute force: after each block, the end of the last window lying wholly inside the samples
    # so far (numpy sliding_window_view), kept when it is new.
    want, last = [], 0
    for end in block_ends:
        w = np.lib.stride_tricks.sliding_window_view(np.arange(end), n)[::hop] if end >= n else []
        if len(w) and w[-1][-1] + 1 > last:
            last = int(w[-1][-1]) + 1
            want.append(last)
    assert got == want
    assert got[:2] == [16, 24]  # at 18 samples window 0…15 is done; at 24 also 4…19, 8…23


def test_skipped_frames_counts_holes_between_first_and_last_received():
    expected = [10, 20, 30, 40, 50, 60]
    assert skipped_frames([20, 30, 40], expected) == 0
    assert skipped_frames([20, 40, 50], expected) == 1  # 30 missing
    assert skipped_frames([10, 60], expected) == 4
    assert skipped_frames([20, 25, 30], expected) == 1  # 25 was never produced
    assert skipped_frames([], expected) == 0


def test_end_index_differences_split_missing_from_never_produced():
    expected = [10, 20, 30, 40, 50, 60]
    assert end_index_differences([20, 40, 50], expected) == (1, 0)  # 30 missing
    assert end_index_differences([20, 25, 30], expected) == (0, 1)  # 25 was never produced
    assert end_index_differences([10, 10, 60], expected) == (4, 0)  # a repeat is no hole
    assert end_index_differences([60, 10], expected) == (4, 0)  # arrival order is not used
    assert end_index_differences([], expected) == (0, 0)
    # the frames before the first and after the last received one are not counted
    assert end_index_differences([30, 40], expected) == (0, 0)


def test_percentile_matches_numpy():
    rng = np.random.default_rng(7)
    for size in (1, 2, 5, 101):
        x = rng.exponential(20.0, size)
        for q in (0, 1, 50, 90, 99, 100):
            # numpy.percentile, method "linear" (Hyndman & Fan 1996, definition 7)
            assert percentile(list(x), q) == pytest.approx(np.percentile(x, q), rel=1e-12)
    assert np.isnan(percentile([], 50))


def test_percentile_refuses_q_outside_0_100():
    with pytest.raises(ValueError, match=r"q=101 must be in \[0, 100\]"):
        percentile([1.0], 101)


def test_latency_matches_the_block_that_carried_the_newest_sample():
    fs, block, n, hop = 25600.0, 2560, 8192, 2048
    base_ns = 1_700_000_000_000_000_000
    blocks = 12
    # block b (samples [b·block, (b+1)·block)) went out at 1 s + b·0.1 s + 3 ms
    sends = [((b + 1) * block, 10**9 + b * 10**8 + 3_000_000) for b in range(blocks)]
    arrivals, want = [], []
    for end in newest_frame_ends([e for e, _ in sends], n, hop):
        b = (end - 1) // block  # the block holding sample end − 1
        first = b * block
        # the service stamps a frame: header time of its block + (end − first)/fs
        t0 = base_ns + round(first * 1e9 / fs)
        t_ns = t0 + round((end - first) * 1e9 / fs)
        arrival = sends[b][1] + 7_000_000 + b  # 7 ms + b ns after that block's send
        arrivals.append((arrival, t_ns))
        want.append(7_000_000 + b)
    got = latencies_ns(arrivals, sends, base_ns=base_ns, fs=fs)
    assert got == want
    assert len(got) == 9  # blocks 4…12 each complete a frame (ends 8192, 10240, …)


def test_search_headroom_stops_at_the_first_failure_and_refines():
    calls: list[int] = []

    def trial(c: int) -> bool:
        calls.append(c)
        return c <= 150

    best, tried = search_headroom((256, 32, 64, 128, 192), trial, step=16, refine=2)
    # 128 passes, 192 fails; halving on multiples of 16: 160 fails, 144 passes
    assert best == 144
    assert tried == [(32, True), (64, True), (128, True), (192, False), (160, False),
                     (144, True)]
    assert calls == [32, 64, 128, 192, 160, 144]
    assert search_headroom((32, 64), lambda c: False, step=16, refine=0) == (0, [(32, False)])
    # a first failure is refined downwards too
    assert search_headroom((32, 64), lambda c: c <= 16, step=16) == (16, [(32, False),
                                                                          (16, True)])
    assert search_headroom((32, 64), lambda c: True, step=16)[0] == 64


def test_frame_template_restamps_index_time_and_header_crc():
    rng = np.random.default_rng(3)
    data = rng.normal(size=(3, 50)).astype(np.float32)
    tpl = FrameTemplate(data, 25600.0)
    raw = tpl.frame(123_456_789_012, 1_700_000_000_123_456_789)
    # docs/feeding.md "Framed TCP and UDP": u64 first index at 16, i64 time at 24, CRC-32 of bytes
    # 0…39 at 40 (zlib / IEEE 802.3)
    assert struct.unpack_from("<Q", raw, 16)[0] == 123_456_789_012
    assert struct.unpack_from("<I", raw, 40)[0] == zlib.crc32(raw[:40])
    frame = decode_datagram(raw)
    assert (frame.first_index, frame.t_ns, frame.fs) == (123_456_789_012,
                                                        1_700_000_000_123_456_789, 25600.0)
    np.testing.assert_array_equal(frame.data, data)
    dec = FrameDecoder()
    frames = dec.feed(tpl.frame(0, 5) + tpl.frame(50, 6))
    assert [(f.first_index, f.t_ns) for f in frames] == [(0, 5), (50, 6)]
    assert dec.malformed == 0


@pytest.mark.parametrize("argv,message", [
    (["--repeats", "2"], "--repeats applies to the engine benchmark, not --service"),
    (["--channels", "32,x"], "--channels '32,x': expected counts like 32,64,128"),
    (["--channels", "0,32"], "--channels '0,32': counts must be >= 1"),
])
def test_bench_service_refuses_bad_options(argv, message, capsys):
    assert cli_main(["bench", "--service", *argv]) == 2
    assert message in capsys.readouterr().err


# --- the short run, end to end ---------------------------------------------------------------

N_FRAME, HOP = 8192, 2048  # 3200 lines: N = 2.56 × 3200, 75 % overlap (common practice)
MEM_N, MEM_HOP = 1024, 256  # 400 lines


def frames_for(n_samples: int, n: int, hop: int) -> int:
    """floor((n − N)/hop) + 1 frames from n samples (common practice, Welch 1967)."""
    return (n_samples - n) // hop + 1 if n_samples >= n else 0


@pytest.fixture(scope="module")
def report(quaver_cli: Callable[..., Any]) -> dict[str, Any]:
    res = quaver_cli("bench", "--service", "--short", "--json", timeout_s=240.0)
    assert res.returncode == 0, res.stderr[-3000:]
    return json.loads(res.stdout)  # type: ignore[no-any-return]


@pytest.mark.slow
def test_short_run_headroom_counts_every_frame(report):
    steps = report["headroom"]["steps"]
    # 32 is tried only if 16 passed (a timing matter, so either is accepted here)
    assert [s["channels"] for s in steps] in ([16], [16, 32])
    assert [s["passed"] for s in steps[:-1]] == [True] * (len(steps) - 1)
    per_source = report["setup"]["per_source"]
    assert (report["setup"]["n"], report["setup"]["hop"]) == (N_FRAME, HOP)
    for st in steps:
        # each step restarts frame assembly at its first sample (n0)
        want = sum(per_source * frames_for(n1 - n0, N_FRAME, HOP)
                   for n0, n1 in st["samples"].values())
        assert want > 0
        assert st["frames_expected"] == want
        if st["drops"] == 0:
            assert st["frames_counted"] == want
        else:  # each dropped block is frames the service never analysed
            assert st["frames_counted"] < want
        block = report["setup"]["block_samples"]
        assert all(n1 - n0 == st["blocks"] * block for n0, n1 in st["samples"].values())
    small = steps[0]
    assert (small["drops"], small["gaps"], small["overrun_channels"]) == (0, 0, 0)
    assert small["frames_counted"] == small["frames_expected"]
    assert small["service_rss_mb"] > 0
    assert 0 < small["feeder_cpu_share"] <= small["bench_cpu_share"]


@pytest.mark.slow
def test_short_run_latency_is_matched_to_a_send_before_it(report):
    lat = report["headroom"]["latency"]
    assert lat["client_error"] == ""
    values = lat["values_ms"]
    assert values and lat["count"] == len(values)
    # a message cannot arrive before the block carrying its newest sample was sent
    assert all(v > 0 for v in values)
    assert lat["median_ms"] == pytest.approx(np.percentile(values, 50), abs=1e-3)  # numpy


@pytest.mark.slow
def test_short_run_fanout_clients_get_frames_and_skip_none_unreported(report):
    fan = report["fanout"]
    assert fan["all_connected"] is True
    assert len(fan["per_client"]) == fan["clients"] == 10
    clean = fan["with_clients"]["drops"] == 0 and fan["with_clients"]["gaps"] == 0
    for c in fan["per_client"]:
        assert c["error"] == ""
        assert c["received"] > 0
        assert c["seq_not_rising"] == 0
        if clean:
            # every frame a client did not get between its first and last is in its `missed`
            assert c["skipped_by_end_index"] <= c["missed_reported"]
            assert c["skipped_by_end_index"] == (c["missing_by_end_index"]
                                                 + c["unexpected_end_index"])
            assert c["unexpected_end_index"] == 0
            if c["missed_reported"] == 0:
                assert c["skipped_by_end_index"] == 0
        else:  # dropped blocks: frames never made, the end-index check is not possible
            assert c["skipped_by_end_index"] is None
    assert fan["clients_with_uncounted_skips"] == (0 if clean else None)
    for phase in ("without_clients", "with_clients"):
        st = fan[phase]
        want = sum(16 * frames_for(n1 - n0, N_FRAME, HOP) for n0, n1 in st["samples"].values())
        # a source fed before starts the phase with a one-block jump: one gap per channel
        assert st["restart_gaps"] == 16 * sum(n0 > 0 for n0, _ in st["samples"].values())
        assert st["frames_expected"] == want
        if st["drops"] == 0:
            assert st["frames_counted"] == want
        else:  # each dropped block is frames the service never analysed
            assert st["frames_counted"] < want


@pytest.mark.slow
def test_short_run_memory_figures(report):
    mem = report["memory"]
    assert mem["timed_out"] is False
    assert (mem["n"], mem["hop"]) == (MEM_N, MEM_HOP)
    assert len(mem["points"]) == len(mem["checkpoints"]) == 2
    for p, checkpoint in zip(mem["points"], mem["checkpoints"], strict=True):
        assert p["frames"] >= checkpoint
    for p in mem["points"]:
        assert p["frames"] == mem["channels"] * frames_for(p["samples_per_channel"], MEM_N,
                                                           MEM_HOP)
        assert p["rss_mb"] > 0
    assert mem["drops"] == 0  # the feeder keeps at most 3 blocks ahead of the analysis
    assert mem["rss_ratio"] == pytest.approx(mem["points"][-1]["rss_mb"]
                                             / mem["points"][0]["rss_mb"], abs=1e-3)


@pytest.mark.slow
def test_short_run_headline_figures_are_the_steps_and_the_engines(report):
    """The summary keys repeat the step figures they name, and the engine's capacity is its
    real-time factor times the channels it was timed on (bench/engine.py)."""
    steps = {s["channels"]: s for s in report["headroom"]["steps"]}
    best = report["headroom"]["largest_passing_channels"]
    assert report["headroom_channels"] == best
    for ch, st in steps.items():
        assert st["p99_ms"] == st["latency"]["p99_ms"]
        assert st["cpu_ms_per_frame"] == st["service_cpu_ms_per_frame"] > 0
        assert report["p99_ms_by_channels"][str(ch)] == st["p99_ms"]  # JSON keys are text
    if best in steps:
        assert report["cpu_ms_per_frame"] == steps[best]["cpu_ms_per_frame"]
    eng = report["engine"]
    assert eng["realtime_factor"] > 1  # the engine alone is far faster than real time
    assert report["engine_capacity_channels"] == eng["capacity_channels"]
    # floor(channels × factor); the factor is printed rounded to 0.01
    assert abs(eng["capacity_channels"] - eng["channels_timed"] * eng["realtime_factor"]) <= (
        1 + 0.005 * eng["channels_timed"])
    if best:
        assert report["headroom_over_engine_capacity"] == pytest.approx(
            best / eng["capacity_channels"], abs=1e-3)
