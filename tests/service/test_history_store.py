"""Spectral history: the codec's precision, interval means taken from frames, alarm-change
rows, tier thinning, the disk bound and the migration of a step-2 database."""

from __future__ import annotations

import sqlite3
import tomllib
from dataclasses import replace
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

from service.config import ConfigError, parse_config
from service.history import SpectrumHistory, alarm_row
from service.store import HistoryPolicy, HistoryRow, Store
from service.store.history import DB_STEP, decode, encode
from service.store.schema import MIGRATIONS, migrate, schema_version
from service.types import SpectralFrame

S = 1_000_000_000
T0 = 1_699_999_200 * S  # a multiple of 600 s and of 3600 s
LINES = 400


def frame(t_s: float, power: np.ndarray, *, ch: str = "c1", profile: str = "wide",
          quality: str = "ok") -> SpectralFrame:
    return SpectralFrame(
        channel=ch, profile=profile, seq=0, t_ns=T0 + round(t_s * S), fs=12800.0,
        n=1024, df_hz=12.5, f0_hz=0.0, lines=LINES, fmax_hz=5000.0, window="hann",
        enbw_bins=1.5, averaging="exponential", averages=8, input_unit="g", unit="mm/s",
        amplitude="rms", lowcut_hz=2.0, power=power.astype(np.float32), overall=1.0,
        bands=(), tones=(), peaks=(), quality=quality,
    )


def spectrum(seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return (10.0 ** rng.uniform(-12, 1, LINES + 1)).astype(np.float32)


def db_error(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(10 * np.log10(a) - 10 * np.log10(b))))


def test_the_codec_keeps_every_line_within_half_a_step_in_db() -> None:
    rng = np.random.default_rng(3)
    p = 10.0 ** rng.uniform(-30, 20, 6401)  # 500 dB of range
    back = decode(encode(p))
    # half a code step, plus float64 rounding of the log and the power
    assert db_error(back, p) <= DB_STEP / 2 + 1e-9
    assert db_error(back, p) > DB_STEP / 4  # the codes really are quantised
    z = decode(encode(np.array([0.0, 1e-45, 1.0])))
    assert z[0] == 0.0 and z[1] == 0.0 and z[2] == pytest.approx(1.0, rel=1e-12)


def test_the_codec_refuses_what_is_not_a_power_spectrum() -> None:
    with pytest.raises(ValueError, match="1-D and not empty"):
        encode(np.zeros((2, 3)))
    with pytest.raises(ValueError, match="finite and >= 0"):
        encode(np.array([1.0, -1.0]))
    with pytest.raises(ValueError, match="finite and >= 0"):
        encode(np.array([1.0, np.nan]))


def test_an_interval_row_is_the_mean_of_its_frames() -> None:
    h = SpectrumHistory(600)
    a, b, c = spectrum(1), spectrum(2), spectrum(3)
    assert h.add([frame(10, a), frame(300, b)]) == []
    assert h.add([frame(400, c, quality="sensor-fault")]) == []  # left out
    (row,) = h.add([frame(601, c)])  # the next interval: the first one closes
    assert (row.channel, row.profile, row.reason, row.frames) == ("c1", "wide", "interval", 2)
    assert (row.t_ns, row.span_ns, row.step_s) == (T0 + 600 * S, 600 * S, 600)
    mean = (a.astype(np.float64) + b) / 2
    np.testing.assert_allclose(row.power, mean, rtol=1e-12)
    (last,) = h.flush()  # shut-down: the open interval ends at its newest frame
    assert (last.t_ns, last.frames) == (T0 + 601 * S, 1)
    np.testing.assert_array_equal(last.power, c.astype(np.float64))


def test_a_channel_that_went_silent_is_closed_by_the_others() -> None:
    h = SpectrumHistory(10)
    assert h.add([frame(1, spectrum(1), ch="a"), frame(1, spectrum(2), ch="b")]) == []
    assert h.add([frame(12, spectrum(2), ch="b")])[0].channel == "b"  # b's own next interval
    rows = h.add([frame(25, spectrum(3), ch="b")])  # a's interval ended 2 intervals ago
    assert sorted(r.channel for r in rows) == ["a", "b"]


