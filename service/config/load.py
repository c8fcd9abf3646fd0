"""Reading a config: TOML file → dicts → models → cross-checks, with every pydantic error
translated into ``key.path[index].field: reason`` and the ``QUAVER_*`` overrides applied.

Knows nothing about sockets, storage or the engine."""

from __future__ import annotations

import difflib
import os
import tomllib
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from ..entries import EntryProblem
from .base import ID_PATTERN, SHA256_PATTERN, ConfigError
from .checks import _cross_check, notify_env_problems
from .cluster import cluster_problems
from .models import MODELS, Config
from .mqtt import mqtt_problems
from .opcua import anchor_opcua_paths, opcua_problems
from .salvage import salvage
from .sources import SOURCE_KINDS, FileSourceConfig

# Environment variables that override one setting each: variable -> (table, key).
ENV_OVERRIDES: dict[str, tuple[str, str]] = {
    "QUAVER_LISTEN": ("service", "listen"),
    "QUAVER_DATA_DIR": ("service", "data_dir"),
}


def load_config(path: str | os.PathLike[str], env: Mapping[str, str] | None = None) -> Config:
    """Read, validate and cross-check one TOML config file; raise ConfigError listing every
    problem (TOML syntax errors carry their line and column)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as e:
        raise ConfigError([f"cannot read: {e}"], source=str(p)) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ConfigError([f"TOML syntax error: {e}"], source=str(p)) from None
    return parse_config(data, base_dir=p.resolve().parent, source=str(p), env=env)


def parse_config(
    data: Mapping[str, Any],
    *,
    base_dir: Path | None = None,
    source: str = "config",
    env: Mapping[str, str] | None = None,
) -> Config:
    """Validate a config already parsed into dicts (e.g. built by ``quaver demo``).

    ``env`` (default ``os.environ``) supplies ``QUAVER_*`` overrides and the variables
    ``[[notify]] urls_env`` names; ``base_dir`` anchors
    relative paths. Raises ConfigError listing every problem.
    """
    env = os.environ if env is None else env
    raw: dict[str, Any] = {k: v for k, v in data.items()}
    from_env: dict[tuple[str, str], str] = {}
    for var, (table, key) in ENV_OVERRIDES.items():
        if env.get(var):
            section = raw.get(table)
            raw[table] = {**(section if isinstance(section, dict) else {}), key: env[var]}
            from_env[(table, key)] = var
    try:
        cfg = Config.model_validate(raw)
    except ValidationError as e:
        problems = _pydantic_problems(e, from_env)
        # the entries that did validate are cross-checked too, so one run lists every problem
        salvaged = salvage(raw, e)
        if salvaged is not None:
            problems += [p for p in _cross_check(*salvaged) if p not in problems]
        raise ConfigError(problems, source=source) from None
    problems = (_cross_check(cfg) + notify_env_problems(cfg, env) + mqtt_problems(cfg, env)
                + opcua_problems(cfg, base_dir) + cluster_problems(cfg))
    if problems:
        raise ConfigError(problems, source=source)
    if base_dir is not None:
        if ("service", "data_dir") not in from_env:
            cfg.service.data_dir = str(base_dir / cfg.service.data_dir)
        if cfg.service.tls_cert is not None:
            cfg.service.tls_cert = str(base_dir / cfg.service.tls_cert)
        if cfg.service.tls_key is not None:
            cfg.service.tls_key = str(base_dir / cfg.service.tls_key)
        if cfg.mqtt.ca_file is not None:
            cfg.mqtt.ca_file = str(base_dir / cfg.mqtt.ca_file)
        for s in cfg.sources:
            if isinstance(s, FileSourceConfig):
                s.path = str(base_dir / s.path)
        anchor_opcua_paths(cfg.opcua, base_dir)
    return cfg


def _path(loc: Iterable[int | str]) -> str:
    out = ""
    for part in loc:
        if part == "[key]":  # pydantic's marker for a table key that failed, e.g. a profile name
            continue
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


_KNOWN_KEYS = sorted({name for m in MODELS for name in m.model_fields})


def _pydantic_problems(e: ValidationError, from_env: Mapping[tuple[str, str], str]) -> list[str]:
    problems = []
    for err in e.errors():
        loc = list(err["loc"])
        # a discriminated union puts the tag in the path: sources.0.tcp.format
        if len(loc) >= 3 and loc[0] == "sources" and loc[2] in SOURCE_KINDS:
            del loc[2]
        kind, ctx, value = err["type"], err.get("ctx", {}), err.get("input")
        entry = ctx.get("error")
        if isinstance(entry, EntryProblem):  # one entry's own rule (service.entries)
            problems.append(_path([*loc, entry.key] if entry.key else loc) + ": " + entry.text)
            continue
        if kind == "literal_error":
            msg = f"{value!r} is not one of {ctx['expected'].replace(' or ', ', ')}"
        elif kind == "union_tag_invalid":
            loc.append("kind")
            msg = f"{ctx['tag']!r} is not one of {ctx['expected_tags']}"
        elif kind == "union_tag_not_found":
            loc.append("kind")
            msg = f"required key is missing (one of {', '.join(map(repr, SOURCE_KINDS))})"
        elif kind == "missing":
            msg = "required key is missing"
        elif kind == "extra_forbidden":
            near = difflib.get_close_matches(str(loc[-1]), _KNOWN_KEYS, n=1)
            msg = "unknown key" + (f"; did you mean {near[0]!r}?" if near else "")
        elif kind == "string_pattern_mismatch" and ctx.get("pattern") == ID_PATTERN:
            msg = (
                f"{value!r} is not a url-safe id: letters, digits, '.', '_' and '-', "
                "starting with a letter or digit, at most 64 characters"
            )
        elif kind == "string_pattern_mismatch" and ctx.get("pattern") == SHA256_PATTERN:
            msg = "must be the 64 hex digits of a SHA-256 digest"
        else:
            msg = err["msg"].removeprefix("Value error, ")
            secret = "urls" in loc  # a notification URL may hold a password: not echoed
            if not isinstance(value, dict | list) and repr(value) not in msg and not secret:
                msg += f" (got {value!r})"
        where = _path(loc)
        if len(loc) == 2 and tuple(loc) in from_env:
            where += f" (from {from_env[(loc[0], loc[1])]})"  # type: ignore[index]
        problems.append(f"{where}: {msg}")
    return problems
