"""Cluster mode on a real Ray cluster of three nodes on this machine (ray.cluster_utils: a
head with no CPU for actors and two workers of one CPU each, on 127.0.0.1): the service's
results equal the one-process results frame for frame; a source pinned to a node runs there;
killing the node of a relocatable source moves it to the other node, its channels show
``failed`` meanwhile with events that say why, and every announced event is in the store.

Run this file on its own (Ray's processes are heavy); every wait is bounded."""

from __future__ import annotations

import asyncio
import os
import shutil
import socket
import tempfile
import time
from collections.abc import Awaitable, Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from clusterkit import (
    capture_frames,
    frame_differences,
    local_frames,
    recording,
    replay_doc,
)

# Before Ray is imported: every node, server and worker of Ray on loopback (Ray reads this
# when it is imported; its processes inherit it), no usage reports, no token auth.
RAY_ENV = {"RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER": "0", "RAY_USAGE_STATS_ENABLED": "0",
           "RAY_AUTH_MODE": "disabled"}
os.environ.update(RAY_ENV)
ray = pytest.importorskip("ray")
from ray.cluster_utils import Cluster as RayTestCluster  # noqa: E402

from service.app import Service  # noqa: E402
from service.config import parse_config  # noqa: E402
from service.config.cluster import node_resource  # noqa: E402
from service.types import SpectralFrame  # noqa: E402

pytestmark = pytest.mark.slow  # a Ray cluster of three nodes: ~40 s for the file

OBJECT_STORE = 80 * 2**20  # bytes per node: the smallest Ray accepts comfortably


@pytest.fixture(scope="module")
def cluster() -> Iterator[tuple[RayTestCluster, dict[str, Any]]]:
    temp = tempfile.mkdtemp(prefix="qray", dir="/tmp")  # short: Ray's socket paths
    # Ray 2.60 writes the head's address to <its default temp folder>/ray/ray_current_cluster
    # whatever temp_dir says, and fails where that folder does not exist (a fresh machine):
    # its default is pointed at ours (RAY_TMPDIR), so nothing is left in /tmp/ray either
    os.makedirs(os.path.join(temp, "ray"), exist_ok=True)
    try:
        with pytest.MonkeyPatch.context() as env:
            env.setenv("RAY_TMPDIR", temp)
            yield from _cluster(temp)
    finally:
        shutil.rmtree(temp, ignore_errors=True)


def _cluster(temp: str) -> Iterator[tuple[RayTestCluster, dict[str, Any]]]:
    c = RayTestCluster(initialize_head=True, head_node_args={
        "num_cpus": 0, "include_dashboard": False, "object_store_memory": OBJECT_STORE,
        "temp_dir": temp,
        # a lost node is declared dead after 3 missed 1 s health checks (Ray's default is
        # slower; the test waits bounded all the same)
        "_system_config": {"health_check_period_ms": 1000,
                           "health_check_failure_threshold": 3},
    })
    try:
        nodes = {name: c.add_node(num_cpus=1, resources={node_resource(name): 1},
                                  object_store_memory=OBJECT_STORE)
                 for name in ("w1", "w2")}
        c.wait_for_nodes(timeout=60)
        # this process's driver, on loopback like the nodes (the service finds it connected);
        # the workers import the package from this tree
        root = str(Path(__file__).resolve().parents[2])
        assert c.address.startswith("127.0.0.1:")
        ray.init(address=c.address, log_to_driver=False,
                 runtime_env={"env_vars": {"PYTHONPATH": root}})
        yield c, nodes
    finally:
        if ray.is_initialized():
            ray.shutdown()
        c.shutdown()


async def until(cond: Callable[[], bool], timeout_s: float, what: str) -> float:
    """Wait (bounded) until ``cond()``; the seconds it took."""
    t0 = time.monotonic()
    while not cond():
        if time.monotonic() - t0 > timeout_s:
            raise AssertionError(f"not within {timeout_s} s: {what}")
        await asyncio.sleep(0.2)
    return time.monotonic() - t0