def test_an_alarm_row_holds_the_frame_of_the_moment() -> None:
    p = spectrum(4)
    row = alarm_row(frame(33, p), 17)
    assert (row.reason, row.event_id, row.t_ns, row.step_s) == ("alarm", 17, T0 + 33 * S, 0)
    np.testing.assert_array_equal(row.power, p.astype(np.float64))


def row(t_s: float, p: np.ndarray, *, reason: str = "interval", step_s: int = 600,
        frames: int = 1, ch: str = "c1") -> HistoryRow:
    return replace(alarm_row(frame(t_s, p, ch=ch), None), reason=reason,
                   step_s=step_s if reason == "interval" else 0, frames=frames,
                   event_id=None if reason == "interval" else 1)


def test_stored_rows_read_back_listed_nearest_and_exact_to_the_codec(tmp_path: Path) -> None:
    with Store(tmp_path / "q.db") as store:
        ids = store.put_history([row(600 * k, spectrum(k)) for k in range(1, 4)]).result()
        alarm = store.put_history([row(700, spectrum(9), reason="alarm")]).result()
        listed, total = store.history_list("c1", "wide", T0, T0 + 3600 * S)
        assert total == 4
        assert [(r["id"], r["reason"]) for r in listed] == [
            (ids[0], "interval"), (alarm[0], "alarm"), (ids[1], "interval"),
            (ids[2], "interval")]
        assert store.history_list("c1", "wide", T0, T0 + 3600 * S, limit=2)[0][0]["id"] == ids[1]
        assert store.history_list("c1", "narrow", T0, T0 + 3600 * S) == ([], 0)
        one = store.history_spectrum(ids[1])
        assert one is not None and one["lines"] == LINES and one["df_hz"] == 12.5
        assert db_error(one["power"], spectrum(2)) <= DB_STEP / 2 + 1e-6
        near = store.history_nearest("c1", "wide", T0 + 1000 * S)
        assert near is not None and near["id"] == ids[1]  # 1200 s is nearer than 700 s
        assert store.history_spectrum(10**9) is None
        assert store.health()["history_written"] == 4


def test_old_interval_rows_are_thinned_to_hourly_means_and_alarm_rows_kept(
    tmp_path: Path,
) -> None:
    policy = HistoryPolicy(fine_s=86400, coarse_s=10 * 86400, coarse_step_s=3600,
                           max_bytes=None)
    with Store(tmp_path / "q.db", history=policy) as store:
        # two hours of 10-minute rows (t = 600 … 7200 s), frames 1 or 3
        rows = [row(600 * k, spectrum(k), frames=1 + 2 * (k % 2)) for k in range(1, 13)]
        store.put_history([*rows, row(900, spectrum(50), reason="alarm")]).result()
        report = store.maintain_history(now_ns=T0 + 2 * 86400 * S).result()
        assert report["thinned"] == 12 and report["deleted"] == 0
        listed, _ = store.history_list("c1", "wide", T0, T0 + 86400 * S)
        coarse = [r for r in listed if r["reason"] == "interval"]
        assert [(r["t_ns"], r["step_s"]) for r in coarse] == [
            (T0 + 3600 * S, 3600), (T0 + 7200 * S, 3600)]
        assert [r["frames"] for r in coarse] == [12, 12]  # 6 rows of 1 and 3 frames each
        assert [r["reason"] for r in listed].count("alarm") == 1
        # the hourly row is the frames-weighted mean of the (decoded) rows it replaced
        hour1 = store.history_spectrum(coarse[0]["id"])
        assert hour1 is not None
        w = np.array([1 + 2 * (k % 2) for k in range(1, 7)], dtype=np.float64)
        want = sum(wk * decode(encode(spectrum(k))) for wk, k in zip(w, range(1, 7),
                                                                     strict=True)) / w.sum()
        assert db_error(hour1["power"], np.asarray(want)) <= DB_STEP / 2 + 1e-6
        # past coarse_s everything goes
        report = store.maintain_history(now_ns=T0 + 20 * 86400 * S).result()
        assert report["deleted"] == 3 and report["rows"] == 0


