"""REST of the spectral history: list, one spectrum as JSON/CSV/NPY (exact to the stated
precision), compare two times, the waterfall's shape and pooling, and the pooling itself."""

from __future__ import annotations

import base64
import io
import socket
import time
from collections.abc import Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from dsp.scaling import amplitude_from_power, unit_power_weights
from service.api import create_app
from service.config import Config
from service.history import alarm_row
from service.hub import Hub
from service.store import Store
from service.store.history import DB_STEP
from service.types import ChannelState
from service.waterfall import pool_columns, pool_rows
from tests.service.conftest import LOOPBACK, SMALL_FS, feed_tone, one_band_config, run_service
from tests.service.test_history_store import LINES, T0, S, frame, spectrum

# the stored power is within DB_STEP/2 dB; an amplitude (its square root) within half that
AMP_REL = 10 ** (DB_STEP / 2 / 20) - 1 + 2 * float(np.finfo(np.float32).eps)


@dataclass
class FakeService:
    """What the routers use of a running service: a hub, a store and the config."""

    hub: Hub
    store: Store
    cfg: Config
    alarms: Any = None


@pytest.fixture
def client(tmp_path: Path) -> Iterator[tuple[TestClient, Store, list[int]]]:
    cfg = Config.model_validate({"service": {"timezone": "Europe/Berlin"}})
    hub = Hub()
    hub.channels["c1"] = ChannelState(
        id="c1", source_id="s", machine="m", description="", input_unit="g",
        sensitivity=1.0, speed_rpm=None, clip_level=None, profiles=("wide", "narrow"))
    with Store(tmp_path / "q.db") as store:
        rows = [replace(alarm_row(frame(600 * k, spectrum(k)), None), reason="interval",
                        step_s=600, event_id=None, frames=k) for k in range(1, 7)]
        rows.append(alarm_row(frame(1000, spectrum(40)), 5))
        ids = store.put_history(rows).result()
        app = create_app(hub, config=cfg, service=FakeService(hub, store, cfg))  # type: ignore[arg-type]
        yield TestClient(app, base_url="http://127.0.0.1"), store, ids


def want(k: int, unit: str = "mm/s", amplitude: str = "rms") -> np.ndarray:
    """Spectrum k of the fixture in ``unit``, computed here from the power put in."""
    f = 12.5 * np.arange(LINES + 1)
    w = unit_power_weights(f, "g", unit, lowcut_hz=2.0)  # type: ignore[arg-type]
    return np.asarray(amplitude_from_power(spectrum(k).astype(np.float64) * w, amplitude))  # type: ignore[arg-type]


def close_to(got: np.ndarray, expect: np.ndarray) -> None:
    nz = expect > 0
    assert np.all(got[~nz] == 0)
    rel = np.abs(got[nz] / expect[nz] - 1)
    assert rel.max() <= AMP_REL, rel.max()


def test_the_list_gives_times_with_the_site_offset_and_reasons(client: Any) -> None:
    c, _, ids = client
    since, until = T0 / S, (T0 + 3601 * S) / S
    r = c.get("/api/v1/channels/c1/history", params={"profile": "wide", "since": since,
                                                      "until": until})
    assert r.status_code == 200, r.text
    d = r.json()
    assert d["count"] == 7 and not d["truncated"] and d["profile"] == "wide"
    assert [i["reason"] for i in d["items"]] == ["interval", "alarm", *["interval"] * 5]
    first = d["items"][0]
    assert first["id"] == ids[0] and first["t_ns"] == T0 + 600 * S and first["frames"] == 1
    # T0 + 600 s = 2023-11-14 22:10:00 UTC, in Berlin (winter) +01:00
    assert first["time"] == "2023-11-14T23:10:00.000+01:00"
    assert d["items"][1]["event_id"] == 5
    r = c.get("/api/v1/channels/c1/history", params={"since": since, "until": until,
                                                      "limit": 2})
    assert r.json()["truncated"] and [i["id"] for i in r.json()["items"]] == ids[4:6]
    assert c.get("/api/v1/channels/c1/history", params={"profile": "narrow", "since": since,
                                                         "until": until}).json()["count"] == 0
    assert c.get("/api/v1/channels/nope/history").status_code == 404
    assert c.get("/api/v1/channels/c1/history", params={"profile": "x"}).status_code == 404
    assert c.get("/api/v1/channels/c1/history", params={"since": 10, "until": 5}
                 ).status_code == 422


