"""Cluster mode without Ray: the transport from an actor to the service process gives back
the pipeline's own frames, the actor's work (SourceGroup) run in this process gives the
local pipeline's results, and the [cluster] table's rules.

The same with real Ray actors on a multi-node test cluster: test_cluster_ray.py."""

from __future__ import annotations

import asyncio
import pickle
from pathlib import Path

import numpy as np
import pytest
from clusterkit import frame_differences, local_frames, recording, replay_doc

from service.cluster.actor import SourceGroup, _without_spectra
from service.cluster.head import Cluster, RemotePipeline, RemoteSource, group_sources
from service.cluster.transport import PushBatch, SpectraWanted
from service.config import ConfigError, parse_config
from service.demo import demo_config
from service.hub import Hub
from service.pipeline import SourcePipeline, channel_states
from service.profiles import ProfileBank
from service.sources import make_source
from service.store import HistoryRow
from service.types import SampleBlock


def test_a_push_through_pickle_gives_the_pipelines_frames_and_goes_lighter_without_spectra(
) -> None:
    # every source of the demo (pumps, gearbox, the variable-speed fan with its tacho), four
    # seconds of the plant model pushed in 0.1 s blocks as the simulated source cuts them
    cfg = demo_config(data_dir="unused")
    pushes = 0
    whole_bytes = light_bytes = 0
    for src_cfg in cfg.sources:
        src = make_source(src_cfg)
        ids = list(src.channel_ids)
        fs = float(src.fs or 0.0)
        p = SourcePipeline(src, channel_states(cfg, src_cfg.id, ids), None,  # type: ignore[arg-type]
                           lambda fs, ids=ids: ProfileBank(cfg, ids, fs), cfg=cfg)
        n = round(0.1 * fs)
        for k in range(0, round(4.0 * fs), n):
            x = src.model.render(k, n)  # type: ignore[attr-defined]
            got = p.process_pushes(SampleBlock(src_cfg.id, tuple(ids), x, k, k * 1000, fs))
            frames = [f for push in got for f in push.frames()]
            # through pickle, as Ray sends it: the same frames
            whole = pickle.dumps(got)
            back = [f for push in pickle.loads(whole) for f in push.frames()]
            assert len(back) == len(frames)
            for a, b in zip(frames, back, strict=True):
                assert frame_differences(a, b) == [], a.channel
            # without spectra: every value but the spectra (and the peaks found from them)
            light = pickle.dumps([_without_spectra(push) for push in got])
            thin = [f for push in pickle.loads(light) for f in push.frames()]
            for a, b in zip(frames, thin, strict=True):
                assert frame_differences(a, b, skip=("power", "peaks")) == [], a.channel
                assert b.power.shape == (0,)
            whole_bytes += len(whole)
            light_bytes += len(light)
            pushes += bool(frames)
    assert pushes > 40  # every source made frames in most pushes
    # the spectra are most of a push's bytes (common practice: lines + 1 float32 per channel
    # against a few dozen band and tone values)
    assert light_bytes < 0.25 * whole_bytes, (light_bytes, whole_bytes)


def test_a_push_without_spectra_takes_its_groups_newest_sent_ones_at_the_head() -> None:
    cfg = parse_config(replay_doc(Path("x.wav")), source="test")
    ids = ["m1-de-h", "m1-de-v"]
    p = SourcePipeline(make_source(cfg.sources[0]), channel_states(cfg, "rec", ids), None,  # type: ignore[arg-type]
                       lambda fs: ProfileBank(cfg, ids, fs), cfg=cfg)
    t = np.arange(2560 * 3) / 2560.0
    x = np.stack([np.sin(2 * np.pi * 24.75 * t), np.cos(2 * np.pi * 24.75 * t)]).astype(
        np.float32)
    first = p.process_pushes(SampleBlock("rec", tuple(ids), x, 0, 0, 2560.0))
    later = p.process_pushes(SampleBlock("rec", tuple(ids), x, x.shape[1], 10**9, 2560.0))
    # two profiles ("wide", "narrow"), both channels in each: one push per profile
    assert {(q.profile, q.power.shape) for q in first} == {("wide", (2, 401)),
                                                           ("narrow", (2, 201))}
    rp = RemotePipeline(RemoteSource(cfg.sources[0], Cluster(cfg)), {}, None)  # type: ignore[arg-type]
    for q in first:
        rp._spectra_of(q)
    thin = [_without_spectra(q) for q in later]
    for q in thin:
        rp._spectra_of(q)
    for q, old in zip(thin, first, strict=True):
        assert q.power is old.power  # the newest sent
        f = q.frame(0)
        assert rp._is_stale(f)
        assert not rp._is_stale(old.frame(0))
    # a subscriber of one channel's spectra: pushes with that channel carry theirs
    want = SpectraWanted(1.0, frozenset({"m1-de-v"}))
    assert want.takes(ids) and not want.takes(["other"])
    assert SpectraWanted(1.0, None).takes(["other"])
    assert not SpectraWanted().takes(ids)


