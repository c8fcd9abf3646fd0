"""A source pipeline that raises is reported as failed and run again; the engine cannot be
poisoned by any mixture of bad samples and index jumps.

In-process: the service's own objects on one event loop (the failure is injected into the
pipeline's per-block work), and the pipeline's per-block method driven directly."""

from __future__ import annotations

import asyncio
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import service.pipeline as pipeline_module
import service.supervise as supervise_module
from service.app import Service
from service.config import parse_config
from service.pipeline import SourcePipeline
from service.profiles import ProfileBank
from service.types import SampleBlock
from service.wire import encode_frame
from tests.service.conftest import SMALL_FS, free_ports, one_band_config

LOOPBACK = "127.0.0.1"


def _cfg(tmp_path: Path, port: int) -> Any:
    doc = one_band_config(channels=[{"id": "a", "stale_after_s": 30.0}])
    doc["sources"][0]["listen"] = f"{LOOPBACK}:{port}"
    doc["service"] = {"listen": f"{LOOPBACK}:{free_ports(1)[0]}", "data_dir": str(tmp_path)}
    return parse_config(doc, env={})


async def _until(probe: Any, what: str, timeout_s: float = 10.0) -> None:
    for _ in range(int(timeout_s / 0.02)):
        if probe():
            return
        await asyncio.sleep(0.02)
    raise AssertionError(f"timed out waiting for {what}")


def test_a_failing_pipeline_is_reported_failed_and_restarted(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(supervise_module, "RESTART_FIRST_S", 0.3)
    (port,) = free_ports(1)
    svc = Service(_cfg(tmp_path, port))
    p = svc.pipelines[0]
    st_a = svc.hub.channels["a"]
    real = p.process_pushes  # what the pipeline task runs per block
    calls = {"n": 0}

    def sometimes_raises(block: SampleBlock) -> Any:
        calls["n"] += 1
        if calls["n"] == 20:  # one block, some way into the stream
            raise OverflowError("injected: the engine met something it could not handle")
        return real(block)

    p.process_pushes = sometimes_raises  # type: ignore[method-assign]

    async def main() -> dict[str, Any]:
        await svc.start()
        seen: dict[str, Any] = {}
        try:
            _, writer = await asyncio.open_connection(LOOPBACK, port)
            t = np.arange(int(12 * SMALL_FS)) / SMALL_FS
            x = (0.3 * np.sin(2 * np.pi * 123.0 * t))[None, :].astype(np.float32)
            k = 0
            for _ in range(200):  # bounded: 0.1 s of signal per step
                writer.write(encode_frame(x[:, k:k + 256], "f32le", SMALL_FS, k))
                k += 256
                await writer.drain()
                await asyncio.sleep(0.01)
                if st_a.status == "failed" and "failed" not in seen:
                    seen["failed"] = (st_a.fault, p.failures)
                if "failed" in seen and st_a.status == "ok":
                    seen["back"] = p.failures
                    break
            writer.close()
            await _until(lambda: "back" in seen, "ok after the restart")
            seen["frames"] = st_a.frames
            seen["pipeline_failed"] = p.failed
        finally:
            await svc.stop()
        return seen

    seen = asyncio.run(main())
    fault, failures = seen["failed"]
    assert "OverflowError" in fault and "injected" in fault and failures == 1
    assert seen["back"] == 1 and seen["pipeline_failed"] == ""
    assert seen["frames"] > 0
    events = svc.store.events(None, "a", 100, None)
    status = [(e["from_state"], e["to_state"]) for e in reversed(events) if e["kind"] == "status"]
    # failed, then (restarted, no spectrum yet) no-signal, then ok with the first frame
    assert status == [("ok", "failed"), ("failed", "no-signal"), ("no-signal", "ok")], status
    los = [e for e in events if e["rule"] == "a.signal"]
    assert {e["to_state"] for e in los} >= {"alert", "normal"}  # failed is a loss of signal


# --- the engine cannot be poisoned --------------------------------------------------------------

FS = SMALL_FS
BLOCK = 256
I64_MAX = 2**63 - 1


class _Src:
    id = "s"
    channel_ids = ("a", "b")

    class counters:  # noqa: N801 - the attribute the pipeline reads
        drops = 0


def _pipeline(cfg: Any) -> SourcePipeline:
    from service.pipeline import channel_states

    states = channel_states(cfg, "s", ["a", "b"], fs=FS)

    async def publish(*_: Any) -> None:
        return None

    return SourcePipeline(_Src(), states, publish,  # type: ignore[arg-type]
                          make_bank=lambda fs: ProfileBank(cfg, ["a", "b"], fs), cfg=cfg)


def _two_channel_cfg() -> Any:
    doc = one_band_config()
    doc["sources"][0]["channels"] = ["a", "b"]
    doc["sources"][0]["listen"] = f"{LOOPBACK}:1"  # never opened here
    return parse_config(doc, env={})


def _tone(first: int, n: int, amp: float) -> np.ndarray:
    """A 123 Hz sine at stream index ``first`` onward, phase-continuous at any index: the
    phase in cycles is k·123/2560 mod 1, taken exactly in integers (Python's are unbounded)."""
    k = (first * 123) % 2560 + np.arange(n, dtype=np.int64) * 123
    return (amp * np.sin(2 * np.pi * (k % 2560) / 2560.0)).astype(np.float32)


BAD = st.sampled_from(["nan", "inf", "huge", "flat", "jump", "jump-far", "good"])


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(BAD, min_size=1, max_size=12), st.integers(0, I64_MAX - 10**6))
def test_no_mixture_of_bad_blocks_stops_a_later_good_signal_being_analysed_exactly(
    chaos: list[str], far: int
) -> None:
    """Whatever came before (NaN, inf, 1e20 values, a flat line, index jumps anywhere in the
    int64 range), a clean stretch afterwards gives the band value of that stretch alone:
    a 123 Hz sine of peak 0.8 g on channel a reads 0.8/√2 g RMS in band b (100–150 Hz;
    RMS of a sine = peak/√2, common practice), within 0.1 dB."""
    cfg = _two_channel_cfg()
    p = _pipeline(cfg)
    clock = [1000.0]
    orig = pipeline_module.time.monotonic
    pipeline_module.time.monotonic = lambda: clock[0]  # type: ignore[assignment]
    try:
        idx = 0
        for what in chaos:
            x = np.stack([_tone(idx, BLOCK, 0.3), _tone(idx, BLOCK, 0.1)])
            if what == "nan":
                x[0, ::7] = np.nan
            elif what == "inf":
                x[1, 3] = -np.inf
            elif what == "huge":
                x[0, :] = 1e20
            elif what == "flat":
                x[:, :] = 0.5
            elif what == "jump":
                idx += 12345
            elif what == "jump-far":
                idx = far
            p.process(SampleBlock("s", ("a", "b"), x, idx, 0, FS))
            idx += BLOCK
            clock[0] += BLOCK / FS
        # then 6 s of clean signal, in real-time steps (the fault hold runs out)
        frames = []
        for _ in range(int(6 * FS / BLOCK)):
            x = np.stack([_tone(idx, BLOCK, 0.8), _tone(idx, BLOCK, 0.1)])
            frames = p.process(SampleBlock("s", ("a", "b"), x, idx, 0, FS)) or frames
            idx += BLOCK
            clock[0] += BLOCK / FS
    finally:
        pipeline_module.time.monotonic = orig  # type: ignore[assignment]
    st_a = p.channels["a"]
    assert st_a.data_status == "ok", (chaos, st_a.data_status, st_a.data_fault)
    got = {f.channel: f for f in frames}
    band = next(b for b in got["a"].bands if b.name == "b").value
    assert math.isfinite(band)
    assert abs(20 * math.log10(band / (0.8 / math.sqrt(2)))) < 0.1, (chaos, band)
    assert got["a"].quality == "ok"


