"""The service's alarm engine, which evaluates a whole push with array operations
(``AlarmEngine.evaluate_push``), against the per-rule reference engine
(``service.alarms.reference``) stepped frame by frame: on random value sequences around the
levels, with hysteresis, on/off delays, latching, baselines, acknowledgements, suspending
channel states, time jitter and clock steps, both make the same events (same transitions,
same times, same values and levels) and the same snapshot."""

from __future__ import annotations

import math
import pickle
from typing import Any

import numpy as np
import pytest

from service.alarms import AckRefused, AlarmEngine, Baseline, Rule, signal_rule
from service.alarms.reference import ReferenceAlarmEngine
from service.types import FrameSettings, PeakSettings, PushFrames, PushPeaks

CHANNELS = ("c0", "c1", "c2", "c3")
BANDS = ("1x", "bearing", "high")
TONES = ("2x",)
NS = 1_000_000_000
STEP_NS = 80_000_000  # 12.5 frames/s


def _no_peaks(power: np.ndarray, s: PeakSettings) -> list[tuple[()]]:
    return [() for _ in range(len(power))]


def _push(values: np.ndarray, t_ns: int, seq0: int, primary: tuple[bool, ...] | None = None
          ) -> PushFrames:
    """A push of CHANNELS whose [overall | bands | tones] are ``values`` [C, 1 + B + T]."""
    c = len(CHANNELS)
    nb = len(BANDS)
    bands = np.concatenate((values[:, 1:1 + nb], values[:, :1]), axis=1)  # overall last
    edges = np.tile(np.array([[10.0, 100.0]] * (nb + 1)), (c, 1, 1))
    power = np.zeros((c, 9), dtype=np.float32)
    settings = FrameSettings(profile="default", fs=2560.0, n=16, df_hz=160.0, f0_hz=0.0,
                             lines=8, fmax_hz=1000.0, window="hann", enbw_bins=1.5,
                             averaging="exponential", input_unit="g", unit="mm/s",
                             amplitude="rms", lowcut_hz=0.0)
    peaks = PushPeaks(power, PeakSettings("g", 160.0, "hann", 16, "mm/s", "rms", 0, 0.0, 0.0),
                      _no_peaks)
    return PushFrames(
        source_id="s", channels=CHANNELS, settings=settings,
        primary=np.array(primary or (True,) * c), seq0=seq0, t_ns=t_ns, end_index=0,
        averages=8, power=power, band_names=BANDS, bands=bands, band_edges=edges,
        tone_names=TONES, tones=values[:, 1 + nb:].copy(),
        tone_hz=np.full((c, len(TONES)), 50.0), fault=np.zeros(c, dtype=bool),
        speed_rpm=np.full(c, math.nan), speed_source=("",) * c, speed_status=("",) * c,
        speed_variation=np.full(c, math.nan), speed_varied=np.zeros(c, dtype=bool),
        peaks=peaks,
    )


def _rules(rng: np.random.Generator) -> list[Rule]:
    """Random value rules on every channel (overall, bands, the tone; some with a baseline,
    some missing from the push), and a loss-of-signal rule on some channels."""
    rules = []
    for ch in CHANNELS:
        for kind, name in [("overall", "overall"), *(("band", b) for b in BANDS),
                           ("tone", TONES[0]), ("band", "not-in-push")]:
            if rng.random() < 0.15:
                continue
            # on a grid of 1/8 (as the quantised values): values land on levels exactly
            alert = float(rng.integers(4, 13)) / 8
            baseline = None
            if rng.random() < 0.2:
                baseline = Baseline(learn_s=float(rng.choice([0.3, 1.0])),
                                    alert_factor=1.5, danger_factor=2.5)
            rules.append(Rule(
                id=f"{ch}.{kind}.{name}", channel=ch, kind=kind, name=name,  # type: ignore[arg-type]
                alert=None if baseline else alert,
                danger=None if baseline else alert + float(rng.integers(1, 8)) / 8,
                hysteresis=float(rng.choice([0.0, 0.05, 0.2])),
                on_delay_s=float(rng.choice([0.0, 0.0, 0.16, 0.5])),
                off_delay_s=float(rng.choice([0.0, 0.0, 0.24, 1.0])),
                latch=bool(rng.random() < 0.4), unit="mm/s", baseline=baseline,
                profile=str(rng.choice(["", "default"])),
            ))
        if rng.random() < 0.5:
            rules.append(signal_rule(ch, str(rng.choice(["alert", "danger"]))))
    return rules


def _values(rng: np.random.Generator, steps: int, grid: bool = False) -> np.ndarray:
    """[steps, C, K] random walks that cross the levels (0.5 … 3) both ways, some NaN;
    ``grid``: rounded to 1/8, so that values equal levels and clear thresholds (h = 0)."""
    k = 1 + len(BANDS) + len(TONES)
    walk = np.cumsum(rng.normal(0.0, 0.25, (steps, len(CHANNELS), k)), axis=0)
    v = np.abs(1.0 + walk) % 3.2
    if grid:
        v = np.round(v * 8) / 8
    v[rng.random(v.shape) < 0.02] = np.nan
    return v


def _event_dict(e: Any) -> dict[str, Any]:
    d = dict(e.as_dict())
    d.pop("id", None)
    return d