def test_one_spectrum_round_trips_as_json_csv_and_npy_within_the_precision(
    client: Any,
) -> None:
    c, _, ids = client
    url = f"/api/v1/channels/c1/history/{ids[2]}"
    d = c.get(url).json()
    assert (d["unit"], d["amplitude"], d["lines"], d["df_hz"]) == ("mm/s", "rms", LINES, 12.5)
    assert d["precision_db"] == DB_STEP / 2 and d["reason"] == "interval"
    js = np.array(d["values"], dtype=np.float32)
    close_to(js.astype(np.float64), want(3))
    npy = c.get(url, params={"format": "npy"})
    assert npy.headers["X-Quaver-Unit"] == "mm/s"
    arr = np.load(io.BytesIO(npy.content), allow_pickle=False)
    assert arr.dtype == np.float32 and arr.shape == (LINES + 1,)
    np.testing.assert_array_equal(arr, js)  # the same float32 values
    csv = c.get(url, params={"format": "csv"}).text.splitlines()
    assert csv[0] == "frequency_hz,rms_mm_per_s"
    col = np.array([float(x.split(",")[1]) for x in csv[1:]], dtype=np.float32)
    np.testing.assert_array_equal(col, js)  # 9 significant digits hold a float32 exactly
    acc = np.array(c.get(url, params={"unit": "g", "amplitude": "peak"}).json()["values"])
    close_to(acc, want(3, "g", "peak"))
    assert c.get("/api/v1/channels/c1/history/999999").status_code == 404
    assert c.get(url, params={"format": "xml"}).status_code == 422


def test_compare_takes_the_nearest_spectra_and_their_difference_in_db(client: Any) -> None:
    c, _, ids = client
    r = c.get("/api/v1/channels/c1/history/compare",
              params={"a": (T0 + 590 * S) / S, "b": (T0 + 3500 * S) / S})
    assert r.status_code == 200, r.text
    d = r.json()
    assert (d["a"]["id"], d["b"]["id"]) == (ids[0], ids[5])  # 600 s and 3600 s
    a, b = np.array(d["a"]["values"]), np.array(d["b"]["values"])
    close_to(a, want(1))
    close_to(b, want(6))
    diff = np.array([np.nan if x is None else x for x in d["diff_db"]])
    expect = 10 * np.log10(spectrum(6).astype(np.float64) / spectrum(1))
    ok = np.isfinite(diff)
    assert not ok[0] and ok[1:].all()  # line 0 (0 Hz) reads 0 mm/s in both
    # each side within DB_STEP/2 of its stored power, plus float32 rounding of the values
    assert np.max(np.abs(diff[ok] - expect[ok])) <= DB_STEP + 1e-4


def test_the_waterfall_pools_rows_and_columns_to_the_size_asked(client: Any) -> None:
    c, _, _ = client
    params = {"since": T0 / S, "until": (T0 + 3601 * S) / S, "rows": 3, "cols": 50,
              "profile": "wide"}
    d = c.get("/api/v1/channels/c1/waterfall", params=params).json()
    assert (d["rows"], d["cols"], d["spectra"], d["fmax_hz"]) == (3, 50, 7, 5000.0)
    assert d["pooled"] == [3, 2, 2] and len(d["values"]) == 3 and len(d["values"][0]) == 50
    # row 0 pools spectra at 600, 1000 (alarm) and 1200 s: the max of the three
    grid = np.max([want(1), want(40), want(2)], axis=0)
    expect = pool_columns(grid, 0.0, 12.5, 0.0, 5000.0, 50)
    np.testing.assert_allclose(np.array(d["values"][0]), expect, rtol=AMP_REL)
    assert d["t0_ns"][0] == T0 + 600 * S and d["t_ns"][0] == T0 + 1200 * S
    b = c.get("/api/v1/channels/c1/waterfall", params={**params, "format": "base64"}).json()
    m = np.frombuffer(base64.b64decode(b["data"]), dtype="<f4").reshape(b["rows"], b["cols"])
    np.testing.assert_array_equal(m, np.array(d["values"], dtype=np.float32))
    big = c.get("/api/v1/channels/c1/waterfall", params={**params, "rows": 2000, "cols": 8192})
    assert big.status_code == 422 and "above 4194304" in big.text
    empty = c.get("/api/v1/channels/c1/waterfall", params={**params, "until": T0 / S + 1,
                                                            "since": T0 / S}).json()
    assert empty["rows"] == 0 and empty["values"] == []