def test_the_bound_thins_the_oldest_first_then_drops_them(tmp_path: Path) -> None:
    unbound = HistoryPolicy(fine_s=None, coarse_s=None, max_bytes=None)
    with Store(tmp_path / "q.db", history=unbound) as store:
        # 48 ten-minute rows (8 h)
        store.put_history([row(600 * k, spectrum(k)) for k in range(1, 49)]).result()
        report = store.maintain_history().result()
        assert report["rows"] == 48 and report["thinned_for_size"] == 0
    per_row = report["bytes"] / 48
    policy = HistoryPolicy(fine_s=None, coarse_s=None, coarse_step_s=3600,
                           max_bytes=int(40 * per_row))  # room for about 40 rows
    with Store(tmp_path / "q.db", history=policy) as store:
        report = store.maintain_history().result()
        assert report["bytes"] <= policy.max_bytes
        assert report["thinned_for_size"] > 0
        listed, total = store.history_list("c1", "wide", T0, T0 + 86400 * S, limit=100)
        steps = [r["step_s"] for r in listed]
        # the oldest hours were thinned, the newest rows are still at 10 minutes
        assert steps[0] == 3600 and steps[-1] == 600
        assert steps == sorted(steps, reverse=True)
        assert listed[-1]["t_ns"] == T0 + 48 * 600 * S
        # a bound so small that thinning cannot do: the oldest rows are dropped
        tight = HistoryPolicy(fine_s=None, coarse_s=None, max_bytes=int(12 * per_row))
    with Store(tmp_path / "q.db", history=tight) as store:
        report = store.maintain_history().result()
        assert report["deleted_for_size"] > 0 and report["bytes"] <= tight.max_bytes
        listed, total = store.history_list("c1", "wide", T0, T0 + 86400 * S, limit=100)
        assert 0 < total < 8 and listed[-1]["t_ns"] == T0 + 48 * 600 * S


def test_a_step_2_database_is_migrated_through_the_outbox_to_history(tmp_path: Path) -> None:
    path = tmp_path / "quaver.db"
    c = sqlite3.connect(path, isolation_level=None)
    c.execute("PRAGMA journal_mode = WAL")
    assert migrate(c, MIGRATIONS[:2]) == [1, 2]
    c.execute(
        "INSERT INTO events(t_ns, channel, rule, kind, from_state, to_state, value, level, "
        "unit, message, latched, acked_by, note) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
        (T0, "c1", "c1.overall", "transition", "normal", "alert", 3.0, 2.8, "mm/s",
         "kept", 0, "", ""),
    )
    c.close()
    assert "outbox" in MIGRATIONS[2].sql and "history" in MIGRATIONS[3].sql
    with Store(path) as store:
        assert store.health()["ok"], store.health()
        assert [e["message"] for e in store.events()] == ["kept"]
        (rid,) = store.put_history([row(600, spectrum(1))]).result()
        assert store.history_spectrum(rid) is not None
    c = sqlite3.connect(path)
    assert schema_version(c) == len(MIGRATIONS)  # every later step ran too
    c.close()


def with_history(**history: object) -> dict[str, object]:
    """The demo's config (service/examples/demo.toml) with ``history`` as its [history]."""
    text = resources.files("service").joinpath("examples/demo.toml").read_text("utf-8")
    return {**tomllib.loads(text), "history": history}


def test_the_history_settings_refuse_tiers_that_do_not_nest_and_odd_intervals() -> None:
    with pytest.raises(ConfigError, match=r"coarse_days=10 must be at least fine_days=30"):
        parse_config(with_history(coarse_days=10))
    with pytest.raises(ConfigError, match=r"history\.interval_s"):
        parse_config(with_history(interval_s=0))
    with pytest.raises(ConfigError, match=r"history\.interval_s"):
        parse_config(with_history(interval_s=10.5))  # whole seconds
    assert parse_config(with_history(interval_s=10)).history.interval_s == 10
    assert parse_config(with_history()).history.interval_s == 600  # the default
    with pytest.raises(ValueError, match="whole number of s, at least 1"):
        SpectrumHistory(0)