def run(coro: Awaitable[None], timeout_s: float) -> None:
    async def bounded() -> None:
        async with asyncio.timeout(timeout_s):
            await coro

    asyncio.run(bounded())


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_the_cluster_gives_the_one_process_results(
        cluster: tuple[RayTestCluster, dict[str, Any]], tmp_path: Path) -> None:
    c, _ = cluster
    doc = replay_doc(recording(tmp_path / "rec.wav"))
    local = local_frames(doc)
    cfg = parse_config({**doc, "service": {"data_dir": str(tmp_path / "data")},
                        "cluster": {"engine": "ray", "address": c.address}}, source="test")
    got: list[SpectralFrame] = []
    took: dict[str, float] = {}

    async def go() -> None:
        svc = Service(cfg)
        capture_frames(svc, got)
        await svc.start()
        try:
            await until(lambda: len(got) >= len(local), 90, "every frame of the replay")
            await asyncio.sleep(0.5)  # nothing more comes
            # what only lives on the actor, asked as an API route asks (a worker thread):
            # the newest second of the recording's samples
            t0 = time.monotonic()
            wave = await asyncio.to_thread(
                svc.by_source["rec"].latest_waveform, "m1-de-h", 1.0)
            took["waveform_s"] = time.monotonic() - t0
            assert wave is not None and wave[1] == 2560.0 and wave[0].shape == (2560,)
        finally:
            await svc.stop()

    run(go(), 180)
    assert len(local) > 100
    assert len(got) == len(local)
    for a, b in zip(local, got, strict=True):
        # t_ns: the replay's clock starts at each run's wall time
        assert frame_differences(a, b, skip=("t_ns",)) == [], (a.channel, a.profile, a.seq)
    print(f"waveform from the actor in {took['waveform_s']:.3f} s")


def test_a_lost_node_moves_its_relocatable_source_and_nothing_is_lost(
        cluster: tuple[RayTestCluster, dict[str, Any]], tmp_path: Path) -> None:
    c, nodes = cluster
    ids = ["p1-de-h", "p2-de-h"]  # two of the demo plant's channels
    doc: dict[str, Any] = {
        "service": {"data_dir": str(tmp_path / "data")},
        "analysis": {"fmax_hz": 4000.0, "lines": 400, "overlap": 0.5},
        "cluster": {"engine": "ray", "address": c.address, "workers": 1, "max_restarts": 3},
        "sources": [
            # relocatable: the simulated plant, at real time
            {"id": "sim", "kind": "simulated", "scenario": "demo", "sample_rate_hz": 10240.0,
             "channels": ids},
            # pinned: a TCP input listening on node w1's address
            {"id": "net", "kind": "tcp", "listen": f"127.0.0.1:{free_port()}",
             "format": "f32le", "sample_rate_hz": 10240.0, "channels": ["net-a"],
             "node": "w1"},
        ],
        # an alarm that is raised at once (the plant's overall is far above it), so that
        # events are made before, while and after the node is lost
        "alarms": [{"channel": "p1-de-h", "overall": True, "alert": 1e-6, "danger": 1e9}],
    }
    cfg = parse_config(doc, source="test")
    announced: list[dict[str, object]] = []
    report: dict[str, float] = {}

    async def go() -> None:
        svc = Service(cfg)
        await svc.start()
        sub = svc.hub.subscribe()
        sub.kinds = frozenset({"alarms"})

        async def drain() -> None:
            while True:
                item = await sub.get()
                if isinstance(item, dict) and "id" in item:
                    announced.append(item)

        reader = asyncio.create_task(drain())
        try:
            assert svc.cluster is not None
            sim, net = (svc.cluster.by_source[s] for s in ("sim", "net"))
            net_where = await asyncio.wait_for(net.where.remote(), 30)
            # the pinned source runs on the node that holds its resource
            assert net_where["node_id"] == nodes["w1"].node_id
            ch = svc.hub.channels
            await until(lambda: ch["p1-de-h"].status == "ok" and ch["p1-de-h"].frames > 5, 60,
                        "frames from the simulated source")
            before = await asyncio.wait_for(sim.where.remote(), 30)
            lost = next(n for n in nodes.values() if n.node_id == before["node_id"])
            committed = svc.store.events(limit=1000)
            assert any(e["channel"] == "p1-de-h" and e["kind"] != "status"
                       for e in committed)  # the alarm was raised already
            t_kill = time.monotonic()
            c.remove_node(lost, allow_graceful=False)
            await until(lambda: ch["p1-de-h"].status == "failed", 60, "p1-de-h shown failed")
            report["failed_after_s"] = time.monotonic() - t_kill
            frames_then = ch["p1-de-h"].frames
            await until(lambda: ch["p1-de-h"].status == "ok" and ch["p1-de-h"].frames > 3
                        and svc.by_source["sim"].incarnation != before["incarnation"], 90,
                        "p1-de-h ok again on the other node")
            report["recovered_after_s"] = time.monotonic() - t_kill
            after = await asyncio.wait_for(sim.where.remote(), 30)
            assert after["node_id"] != before["node_id"]
            assert after["node_id"] in {n.node_id for n in nodes.values()}
            assert ch["p1-de-h"].frames < frames_then or after["incarnation"] != before[
                "incarnation"]
            # nothing committed before the loss is lost
            stored = {e["id"]: e for e in svc.store.events(limit=1000)}
            assert {e["id"] for e in committed} <= set(stored)
            # the channels of the moved source said why they were not ok
            failed = [e for e in stored.values()
                      if e["kind"] == "status" and e["to_state"] == "failed"]
            assert {e["channel"] for e in failed} >= set(ids)
            assert all("pipeline failed" in str(e["message"]) for e in failed)
            assert all("pipeline failed: ActorLost: actor lost (" in str(e["message"])
                       and "Ray restarts it, on another node if its own is gone (at most 3 "
                       "times)" in str(e["message"]) for e in failed), failed
            # every event announced was committed first
            await asyncio.sleep(0.5)
            seen = list(announced)
            assert seen
            assert {e["id"] for e in seen} <= {e["id"] for e in svc.store.events(limit=1000)}
        finally:
            reader.cancel()
            await svc.stop()

    run(go(), 240)
    print(f"node loss: failed shown after {report['failed_after_s']:.1f} s, recovered after "
          f"{report['recovered_after_s']:.1f} s")


