"""Run-up records in a running service: the simulated fan sweeping 900 ↔ 1500 r/min (10 ×
real time) leaves run-up and coast-down records that REST lists and serves as JSON and CSV,
404 for what is not there, and the records are still there after a restart."""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.sources.varspeed import ORDERS_MM_S
from tests.service.conftest import run_service
from tests.service.test_speed_e2e import FS


def _doc() -> dict[str, Any]:
    return {
        "analysis": {"fmax_hz": 500.0, "lines": 400, "averaging": "exponential",
                     "averages": 2, "unit": "velocity"},
        # 10 × real time: one 900 → 1500 r/min ramp (30 s of plant time) in 3 s
        "sources": [{"id": "v", "kind": "simulated", "scenario": "variable-speed",
                     "speed": 10.0, "speed_ramp_s": 30.0, "sample_rate_hz": FS,
                     "channels": ["v1-fan-h", "v1-tacho"]}],
        "channels": [
            {"id": "v1-fan-h", "speed_from": "v1-tacho", "runup_orders": [1.0, 2.0],
             "runup_rpm_step": 100.0, "runup_min_rpm": 950.0, "runup_max_rpm": 1450.0},
            {"id": "v1-tacho", "kind": "tacho", "rpm_min": 300.0, "rpm_max": 3000.0},
        ],
    }


@pytest.mark.slow
def test_records_are_listed_served_as_json_and_csv_and_kept_over_a_restart(
        tmp_path: Path) -> None:
    with run_service(_doc(), tmp_path) as svc:
        listed = svc.wait(lambda: (lambda d: d if len(d["runups"]) >= 2 else None)(
            svc.get("channels/v1-fan-h/runups")), "two run-up records", 40.0)
        assert listed["recording"] and (listed["rpm_lo"], listed["rpm_hi"]) == (950.0, 1450.0)
        kinds = {r["kind"] for r in listed["runups"][:2]}
        assert kinds == {"run-up", "coast-down"}  # the sweeps alternate
        newest = listed["runups"][0]
        assert newest["orders"] == [1.0, 2.0] and newest["unit"] == "g"
        assert newest["start"] and newest["end_ns"] > newest["start_ns"]
        one = svc.get(f"channels/v1-fan-h/runups/{newest['id']}")
        assert one["points"] == len(one["rows"]) >= 5 and one["amplitude"] == "rms"
        rpm = np.array([p["rpm"] for p in one["rows"]])
        amp = np.array([p["amplitude"] for p in one["rows"]])
        # the model's orders keep their velocity at every speed: acceleration v·2π·o·f/g_n
        # RMS in g (service/sources/varspeed.py; a = 2πf·v, common practice); bins of
        # 100 r/min, noise-limited as in test_runups (a bin has ≥ 1 step: 3 × 7 %)
        for j, (order, v_mm_s) in enumerate(ORDERS_MM_S[:2]):
            want = v_mm_s * 1e-3 * 2 * np.pi * order * (rpm / 60) / 9.80665
            np.testing.assert_allclose(amp[:, j], want, rtol=0.21)
        text = svc.client.get(f"/api/v1/channels/v1-fan-h/runups/{newest['id']}",
                              params={"format": "csv"})
        assert text.status_code == 200 and text.headers["content-type"].startswith("text/csv")
        table = list(csv.DictReader(io.StringIO(text.text)))
        assert len(table) == len(one["rows"])
        assert [float(r["rpm"]) for r in table] == pytest.approx(rpm.tolist(), rel=1e-8)
        assert [float(r["order_1_g_rms"]) for r in table] == pytest.approx(
            amp[:, 0].tolist(), rel=1e-8)
        assert [float(r["order_2_phase_deg"]) for r in table] == pytest.approx(
            [p["phase_deg"][1] for p in one["rows"]], abs=1e-4)
        for path, what in ((f"channels/v1-fan-h/runups/{newest['id'] + 10**6}", "no run-up"),
                           (f"channels/v1-tacho/runups/{newest['id']}", "no run-up"),
                           ("channels/nope/runups", "nope")):
            r = svc.client.get(f"/api/v1/{path}")
            assert r.status_code == 404 and what in r.text, (path, r.text)
        assert svc.client.get("/api/v1/channels/v1-fan-h/runups/0").status_code == 422
        assert svc.client.get(f"/api/v1/channels/v1-fan-h/runups/{newest['id']}",
                              params={"format": "xml"}).status_code == 422
    ids = [r["id"] for r in listed["runups"]]
    with run_service(_doc(), tmp_path) as svc:  # the same data folder
        again = svc.get("channels/v1-fan-h/runups")
        assert set(ids) <= {r["id"] for r in again["runups"]}
        assert svc.get(f"channels/v1-fan-h/runups/{newest['id']}")["rows"] == one["rows"]
