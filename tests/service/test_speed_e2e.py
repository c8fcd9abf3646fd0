"""End to end: a service running the simulated variable-speed fan (tacho channel) keeps its
order bands on their orders while the speed ramps; speed with its status over REST; the
operator's speed write. A real ``quaver serve`` on 127.0.0.1."""

from __future__ import annotations

import hashlib
import json
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from websockets.sync.client import connect

from service.sources.varspeed import ORDERS_MM_S
from tests.service.conftest import run_service

FS = 1280.0  # 2.56 × Fmax 500 Hz (common practice)
OPERATOR = ("olga-operator", "speed-operator-1b7e52c9")
VIEWER = ("vic-viewer", "speed-viewer-9c04d1e6")
V_1X = dict(ORDERS_MM_S)[1.0]  # the model's 1X velocity, mm/s RMS, at every speed


def _token(name: str, role: str, plain: str) -> dict[str, str]:
    return {"name": name, "role": role, "sha256": hashlib.sha256(plain.encode()).hexdigest()}


def _doc() -> dict[str, Any]:
    return {
        "analysis": {"fmax_hz": 500.0, "lines": 800, "overlap": 0.5, "averaging": "exponential",
                     "averages": 4, "unit": "velocity"},
        "sources": [
            # 10 × real time: one 900 → 1500 r/min ramp (30 s of plant time) in 3 s
            {"id": "v", "kind": "simulated", "scenario": "variable-speed", "speed": 10.0,
             "speed_ramp_s": 30.0, "sample_rate_hz": FS, "channels": ["v1-fan-h", "v1-tacho"]},
            {"id": "t", "kind": "tcp", "listen": "auto", "format": "framed",
             "sample_rate_hz": FS, "channels": ["m"]},
        ],
        "channels": [
            {"id": "v1-fan-h", "speed_from": "v1-tacho", "runup_orders": [1.0, 2.0],
             "runup_rpm_step": 100.0},
            {"id": "v1-tacho", "kind": "tacho", "rpm_min": 300.0, "rpm_max": 3000.0},
            {"id": "m", "speed": "manual", "rpm_max": 3000.0},
        ],
        "bands": [{"channel": "v1-fan-h", "name": "1x", "lo_order": 0.8, "hi_order": 1.2}],
        "tokens": [_token(*OPERATOR[:1], "operator", OPERATOR[1]),
                   _token(*VIEWER[:1], "viewer", VIEWER[1])],
    }