def test_pooling_keeps_the_largest_line_and_fills_narrow_columns() -> None:
    v = np.zeros(11)
    v[7] = 5.0  # a line at 70 Hz on a 10 Hz grid
    cols = pool_columns(v, 0.0, 10.0, 0.0, 100.0, 4)  # 25 Hz columns
    np.testing.assert_array_equal(cols, [0.0, 0.0, 5.0, 0.0])
    fine = pool_columns(v, 0.0, 10.0, 60.0, 80.0, 8)  # 2.5 Hz columns: nearest line
    np.testing.assert_array_equal(fine, [0, 0, 5, 5, 5, 5, 0, 0])
    wf = pool_rows([(1, v, 0.0, 10.0), (2, 2 * v, 0.0, 10.0), (3, v, 0.0, 10.0)], 2, 4,
                   0.0, 100.0)
    assert wf.spectra == [2, 1] and wf.t0_ns == [1, 3] and wf.t_ns == [2, 3]
    np.testing.assert_array_equal(wf.values[:, 2], [10.0, 5.0])
    outside = pool_columns(v, 0.0, 10.0, 200.0, 300.0, 2)
    assert np.isnan(outside).all()


@pytest.mark.slow
def test_a_running_service_stores_interval_means_and_a_row_at_each_alarm_change(
    tmp_path: Path,
) -> None:
    doc = one_band_config(history={"interval_s": 1})
    with run_service(doc, tmp_path) as svc, \
            socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=10) as sock:
        k = 0
        for _ in range(3):  # quiet (0.14 g RMS in band b), over more than one interval
            k = feed_tone(sock, k, int(1.5 * SMALL_FS), 0.2)
            time.sleep(1.1)
        k = feed_tone(sock, k, int(4 * SMALL_FS), 0.8)  # 0.57 g RMS: over alert (0.5)

        def alarm_rows() -> list[dict[str, Any]] | None:
            items = svc.get("channels/a/history", since=0)["items"]
            rows = [i for i in items if i["reason"] == "alarm"]
            return rows or None

        (alarm,) = svc.wait(alarm_rows, "a stored spectrum at the alarm change")
        events = svc.get("events")["events"]
        raised = [e for e in events if e["to_state"] == "alert"]
        assert [e["id"] for e in raised] == [alarm["event_id"]]
        items = svc.get("channels/a/history", since=0)["items"]
        interval = [i for i in items if i["reason"] == "interval"]
        assert len(interval) >= 2 and all(i["step_s"] == 1 for i in interval)
        assert all(i["frames"] >= 1 for i in interval)
        # the alarm's spectrum holds the tone at the level that raised it: 0.8 g peak
        one = svc.get(f"channels/a/history/{alarm['id']}")
        q = round(123.0 / one["df_hz"])
        tone = max(one["values"][q - 2:q + 3])
        assert 0.6 < tone < 0.9, tone
        metrics = svc.client.get("/metrics").text
        (written,) = [float(line.split()[-1]) for line in metrics.splitlines()
                      if line.startswith("quaver_store_history_written_total ")]
        assert written >= len(items)
        assert svc.health()["store"]["history_written"] >= len(items)
        wf = svc.get("channels/a/waterfall", since=0, rows=50, cols=64)
        # one row per stored spectrum (fewer than 50); more may have been stored meanwhile
        assert wf["rows"] == wf["spectra"] >= len(items) and wf["cols"] == 64
