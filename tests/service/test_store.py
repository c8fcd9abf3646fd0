"""Tests for service.store: commits visible to other connections, survival of SIGKILL,
trend tiers against numpy on a synthetic series, retention by age and size, evidence round
trip, and write faults reported in health instead of raised.

Behaviour of SQLite itself is taken from its documentation: WAL readers see the last
commit (https://www.sqlite.org/wal.html), ``PRAGMA integrity_check`` answers "ok" for a
sound file, ``max_page_count`` makes a write fail with SQLITE_FULL
(https://www.sqlite.org/pragma.html)."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from contextlib import closing
from pathlib import Path

import numpy as np
import pytest

from service.alarms import AlarmEvent
from service.store import Retention, Store, StoreError

S = 1_000_000_000
T0 = 1_700_002_800 * S  # 2023-11-14T23:00:00Z, a multiple of 3600 s
REPO = Path(__file__).resolve().parents[2]
WAIT_S = 60  # upper bound for a future; never reached unless something is broken


def event(i: int, ch: str = "m1", t_s: float | None = None) -> AlarmEvent:
    return AlarmEvent(
        t_ns=T0 + round((i if t_s is None else t_s) * S),
        channel=ch,
        rule=f"{ch}.overall",
        kind="transition",
        from_state="normal",
        to_state="alert",
        value=1.0 + i,
        level=1.0,
        unit="mm/s",
        message=f"event {i}",
        latched=i % 2 == 1,
    )


@pytest.fixture
def store(tmp_path: Path):  # type: ignore[no-untyped-def]
    st = Store(tmp_path / "data" / "q.db")
    st.start()
    yield st
    st.close()


def test_committed_events_get_increasing_ids_and_are_visible_elsewhere(store: Store) -> None:
    stored = store.put_events([event(0), event(1)], alarm_state={"version": 1, "n": 2}).result(
        WAIT_S
    )
    stored += store.put_events([event(2, "m2")]).result(WAIT_S)
    assert [e.id for e in stored] == [1, 2, 3]
    assert [e.message for e in stored] == ["event 0", "event 1", "event 2"]
    # a separate connection sees the commit at once (WAL: readers see the last commit)
    with closing(sqlite3.connect(store.path)) as c:
        rows = c.execute("SELECT id, channel, value, latched FROM events ORDER BY id").fetchall()
    assert rows == [(1, "m1", 1.0, 0), (2, "m1", 2.0, 1), (3, "m2", 3.0, 0)]
    # reads from another thread, on that thread's own connection
    with ThreadPoolExecutor(1) as pool:
        newest = pool.submit(store.events).result(WAIT_S)
        assert pool.submit(store.load_alarm_state).result(WAIT_S) == {"version": 1, "n": 2}
    assert [e["id"] for e in newest] == [3, 2, 1]
    assert newest[1] == {**stored[1].as_dict(), "has_evidence": False}
    # paging and filters
    assert [e["id"] for e in store.events(limit=2)] == [3, 2]
    assert [e["id"] for e in store.events(limit=2, before_id=2)] == [1]
    assert [e["id"] for e in store.events(channel="m1")] == [2, 1]
    assert [e["id"] for e in store.events(since_ns=T0 + 1 * S)] == [3, 2]
    assert store.event(2) == newest[1] and store.event(99) is None
    with pytest.raises(ValueError, match="limit=0 must be in 1…1000"):
        store.events(limit=0)


def test_alarm_state_round_trip_and_none_before_any(store: Store) -> None:
    assert store.load_alarm_state() is None
    snap = {"version": 1, "alarms": {"m1.overall": {"state": "alert", "above_ns": [1, None]}}}
    store.save_alarm_state(snap).result(WAIT_S)
    assert store.load_alarm_state() == snap


KILLED_WRITER = """
import sys
from service.alarms import AlarmEvent
from service.store import Store
st = Store(sys.argv[1])
st.start()
for i in range(100_000):
    ev = AlarmEvent(t_ns=i, channel="m1", rule="m1.overall", kind="transition",
                    from_state="normal", to_state="alert", value=float(i), level=1.0,
                    unit="mm/s", message=f"e{i}")
    fut = st.put_events([ev], alarm_state={"version": 1, "i": i})
    for k in range(20):  # trend traffic in the same writer queue
        st.record(f"c{k}", "overall", i * 10**9, float(i))
    (done,) = fut.result()
    print(done.id, i, flush=True)