# --- the state rule itself ----------------------------------------------------------------------

from service.quality import CHANNEL_STATUSES, Inputs, derive, is_lost  # noqa: E402

AGES = st.one_of(st.none(), st.floats(0, 1e6, allow_nan=False))


@given(
    data_status=st.sampled_from(["ok", "sensor-fault", "gap", "overrun"]),
    frame_age_s=AGES,
    since_start_s=st.floats(0, 1e6, allow_nan=False),
    stale_after_s=st.floats(0.01, 1e4, allow_nan=False),
    failed=st.sampled_from(["", "OverflowError: x"]),
    connected=st.sampled_from([None, True, False]),
)
def test_a_channel_never_reads_ok_while_its_latest_frame_is_stale(
    data_status: str, frame_age_s: float | None, since_start_s: float, stale_after_s: float,
    failed: str, connected: bool | None,
) -> None:
    i = Inputs(data_status, "why", frame_age_s, since_start_s, stale_after_s, failed, connected)
    status, cause = derive(i)
    assert status in CHANNEL_STATUSES
    if status == "ok":
        assert frame_age_s is not None and frame_age_s <= stale_after_s
        assert not failed and data_status in ("ok",) and cause == ""
    else:
        assert cause  # a not-ok state always says why
    if failed:
        assert status == "failed" and is_lost(i)
    if frame_age_s is not None and frame_age_s > stale_after_s:
        assert status in ("no-signal", "failed") and is_lost(i)
    assert is_lost(i) == (status == "failed" or (status == "no-signal" and (
        (since_start_s if frame_age_s is None else frame_age_s) > stale_after_s)))


def test_stale_after_s_comes_from_the_channel_then_its_source_then_the_profiles() -> None:
    from service.pipeline import channel_states
    from service.quality import default_stale_after_s

    doc = one_band_config(channels=[{"id": "a", "stale_after_s": 7.5}])
    doc["sources"][0].update(channels=["a", "b"], listen=f"{LOOPBACK}:1")
    states = channel_states(parse_config(doc, env={}), "s", ["a", "b"], fs=SMALL_FS)
    # b: 400 lines at 2560 Hz → N = 1024 (0.4 s), hop N/4 (75 % overlap, the default)
    assert states["a"].stale_after_s == 7.5
    assert states["b"].stale_after_s == default_stale_after_s(0.1, 0.4) == 5.0
    doc["sources"][0]["stale_after_s"] = 12.0
    states = channel_states(parse_config(doc, env={}), "s", ["a", "b"], fs=SMALL_FS)
    assert (states["a"].stale_after_s, states["b"].stale_after_s) == (7.5, 12.0)
    # a slow profile sets a longer default: one frame + 2 hops, 3 hops, at least 5 s
    assert default_stale_after_s(2.0, 8.0) == 12.0 and default_stale_after_s(3.0, 4.0) == 10.0
