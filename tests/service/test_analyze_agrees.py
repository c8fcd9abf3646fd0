"""`quaver analyze` and the running service's REST API give the same numbers for the same
samples and config: overall (value and band), bands, tracked tones and peaks, for every
window and both example configs, every profile.

The service runs in-process (its own Service, pipelines and HTTP app over a TestClient; no
sockets): each source's samples go through its SourcePipeline in the same 1 s blocks that
analyze uses, so both must agree to float rounding. Regression for issue 14, item 2:
analyze wired the engine a second time and took its overall over lowcut..Fmax (0.563 mm/s
over 2-5000 Hz) where the service used the band named overall (0.110 mm/s, 10-1000 Hz)."""

from __future__ import annotations

import json
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from service import cli
from service.api import create_app
from service.app import Service
from service.config import channel_settings, effective_analysis, load_config, profiles_of
from service.sources.simulated import DEMO_FS
from service.types import SampleBlock
from tests.service.conftest import to_toml

EXAMPLES = Path(__file__).resolve().parents[2] / "service" / "examples"
WINDOWS = ["rectangular", "hann", "hamming", "blackman-harris", "flattop", "kaiser"]
SECONDS = 4.5  # the demo's narrow profile (1280 Hz, 4096-sample frames) needs 3.2 s a frame


def _samples(cfg: Any, ids: list[str], fs: float, seed: int) -> np.ndarray:
    """Per channel: 1X at its speed, a few random tones, a DC offset and noise (g or m/s²)."""
    rng = np.random.default_rng(seed)
    k = np.arange(int(SECONDS * fs))
    x = np.empty((len(ids), k.size), dtype=np.float32)
    for r, cid in enumerate(ids):
        rpm = channel_settings(cfg, cid).speed_rpm or 1500.0
        parts = [(0.8, rpm / 60.0)] + [(rng.uniform(0.05, 1.0), rng.uniform(20, fs / 2.6))
                                       for _ in range(3)]
        sig = 0.3 + rng.normal(0.0, 0.01, k.size)
        for a, f in parts:
            sig += a * np.sin(2 * np.pi * f * k / fs + rng.uniform(0, 6))
        x[r] = sig
    return x


def _close(a: Any, b: Any, what: str, scale: float = 0.0) -> None:
    if a is None or b is None:
        assert a is None and b is None, what
    else:
        # float32 spectra, decimation and tone sums, batched over a different number of
        # channels: rounding relative to the value, or to the channel's largest (``scale``)
        assert a == pytest.approx(b, rel=1e-6, abs=2e-6 * scale), what


@pytest.mark.slow
@pytest.mark.parametrize("window", WINDOWS)
@pytest.mark.parametrize("example", ["plant.toml", "demo.toml"])
def test_analyze_equals_the_services_rest_values(
    example: str, window: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    doc = tomllib.loads((EXAMPLES / example).read_text(encoding="utf-8"))
    doc["analysis"]["window"] = window
    doc["service"]["data_dir"] = str(tmp_path / "data")
    path = tmp_path / example
    path.write_text(to_toml(doc), encoding="utf-8")
    cfg = load_config(path)
    svc = Service(cfg)
    client = TestClient(create_app(svc.hub))
    compared = 0
    try:
        for i, (src, p) in enumerate(zip(cfg.sources, svc.pipelines, strict=True)):
            ids = list(p.source.channel_ids)  # type: ignore[attr-defined]
            fs = src.sample_rate_hz or DEMO_FS
            x = _samples(cfg, ids, fs, seed=i + WINDOWS.index(window))
            chunk = int(round(cli.CHUNK_S * fs))
            for k in range(0, x.shape[1], chunk):
                frames = p.process(SampleBlock(src.id, tuple(ids), x[:, k:k + chunk], k, 0, fs))
                svc.hub.publish(frames, 0.0)
            rec = tmp_path / f"{src.id}.csv"
            np.savetxt(rec, x.T, fmt="%.9g", delimiter=",", header=",".join(ids), comments="")
            for prof in profiles_of(cfg, ids[0]):
                a = effective_analysis(cfg, ids[0], prof)
                argv = ["analyze", str(rec), "--rate", str(fs), "-c", str(path), "--json",
                        "--averaging", a.averaging, "--averages", str(a.averages)]
                if len(cfg.profiles) > 1:
                    argv += ["--profile", prof]
                assert cli.main(argv) == 0
                out = json.loads(capsys.readouterr().out)
                for ch in out["channels"]:
                    cid = ch["config_channel"]
                    q = {"profile": prof}
                    bands = client.get(f"/api/v1/channels/{cid}/bands", params=q).json()
                    tones = client.get(f"/api/v1/channels/{cid}/tones", params=q).json()
                    where = f"{example} {window} {cid} {prof}"
                    scale = max(p["amplitude"] for p in ch["peaks"])
                    assert ch["profile"] == bands["profile"] == prof, where
                    assert ch["averages"] > 0
                    _close(ch["overall"], bands["overall"], f"{where} overall")
                    assert ch["overall_band_hz"] == [bands["overall_lo_hz"],
                                                     bands["overall_hi_hz"]], where
                    if "overall" in [b["name"] for b in ch["bands"]]:  # severity band 10-1000
                        # from the low-frequency limit up (Blackman-Harris, flat-top: 12.5,
                        # 15.6 Hz at 3.125 Hz lines)
                        lo = max(10.0, ch["lowcut_hz"])
                        assert ch["overall_band_hz"] == [lo, 1000.0], where
                    assert [b["name"] for b in ch["bands"]] == [b["name"] for b in bands["bands"]]
                    for b, r in zip(ch["bands"], bands["bands"], strict=True):
                        assert (b["lo_hz"], b["hi_hz"]) == (r["lo_hz"], r["hi_hz"]), where
                        _close(b["value"], r["value"], f"{where} band {b['name']}", scale)
                    assert [t["name"] for t in ch["tones"]] == [t["name"] for t in tones["tones"]]
                    for t, r in zip(ch["tones"], tones["tones"], strict=True):
                        _close(t["frequency_hz"], r["frequency_hz"], where)
                        _close(t["amplitude"], r["amplitude"], f"{where} tone {t['name']}", scale)
                    assert len(ch["peaks"]) == len(tones["peaks"]) > 0, where
                    for pk, r in zip(ch["peaks"], tones["peaks"], strict=True):
                        _close(pk["frequency_hz"], r["frequency_hz"], f"{where} peak")
                        _close(pk["amplitude"], r["amplitude"], f"{where} peak", scale)
                    compared += 1
    finally:
        svc.store.close()
    assert compared == sum(len(profiles_of(cfg, c)) for s in cfg.sources for c in s.channels)