def test_the_head_wants_every_spectrum_of_the_channels_its_subscribers_read_spectra_of(
) -> None:
    cfg = parse_config(replay_doc(Path("x.wav")), source="test")
    hub = Hub()
    cluster = Cluster(cfg, hub)
    assert cluster.spectra_wanted() == SpectraWanted(1.0, frozenset())  # nobody reads them
    bands = hub.subscribe(["m1-de-h"])
    bands.kinds = frozenset({"bands", "alarms"})
    assert cluster.spectra_wanted().channels == frozenset()  # bands travel with every push
    hub.subscribe(["m1-de-v"]).kinds = frozenset({"tones"})  # peaks come from the spectrum
    assert cluster.spectra_wanted().channels == frozenset({"m1-de-v"})
    every = hub.subscribe(None)
    every.kinds = frozenset({"spectrum"})
    assert cluster.spectra_wanted().channels is None  # every channel's
    hub.unsubscribe(every)
    assert cluster.spectra_wanted().channels == frozenset({"m1-de-v"})


def _group_batches(cfg_doc: dict[str, object], spectra: SpectraWanted
                   ) -> tuple[list[PushBatch], list[HistoryRow]]:
    """Every push of the same recording from a SourceGroup (the actor's work) in this
    process, pulled as the service process pulls them; and the interval means it made."""
    cfg = parse_config(cfg_doc, source="test")
    out: list[PushBatch] = []
    rows: list[HistoryRow] = []

    async def go() -> None:
        g = SourceGroup(cfg, ["rec"])
        async with asyncio.timeout(60):
            await g.start(spectra)
            task = g.runs["rec"].task
            assert task is not None
            while not (task.done() and not g.runs["rec"].outbox):
                out.extend(await g.pull("rec", 0.2, None, spectra))
            rows.extend(g.finish_history("rec"))
            await g.stop()

    asyncio.run(go())
    return out, [r for b in out for r in b.history] + rows


def test_the_actors_work_gives_the_local_pipelines_results(tmp_path: Path) -> None:
    doc = replay_doc(recording(tmp_path / "rec.wav"))
    local = local_frames(doc)
    batches, _ = _group_batches(doc, SpectraWanted(1.0, None))
    remote = [f for b in batches for push in b.pushes for f in push.frames()]
    # 12 s at fs 2560 (30720 samples): "wide" 1024-point frames every 512 samples →
    # (30720 − 1024) // 512 + 1 = 59 per channel; "narrow" decimated by 4 to 640 Hz,
    # 512-point frames every 256 (1024 input samples), the first ending at the input index
    # its first frame reports (the decimation chain's delay) → 2 channels each
    narrow = [f for f in local if f.profile == "narrow"]
    per_channel = (30720 - narrow[0].end_index) // 1024 + 1
    assert narrow[0].end_index > 512 * 4  # the chain's delay adds to the 2048 input samples
    assert len(local) == 2 * (59 + per_channel)
    assert len(remote) == len(local)
    for a, b in zip(local, remote, strict=True):
        # t_ns: the replay's clock starts at each run's wall time
        assert frame_differences(a, b, skip=("t_ns",)) == [], (a.channel, a.profile, a.seq)
    last = batches[-1]
    assert last.counters.samples == 12 * 2560
    assert last.states["m1-de-h"][1] == 12 * 2560  # STATE_FIELDS[1]: samples
    assert {cid for b in batches for cid in b.plans} == {"m1-de-h", "m1-de-v"}
    assert len({b.incarnation for b in batches}) == 1


