"""The ``[mqtt]`` table (errors by key path, in ``quaver check`` too), the topic layout and the
publisher's bounded backlog, without a broker (tests/service/test_mqtt_e2e.py has one)."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from service.config import ConfigError, parse_config
from service.hub import Hub
from service.mqtt import MqttPublisher, Topics
from tests.service.conftest import REPO, child_env, run_cli, to_toml

SOURCE = [{"id": "s", "kind": "simulated", "scenario": "demo", "channels": ["p1-de-h"]}]


def cfg_with(mqtt: dict[str, Any], env: dict[str, str] | None = None, **tables: Any) -> Any:
    return parse_config({"sources": SOURCE, "mqtt": mqtt, **tables}, env=env or {})


def test_off_by_default_with_its_defaults() -> None:
    m = parse_config({"sources": SOURCE}, env={}).mqtt
    assert m.enabled is False and m.broker == "127.0.0.1:1883" and m.qos == 0
    assert m.topic_prefix == "quaver" and m.retain == "status"
    assert m.publish == ["overall", "bands", "tones", "status", "alarms"]


# '+' and '#' are wildcards, '/' separates levels, '$' topics belong to the broker: MQTT 3.1.1
# §4.7.1 and §4.7.2 (docs/references.md)
@pytest.mark.parametrize(("mqtt", "message"), [
    ({"qos": 2}, "mqtt.qos: 2 is not one of 0, 1"),
    ({"topic_prefix": "site/#"}, "mqtt.topic_prefix: 'site/#': level '#' holds '#'"),
    ({"topic_prefix": "site//q"}, "mqtt.topic_prefix: 'site//q': level '' is empty"),
    ({"topic_prefix": "$SYS/q"}, r"mqtt.topic_prefix: '\$SYS/q' starts with '\$'"),
    ({"broker": "broker.local"}, "mqtt.broker: 'broker.local' is not host:port"),
    ({"password": "x"}, "mqtt: a password needs a username"),
    ({"username": "u", "password": "x", "password_env": "P"},
     "mqtt: give password or password_env, not both"),
    ({"ca_file": "ca.pem"}, "mqtt: ca_file is given but tls = false"),
    ({"keepalive_s": 2}, "mqtt.keepalive_s: .*greater than or equal to 5"),
    ({"backlog_max": 5}, "mqtt.backlog_max: .*greater than or equal to 10"),
    ({"publish": ["bands", "waveform"]}, "mqtt.publish"),
    ({"retain": "everything"}, "mqtt.retain"),
    ({"spectrum_interval_s": 0.1}, "mqtt.spectrum_interval_s"),
    ({"hostname": "x"}, "mqtt.hostname"),
])
def test_bad_values_name_their_key(mqtt: dict[str, Any], message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        cfg_with({"enabled": True, **mqtt})


def test_password_env_must_be_set_and_machines_must_be_topic_levels() -> None:
    bad = {"channels": [{"id": "p1-de-h", "machine": "hall 2/pump+1"}]}
    with pytest.raises(ConfigError) as e:
        cfg_with({"enabled": True, "username": "u", "password_env": "QUAVER_TEST_MQTT_PW"},
                 **bad)
    assert e.value.problems == [
        "mqtt.password_env: the environment variable QUAVER_TEST_MQTT_PW is unset or empty",
        "channels[0].machine: 'hall 2/pump+1' holds '+', '/' (reserved in MQTT topic names); "
        "with [mqtt] enabled a machine id is a topic level",
    ]
    # off: neither matters (the machine id is fine for everything else)
    cfg_with({"enabled": False, "username": "u", "password_env": "QUAVER_TEST_MQTT_PW"}, **bad)
    ok = cfg_with({"enabled": True, "username": "u", "password_env": "QUAVER_TEST_MQTT_PW"},
                  env={"QUAVER_TEST_MQTT_PW": "s3cret"})
    assert MqttPublisher(ok, Hub(), env={"QUAVER_TEST_MQTT_PW": "s3cret"}).password == "s3cret"


def test_quaver_check_reports_mqtt_problems_by_key_path(tmp_path: Path) -> None:
    path = tmp_path / "q.toml"
    path.write_text(to_toml({"sources": SOURCE, "mqtt": {"enabled": True, "qos": 3,
                                                          "topic_prefix": "a/+/b"}}))
    r = run_cli("check", "-c", str(path))
    assert r.returncode != 0
    out = r.stdout + r.stderr
    assert "mqtt.qos: 3 is not one of 0, 1" in out
    assert "mqtt.topic_prefix: 'a/+/b': level '+' holds '+'" in out


def test_topic_layout() -> None:
    t = Topics("site-a/quaver", {"a": "pump-1", "b": ""})
    assert t.channel("a") == "site-a/quaver/pump-1/a"
    assert t.channel("b") == "site-a/quaver/_/b"  # no machine
    assert t.channel("c") == "site-a/quaver/_/c"  # no [[channels]] entry
    assert t.status("a") == "site-a/quaver/pump-1/a/status"
    assert t.events == "site-a/quaver/alarms/events"
    assert t.state == "site-a/quaver/service/state"


def test_backlog_is_bounded_drops_oldest_and_counts() -> None:
    """While not connected every message is held, oldest dropped beyond backlog_max, and
    the order of what is kept is the order of publishing."""
    cfg = cfg_with({"enabled": True, "backlog_max": 10})
    pub = MqttPublisher(cfg, Hub(), env={})
    for k in range(25):
        pub._send(f"quaver/x/{k}", str(k).encode(), 0, False)
    assert pub.dropped == 15 and len(pub.backlog) == 10
    assert [int(p) for _, p, _, _ in pub.backlog] == list(range(15, 25))
    h = pub.health()
    assert h["connected"] is False and h["ok"] is False
    assert (h["backlog"], h["dropped"], h["published"]) == (10, 15, 0)
    assert re.fullmatch(r"quaver-[A-Za-z0-9._-]+", h["client_id"])


def test_without_paho_the_demo_runs_and_an_enabled_mqtt_is_a_config_error(
        tmp_path: Path) -> None:
    """paho-mqtt is an extra: a service without [mqtt] never imports it, and one with
    [mqtt] enabled but no paho is refused by the config check, not by a traceback."""
    code = f"""
