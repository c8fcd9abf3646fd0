"""Tests for service.alarms: the state machine on synthetic value series, latch and ack,
sensor fault, NaN, baseline-relative levels, snapshot/restore and rules from config.

Expected transition times are worked out by hand in the comments from the semantics in the
module docstring: a level is reached at value >= level and must hold for on_delay_s; it
clears below level·(1 − h) and must stay there for off_delay_s (``common practice`` for
two-level alarms with hysteresis and delays)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from service.alarms import (
    LEARN_MAX,
    AckRefused,
    AlarmEngine,
    AlarmEvent,
    AlarmState,
    Baseline,
    InvalidTransition,
    Rule,
    UnknownAlarm,
    check_transition,
    rule_id,
    rules_from_config,
    signal_rule,
)
from service.config import parse_config
from service.types import BandValue, SpectralFrame, ToneValue

S = 1_000_000_000  # ns per s
T0 = 1_700_000_000 * S  # an arbitrary epoch time so that times look real


def frame(
    ch: str,
    t_s: float,
    overall: float = 0.0,
    bands: dict[str, float] | None = None,
    tones: dict[str, float] | None = None,
) -> SpectralFrame:
    return SpectralFrame(
        channel=ch,
        profile="p",
        seq=0,
        t_ns=T0 + round(t_s * S),
        fs=12800.0,
        n=4096,
        df_hz=3.125,
        f0_hz=0.0,
        lines=1600,
        fmax_hz=5000.0,
        window="hann",
        enbw_bins=1.5,
        averaging="linear",
        averages=4,
        input_unit="g",
        unit="mm/s",
        amplitude="rms",
        lowcut_hz=2.0,
        power=np.zeros(1601, np.float32),
        overall=overall,
        bands=tuple(BandValue(k, 10.0, 1000.0, v) for k, v in (bands or {}).items()),
        tones=tuple(ToneValue(k, 24.7, v) for k, v in (tones or {}).items()),
        peaks=(),
    )


def overall_rule(ch: str = "m1", **kw: object) -> Rule:
    args: dict[str, object] = dict(
        id=rule_id(ch, "overall"),
        channel=ch,
        kind="overall",
        name="overall",
        alert=1.0,
        danger=2.0,
        hysteresis=0.1,
        on_delay_s=3.0,
        off_delay_s=5.0,
        unit="mm/s",
    )
    args.update(kw)
    return Rule(**args)  # type: ignore[arg-type]


def run(
    engine: AlarmEngine,
    series: list[float],
    ch: str = "m1",
    start_s: int = 0,
    status: dict[int, str] | None = None,
) -> list[AlarmEvent]:
    """One frame per second: value series[i] at t = start_s + i s."""
    out = []
    for i, v in enumerate(series):
        t = start_s + i
        out += engine.evaluate(frame(ch, t, overall=v), (status or {}).get(t, "ok"))
    return out


def summary(events: list[AlarmEvent]) -> list[tuple[object, ...]]:
    return [
        (
            (e.t_ns - T0) / S,
            e.kind,
            e.from_state,
            e.to_state,
            None if e.level is None else round(e.level, 9),
        )
        for e in events
    ]


# alert 1.0, danger 2.0, h = 0.1 → alert clears below 0.9, danger below 1.8; on 3 s, off 5 s.
SERIES = (
    [0.5] * 5  # t 0-4   normal
    + [1.2] * 2  # t 5-6   above alert, but only for 2 s ...
    + [0.95]  # t 7     below alert (above 0.9): the on-delay starts again
    + [1.2] * 4  # t 8-11  above alert since 8 → ALERT at 8 + 3 = 11
    + [0.95] * 3  # t 12-14 between 0.9 and 1.0: hysteresis band, stays ALERT
    + [2.5] * 2  # t 15-16 above danger ...
    + [1.9]  # t 17    below danger (above 1.8): danger on-delay starts again
    + [2.5] * 4  # t 18-21 above danger since 18 → DANGER at 21
    + [1.85] * 4  # t 22-25 between 1.8 and 2.0: stays DANGER
    + [1.5] * 6  # t 26-31 below 1.8 since 26 → ALERT at 26 + 5 = 31
    + [0.95] * 2  # t 32-33 hysteresis band of alert: stays ALERT
    + [0.5] * 3  # t 34-36 below 0.9 ...
    + [0.92]  # t 37    back above 0.9: the off-delay starts again
    + [0.5] * 7  # t 38-44 below 0.9 since 38 → NORMAL at 43
)
EXPECTED = [  # (t s, kind, from, to, level crossed)
    (11.0, "transition", "normal", "alert", 1.0),
    (21.0, "transition", "alert", "danger", 2.0),
    (31.0, "transition", "danger", "alert", 1.8),  # danger·(1 − h)
    (43.0, "transition", "alert", "normal", 0.9),  # alert·(1 − h)
]


def test_normal_alert_danger_alert_normal_at_the_right_times() -> None:
    engine = AlarmEngine([overall_rule()])
    events = run(engine, SERIES)
    assert summary(events) == EXPECTED
    assert [e.value for e in events] == [1.2, 2.5, 1.5, 0.5]
    assert all(e.rule == "m1.overall" and e.unit == "mm/s" and not e.latched for e in events)
    assert [e.raises for e in events] == [True, True, False, False]
    assert engine.active() == []


def test_zero_delays_act_on_the_first_frame_and_hysteresis_still_holds() -> None:
    engine = AlarmEngine([overall_rule(on_delay_s=0.0, off_delay_s=0.0)])
    events = run(engine, [0.5, 1.0, 0.95, 0.9, 0.89, 2.0, 1.8, 1.79])
    # 1.0 reaches alert (>=); 0.95 and 0.9 are not below 0.9; 0.89 is; 2.0 reaches danger;
    # 1.8 is not below 1.8; 1.79 is.
    assert summary(events) == [
        (1.0, "transition", "normal", "alert", 1.0),
        (4.0, "transition", "alert", "normal", 0.9),
        (5.0, "transition", "normal", "danger", 2.0),
        (7.0, "transition", "danger", "alert", 1.8),
    ]


def test_a_jump_past_both_levels_goes_straight_to_danger_and_back_to_normal() -> None:
    engine = AlarmEngine([overall_rule()])
    events = run(engine, [3.0] * 5 + [0.1] * 6)
    # above both levels since 0 → DANGER at 3; below both clear levels since 5 → NORMAL at 10
    assert summary(events) == [
        (3.0, "transition", "normal", "danger", 2.0),
        (10.0, "transition", "danger", "normal", 0.9),
    ]


def test_latch_holds_until_acknowledged() -> None:
    engine = AlarmEngine([overall_rule(latch=True, on_delay_s=0.0, off_delay_s=0.0)])
    events = run(engine, [0.5, 1.5, 0.5, 0.5])
    assert summary(events) == [
        (1.0, "transition", "normal", "alert", 1.0),
        (2.0, "transition", "alert", "latched", 0.9),  # cleared, but held
    ]
    assert [e.latched for e in events] == [True, True]
    assert "latched until acknowledged" in events[1].message
    (view,) = engine.active()
    assert (view.state, view.peak, view.latched, view.acked, view.level) == (
        AlarmState.LATCHED,
        AlarmState.ALERT,
        True,
        False,
        1.0,
    )
    ack = engine.ack("m1.overall", "r.okafor", "checked coupling", t_ns=T0 + 10 * S)
    assert (ack.kind, ack.from_state, ack.to_state, ack.acked_by, ack.note, ack.latched) == (
        "ack",
        "latched",
        "normal",
        "r.okafor",
        "checked coupling",
        False,
    )
    assert engine.active() == []
    with pytest.raises(AckRefused, match="'m1.overall' is normal; there is nothing to ack"):
        engine.ack("m1.overall", "r.okafor", t_ns=T0 + 11 * S)


def test_latched_alarm_rises_again_and_ack_while_high_skips_the_latch() -> None:
    engine = AlarmEngine([overall_rule(latch=True, on_delay_s=0.0, off_delay_s=0.0)])
    events = run(engine, [1.5, 0.5, 2.5])  # alert, latched, then danger from the latch
    assert [(e.from_state, e.to_state) for e in events] == [
        ("normal", "alert"),
        ("alert", "latched"),
        ("latched", "danger"),
    ]
    ack = engine.ack("m1.overall", "j.varga", t_ns=T0 + 3 * S)
    assert (ack.from_state, ack.to_state, ack.level) == ("danger", "danger", 2.0)
    assert engine.view("m1.overall").acked
    with pytest.raises(AckRefused, match="already acknowledged by 'j.varga'"):
        engine.ack("m1.overall", "someone", t_ns=T0 + 4 * S)
    events = run(engine, [1.5, 0.5], start_s=4)
    # acknowledged while high: clears straight to normal, no latch
    assert [(e.from_state, e.to_state, e.latched) for e in events] == [
        ("danger", "alert", False),
        ("alert", "normal", False),
    ]


def test_escalation_needs_a_new_acknowledgement() -> None:
    engine = AlarmEngine([overall_rule(latch=True, on_delay_s=0.0, off_delay_s=0.0)])
    run(engine, [1.5])
    engine.ack("m1.overall", "j.varga", t_ns=T0 + S)
    events = run(engine, [2.5, 0.5], start_s=2)
    assert [(e.from_state, e.to_state) for e in events] == [
        ("alert", "danger"),
        ("danger", "latched"),
    ]
    assert not engine.view("m1.overall").acked


def test_ack_of_unknown_alarm_raises() -> None:
    engine = AlarmEngine([overall_rule()])
    with pytest.raises(UnknownAlarm, match="no alarm rule 'm9.overall'"):
        engine.ack("m9.overall", "r.okafor", t_ns=T0)
    with pytest.raises(UnknownAlarm, match="no alarm rule 'nope'"):
        engine.view("nope")


def test_sensor_fault_suspends_the_channel_without_events_of_its_own() -> None:
    engine = AlarmEngine([overall_rule("m1"), overall_rule("m2")])
    out: list[AlarmEvent] = []
    for t in range(12):
        status = "sensor-fault" if 2 <= t <= 5 else "ok"
        out += engine.evaluate(frame("m1", t, overall=1.5), status)
        out += engine.evaluate(frame("m2", t, overall=1.5), "ok")
    m1 = [e for e in out if e.channel == "m1"]
    m2 = [e for e in out if e.channel == "m2"]
    # m1: above alert since 0, pending at the fault (t 2); no transition while faulted
    # (it would have reached ALERT at 3); the on-delay restarts at the first good frame
    # (t 6) → ALERT at 9. m2 is untouched: ALERT at 3. The state changes themselves are
    # the service's "status" events (service.app), not the engine's.
    assert summary(m1) == [(9.0, "transition", "normal", "alert", 1.0)]
    assert summary(m2) == [(3.0, "transition", "normal", "alert", 1.0)]


@pytest.mark.parametrize("status", ["sensor-fault", "no-signal", "failed"])
def test_a_suspending_state_keeps_an_active_alarm_and_hides_its_value(status: str) -> None:
    engine = AlarmEngine([overall_rule(on_delay_s=0.0, off_delay_s=0.0)])
    run(engine, [1.5])
    events = run(engine, [0.1, 0.1], start_s=1, status={1: status, 2: status})
    assert events == []  # a fault says nothing about the machine: no clearing on bad data
    view = engine.view("m1.overall")
    assert view.state is AlarmState.ALERT
    assert view.suspended and view.channel_status == status
    assert view.value is None  # not the last good one (1.5) shown as if current
    run(engine, [1.5], start_s=3)  # live again: the value is shown again
    assert engine.view("m1.overall").value == 1.5 and not engine.view("m1.overall").suspended


@pytest.mark.parametrize("status", ["gap", "overrun"])
def test_gap_and_overrun_frames_are_still_evaluated(status: str) -> None:
    engine = AlarmEngine([overall_rule(on_delay_s=0.0)])
    events = run(engine, [1.5], status={0: status})
    assert summary(events) == [(0.0, "transition", "normal", "alert", 1.0)]


def test_loss_of_signal_rule_goes_to_its_level_and_back() -> None:
    engine = AlarmEngine(
        [overall_rule("m1"), signal_rule("m1", "danger"), signal_rule("m2", "alert")]
    )
    t = 10 * 10**9
    assert engine.set_channel_status("m1", "sensor-fault", t) == []  # not a loss of signal
    (lost,) = engine.set_channel_status("m1", "no-signal", t + 1, fault="no new spectrum")
    assert (lost.rule, lost.kind, lost.from_state, lost.to_state) == (
        "m1.signal", "transition", "normal", "danger")
    assert lost.raises and "LOSS OF SIGNAL" in lost.message and "no new spectrum" in lost.message
    assert (lost.value, lost.level) == (None, None)  # no number to show: the message says why
    assert engine.set_channel_status("m1", "failed", t + 2) == []  # still lost: no new event
    assert engine.view("m1.signal").danger == 1.0 and engine.view("m1.signal").alert is None
    (back,) = engine.set_channel_status("m1", "ok", t + 3)
    assert (back.from_state, back.to_state) == ("danger", "normal")
    (other,) = engine.set_channel_status("m2", "failed", t + 4)
    assert other.to_state == "alert"
    # frames never move a signal rule
    assert engine.evaluate(frame("m2", 20, 5.0), "ok") != []  # m2 is back: that clears it
    assert engine.view("m2.signal").state is AlarmState.NORMAL


def test_a_signal_rule_needs_exactly_one_level() -> None:
    with pytest.raises(ValueError, match="a signal rule has one level"):
        Rule(id="m1.signal", channel="m1", kind="signal", name="x", alert=1.0, danger=2.0)


def test_channel_status_outside_the_closed_set_is_refused() -> None:
    engine = AlarmEngine([overall_rule()])
    with pytest.raises(
        ValueError,
        match="channel_status='faulty' is not one of 'ok', 'no-signal', 'sensor-fault', 'gap', "
        "'overrun', 'failed'",
    ):
        engine.evaluate(frame("m1", 0, 1.0), "faulty")


def test_nan_is_skipped_without_moving_any_timer() -> None:
    engine = AlarmEngine([overall_rule(on_delay_s=2.0, off_delay_s=0.0)])
    # above since 0; NaN at 1 neither resets nor fires; 2 - 0 >= 2 → ALERT at 2
    events = run(engine, [1.5, math.nan, 1.5])
    assert summary(events) == [(2.0, "transition", "normal", "alert", 1.0)]
    engine = AlarmEngine([overall_rule(on_delay_s=2.0, off_delay_s=0.0)])
    # the frame that would fire (t 2) is NaN: nothing then; the next good frame fires
    events = run(engine, [1.5, 1.5, math.nan, 1.5, math.nan, math.nan])
    assert summary(events) == [(3.0, "transition", "normal", "alert", 1.0)]
    assert engine.view("m1.overall").value == 1.5


def test_time_running_backwards_neither_freezes_nor_rushes_an_alarm() -> None:
    engine = AlarmEngine([overall_rule(on_delay_s=2.0, off_delay_s=0.0)])
    # arrival-time jitter: a frame 0.3 s older than the last is taken at the last one's time
    # and its value counts: the dip below the level restarts the delay (above again from 2)
    out = []
    for t, v in ((0.0, 1.5), (1.5, 1.5), (1.2, 0.5), (2.0, 1.5), (3.9, 1.5), (4.0, 1.5)):
        out += engine.evaluate(frame("m1", t, overall=v))
    assert summary(out) == [(4.0, "transition", "normal", "alert", 1.0)]
    engine = AlarmEngine([overall_rule(on_delay_s=2.0, off_delay_s=0.0)])
    # the clock steps back an hour at t = 1: the pending delay restarts on the new clock and
    # the alarm fires 2 s later on it, not an hour later when the old time comes round
    out = run(engine, [1.5, 1.5])
    out += run(engine, [1.5, 1.5, 1.5, 1.5], start_s=-3600)
    assert summary(out) == [(-3598.0, "transition", "normal", "alert", 1.0)]


def test_band_and_tone_rules_pick_their_value_by_name() -> None:
    band = Rule(
        id=rule_id("m1", "band", "Bearing Env"),
        channel="m1",
        kind="band",
        name="Bearing Env",
        alert=0.4,
        danger=0.9,
    )
    tone = Rule(
        id=rule_id("m1", "tone", "1X"), channel="m1", kind="tone", name="1X", alert=2.0, danger=4.0
    )
    assert (band.id, tone.id) == ("m1.band.bearing-env", "m1.tone.1x")
    engine = AlarmEngine([band, tone])
    ev = engine.evaluate(
        frame("m1", 0, overall=9.0, bands={"Bearing Env": 0.5, "x": 9.0}, tones={"1X": 4.5})
    )
    assert {(e.rule, e.to_state) for e in ev} == {
        ("m1.band.bearing-env", "alert"),
        ("m1.tone.1x", "danger"),
    }
    # a frame without the band is a missing value (NaN): skipped
    assert engine.evaluate(frame("m1", 1, tones={"1X": 4.5})) == []


def test_baseline_rule_learns_a_median_and_fires_at_twice_it() -> None:
    rng = np.random.default_rng(7)
    learn = rng.uniform(0.8, 1.2, 10).tolist()
    median = float(np.median(learn))  # numpy.median as the reference
    rule = overall_rule(
        alert=None,
        danger=None,
        on_delay_s=0.0,
        off_delay_s=0.0,
        baseline={"learn_s": 10, "alert_factor": 2.0, "danger_factor": 4.0},
    )
    engine = AlarmEngine([rule])
    events = run(engine, learn + [2.2 * median])  # t 0-9 learning; t 10 is 2.2 × baseline
    assert engine.view("m1.overall").alert == pytest.approx(2 * median, rel=1e-15)
    assert engine.view("m1.overall").danger == pytest.approx(4 * median, rel=1e-15)
    assert summary(events) == [(10.0, "transition", "normal", "alert", round(2 * median, 9))]
    # just below ×2 after learning: nothing
    engine = AlarmEngine([rule])
    assert run(engine, [*learn, 3.0 * median]) != []
    engine = AlarmEngine([rule])
    assert run(engine, [*learn, 1.99 * median]) == []
    assert not engine.view("m1.overall").learning


def test_baseline_in_db_and_no_alarm_while_learning() -> None:
    rule = overall_rule(
        alert=None,
        danger=None,
        on_delay_s=0.0,
        baseline=Baseline(learn_s=5, alert_db=6, danger_db=12),
    )
    engine = AlarmEngine([rule])
    events = run(engine, [1.0, 50.0, 1.0, 1.0, 1.0])  # a spike while learning raises nothing
    assert events == [] and engine.view("m1.overall").learning
    run(engine, [1.0], start_s=5)
    # +6 dB as an amplitude ratio is 10^(6/20) (IEC 60027-3 field-quantity level)
    assert engine.view("m1.overall").alert == pytest.approx(10**0.3, rel=1e-12)
    assert engine.view("m1.overall").danger == pytest.approx(10**0.6, rel=1e-12)


def test_baseline_learning_keeps_a_bounded_evenly_spaced_sample() -> None:
    rule = overall_rule(
        alert=None, danger=None, baseline={"learn_s": 1e6, "alert_factor": 2, "danger_factor": 4}
    )
    engine = AlarmEngine([rule])
    run(engine, list(np.arange(5000.0)))
    learn = engine.snapshot()["alarms"]["m1.overall"]["learn"]
    assert len(learn) < LEARN_MAX
    step = learn[1] - learn[0]
    assert step == 4.0 and learn == list(np.arange(0.0, 5000.0, step))


def test_snapshot_restore_resumes_identically() -> None:
    rules = [
        overall_rule("m1"),
        overall_rule("m2", latch=True, on_delay_s=0.0, off_delay_s=1.0),
        overall_rule(
            "m3",
            alert=None,
            danger=None,
            on_delay_s=1.0,
            baseline={"learn_s": 30, "alert_factor": 2, "danger_factor": 4},
        ),
    ]
    rng = np.random.default_rng(3)
    noise = rng.uniform(0.9, 1.1, 60)
    feeds = {"m1": SERIES, "m2": list(SERIES[::-1]), "m3": list(noise[:40]) + [2.5] * 20}
    ref = AlarmEngine(rules)
    a = AlarmEngine(rules)

    def step(engine: AlarmEngine, t: int) -> list[AlarmEvent]:
        out = []
        for ch, series in feeds.items():
            st = "sensor-fault" if ch == "m2" and 26 <= t <= 28 else "ok"
            out += engine.evaluate(frame(ch, t, overall=series[t]), st)
        return out

    ref_events, a_events = [], []
    for t in range(45):
        ref_events += step(ref, t)
        if t < 19:  # pending danger on-delay on m1 (since 18), learning on m3
            a_events += step(a, t)
        elif t == 19:
            a_events += step(a, t)
            snap = json.loads(json.dumps(a.snapshot(), allow_nan=False))
            a = AlarmEngine(rules)
            a.restore(snap)
        else:
            a_events += step(a, t)
        if t == 27:
            ref_events.append(ref.ack("m2.overall", "op", "n", t_ns=T0 + t * S))
            a_events.append(a.ack("m2.overall", "op", "n", t_ns=T0 + t * S))
    assert a_events == ref_events
    assert len(ref_events) >= 8  # the run exercised transitions on every channel
    assert {e.channel for e in ref_events} == {"m1", "m2", "m3"}
    assert a.views() == ref.views()


def test_restore_refuses_another_version_and_bad_states() -> None:
    engine = AlarmEngine([overall_rule()])
    with pytest.raises(ValueError, match="alarm snapshot version=7 is not 1"):
        engine.restore({"version": 7, "alarms": {}})
    snap = engine.snapshot()
    snap["alarms"]["m1.overall"]["state"] = "tripped"
    with pytest.raises(ValueError, match="state='tripped' is not one of 'normal', 'alert'"):
        engine.restore(snap)


def test_transition_table_refuses_invalid_transitions() -> None:
    assert check_transition("normal", "alert") == (AlarmState.NORMAL, AlarmState.ALERT)
    assert check_transition("latched", "normal", "ack") == (AlarmState.LATCHED, AlarmState.NORMAL)
    with pytest.raises(InvalidTransition, match="latched -> normal by value is not an allowed"):
        check_transition("latched", "normal", "value")
    with pytest.raises(
        InvalidTransition,
        match="normal -> latched by value .* from normal: "
        "alert \\(by value\\), danger \\(by value\\)",
    ):
        check_transition(AlarmState.NORMAL, AlarmState.LATCHED)
    with pytest.raises(InvalidTransition, match="alert -> alert"):
        check_transition("alert", "alert")
    with pytest.raises(ValueError, match="from_state='nominal' is not one of 'normal'"):
        check_transition("nominal", "alert")
    with pytest.raises(ValueError, match="cause='operator' is not one of 'value', 'ack'"):
        check_transition("normal", "alert", "operator")


def test_rule_checks_its_arguments() -> None:
    with pytest.raises(ValueError, match="kind='peak' is not one of 'band', 'tone', 'overall'"):
        overall_rule(kind="peak")
    with pytest.raises(ValueError, match=r"rule 'm1.overall': danger: 2 must be above alert 3"):
        overall_rule(alert=3.0)
    with pytest.raises(ValueError, match="absolute alert/danger or baseline_learn_s, not both"):
        overall_rule(baseline={"learn_s": 5, "alert_factor": 2, "danger_factor": 4})
    with pytest.raises(ValueError, match="give alert_factor and danger_factor, or alert_db"):
        Baseline(learn_s=5, alert_factor=2, danger_db=12)
    with pytest.raises(ValueError, match="hysteresis=1.0 must be in"):
        overall_rule(hysteresis=1.0)
    with pytest.raises(ValueError, match="is not url-safe"):
        overall_rule(id="m1 overall")


CONFIG = {
    "sources": [
        {
            "id": "s",
            "kind": "tcp",
            "listen": "127.0.0.1:9101",
            "format": "f32le",
            "sample_rate_hz": 12800,
            "channels": ["p1-de-h", "p1-de-v", "fan-h"],
        }
    ],
    "analysis": {"fmax_hz": 5000, "lines": 1600},
    "channels": [
        {"id": "fan-h", "analysis": {"unit": "acceleration"}},
        {"id": "p1-de-h", "speed_rpm": 1480},
    ],
    "bands": [
        {"channel": "p1-de-h", "name": "Bearing HF", "lo_hz": 1000, "hi_hz": 3000},
        {"channel": "*", "name": "overall", "lo_hz": 10, "hi_hz": 1000},
    ],
    "tones": [{"channel": "*", "name": "1X", "order": 1}],
    "alarms": [
        {"channel": "*", "overall": True, "alert": 2.8, "danger": 4.5},
        {"channel": "*", "band": "Bearing HF", "alert": 0.4, "danger": 0.9, "latch": True},
        {"channel": "*", "tone": "1X", "alert": 2.0, "danger": 5.0},
        {"channel": "fan-h", "overall": True, "alert": 0.5, "danger": 1.0, "on_delay_s": 2},
    ],
}


def test_rules_from_config_expands_star_and_lets_a_channel_entry_win() -> None:
    cfg = parse_config(CONFIG, env={})
    rules = {r.id: r for r in rules_from_config(cfg)}
    assert sorted(rules) == [
        "fan-h.overall",
        "fan-h.signal",
        "p1-de-h.band.bearing-hf",
        "p1-de-h.overall",
        "p1-de-h.signal",
        "p1-de-h.tone.1x",
        "p1-de-v.overall",
        "p1-de-v.signal",
    ]  # the band and the order tone exist only on p1-de-h (the only channel with a speed);
    # every channel has its loss-of-signal rule (loss_of_signal = "alert" by default)
    assert rules["fan-h.signal"].kind == "signal" and rules["fan-h.signal"].alert == 1.0
    assert (rules["fan-h.overall"].alert, rules["fan-h.overall"].on_delay_s) == (0.5, 2.0)
    assert rules["fan-h.overall"].unit == "g"  # unit = acceleration → g
    assert rules["p1-de-v.overall"].unit == "mm/s"  # velocity default
    assert rules["p1-de-h.band.bearing-hf"].latch
    assert rules["p1-de-h.band.bearing-hf"].name == "Bearing HF"
    # the running channels may be given (e.g. a simulated source listing none)
    assert [r.id for r in rules_from_config(cfg, ["p1-de-v", "fan-h"])] == [
        "p1-de-v.overall",
        "fan-h.overall",
        "p1-de-v.signal",
        "fan-h.signal",
    ]
    off = json.loads(json.dumps(CONFIG))
    listed = {ch["id"] for ch in off["channels"]}
    off["channels"] += [{"id": c} for c in off["sources"][0]["channels"] if c not in listed]
    for ch in off["channels"]:
        ch["loss_of_signal"] = "off"
    assert not [r for r in rules_from_config(parse_config(off, env={})) if r.kind == "signal"]


def test_rules_from_config_errors_name_the_entry() -> None:
    data = json.loads(json.dumps(CONFIG))
    data["alarms"].append({"channel": "fan-h", "overall": True, "alert": 1, "danger": 2})
    with pytest.raises(ValueError, match=r"alarms\[4\]: repeats alarms\[3\] \(overall"):
        rules_from_config(parse_config(data, env={}))
    cfg = parse_config(CONFIG, env={})
    with pytest.raises(ValueError, match=r"alarms\[3\].channel: 'fan-h' is not a channel"):
        rules_from_config(cfg, ["p1-de-h"])


def test_a_snapshot_written_before_the_alarms_package_still_restores() -> None:
    # data/alarm_snapshot_v1.json: snapshot() and views() of four rules (absolute, latching
    # and acknowledged in a sensor fault, learning a factor baseline, a learned dB baseline)
    # as written by the single-module service/alarms.py; the format must stay readable.
    saved = json.loads((Path(__file__).parent / "data" / "alarm_snapshot_v1.json").read_text())
    rules = [
        overall_rule("m1"),
        overall_rule("m2", latch=True, on_delay_s=0.0, off_delay_s=1.0),
        overall_rule("m3", alert=None, danger=None, on_delay_s=1.0,
                     baseline={"learn_s": 30, "alert_factor": 2, "danger_factor": 4}),
        overall_rule("m4", alert=None, danger=None,
                     baseline={"learn_s": 5, "alert_db": 6, "danger_db": 12}),
    ]
    engine = AlarmEngine(rules)
    engine.restore(saved["snapshot"])
    # fields added since (shelving) read as "not shelved"; everything saved is as it was
    unshelved = {"shelved": False, "shelved_until_ns": None, "shelved_ns": None,
                 "shelved_by": "", "shelve_reason": ""}
    assert [v.as_dict() for v in engine.views()] == [{**v, **unshelved} for v in saved["views"]]
    shelf = {k: v for k, v in unshelved.items() if k != "shelved"}
    snap = saved["snapshot"]
    assert engine.snapshot() == {
        **snap, "alarms": {rid: {**a, **shelf} for rid, a in snap["alarms"].items()}}
    # and it runs on from there: m2's fault ends with the value low, and the latching alarm
    # goes straight to normal (not latched): it was acknowledged while the value was high
    events = engine.evaluate(frame("m2", 29, overall=0.1), "ok")
    events += engine.evaluate(frame("m2", 30.5, overall=0.1), "ok")
    assert [(e.from_state, e.to_state) for e in events] == [("danger", "normal")]