def _run(seed: int, steps: int = 400, t0_ns: int = 1_700_000_000 * NS) -> tuple[int, int]:
    rng = np.random.default_rng(seed)
    rules = _rules(rng)
    vec, ref = AlarmEngine(rules), ReferenceAlarmEngine(rules)
    values = _values(rng, steps, grid=seed % 2 == 1)
    statuses = ["ok"] * len(CHANNELS)
    t = t0_ns
    events = transitions = 0
    for p in range(steps):
        # the clock: mostly steady, sometimes arrival jitter back, rarely a step back
        r = rng.random()
        t += STEP_NS if r < 0.9 else -int(rng.integers(1, NS // 2)) if r < 0.97 else -3 * NS
        if rng.random() < 0.03:  # a channel's state changes now and then
            c = int(rng.integers(len(CHANNELS)))
            statuses[c] = str(rng.choice(["ok", "ok", "sensor-fault", "gap", "overrun",
                                          "no-signal"]))
        faults = ["bad samples" if s == "sensor-fault" else "" for s in statuses]
        push = _push(values[p], t, seq0=p * len(CHANNELS))
        got = vec.evaluate_push(push, statuses, faults)
        want = []
        for c in range(len(CHANNELS)):
            want += [(e, c) for e in ref.evaluate(push.frame(c), statuses[c], fault=faults[c])]
        # same events, same order, same channel
        assert [(_event_dict(e), c) for e, c in got] == [(_event_dict(e), c) for e, c in want]
        events += len(got)
        transitions += sum(e.kind == "transition" for e, _ in got)
        if rng.random() < 0.05:  # an operator acknowledges an active alarm in both
            active = [v.rule for v in ref.active() if not v.acked]
            if active:
                rid = str(rng.choice(active))
                a = vec.ack(rid, "op", "seen", t_ns=t)
                b = ref.ack(rid, "op", "seen", t_ns=t)
                assert _event_dict(a) == _event_dict(b)
        if p % 50 == 0:
            assert vec.snapshot() == ref.snapshot()
    assert vec.snapshot() == ref.snapshot()
    assert vec.views() == ref.views()
    return events, transitions


@pytest.mark.parametrize("seed", range(12))
def test_vectorised_alarms_equal_the_per_rule_engine(seed: int) -> None:
    events, transitions = _run(seed)
    # the sequences do exercise the state machines (not a comparison of two silences)
    assert transitions >= 10, (events, transitions)


def test_times_beyond_int64_stay_exact() -> None:
    """A producer's header times at the end of the int64 range (tests/service/
    test_robustness.py): frame times run past 2**63 − 1 ns and both engines still agree."""
    events, transitions = _run(3, steps=200, t0_ns=2**63 - 1 - 5 * NS)
    assert transitions >= 5, (events, transitions)


def test_restore_and_replace_rules_keep_equal() -> None:
    """A snapshot of one engine restored into both, then a rule set changed by a reload:
    both go on alike."""
    rng = np.random.default_rng(99)
    rules = _rules(rng)
    src = AlarmEngine(rules)
    values = _values(rng, 60)
    t = 1_700_000_000 * NS
    for p in range(60):
        t += STEP_NS
        src.evaluate_push(_push(values[p], t, p), ["ok"] * 4, [""] * 4)
    snap = src.snapshot()
    vec, ref = AlarmEngine(rules), ReferenceAlarmEngine(rules)
    vec.restore(snap)
    ref.restore(snap)
    assert vec.snapshot() == ref.snapshot() == snap
    changed = [Rule(**{**r.as_dict(), "hysteresis": 0.1, "baseline": r.baseline})
               if i % 3 == 0 and r.kind != "signal" else r for i, r in enumerate(rules[1:])]
    assert vec.replace_rules(changed) == ref.replace_rules(changed)
    values = _values(rng, 200)
    for p in range(200):
        t += STEP_NS
        push = _push(values[p], t, p)
        got = [_event_dict(e) for e, _ in vec.evaluate_push(push, ["ok"] * 4, [""] * 4)]
        want = [_event_dict(e) for c in range(4) for e in ref.evaluate(push.frame(c), "ok")]
        assert got == want
    assert vec.snapshot() == ref.snapshot()


def test_acknowledging_a_normal_alarm_is_refused_by_both() -> None:
    rule = Rule(id="c0.overall", channel="c0", kind="overall", name="overall", alert=1.0,
                danger=2.0)
    for eng in (AlarmEngine([rule]), ReferenceAlarmEngine([rule])):
        with pytest.raises(AckRefused, match="is normal"):
            eng.ack("c0.overall", "op", t_ns=1)


def test_a_push_pickles_with_its_values() -> None:
    """A push crosses a process boundary whole (the arrays, not the frames made so far)."""
    rng = np.random.default_rng(1)
    push = _push(_values(rng, 1)[0], 123 * NS, 7)
    first = push.frame(2)
    back = pickle.loads(pickle.dumps(push))
    again = back.frame(2)  # the same frame, made again on the other side
    for name in ("channel", "seq", "t_ns", "overall", "bands", "tones", "quality", "unit"):
        assert getattr(again, name) == getattr(first, name), name
    np.testing.assert_array_equal(again.power, first.power)
    assert again.peaks == ()
    np.testing.assert_array_equal(back.bands, push.bands)
    assert back.channels == push.channels and back.settings == push.settings