import asyncio, json, sys
sys.modules["paho"] = None  # as if the extra were not installed
from service.app import Service
from service.config import ConfigError, parse_config
from service.demo import demo_config
svc = Service(demo_config(data_dir={str(tmp_path)!r}))
async def run():
    await svc.start()
    for _ in range(100):  # at most 10 s for the first frames
        await asyncio.sleep(0.1)
        if svc.hub.frames_published:
            break
    await svc.stop()
asyncio.run(run())
try:
    parse_config({{"sources": {SOURCE!r}, "mqtt": {{"enabled": True}}}}, env={{}})
    problems = []
except ConfigError as e:
    problems = e.problems
print(json.dumps({{"frames": svc.hub.frames_published, "problems": problems,
                  "paho": [m for m in sys.modules if m.startswith("paho.")]}}))
"""
    r = subprocess.run([sys.executable, "-c", code], cwd=REPO, env=child_env(),
                       capture_output=True, text=True, timeout=60, check=False)
    assert r.returncode == 0, r.stderr[-2000:]
    out = json.loads(r.stdout.strip().splitlines()[-1])
    assert out["paho"] == [] and out["frames"] > 0
    assert out["problems"] == ["mqtt.enabled: publishing needs paho-mqtt, which is not "
                               "installed (pip install 'quaver[mqtt]')"]


@pytest.mark.parametrize(("argv", "message"), [
    (["bench", "--mqtt", "auto"], "--mqtt applies to --service only"),
    (["bench", "--service", "--mqtt", "broker.local"], "--mqtt: 'broker.local' is not host:port"),
    (["bench", "--service", "--mqtt", "auto", "--channels", "32,64"],
     "--channels '32,64': expected one count with --mqtt"),
    (["bench", "--service", "--mqtt", "auto", "--short"], "do not apply to --service --mqtt"),
])
def test_bench_mqtt_option_errors(argv: list[str], message: str) -> None:
    r = run_cli(*argv)
    assert r.returncode == 2 and message in r.stderr, r.stderr
