"""The service process keeps its start-up heap out of Python's full collections, and says so
in /metrics next to prometheus_client's own collector and process figures.

A full (generation 2) collection walks every tracked object with the whole service stopped;
without the freeze, ~130 000 start-up objects made that an 80–120 ms pause every few seconds
at 64 channels (quaver bench --service). Timing is for the benchmark; these tests check the
mechanism: the objects are frozen once serving, later garbage is still collected, and the
figures reach /metrics."""

from __future__ import annotations

import re
import socket
import subprocess
import sys
from pathlib import Path

import httpx
import pytest

from bench.harness import child_env
from tests.service.conftest import (
    REPO,
    SMALL_FS,
    RunningService,
    feed_tone,
    free_ports,
    one_band_config,
    run_service,
    to_toml,
)

LOOPBACK = "127.0.0.1"


def metrics(svc: RunningService) -> dict[str, float]:
    """/metrics as {name{labels}: value} (the Prometheus text exposition)."""
    text = httpx.get(f"{svc.base_url}/metrics", timeout=10).text
    out = {}
    for line in text.splitlines():
        m = re.fullmatch(r"([a-zA-Z_:][\w:]*(?:\{[^}]*\})?) (\S+)", line)
        if m:
            out[m.group(1)] = float(m.group(2))
    return out


@pytest.fixture(scope="module")
def svc(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    with run_service(one_band_config(), tmp_path_factory.mktemp("gc")) as s:
        yield s


def test_start_up_heap_is_frozen_once_serving(svc: RunningService) -> None:
    m = metrics(svc)
    # The imports alone (fastapi, pydantic, scipy, numpy, the service) are tens of
    # thousands of objects; a service that did not freeze reports 0.
    assert m["quaver_gc_frozen_objects"] > 20_000
    assert "start-up heap frozen" in svc.log_tail(200)


def test_frozen_set_is_the_start_up_heap(svc: RunningService) -> None:
    before = metrics(svc)
    with socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=5) as sock:
        feed_tone(sock, 0, int(4 * SMALL_FS), 0.3)  # 4 s of 123 Hz: ~20 analysis frames
    svc.wait(lambda: svc.channel("a")["counters"]["samples"] == int(4 * SMALL_FS) or None,
             "every sample taken")
    after = metrics(svc)
    # What came later (frames, requests, their JSON) is left to the collector as usual: the
    # frozen set does not take it in (it only loses start-up objects that are freed).
    assert 0 < after["quaver_gc_frozen_objects"] <= before["quaver_gc_frozen_objects"]
    assert after['python_gc_collections_total{generation="0"}'] >= 1


def test_process_figures_for_a_long_run(svc: RunningService) -> None:
    m = metrics(svc)
    # prometheus_client's ProcessCollector reads /proc/self: a Python service with numpy,
    # scipy and fastapi loaded is tens of MiB resident (common practice: > 20 MiB).
    assert m["process_resident_memory_bytes"] > 20 * 2**20
    assert m["process_cpu_seconds_total"] > 0
    for gen in "012":
        assert f'python_gc_objects_uncollectable_total{{generation="{gen}"}}' in m


# Runs service.runner.serve() (not run_service) for the config file argv[1] until it serves,
# then prints the collector's freeze count and exits at once.
IN_PROCESS = """
import asyncio, gc, os, sys
from service.runner import serve
from service.config import load_config

async def main():
    started = asyncio.Event()
    task = asyncio.create_task(serve(load_config(sys.argv[1]), announce=lambda _: None,
                                     started=started))
    await asyncio.wait_for(started.wait(), 20.0)
    print(gc.get_freeze_count(), flush=True)
    os._exit(0)

asyncio.run(main())
"""


def test_in_process_services_do_not_freeze(tmp_path: Path) -> None:
    # serve() only freezes when asked (run_service, the service's own process): tests run
    # several services in one process, and freezing theirs would keep their garbage.
    http, tcp = free_ports(2)
    doc = {**one_band_config(), "service": {"listen": f"{LOOPBACK}:{http}",
                                            "data_dir": str(tmp_path / "data")}}
    doc["sources"] = [{**doc["sources"][0], "listen": f"{LOOPBACK}:{tcp}"}]
    path = tmp_path / "quaver.toml"
    path.write_text(to_toml(doc), encoding="utf-8")
    done = subprocess.run([sys.executable, "-c", IN_PROCESS, str(path)], cwd=REPO,
                          env=child_env(), capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.split() == ["0"]
