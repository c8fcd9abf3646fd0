"""Tests for `quaver check` reporting every problem of a file in one run: the model errors of
each entry, then the cross-checks of the entries that did validate, without echoes."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from service import cli
from service.config import ConfigError, parse_config

SHA = "ab" * 32

# Fourteen independent mistakes across nine tables, each marked with the line it must give.
BROKEN = f"""
[service]
listen = "127.0.0.1:8750"
retention_dayz = 3                   # 1 unknown key

[analysis]
fmax_hz = 1000
lines = 810                          # 2 not a multiple of 25
window = "hanning"                   # 3 not a window

[[sources]]
id = "line-a"
kind = "tcp"
listen = "127.0.0.1:9101"
format = "f32le"
sample_rate_hz = 2000                # 4 below 2.56 * fmax
channels = ["p1", "p2"]

[[sources]]
id = "line-b"
kind = "udp"
listen = "127.0.0.1:9102"
format = "framed"
sample_rate_hz = "fast"              # 5 not a number
channels = ["p3"]

[[channels]]
id = "p1"
machine = "P1"
speed_rpm = 1480

[[channels]]
id = "p9"                            # 6 no source has it

[[bands]]
channel = "p1"
name = "overall"
lo_hz = 10
hi_hz = 900

[[bands]]
channel = "p1"
name = "high"
lo_hz = 500
hi_hz = 1500                         # 7 above Fmax

[[bands]]
channel = "p3"
name = "low"
lo_hz = 100
hi_hz = 50                           # 8 edges reversed

[[tones]]
channel = "p2"
name = "1X"
order = 1                            # 9 p2 has no running speed

[[alarms]]
channel = "p1"
band = "overal"                      # 10 no such band
alert = 1.0
danger = 2.0

[[alarms]]
channel = "p1"
band = "high"                        # its band's own problem says it all: no line
alert = 1.0
danger = 2.0

[[alarms]]
channel = "p3"
band = "low"                         # its source failed: no line
alert = 1.0
danger = 2.0

[[alarms]]
channel = "p1"
overall = true
alert = 3.0
danger = 2.0                         # 11 danger below alert

[[alarms]]
channel = "p8"                       # 12 no such channel
overall = true
alert = 1.0
danger = 2.0

[[tokens]]
name = "ops"
role = "boss"                        # 13 not a role
sha256 = "{SHA}"

[[machines]]
id = "M7"                            # 14 no channel is on it
"""

EXPECTED = [
    r"^service\.retention_dayz: unknown key",
    r"^analysis\.window: 'hanning' is not one of",
    r"^sources\[1\]\.sample_rate_hz: ",
    r"^bands\[2\]\.hi_hz: 50 must be above lo_hz 100",
    r"^alarms\[3\]\.danger: 2 must be above alert 3",
    r"^tokens\[0\]\.role: 'boss' is not one of",
    r"^analysis\.lines: 2\.56·810 = 2073\.6 samples is not an integer",
    r"^analysis\.fmax_hz: 1000 Hz needs a sample rate of at least 2\.56·fmax = 2560 Hz; "
    r"source 'line-a' runs at 2000 Hz",
    r"^channels\[1\]\.id: 'p9' is not produced by any source",
    r"^bands\[1\]\.hi_hz: 1500 Hz is above fmax_hz of channel 'p1' \(1000 Hz\)",
    r"^tones\[0\]\.order: channel 'p2' has no speed_rpm",
    r"^alarms\[0\]\.band: 'overal' is not a band of channel 'p1' \(bands: 'overall'\)",
    r"^alarms\[4\]\.channel: 'p8' is not a channel of any source",
    r"^machines\[0\]\.id: 'M7' is not the machine of any channel",
]


def test_check_lists_fourteen_mistakes_in_one_run(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "broken.toml"
    path.write_text(BROKEN)
    assert cli.main(["check", "-c", str(path)]) == 2
    err = capsys.readouterr().err
    lines = [ln.strip() for ln in err.splitlines()[1:] if ln.strip()]
    assert err.splitlines()[0].endswith(f"broken.toml: {len(EXPECTED)} problems"), err
    for pattern in EXPECTED:
        hits = [ln for ln in lines if re.search(pattern, ln)]
        assert len(hits) == 1, (pattern, lines)
    # nothing else: no echo of a failed entry (the alarms on 'high' and on p3's 'low')
    assert len(lines) == len(EXPECTED), lines


def _good() -> dict[str, object]:
    return {
        "sources": [
            {"id": "a", "kind": "tcp", "listen": "127.0.0.1:9101", "format": "f32le",
             "sample_rate_hz": 12800, "channels": ["c1", "c2"]},
        ],
        "bands": [{"channel": "c1", "name": "b1", "lo_hz": 10, "hi_hz": 100}],
        "alarms": [{"channel": "c1", "band": "b1", "alert": 1.0, "danger": 2.0}],
    }


def test_salvaged_indices_are_the_files_own() -> None:
    d = _good()
    # bands[0] fails its model; bands[1] of the file is bands[0] of what is cross-checked
    d["bands"] = [
        {"channel": "c1", "name": "bad", "lo_hz": 100, "hi_hz": 10},
        {"channel": "c1", "name": "b1", "lo_hz": 10, "hi_hz": 100},
        {"channel": "c1", "name": "b1", "lo_hz": 20, "hi_hz": 200},
    ]
    with pytest.raises(ConfigError) as e:
        parse_config(d, env={})
    assert len(e.value.problems) == 2, e.value.problems
    assert e.value.problems[0].startswith("bands[0]")
    assert e.value.problems[1] == "bands[2].name: 'b1' repeats bands[1] on channel 'c1'"


def test_a_failed_band_silences_only_the_alarms_on_it() -> None:
    d = _good()
    d["bands"] = [{"channel": "c1", "name": "b1", "lo_hz": 10, "hi_hz": "x"}]
    d["alarms"] = [
        {"channel": "c1", "band": "b1", "alert": 1.0, "danger": 2.0},
        {"channel": "c2", "band": "b1", "alert": 1.0, "danger": 2.0},
    ]
    with pytest.raises(ConfigError) as e:
        parse_config(d, env={})
    # c2 has no band b1 whatever bands[0] says: that one is a mistake of its own
    assert e.value.problems[1:] == ["alarms[1].band: 'b1' is not a band of channel 'c2' "
                                    "(bands: none)"]
    assert e.value.problems[0].startswith("bands[0].hi_hz: ")


def test_a_bad_setting_of_a_table_keeps_the_rest_checked() -> None:
    d = _good()
    d["history"] = {"interval_s": "often"}  # one field of [history]: its default stands in
    d["alarms"] = [{"channel": "c9", "overall": True, "alert": 1.0, "danger": 2.0}]
    with pytest.raises(ConfigError) as e:
        parse_config(d, env={})
    assert len(e.value.problems) == 2, e.value.problems
    assert e.value.problems[0].startswith("history.interval_s: ")
    assert e.value.problems[1] == ("alarms[0].channel: 'c9' is not a channel of any source "
                                   "(channels: 'c1', 'c2')")
