"""The built-in demo: the invented pumping station of ``service/examples/demo.toml`` (with its
variable-speed fan and tacho), with
its published operator token and the optional framed TCP input for ``quaver feed``.

Knows the config parser and the packaged examples only."""

from __future__ import annotations

import tomllib
from importlib import resources

from .config import Config, parse_config

DEMO_OPERATOR_TOKEN = "quaver-demo-operator"  # matches the hash in examples/demo.toml


def demo_config(
    *,
    listen: str | None = None,
    data_dir: str | None = None,
    speed: float | None = None,
    fault_start_s: float | None = None,
    fault_ramp_s: float | None = None,
    feed_listen: str | None = None,
    variable_speed: bool = False,
) -> Config:
    """The built-in demo: the invented pumping station from ``service/examples/demo.toml``.

    ``speed`` paces the simulation (×real time); ``fault_start_s``/``fault_ramp_s`` move
    and stretch the scripted bearing fault (plant seconds). ``feed_listen`` (HOST:PORT)
    adds the framed TCP input of ``examples/demo-feed.toml`` there, for ``quaver feed``
    (``quaver demo``: 127.0.0.1:8751 unless told otherwise; without it only HTTP is bound).
    The variable-speed fan v1 with its tacho is part of the demo; ``variable_speed`` is
    accepted for older callers and changes nothing (``quaver demo --variable-speed`` too)."""
    examples = resources.files("service").joinpath("examples")
    data = tomllib.loads(examples.joinpath("demo.toml").read_text(encoding="utf-8"))
    if feed_listen is not None:
        feed = tomllib.loads(examples.joinpath("demo-feed.toml").read_text(encoding="utf-8"))
        for s in feed["sources"]:
            s["listen"] = feed_listen
        for table in ("sources", "channels"):
            data[table] = [*data.get(table, []), *feed[table]]
    del variable_speed  # the fan is always there now
    if listen is not None:
        data.setdefault("service", {})["listen"] = listen
    if data_dir is not None:
        data.setdefault("service", {})["data_dir"] = data_dir
    for s in data.get("sources", []):
        if s.get("kind") == "simulated":
            for key, value in (
                ("speed", speed),
                ("fault_start_s", fault_start_s),
                ("fault_ramp_s", fault_ramp_s),
            ):
                if value is not None:
                    s[key] = value
    return parse_config(data, source="built-in demo")
