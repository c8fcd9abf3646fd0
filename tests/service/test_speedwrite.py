"""The one speed write behind REST, MQTT and OPC UA (service.speedwrite): which channels take
a written speed, which values are speeds, and that a refusal changes nothing."""

from __future__ import annotations

import math

import pytest

from service.config import parse_config
from service.pipeline import channel_states
from service.speedwrite import SpeedRefused, check_rpm, write_speed

IDS = ["m", "f", "e", "t", "v"]


def setup() -> tuple[object, dict]:
    cfg = parse_config({
        "sources": [{"id": "s", "kind": "tcp", "listen": "127.0.0.1:9", "format": "f32le",
                     "sample_rate_hz": 12800.0, "channels": IDS}],
        "channels": [{"id": "m", "speed": "manual", "speed_rpm": 1200.0},
                     {"id": "f", "speed_rpm": 1480.0},
                     {"id": "e", "speed": "estimated", "rpm_min": 600.0, "rpm_max": 1800.0},
                     {"id": "t", "kind": "tacho"},
                     {"id": "v", "speed_from": "t"}],
    }, source="test")
    return cfg, channel_states(cfg, "s", IDS)


def test_manual_channels_take_a_speed_and_give_it_back() -> None:
    cfg, st = setup()
    sp = write_speed(cfg, st, "m", 1500, "mqtt", manual_only=True)
    assert (sp["rpm"], sp["source"], sp["written_by"]) == (1500.0, "manual", "mqtt")
    assert st["m"].manual_rpm == 1500.0
    sp = write_speed(cfg, st, "m", None, "mqtt", manual_only=True)  # withdrawn
    assert st["m"].manual_rpm is None and sp["rpm"] == 1200.0  # back to its speed_rpm
    # an operator at REST may also write a fixed channel's speed; the protocols may not
    assert write_speed(cfg, st, "f", 900.0, "op", manual_only=False)["rpm"] == 900.0
    with pytest.raises(SpeedRefused, match="'f' is not configured speed = 'manual'") as e:
        write_speed(cfg, st, "f", 900.0, "mqtt", manual_only=True)
    assert e.value.why == "not-writable"


@pytest.mark.parametrize(("cid", "match", "why"), [
    ("e", "has its speed from its 1X line", "not-writable"),
    ("v", "has its speed from tacho 't'", "not-writable"),
    ("t", "is a tacho: it measures speed", "not-writable"),
    ("nope", "no channel 'nope'", "unknown-channel"),
])
def test_measured_speeds_and_unknown_channels_are_refused(cid: str, match: str, why: str
                                                          ) -> None:
    cfg, st = setup()
    before = {k: (s.manual_rpm, s.speed_source) for k, s in st.items()}
    with pytest.raises(SpeedRefused, match=match) as e:
        write_speed(cfg, st, cid, 1000.0, "op", manual_only=False)
    assert e.value.why == why
    assert {k: (s.manual_rpm, s.speed_source) for k, s in st.items()} == before


@pytest.mark.parametrize("bad", [0, -1.0, math.nan, math.inf, 1e6 + 1, True, "900", None])
def test_what_is_not_a_speed(bad: object) -> None:
    with pytest.raises(SpeedRefused) as e:
        check_rpm(bad)
    assert e.value.why == "bad-value"
    cfg, st = setup()
    if bad is not None:  # None is the withdrawal, not a value
        with pytest.raises(SpeedRefused):
            write_speed(cfg, st, "m", bad, "op", manual_only=True)  # type: ignore[arg-type]
        assert st["m"].manual_rpm is None  # nothing written
    assert check_rpm(1e6) == 1e6 and check_rpm(1) == 1.0  # the range's ends: (0, 1e6]