"""


def test_sigkill_loses_no_committed_event(tmp_path: Path) -> None:
    db = tmp_path / "q.db"
    proc = subprocess.Popen(
        [sys.executable, "-c", KILLED_WRITER, str(db)],
        cwd=REPO,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, "PYTHONPATH": str(REPO)},
    )
    assert proc.stdout is not None
    lines = []
    while len(lines) < 300:
        line = proc.stdout.readline()
        if not line:
            break
        lines.append(line)
    os.kill(proc.pid, signal.SIGKILL)
    rest, err = proc.communicate(timeout=WAIT_S)
    lines += rest.splitlines()  # printed, hence committed, before the kill
    assert proc.returncode == -signal.SIGKILL, err
    assert len(lines) >= 300, err
    committed = {int(a): int(b) for a, b in (ln.split() for ln in lines)}
    with closing(sqlite3.connect(db)) as c:
        assert c.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        rows = dict(c.execute("SELECT id, message FROM events").fetchall())
    assert all(rows.get(eid) == f"e{i}" for eid, i in committed.items())
    st = Store(db)
    st.start()
    try:
        # the alarm state was committed with its events: at least as new as the last one
        assert st.load_alarm_state()["i"] >= max(committed.values())  # type: ignore[index]
        more = st.put_events([event(0)]).result(WAIT_S)
        assert more[0].id is not None and more[0].id > max(committed)
    finally:
        st.close()


def test_trend_tiers_match_numpy_on_a_synthetic_series(tmp_path: Path) -> None:
    st = Store(tmp_path / "q.db")
    st.start()
    rng = np.random.default_rng(11)
    # 2 h 10 min of values at irregular times (0.2 … 3 s apart), one NaN every 50
    t_ns = T0 + 7 * S + np.cumsum(rng.integers(200_000_000, 3_000_000_000, 4000))
    t_ns = t_ns[t_ns < T0 + 7800 * S]
    values = rng.normal(3.0, 1.0, t_ns.size)
    values[::50] = np.nan
    for t, v in zip(t_ns.tolist(), values.tolist(), strict=True):
        st.record("p1-de-h", "overall", t, v)
    st.flush_trends().result(WAIT_S)
    ok = np.isfinite(values)
    since, until = T0, T0 + 7800 * S

    def expected(step_s: int) -> list[tuple[int, float, float, float, int]]:
        b = (t_ns[ok] // (step_s * S)) * (step_s * S)
        out = []
        for start in np.unique(b):
            x = values[ok][b == start]
            out.append((int(start), float(x.mean()), float(x.min()), float(x.max()), x.size))
        return out

    def check(got: list[tuple[int, float, float, float, int]], step_s: int) -> None:
        exp = expected(step_s)  # numpy mean/min/max/size of the raw values per bucket
        assert [g[0] for g in got] == [e[0] for e in exp]
        assert [g[2:] for g in got] == [e[2:] for e in exp]  # min, max, count exactly
        np.testing.assert_allclose([g[1] for g in got], [e[1] for e in exp], rtol=1e-12)

    assert st.trend_step(since) == 10
    check(st.trend("p1-de-h", "overall", since, until), 10)
    check(st.trend("p1-de-h", "overall", since, until, step_s=60), 60)  # stored 1-min tier
    check(st.trend("p1-de-h", "overall", since, until, step_s=3600), 3600)  # stored 1-h tier
    check(st.trend("p1-de-h", "overall", since, until, step_s=30), 30)  # aggregated from 10 s
    check(st.trend("p1-de-h", "overall", since, until, step_s=600), 600)  # from the 60 s tier
    # a window returns the whole buckets that overlap it
    part = st.trend("p1-de-h", "overall", T0 + 3605 * S, T0 + 3725 * S, step_s=60)
    assert [p[0] for p in part] == [T0 + 3600 * S, T0 + 3660 * S, T0 + 3720 * S]
    assert st.trend("p1-de-h", "nothing", since, until) == []
    assert st.trend_names("p1-de-h") == ["overall"]
    with pytest.raises(ValueError, match="step_s=15 is not a positive multiple of the 10 s"):
        st.trend("p1-de-h", "overall", since, until, step_s=15)
    st.close()
    # the coarse tiers in the file are the exact combination of the 10 s rows
    with closing(sqlite3.connect(st.path)) as c:
        fine = c.execute(
            "SELECT t_ns / ? * ?, SUM(sum), MIN(min), MAX(max), SUM(count) FROM trend "
            "WHERE step_s = 10 GROUP BY 1 ORDER BY 1",
            (3600 * S, 3600 * S),
        ).fetchall()
        hour = c.execute(
            "SELECT t_ns, sum, min, max, count FROM trend WHERE step_s = 3600 ORDER BY t_ns"
        ).fetchall()
    assert [r[0] for r in hour] == [r[0] for r in fine]
    assert [r[2:] for r in hour] == [r[2:] for r in fine]


def test_late_values_and_restarts_merge_into_the_same_bucket(tmp_path: Path) -> None:
    db = tmp_path / "q.db"
    vals = [1.0, 5.0, 2.0, 8.0, 4.0]
    st = Store(db)
    st.start()
    st.record("m", "x", T0 + 1 * S, vals[0])
    st.record("m", "x", T0 + 2 * S, vals[1])
    st.record("m", "x", T0 + 15 * S, 100.0)  # a later bucket: the first is written
    st.record("m", "x", T0 + 3 * S, vals[2])  # late: merges into the written bucket
    st.close()  # writes the open buckets
    st = Store(db)  # a restart
    st.start()
    st.record("m", "x", T0 + 4 * S, vals[3])
    st.record("m", "x", T0 + 9 * S, vals[4])
    st.record("m", "x", T0 + 5 * S, float("inf"))  # skipped
    st.flush_trends().result(WAIT_S)
    first = st.trend("m", "x", T0, T0 + 10 * S)
    assert first == [(T0, float(np.mean(vals)), 1.0, 8.0, 5)]
    (minute,) = st.trend("m", "x", T0, T0 + 60 * S, step_s=60)
    assert minute[1:] == (float(np.mean([*vals, 100.0])), 1.0, 100.0, 6)
    st.close()


def test_quiet_series_are_written_once_newer_data_moves_on(tmp_path: Path) -> None:
    st = Store(tmp_path / "q.db")
    st.start()
    st.record("a", "x", T0 + 1 * S, 1.0)
    st.record("b", "x", T0 + 1 * S, 2.0)
    for k in range(1, 4):  # only "b" goes on, to the 4th bucket
        st.record("b", "x", T0 + (1 + 10 * k) * S, 2.0)
    st.save_alarm_state({"sync": 1}).result(WAIT_S)  # queued after the buckets: all committed
    assert st.trend("a", "x", T0, T0 + 60 * S) == [(T0, 1.0, 1.0, 1.0, 1)]
    st.close()


def _fill(st: Store, hours: float, every_s: int = 60) -> None:
    for k in range(int(hours * 3600 / every_s)):
        st.record("m", "x", T0 + k * every_s * S, float(k))
    st.flush_trends().result(WAIT_S)


def test_retention_by_age_drops_old_rows_per_tier(tmp_path: Path) -> None:
    ret = Retention(raw_s=3600, minute_s=6 * 3600, hour_s=None, evidence_s=3600, events_s=None)
    st = Store(tmp_path / "q.db", retention=ret)
    st.start()
    _fill(st, 12)  # one value a minute for 12 h: 720 raw buckets, 720 1-min, 12 1-h
    ids = st.put_events([event(0, t_s=0), event(1, t_s=11 * 3600)]).result(WAIT_S)
    for e in ids:
        st.put_evidence(
            e.id,
            {
                "f0_hz": 0,
                "df_hz": 1,
                "unit": "g",
                "amplitude": "rms",  # type: ignore[arg-type]
                "values": [1.0],
            },
            None,
            1.0,
            e.t_ns,
        ).result(WAIT_S)
    now = T0 + 12 * 3600 * S  # the newest data is at 11:59; "now" = 12:00
    report = st.maintain(now).result(WAIT_S)
    assert report["deleted"] == {"trend_10s": 660, "trend_60s": 360, "evidence": 1}
    span = st.trend("m", "x", now - 3600 * S, now)
    assert (len(span), span[0][0], st.trend_step(now - 3600 * S)) == (60, now - 3600 * S, 10)
    # older than 1 h: the 10 s tier no longer covers it, so the 1-min tier answers
    assert st.trend_step(now - 2 * 3600 * S) == 60
    assert len(st.trend("m", "x", now - 6 * 3600 * S, now)) == 360
    # older than 6 h: only the 1-h tier, kept forever here
    assert st.trend_step(T0) == 3600
    assert [p[4] for p in st.trend("m", "x", T0, now)] == [60] * 12
    assert [e["has_evidence"] for e in st.events()] == [True, False]  # events stay
    # the default "now" is the newest data time (11:59 here): nothing more to drop
    assert st.maintain().result(WAIT_S)["deleted"] == {
        "trend_10s": 0,
        "trend_60s": 0,
        "evidence": 0,
    }
    st.close()


def test_retention_by_size_drops_the_oldest_raw_rows_first(tmp_path: Path) -> None:
    db = tmp_path / "q.db"
    st = Store(db, retention=Retention(raw_s=None, minute_s=None, hour_s=None))
    st.start()
    _fill(st, 36, every_s=10)  # 12960 raw buckets
    full = st.maintain().result(WAIT_S)["db_bytes"]
    st.close()
    with closing(sqlite3.connect(db)) as c:
        counts = dict(c.execute("SELECT step_s, COUNT(*) FROM trend GROUP BY step_s").fetchall())
    assert counts == {10: 12960, 60: 2160, 3600: 36}
    limit = full * 3 // 4
    st = Store(db, retention=Retention(raw_s=None, minute_s=None, hour_s=None, max_db_bytes=limit))
    st.start()
    report = st.maintain().result(WAIT_S)
    assert report["db_bytes"] <= limit < full
    assert set(report["deleted_for_size"]) == {"trend_10s"}  # raw rows only
    st.close()
    assert db.stat().st_size <= limit  # the file itself shrank (incremental vacuum)
    with closing(sqlite3.connect(db)) as c:
        assert c.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        left = dict(c.execute("SELECT step_s, COUNT(*) FROM trend GROUP BY step_s").fetchall())
        oldest = c.execute("SELECT MIN(t_ns), MAX(t_ns) FROM trend WHERE step_s = 10").fetchone()
    assert left[60] == 2160 and left[3600] == 36 and 0 < left[10] < 12960
    assert oldest == (T0 + (12960 - left[10]) * 10 * S, T0 + 12959 * 10 * S)  # newest kept


def test_evidence_round_trip_is_exact_float32(store: Store) -> None:
    rng = np.random.default_rng(5)
    spec = rng.random(1601).astype(np.float32) * 3
    wave = rng.normal(0, 2, 51200).astype(np.float32)
    (ev,) = store.put_events([event(0)]).result(WAIT_S)
    store.put_evidence(
        ev.id,  # type: ignore[arg-type]
        {
            "f0_hz": 0.0,
            "df_hz": 3.125,
            "unit": "mm/s",
            "amplitude": "rms",
            "values": spec,
            "window": "hann",
            "lines": 1600,
        },
        wave,
        25600.0,
        T0 - 2 * S,
    ).result(WAIT_S)
    got = store.get_evidence(ev.id)  # type: ignore[arg-type]
    assert got is not None
    assert got["spectrum"]["values"].dtype == np.float32
    assert np.array_equal(got["spectrum"]["values"], spec)
    assert np.array_equal(got["waveform"], wave) and got["waveform"].dtype == np.float32
    assert {k: v for k, v in got["spectrum"].items() if k != "values"} == {
        "f0_hz": 0.0,
        "df_hz": 3.125,
        "unit": "mm/s",
        "amplitude": "rms",
        "window": "hann",
        "lines": 1600,
    }
    assert (got["fs"], got["t0_ns"]) == (25600.0, T0 - 2 * S)
    assert store.events()[0]["has_evidence"]
    # values given as Python floats are stored as float32 (rounded once, like numpy)
    store.put_evidence(
        ev.id,
        {
            "f0_hz": 0,
            "df_hz": 1,
            "unit": "g",
            "amplitude": "peak",  # type: ignore[arg-type]
            "values": [0.1, 0.2],
        },
        None,
        1.0,
        T0,
    ).result(WAIT_S)
    again = store.get_evidence(ev.id)  # type: ignore[arg-type]
    assert again is not None and again["waveform"] is None
    assert np.array_equal(again["spectrum"]["values"], np.float32([0.1, 0.2]))
    assert store.get_evidence(12345) is None
    # evidence for an event that does not exist fails its future (foreign key), not the caller
    fut = store.put_evidence(
        999,
        {"f0_hz": 0, "df_hz": 1, "unit": "g", "amplitude": "rms", "values": [1.0]},
        None,
        1.0,
        T0,
    )
    with pytest.raises(StoreError, match="FOREIGN KEY"):
        fut.result(WAIT_S)
    h = store.health()  # one bad write is counted, but the store itself is fine
    assert (h["ok"], h["write_errors"]) == (True, 1) and "FOREIGN KEY" in h["last_error"]
    with pytest.raises(ValueError, match="waveform must be 1-D"):
        store.put_evidence(
            1,
            {"f0_hz": 0, "df_hz": 1, "unit": "g", "amplitude": "rms", "values": [1.0]},
            np.zeros((2, 3)),
            1.0,
            T0,
        )


def test_unopenable_folder_is_reported_in_health_not_raised(tmp_path: Path) -> None:
    blocker = tmp_path / "not-a-dir"
    blocker.write_text("a file where the data folder should be")
    st = Store(blocker / "q.db")
    st.start()  # no exception
    fut = st.put_events([event(0)])
    st.record("m", "x", T0, 1.0)
    with pytest.raises(StoreError, match="cannot open .*not-a-dir/q.db"):
        fut.result(WAIT_S)
    h = st.health()
    assert (h["ok"], h["open"], h["writer_alive"]) == (False, False, True)
    assert "cannot open" in h["last_error"] and h["write_errors"] >= 1
    with pytest.raises(StoreError, match="cannot read"):
        st.events()
    st.close()


def test_read_only_data_folder_is_reported_in_health(tmp_path: Path) -> None:
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        (ro / "probe").touch()
    except PermissionError:
        pass
    else:
        ro.chmod(0o700)
        pytest.skip("this user ignores folder permissions (root); see the not-a-dir test")
    try:
        st = Store(ro / "q.db")
        st.start()
        with pytest.raises(StoreError, match="unable to open database file"):
            st.put_events([event(0)]).result(WAIT_S)
        assert not st.health()["ok"] and "unable to open" in st.health()["last_error"]
        st.close()
    finally:
        ro.chmod(0o700)


def test_disk_full_fails_the_write_keeps_running_and_recovers(store: Store) -> None:
    store.put_events([event(0)]).result(WAIT_S)
    # a full disk, simulated with SQLite's own page limit on the writer's connection
    pages = store._submit(
        lambda c: c.execute("PRAGMA page_count").fetchone()[0], durable=False
    ).result(WAIT_S)
    store._submit(
        lambda c: c.execute(f"PRAGMA max_page_count = {pages}").fetchall(), durable=False
    ).result(WAIT_S)
    big = {"version": 1, "blob": "x" * 200_000}
    fut = store.put_events([event(1)], alarm_state=big)
    with pytest.raises(StoreError, match="database or disk is full"):
        fut.result(WAIT_S)
    h = store.health()
    assert not h["ok"] and "full" in h["last_error"] and h["write_errors"] == 1
    assert [e["id"] for e in store.events()] == [1]  # nothing of the failed batch
    store._submit(
        lambda c: c.execute("PRAGMA max_page_count = 1073741823").fetchall(), durable=False
    ).result(WAIT_S)
    (ok,) = store.put_events([event(2)]).result(WAIT_S)
    assert store.health()["ok"] and ok.id == 2  # the failed batch's id 2 was never committed


def test_trend_series_created_in_a_failed_write_are_written_again(store: Store) -> None:
    store.record("m1", "overall", T0, 1.0)
    store.flush_trends().result(WAIT_S)  # series m1/overall exists; its id is cached
    pages = store._submit(
        lambda c: c.execute("PRAGMA page_count").fetchone()[0], durable=False
    ).result(WAIT_S)
    store._submit(  # room for the new series rows, not for their trend rows
        lambda c: c.execute(f"PRAGMA max_page_count = {pages + 100}").fetchall(), durable=False
    ).result(WAIT_S)
    # many new series at once: the series are inserted, then the trend rows fill the disk
    # and the whole write is rolled back
    for k in range(400):
        store.record_many(f"c{k}", T0 + 20 * S, {f"band:{j}": float(j) for j in range(20)})
    with pytest.raises(StoreError, match="database or disk is full"):
        store.flush_trends().result(WAIT_S)
    store._submit(
        lambda c: c.execute("PRAGMA max_page_count = 1073741823").fetchall(), durable=False
    ).result(WAIT_S)
    # the same series again: their rows were rolled back, so they are created anew and the
    # values land under the right names (no id remembered from the failed write)
    store.record_many("c7", T0 + 40 * S, {"band:3": 3.5})
    store.record("m1", "overall", T0 + 40 * S, 2.0)
    store.flush_trends().result(WAIT_S)
    assert [p[1:] for p in store.trend("c7", "band:3", T0, T0 + 60 * S, 10)] == [
        (3.5, 3.5, 3.5, 1)]
    assert [p[1] for p in store.trend("m1", "overall", T0, T0 + 60 * S, 10)] == [1.0, 2.0]


def test_writes_after_close_fail_their_future(tmp_path: Path) -> None:
    st = Store(tmp_path / "q.db")
    st.start()
    st.close()
    with pytest.raises(StoreError, match="is closed"):
        st.put_events([event(0)]).result(WAIT_S)


def test_bad_trend_step_is_refused(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="trend_step_s=7 is not one of 1, 2, 3, 4, 5, 6, 10"):
        Store(tmp_path / "q.db", trend_step_s=7)


def test_snapshot_json_is_stored_verbatim(store: Store) -> None:
    snap = {"version": 1, "alarms": {}, "faulted": ["m1"]}
    store.put_events([], alarm_state=snap).result(WAIT_S)
    with closing(sqlite3.connect(store.path)) as c:
        assert json.loads(c.execute("SELECT json FROM alarm_state").fetchone()[0]) == snap
