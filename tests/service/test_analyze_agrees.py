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
from service.config import channel_settings, load_config, profiles_of
from service.lookups import effective_analysis
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
        if channel_settings(cfg, cid).kind == "tacho":  # 0/5 V, once a revolution at 1500
            x[r] = 5.0 * ((k * rpm / 60.0 / fs) % 1.0 < 0.1)  # r/min: the fan's 1X below
            continue
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
    client = TestClient(create_app(svc.hub), base_url="http://127.0.0.1")  # an allowed Host
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
                    if ch.get("kind") == "tacho":  # a speed summary, no spectrum to compare
                        assert channel_settings(cfg, cid).kind == "tacho", cid
                        assert ch["speed"]["rpm_mean"] > 0, cid
                        continue
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
    assert compared == sum(len(profiles_of(cfg, c)) for s in cfg.sources for c in s.channels
                           if channel_settings(cfg, c).kind != "tacho")


@pytest.mark.parametrize("window", WINDOWS)
@pytest.mark.parametrize("lines", [100, 400, 1600, 6400])
def test_rest_peaks_are_the_largest_local_maxima(window: str, lines: int, tmp_path: Path) -> None:
    # Regression (issue 14, item 1): /tones of a Hamming channel gave "peaks": [] for a
    # clean sine. The peaks REST serves (and the stream: the same payload) must be the
    # definition's on the frame's own spectrum: every local maximum from the low-frequency
    # limit up, interpolated through the window's transform (Harris 1978; dsp.tones
    # .find_peaks, checked line by line in tests/dsp/test_tones.py), in the display unit,
    # largest first.
    from dsp.scaling import unit_power_weights
    from dsp.tones import find_peaks

    fs = 12800.0
    doc = {
        "service": {"data_dir": str(tmp_path)},
        "analysis": {"fmax_hz": 5000.0, "lines": lines, "window": window, "unit": "velocity",
                     "averaging": "linear", "averages": 4, "peaks": 8},
        "sources": [{"id": "s", "kind": "tcp", "listen": "127.0.0.1:9", "format": "f32le",
                     "sample_rate_hz": fs, "channels": ["c0"]}],
    }
    cfg = load_config(_write(tmp_path, doc))
    svc = Service(cfg)
    try:
        rng = np.random.default_rng(lines + WINDOWS.index(window))
        n = int(2.56 * lines) * 3
        k = np.arange(n)
        tones = rng.uniform(40.0, 4500.0, 4)
        x = sum(rng.uniform(0.1, 1.5) * np.sin(2 * np.pi * f * k / fs + rng.uniform(0, 6))
                for f in tones)
        x = (x + np.sin(2 * np.pi * 1001.3 * k / fs))[None].astype(np.float32)
        p = svc.pipelines[0]
        svc.hub.publish(p.process(SampleBlock("s", ("c0",), x, 0, 0, fs)), 0.0)
        got = TestClient(create_app(svc.hub), base_url="http://127.0.0.1").get("/api/v1/channels/c0/tones").json()["peaks"]
        frame = svc.hub.latest["c0"]
        power = np.asarray(frame.power)
        allpk = find_peaks(power, frame.df_hz, frame.window, frame.n,  # type: ignore[arg-type]
                           count=power.size, min_hz=frame.lowcut_hz)
        ok = np.isfinite(allpk.frequency_hz)
        f, a = allpk.frequency_hz[ok], allpk.amplitude_rms[ok]
        amp = a * np.sqrt(unit_power_weights(f, "g", "mm/s", lowcut_hz=frame.lowcut_hz))
        order = np.argsort(-amp, kind="stable")[:8]
        assert len(got) == len(order) >= 1
        np.testing.assert_allclose([g["frequency_hz"] for g in got], f[order], rtol=1e-9)
        np.testing.assert_allclose([g["amplitude"] for g in got], amp[order], rtol=1e-6)
        # the clean 1 g-peak sine at 1001.3 Hz is among them: 1 g = 9.80665 m/s² (CGPM 1901),
        # RMS A/√2, v = a/(2πf) (docs/references.md); within a line and 2 % (10 % under the
        # rectangular window, whose sidelobes fall only 6 dB an octave: Harris 1978, so the
        # other tones' leakage biases the interpolation)
        near = [g for g in got if abs(g["frequency_hz"] - 1001.3) < frame.df_hz]
        if all(abs(t - 1001.3) > 4 * frame.df_hz for t in tones):
            assert near and near[0]["amplitude"] == pytest.approx(
                9806.65 / np.sqrt(2) / (2 * np.pi * 1001.3),
                rel=0.1 if window == "rectangular" else 0.02)
    finally:
        svc.store.close()


def _write(tmp_path: Path, doc: dict[str, Any]) -> Path:
    path = tmp_path / "q.toml"
    path.write_text(to_toml(doc), encoding="utf-8")
    return path
