"""WebSocket clients of a service under test: one latency client in a thread, and the
fan-out clients run in a process of their own (``python -m bench.clients JOB``).

Knows the stream protocol (subscribe message, binary spectrum header); nothing else.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import select
import struct
import subprocess
import sys
import threading
import time
from collections.abc import Sequence
from typing import Any

__all__ = ["LatencyClient", "fanout_worker", "parse_spectrum_header", "read_line"]


def _ws_options(deflate: bool = True) -> dict[str, Any]:
    """Client options: no proxy (loopback; websockets >= 15 would read *_proxy variables);
    permessage-deflate offered unless ``deflate`` is false (browsers offer it)."""
    import websockets

    major = int(str(getattr(websockets, "__version__", "12")).split(".")[0])
    return {"open_timeout": 15.0, "max_size": 1 << 24,
            **({"proxy": None} if major >= 15 else {}),
            **({} if deflate else {"compression": None})}


def parse_spectrum_header(msg: bytes) -> dict[str, Any]:
    """The JSON header of a binary spectrum message (u32 length, then the JSON)."""
    (length,) = struct.unpack_from("<I", msg)
    return json.loads(msg[4 : 4 + length])  # type: ignore[no-any-return]


class LatencyClient:
    """A thread with one WebSocket client on one channel: (arrival ns, timestamp_ns) pairs."""

    def __init__(self, base: str, channel: str) -> None:
        self.url = base.replace("http://", "ws://") + "/api/v1/stream"
        self.channel = channel
        self.arrivals: list[tuple[int, int]] = []
        self.error = ""
        self._stop = threading.Event()
        self._ready = threading.Event()
        self._thread = threading.Thread(target=self._run, name="latency-client", daemon=True)

    def __enter__(self) -> LatencyClient:
        self._thread.start()
        if not self._ready.wait(15.0):
            self.error = self.error or "the latency client did not connect within 15 s"
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(5.0)

    def _run(self) -> None:
        from websockets.sync.client import connect

        try:
            with connect(self.url, **_ws_options()) as ws:
                sub = {"channels": [self.channel], "kinds": ["spectrum"], "max_rate_hz": 100}
                ws.send(json.dumps({"subscribe": sub}))
                self._ready.set()
                while not self._stop.is_set():
                    try:
                        msg = ws.recv(timeout=0.2)
                    except TimeoutError:
                        continue
                    now = time.time_ns()
                    if isinstance(msg, bytes):
                        self.arrivals.append((now, int(parse_spectrum_header(msg)["timestamp_ns"])))
        except Exception as e:  # reported, not raised: the bench goes on
            self.error = f"{type(e).__name__}: {e}"
        finally:
            self._ready.set()


async def _fanout(url: str, channel_sets: list[list[str]], seconds: float,
                  rate_hz: float, deflate: bool = True) -> list[dict[str, Any]]:
    from websockets.asyncio.client import connect

    logs: list[dict[str, Any]] = [{"channels": cs, "frames": {c: [] for c in cs}, "missed": 0,
                                   "received": 0, "error": ""} for cs in channel_sets]
    connected = asyncio.Event()
    stop = asyncio.Event()
    pending = [len(channel_sets)]

    async def client(log: dict[str, Any]) -> None:
        try:
            async with connect(url, **_ws_options(deflate)) as ws:
                sub = {"channels": log["channels"], "kinds": ["spectrum"], "max_rate_hz": rate_hz}
                await ws.send(json.dumps({"subscribe": sub}))
                pending[0] -= 1
                if not pending[0]:
                    connected.set()
                while not stop.is_set():
                    try:
                        msg = await asyncio.wait_for(ws.recv(), 0.25)
                    except TimeoutError:
                        continue
                    if isinstance(msg, bytes):
                        h = parse_spectrum_header(msg)
                        # a channel it did not ask for lands in its own list (reported)
                        log["frames"].setdefault(h["channel"], []).append(
                            (h["timestamp_ns"], h["seq"]))
                        log["received"] += 1
                        log["missed"] = h["missed"]
        except Exception as e:
            log["error"] = f"{type(e).__name__}: {e}"
            pending[0] -= 1
            if not pending[0]:
                connected.set()

    tasks = [asyncio.create_task(client(log)) for log in logs]
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(connected.wait(), 30.0)
    print("connected", flush=True)
    # Listen until the parent says the step has drained (a line or EOF on stdin), at most
    # ``seconds``: a fixed span cut off the last frames of a step that drained late, and the
    # clients' received counts then differed for no reason of their own.
    loop = asyncio.get_running_loop()
    told = asyncio.Event()
    threading.Thread(target=lambda: (sys.stdin.readline(), loop.call_soon_threadsafe(told.set)),
                     name="stop-line", daemon=True).start()
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(told.wait(), seconds)
    stop.set()
    await asyncio.wait(tasks, timeout=5.0)
    return logs


def fanout_worker(argv: Sequence[str]) -> int:
    """Entry of the fan-out client process: argv[0] is a JSON job; prints ``connected`` once
    every client has subscribed, then, when a line or EOF comes on stdin (at most ``seconds``
    s later), one JSON line with the logs."""
    job = json.loads(argv[0])
    t0 = os.times()
    logs = asyncio.run(_fanout(job["url"], job["channel_sets"], job["seconds"], job["rate_hz"],
                               job.get("deflate", True)))
    t1 = os.times()
    print(json.dumps({"logs": logs, "cpu_s": (t1.user - t0.user) + (t1.system - t0.system)}),
          flush=True)
    return 0


def read_line(proc: subprocess.Popen[str], timeout_s: float) -> str:
    assert proc.stdout is not None
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        ready, _, _ = select.select([proc.stdout], [], [], 0.2)
        if ready:
            return proc.stdout.readline()
        if proc.poll() is not None:
            return ""
    return ""


if __name__ == "__main__":  # the fan-out client process (see bench.experiments.fanout)
    raise SystemExit(fanout_worker(sys.argv[1:]))