@pytest.mark.slow
def test_order_band_follows_the_tacho_and_speed_is_reported(tmp_path: Path) -> None:
    with run_service(_doc(), tmp_path) as svc:
        seen: dict[int, tuple[float, float]] = {}  # frame seq → (speed r/min, 1x mm/s)
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline:
            b = svc.get_or_none("channels/v1-fan-h/bands")
            if b is not None and b["speed"]["rpm"] is not None and b["bands"][0]["value"]:
                seen[b["seq"]] = (b["speed"]["rpm"], b["bands"][0]["value"])
                assert (b["speed"]["source"], b["speed"]["status"]) == ("tacho", "ok")
                speeds = [s for s, _ in seen.values()]
                if len(seen) >= 20 and max(speeds) - min(speeds) > 400:
                    break
            time.sleep(0.1)
        speeds = np.array([s for s, _ in seen.values()])
        one_x = np.array([v for _, v in seen.values()])
        assert speeds.max() - speeds.min() > 400, f"the speed did not ramp: {sorted(speeds)}"
        # the model's 1X is 2.0 mm/s RMS at every speed (service/sources/varspeed.py): the
        # order band reads it within 0.5 dB in every frame while 900 ↔ 1500 r/min
        worst = np.abs(20 * np.log10(one_x / V_1X)).max()
        assert worst < 0.5, list(zip(speeds, one_x, strict=True))

        tacho = svc.channel("v1-tacho")
        assert tacho["kind"] == "tacho" and tacho["status"] == "ok"
        assert tacho["speed"]["status"] == "ok" and tacho["speed"]["pulses"]["faults"] == 0
        assert 850 < tacho["speed"]["rpm"] < 1550
        fan = svc.channel("v1-fan-h")
        assert (fan["speed"]["source"], fan["speed"]["from"]) == ("tacho", "v1-tacho")

        def put(cid: str, rpm: float | None, who: tuple[str, str]) -> Any:
            return svc.client.put(f"/api/v1/channels/{cid}/speed", json={"rpm": rpm},
                                  headers={"Authorization": f"Bearer {who[1]}"})

        r = put("m", 1480.0, VIEWER)
        assert r.status_code == 403 and "operator" in r.json()["detail"]
        r = put("v1-fan-h", 1480.0, OPERATOR)
        assert r.status_code == 409 and "tacho 'v1-tacho'" in r.json()["detail"]
        assert put("v1-tacho", 1480.0, OPERATOR).status_code == 409
        assert put("m", -5.0, OPERATOR).status_code == 422
        r = put("m", 1480.0, OPERATOR)
        assert r.status_code == 200, r.text
        m = svc.channel("m")["speed"]
        assert (m["rpm"], m["source"], m["written_by"]) == (1480.0, "manual", OPERATOR[0])
        assert put("nope", 1480.0, OPERATOR).status_code == 404

        runup = svc.get("channels/v1-fan-h/runup")
        assert runup["orders"] == [1.0, 2.0] and runup["unit"] == "g"
        rpm = [r["rpm"] for r in runup["rows"]]
        assert len(rpm) >= 3 and rpm == sorted(rpm)
        # 1X of the model: 2.0 mm/s RMS, i.e. 2.0e-3·2π·f/g_n g RMS (service/sources/varspeed.py)
        for r in runup["rows"]:
            want = V_1X * 1e-3 * 2 * np.pi * r["rpm"] / 60 / 9.80665
            assert r["amplitude"][0] == pytest.approx(want, rel=0.1)
        orders = svc.get("channels/v1-fan-h/orders", omax=10.0, lines=100)
        values = np.array(orders["values"])
        assert orders["frames"] >= 1 and values.size == 101
        for q in (10, 20, 70):  # orders 1, 2 and 7 each on its line (0.1 order per line)
            assert values[q] == values[q - 3: q + 4].max() > 5 * np.median(values)
        assert svc.client.get("/api/v1/channels/m/orders").status_code == 404
        r = svc.client.get("/api/v1/channels/v1-fan-h/orders", params={"lines": 301})
        assert r.status_code == 422 and "multiple of 25" in r.text  # so 2.56 × lines is whole
        # the stream's band messages carry the frame's speed and its status too
        url = f"ws://127.0.0.1:{svc.http_port}/api/v1/stream"
        with connect(url, proxy=None, open_timeout=10, compression=None,
                     additional_headers={"Authorization": f"Bearer {VIEWER[1]}"}) as ws:
            assert json.loads(ws.recv(timeout=10))["kind"] == "hello"
            ws.send(json.dumps({"subscribe": {"channels": ["v1-fan-h"], "kinds": ["bands"]}}))
            for _ in range(50):
                msg = json.loads(ws.recv(timeout=10))
                if msg.get("kind") == "bands":
                    break
            assert msg["kind"] == "bands", msg
            assert msg["speed"]["source"] == "tacho" and msg["speed"]["status"] == "ok"
            assert 850 < msg["speed"]["rpm"] < 1550

        metrics = svc.client.get("/metrics").text
        assert 'quaver_speed_rpm{channel="v1-fan-h",source="tacho"}' in metrics
        assert 'quaver_speed_status{channel="v1-tacho",status="ok"} 1.0' in metrics
        assert 'quaver_speed_rpm{channel="m",source="manual"} 1480.0' in metrics

        r = svc.client.get("/api/v1/channels/m/runup")
        assert r.status_code == 404 and "runup_orders" in r.json()["detail"]