def test_without_subscribers_spectra_stay_on_the_actor_and_its_interval_means_are_whole(
        tmp_path: Path) -> None:
    doc = replay_doc(recording(tmp_path / "rec.wav"))
    local = local_frames(doc)
    # nobody reads spectra, one a minute otherwise: only each group's first push has them
    batches, rows = _group_batches(doc, SpectraWanted(60.0, frozenset()))
    pushes = [push for b in batches for push in b.pushes]
    with_spectra = [push for push in pushes if push.power.shape[1]]
    assert sorted(push.profile for push in with_spectra) == ["narrow", "wide"]
    remote = [f for push in pushes for f in push.frames()]
    assert len(remote) == len(local)
    for a, b in zip(local, remote, strict=True):
        assert frame_differences(a, b, skip=("t_ns", "power", "peaks")) == [], a.channel
    # the interval means were made on the actor from every frame's spectrum: a mean times
    # its frame count is their sum (common practice), so summed over the rows it is the sum
    # of the one-process frames' spectra, whichever way the replay's clock cut the intervals
    for cid in ("m1-de-h", "m1-de-v"):
        for prof in ("wide", "narrow"):
            mine = [r for r in rows if r.channel == cid and r.profile == prof]
            theirs = [f.power for f in local if f.channel == cid and f.profile == prof]
            assert sum(r.frames for r in mine) == len(theirs)
            total = sum(np.asarray(r.power, dtype=np.float64) * r.frames for r in mine)
            want = np.sum(np.asarray(theirs, dtype=np.float64), axis=0)
            np.testing.assert_allclose(total, want, rtol=1e-9)


def _cluster_doc(**cluster: object) -> dict[str, object]:
    doc = replay_doc(Path("rec.wav"))
    doc["sources"] = [
        *doc["sources"],  # type: ignore[list-item]
        {"id": "net", "kind": "tcp", "listen": "127.0.0.1:9000", "format": "f32le",
         "sample_rate_hz": 2560.0, "channels": ["n1"]},
    ]
    doc["cluster"] = cluster
    return doc


def test_network_sources_on_a_remote_cluster_must_name_their_node() -> None:
    with pytest.raises(ConfigError, match=r"sources\[1\]\.node: a tcp source on a Ray cluster "
                       r"must name the node"):
        parse_config(_cluster_doc(engine="ray", address="10.1.2.3:6379"), source="test")
    # on a local Ray everything runs on this machine: no node needed
    cfg = parse_config(_cluster_doc(engine="ray", address="local"), source="test")
    assert cfg.cluster.workers == 2


def test_node_without_ray_and_a_bad_engine_are_refused() -> None:
    doc = _cluster_doc()
    doc["sources"][0]["node"] = "east"  # type: ignore[index]
    with pytest.raises(ConfigError, match=r'sources\[0\]\.node: node is only used with '
                       r'\[cluster\] engine = "ray"'):
        parse_config(doc, source="test")
    with pytest.raises(ConfigError,
                       match=r"cluster\.engine: 'spark' is not one of 'process', 'ray'"):
        parse_config(_cluster_doc(engine="spark"), source="test")


def test_sources_are_grouped_by_node_then_dealt_to_the_workers() -> None:
    doc = _cluster_doc(engine="ray", workers=2)
    doc["sources"] += [  # type: ignore[operator]
        {"id": f"sim{i}", "kind": "simulated", "channels": [f"s{i}-a"]} for i in range(3)]
    doc["sources"][1]["node"] = "east"  # type: ignore[index]
    cfg = parse_config(doc, source="test")
    assert group_sources(cfg) == [("east", ["net"]), (None, ["rec", "sim1"]),
                                  (None, ["sim0", "sim2"])]


def test_the_docker_cluster_example_places_what_its_config_names() -> None:
    import json

    import yaml

    from service.config import load_config
    from service.config.cluster import node_resource

    docker = Path(__file__).resolve().parents[2] / "docker"
    cfg = load_config(docker / "quaver-cluster.toml")
    assert cfg.cluster.engine == "ray" and cfg.cluster.address == "auto"
    with open(docker / "compose.cluster.yaml", encoding="utf-8") as f:
        services = yaml.safe_load(f)["services"]
    offered: set[str] = set()
    for svc in services.values():
        cmd = svc["command"]
        for arg in cmd if isinstance(cmd, list) else []:
            if arg.startswith("--resources="):
                offered |= set(json.loads(arg.split("=", 1)[1]))
    # every pinned source's node is a resource some worker offers
    pinned = {node_resource(s.node) for s in cfg.sources if s.node is not None}
    assert pinned and pinned <= offered
    # the image is built with the ray extra, and the head runs the service
    assert services["head"]["build"]["args"]["QUAVER_EXTRAS"] == "[ray]"
    assert "quaver serve -c /etc/quaver/quaver.toml" in " ".join(services["head"]["command"])
