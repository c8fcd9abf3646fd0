"""Run-up and coast-down records: the sweep rules (service.runups), amplitude and phase of a
synthetic sweep against the simulated fan's known orders, schema step 5 from a step-4
database with its data kept, and the store's queries."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import numpy as np
import pytest

from service.config import ConfigError, parse_config
from service.runups import SweepRecorder
from service.sources.varspeed import ORDERS_MM_S
from service.store import Store
from service.store.runups import KEEP_PER_CHANNEL
from service.store.schema import MIGRATIONS, migrate, schema_version
from tests.service.test_speed import config, run

S = 1_000_000_000
T0 = 1_750_000_000 * S
Z = np.array([1.0 + 0j])


def feed(rec: SweepRecorder, rpms: list[float], t0: int = 0) -> None:
    for k, r in enumerate(rpms):
        rec.step(r, t0 + k * S, Z * r)


def test_a_sweep_through_the_range_is_one_record_binned_by_speed() -> None:
    rec = SweepRecorder(1000.0, 1400.0, 100.0, (1.0,))
    feed(rec, [900, 990, 1010, 1050, 1120, 1180, 1250, 1390, 1410, 1500])
    (r,) = rec.take()
    assert r["kind"] == "run-up" and (r["rpm_lo"], r["rpm_hi"]) == (1000.0, 1400.0)
    assert r["start_ns"] == 2 * S and r["end_ns"] == 8 * S  # from 1010 to the step at 1410
    # bins of 100 r/min: 1000-1100 (1010, 1050), 1100-1200, 1200-1300, 1300-1400, 1400-
    rows = r["rows"]
    assert [round(x["rpm"]) for x in rows] == [1030, 1150, 1250, 1390, 1410]
    assert [x["steps"] for x in rows] == [2, 2, 1, 1, 1]
    assert rows[0]["amplitude"] == [pytest.approx(1030.0)]  # the vector mean of 1010, 1050
    assert rec.take() == []  # taken once
    feed(rec, [1500, 1390, 1200, 1000, 950])  # and back down: a coast-down
    (d,) = rec.take()
    assert d["kind"] == "coast-down" and [round(x["rpm"]) for x in d["rows"]] == [
        1000, 1200, 1390]


def test_a_sweep_that_turns_back_or_loses_its_pulses_is_not_kept() -> None:
    rec = SweepRecorder(1000.0, 1400.0, 100.0, (1.0,))
    feed(rec, [900, 1100, 1300, 1200, 990])  # turned back before the top
    assert rec.take() == [] and rec.abandoned == 1
    feed(rec, [1100, 1300])
    rec.abandon()  # the tacho lost its pulses mid-sweep
    feed(rec, [1410])  # the top reached: but the start is not known
    assert rec.take() == [] and rec.abandoned == 2
    feed(rec, [1300, 1100, 900])  # from the top after the loss: a whole coast-down
    assert [r["kind"] for r in rec.take()] == ["coast-down"]
    feed(rec, [1100, 1200, float("nan"), 1300, 1450])  # NaN steps are skipped
    assert [len(r["rows"]) for r in rec.take()] == [4]
    with pytest.raises(ValueError, match="need 0 < min < max"):
        SweepRecorder(1400.0, 1000.0, 50.0, (1.0,))


def test_the_run_up_settings_go_together() -> None:
    fan = {"speed_from": "v1-tacho", "runup_orders": [1.0], "runup_min_rpm": 950.0}
    with pytest.raises(ConfigError, match="give runup_min_rpm and runup_max_rpm together"):
        parse_config(config(fan=fan), source="t")
    fan.update(runup_max_rpm=900.0)
    with pytest.raises(ConfigError, match="runup_min_rpm 950 must be below runup_max_rpm 900"):
        parse_config(config(fan=fan), source="t")
    fan.update(runup_max_rpm=1450.0, runup_orders=[])
    with pytest.raises(ConfigError, match="need runup_orders"):
        parse_config(config(fan=fan), source="t")


def test_the_simulated_fan_sweeps_give_a_run_up_and_a_coast_down_with_its_orders() -> None:
    fan = {"speed_from": "v1-tacho", "runup_orders": [1.0, 2.0, 7.0], "runup_rpm_step": 50.0,
           "runup_min_rpm": 950.0, "runup_max_rpm": 1450.0}
    # one ramp 900 → 1500 r/min in 60 s and back in the next 60 (rpm = 1200 − 300·cos(πt/60))
    _, states, _ = run(config(fan=fan), 122.0)
    recs = states["v1-fan-h"].runup.take_records()
    assert [r["kind"] for r in recs] == ["run-up", "coast-down"]
    for r in recs:
        # the speed crosses 950 and 1450 r/min at t = 60/π·acos(±5/6) s: 11.2 s and 48.8 s
        # up, 71.2 s and 108.8 s down (the model's law, service/sources/varspeed.py), so a
        # sweep lasts 37.6 s (to a step of 4 revolutions, ~0.25 s, at either end)
        span_s = (r["end_ns"] - r["start_ns"]) / S
        assert span_s == pytest.approx(37.6, abs=0.6)
        rows = r["rows"]
        rpm = np.array([x["rpm"] for x in rows])
        assert np.all(np.diff(rpm) > 0)  # by increasing speed, either way
        if r["kind"] == "run-up":  # from the first step above 950 to the first at 1450
            assert 950 < rpm[0] < 1000 and 1450 <= rpm[-1] < 1500
        else:
            assert 900 < rpm[0] <= 950 and 1400 < rpm[-1] < 1450
        assert len(rows) == 11  # bins of 50 r/min: ten in 950-1450 and the end's
        amp = np.array([x["amplitude"] for x in rows])
        phase = np.array([x["phase_deg"] for x in rows])
        root_n = np.sqrt([x["steps"] for x in rows])
        # noise-limited: the model's broadband noise scatters one 4-revolution step of 1X,
        # 2X, 7X by about 5 %, 7 %, 2.5 % in amplitude (measured on this model; 1X as in
        # test_speed); a bin's vector mean of n steps by that / √n: checked to 3σ
        scatter = {1.0: (0.05, 3.5), 2.0: (0.07, 5.0), 7.0: (0.025, 2.0)}  # (rel, degrees)
        for j, (order, v_mm_s) in enumerate(ORDERS_MM_S):
            # the model's acceleration of a fixed-velocity order, v·2π·o·f/g_n RMS in g
            # (a = 2πf·v for a sine, common practice)
            want = v_mm_s * 1e-3 * 2 * np.pi * order * (rpm / 60) / 9.80665
            rel, deg = scatter[order]
            assert np.all(np.abs(amp[:, j] / want - 1) < 3 * rel / root_n), (order, amp[:, j])
            # the pulse lags the model's angle 0 by 0.0375 revolution (the tacho's 5 % rise
            # crossing 3/4 of its swing, service/sources/varspeed.py): each order leads by
            # 360°·o·0.0375; plus the scatter, and 7X's ~3° of resampling lag (test_speed
            # allows 6° for the higher orders)
            lead = (360 * order * 0.0375 + 180) % 360 - 180
            err = np.abs((phase[:, j] - lead + 180) % 360 - 180)
            assert np.all(err < 3 * deg / root_n + (4.0 if order == 7.0 else 0.0)), (order, err)


def _step4_database(path: Path) -> None:
    c = sqlite3.connect(path, isolation_level=None)
    c.execute("PRAGMA journal_mode = WAL")
    assert migrate(c, MIGRATIONS[:4]) == [1, 2, 3, 4]
    c.execute(
        "INSERT INTO events(t_ns, channel, rule, kind, from_state, to_state, value, level, "
        "unit, message, latched, acked_by, note) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
        (T0, "v1-fan-h", "v1-fan-h.overall", "transition", "normal", "alert", 3.0, 2.8,
         "mm/s", "kept", 0, "", ""),
    )
    c.close()


def record(kind: str = "run-up", n: int = 3) -> dict[str, object]:
    return {"kind": kind, "start_ns": T0, "end_ns": T0 + 60 * S, "rpm_lo": 950.0,
            "rpm_hi": 1450.0, "rpm_step": 50.0, "orders": [1.0, 2.0],
            "rows": [{"rpm": 960.0 + 50 * k, "t_ns": T0 + k * S, "steps": 4,
                      "amplitude": [0.01 * (k + 1), 0.002], "phase_deg": [10.0 * k, -90.0]}
                     for k in range(n)]}


def test_step_5_runs_on_a_step_4_database_and_keeps_its_data(tmp_path: Path) -> None:
    path = tmp_path / "quaver.db"
    _step4_database(path)
    assert "runups" in MIGRATIONS[4].sql
    with Store(path) as store:
        assert store.health()["ok"], store.health()
        assert [e["message"] for e in store.events()] == ["kept"]
        rid = store.put_runup("v1-fan-h", "g", record()).result()
        listed = store.runups("v1-fan-h")
        assert [(x["id"], x["kind"], x["points"], x["orders"], x["unit"]) for x in listed] == [
            (rid, "run-up", 3, [1.0, 2.0], "g")]
        got = store.runup("v1-fan-h", rid)
        assert got is not None and got["rows"] == record()["rows"]  # JSON keeps doubles exactly
        assert store.runup("other", rid) is None  # another channel's id is not found
        assert store.runup("v1-fan-h", rid + 1) is None
    c = sqlite3.connect(path)
    assert schema_version(c) == len(MIGRATIONS) >= 5
    c.close()


def test_records_survive_a_reopen_and_the_oldest_go_beyond_the_bound(tmp_path: Path) -> None:
    path = tmp_path / "q.db"
    with Store(path) as store:
        ids = [store.put_runup("a", "g", record("coast-down" if k % 2 else "run-up", 2)).result()
               for k in range(KEEP_PER_CHANNEL + 3)]
        store.put_runup("b", "mm/s", record()).result()
        with pytest.raises(ValueError, match="kind='stall' is not one of"):
            store.put_runup("a", "g", {**record(), "kind": "stall"})
        with pytest.raises(ValueError, match="needs rows"):
            store.put_runup("a", "g", {k: v for k, v in record().items() if k != "rows"})
        assert store.health()["ok"]  # refused before the writer: the store is not failing
    with Store(path) as store:  # reopened: what was committed is there
        kept = store.runups("a", limit=1000)
        assert len(kept) == KEEP_PER_CHANNEL and kept[0]["id"] == ids[-1]
        assert kept[-1]["id"] == ids[3]  # the three oldest went
        assert [x["channel"] for x in store.runups("b")] == ["b"]
        assert json.dumps(store.runup("a", ids[-1]))  # JSON-safe as stored


def test_analyze_finds_the_run_up_of_a_recording(tmp_path: Path) -> None:
    import tomli_w

    from service.sources.varspeed import VariableSpeedModel
    from tests.service.conftest import run_cli
    from tests.service.test_speed import FS, IDS

    model = VariableSpeedModel(fs=FS, ramp_s=30.0)
    x = model.render(0, int(34 * FS))  # 900 → 1500 r/min in 30 s, then the turn
    rec = tmp_path / "fan.csv"
    np.savetxt(rec, x.T, delimiter=",", header=",".join(IDS), comments="", fmt="%.7g")
    doc = config(fan={"speed_from": "v1-tacho", "runup_orders": [1.0, 7.0],
                      "runup_rpm_step": 100.0, "runup_min_rpm": 950.0,
                      "runup_max_rpm": 1450.0})
    doc["sources"] = [{"id": "v", "kind": "tcp", "listen": "127.0.0.1:9", "format": "f32le",
                       "sample_rate_hz": FS, "channels": list(IDS)}]
    cfg = tmp_path / "q.toml"
    cfg.write_bytes(tomli_w.dumps(doc).encode())
    out = run_cli("analyze", str(rec), "--rate", str(FS), "-c", str(cfg), "--json")
    assert out.returncode == 0, out.stderr
    fan = json.loads(out.stdout)["channels"][0]
    (ru,) = fan["runups"]
    # 950 and 1450 r/min at t = 30/π·acos(±5/6) s = 5.6 s and 24.4 s (the model's law)
    assert ru["kind"] == "run-up" and ru["unit"] == "g" and ru["orders"] == [1.0, 7.0]
    assert ru["start_s"] == pytest.approx(5.6, abs=0.4)
    assert ru["end_s"] == pytest.approx(24.4, abs=0.4)
    rpm = np.array([p["rpm"] for p in ru["rows"]])
    assert len(rpm) == 6 and 950 < rpm[0] < 1000 and 1400 < rpm[-1] < 1500  # 100 r/min bins
    amp = np.array([p["amplitude"][0] for p in ru["rows"]])
    # 1X's acceleration at each bin's speed (as in the test above; 3 × 5 %/√steps)
    want = dict(ORDERS_MM_S)[1.0] * 1e-3 * 2 * np.pi * (rpm / 60) / 9.80665
    steps = np.array([p["steps"] for p in ru["rows"]])
    assert np.all(np.abs(amp / want - 1) < 0.15 / np.sqrt(steps))
    text = run_cli("analyze", str(rec), "--rate", str(FS), "-c", str(cfg))
    assert "run-up 950->1450 r/min at " in text.stdout and "points of orders 1X, 7X" in text.stdout