def test_an_actor_ray_gave_up_is_started_anew(
        cluster: tuple[RayTestCluster, dict[str, Any]], tmp_path: Path) -> None:
    c, _ = cluster
    cfg = parse_config({
        "service": {"data_dir": str(tmp_path / "data")},
        "analysis": {"fmax_hz": 4000.0, "lines": 400, "overlap": 0.5},
        # no restarts: Ray gives the actor up at its first death
        "cluster": {"engine": "ray", "address": c.address, "workers": 1, "max_restarts": 0},
        "sources": [{"id": "sim", "kind": "simulated", "scenario": "demo",
                     "sample_rate_hz": 10240.0, "channels": ["p1-de-h"]}],
    }, source="test")
    report: dict[str, float] = {}

    async def go() -> None:
        svc = Service(cfg)
        await svc.start()
        try:
            assert svc.cluster is not None
            st = svc.hub.channels["p1-de-h"]
            await until(lambda: st.status == "ok" and st.frames > 3, 60, "first frames")
            old = svc.cluster.by_source["sim"]
            t_kill = time.monotonic()
            ray.kill(old, no_restart=True)
            await until(lambda: st.status == "failed", 60, "failed shown")
            report["failed_after_s"] = time.monotonic() - t_kill
            await until(lambda: st.status == "ok" and svc.cluster is not None
                        and svc.cluster.replaced == 1, 90, "ok again on a new actor")
            report["recovered_after_s"] = time.monotonic() - t_kill
            assert svc.cluster.by_source["sim"] is not old
            where = await asyncio.wait_for(svc.cluster.by_source["sim"].where.remote(), 30)
            assert where["incarnation"] == svc.by_source["sim"].incarnation  # type: ignore[attr-defined]
        finally:
            await svc.stop()

    run(go(), 240)
    print(f"actor given up: failed shown after {report['failed_after_s']:.1f} s, a new one "
          f"ok after {report['recovered_after_s']:.1f} s")
