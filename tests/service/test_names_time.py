"""Site time zone and display names: ISO 8601 with the zone's offset, names from the config."""

from __future__ import annotations

import tomllib

import pytest

from service.config import ConfigError, parse_config
from service.names import channel_label, channel_name, machine_name
from service.timefmt import iso_time

# 2026-05-28T20:26:40.123456789Z, in summer (CEST) and 2026-01-15T12:00:00Z in winter (CET)
SUMMER = 1_780_000_000_123_456_789
WINTER = 1_768_478_400_000_000_000


def test_iso_time_carries_the_zone_offset_at_that_instant() -> None:
    # Europe/Berlin is UTC+2 in summer time and UTC+1 otherwise (IANA tz database)
    assert iso_time(SUMMER, "Europe/Berlin") == "2026-05-28T22:26:40.123+02:00"
    assert iso_time(WINTER, "Europe/Berlin") == "2026-01-15T13:00:00.000+01:00"
    assert iso_time(SUMMER, "UTC", digits=6) == "2026-05-28T20:26:40.123456+00:00"
    assert iso_time(0, "UTC", digits=0) == "1970-01-01T00:00:00+00:00"
    # America/St_Johns has a half-hour offset, UTC-2:30 in summer (IANA tz database)
    assert iso_time(SUMMER, "America/St_Johns").endswith("-02:30")


def test_unknown_zone_is_a_config_error_naming_the_key() -> None:
    with pytest.raises(ConfigError) as e:
        parse_config({"service": {"timezone": "Mars/Olympus"}})
    assert "service.timezone" in str(e.value) and "Mars/Olympus" in str(e.value)


_CFG = """
[[sources]]
id = "s"
kind = "simulated"
channels = ["p1-de-h", "p1-nde-h", "x"]

[[channels]]
id = "p1-de-h"
machine = "P1"
name = "drive end, horizontal"

[[channels]]
id = "p1-nde-h"
machine = "P1"

[[machines]]
id = "P1"
name = "Cooling-water pump 1"
group = "utilities"
"""


def test_labels_use_the_configured_names() -> None:
    cfg = parse_config(tomllib.loads(_CFG))
    assert machine_name(cfg, "P1") == "Cooling-water pump 1"
    assert machine_name(cfg, "P9") == "P9"
    assert channel_name(cfg, "p1-de-h") == "drive end, horizontal"
    assert channel_label(cfg, "p1-de-h") == "Cooling-water pump 1 · drive end, horizontal (p1-de-h)"
    assert channel_label(cfg, "p1-nde-h") == "Cooling-water pump 1 · p1-nde-h"
    assert channel_label(cfg, "x") == "x"


def test_a_machine_entry_no_channel_names_is_an_error() -> None:
    with pytest.raises(ConfigError) as e:
        parse_config(tomllib.loads(_CFG + '\n[[machines]]\nid = "P2"\n\n[[machines]]\nid = "P1"\n'))
    text = str(e.value)
    assert "machines[1].id: 'P2' is not the machine of any channel" in text
    assert "machines[2].id: 'P1' repeats machines[0]" in text
