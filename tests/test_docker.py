"""Lint of the container and service files in docker/ against the package they ship.

Knows the files' formats (Dockerfile, compose YAML, systemd unit) and the package's public
config, CLI and HTTP app; builds nothing (this machine has no container engine).

Each check is a function returning a list of problems, run on the real file (no problems)
and on a spoiled copy (the expected problem), so every check is shown to be able to fail.
"""

from __future__ import annotations

import hashlib
import http.server
import inspect
import ipaddress
import json
import re
import shlex
import socket
import subprocess
import sys
import threading
import tomllib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from urllib.parse import urlsplit

import pytest
import yaml
from fastapi.testclient import TestClient

from service.api import create_app
from service.cli import build_parser
from service.config import (
    Config,
    ConfigError,
    ServiceSettings,
    check_listen_allowed,
    load_config,
    parse_config,
    parse_listen,
)
from service.hub import Hub

REPO = Path(__file__).resolve().parents[1]
DOCKER = REPO / "docker"
DOCKERFILE = DOCKER / "Dockerfile"
COMPOSE = DOCKER / "compose.yaml"
EXAMPLE_CONFIG = DOCKER / "quaver.toml"
UNIT = DOCKER / "quaver.service"
HEALTH_PATH = "/api/v1/health/live"  # the one route open without a token (README "Access")
DATA_DIR = "/var/lib/quaver"  # the one data folder: image VOLUME, compose, config, systemd
SUBPROCESS_TIMEOUT_S = 30.0


def default_port() -> int:
    return parse_listen(ServiceSettings().listen)[1]


def console_scripts() -> dict[str, str]:
    with open(REPO / "pyproject.toml", "rb") as f:
        return dict(tomllib.load(f)["project"]["scripts"])


# --- a small Dockerfile reader ------------------------------------------------------------


@dataclass(frozen=True)
class Instruction:
    stage: int  # 0-based index of the FROM this instruction belongs to
    name: str  # upper case: FROM, RUN, USER, ...
    args: str  # the rest of the (continued) line


def parse_dockerfile(text: str) -> list[Instruction]:
    """Instructions in order; comment lines dropped, ``\\`` continuations joined."""
    out: list[Instruction] = []
    stage = -1
    pending = ""
    for raw in text.splitlines():
        line = raw.strip()
        if not pending and (not line or line.startswith("#")):
            continue
        if pending and line.startswith("#"):  # a comment inside a continued instruction
            continue
        if line.endswith("\\"):
            pending += line[:-1].rstrip() + " "
            continue
        line, pending = pending + line, ""
        name, _, args = line.partition(" ")
        name = name.upper()
        if name == "FROM":
            stage += 1
        out.append(Instruction(stage, name, args.strip()))
    return out


def exec_form(args: str) -> list[str] | None:
    """The JSON array of an exec-form CMD/ENTRYPOINT/HEALTHCHECK CMD, else None."""
    try:
        value = json.loads(args)
    except json.JSONDecodeError:
        return None
    return value if isinstance(value, list) and all(isinstance(v, str) for v in value) else None


def final_stage(ins: list[Instruction]) -> list[Instruction]:
    last = max(i.stage for i in ins)
    return [i for i in ins if i.stage == last]


def the(ins: list[Instruction], name: str) -> Instruction:
    found = [i for i in ins if i.name == name]
    assert len(found) == 1, f"expected one {name} in the final stage, found {len(found)}"
    return found[0]


def cmd_argv(ins: list[Instruction]) -> list[str]:
    argv = exec_form(the(final_stage(ins), "CMD").args)
    assert argv, "CMD must be in exec form (a JSON array), so quaver is PID 1 and gets SIGTERM"
    return argv


# --- the checks (each returns its problems) -------------------------------------------------

EXACT_TAG = re.compile(r"^\d+\.\d+\.\d+(?:-[a-z0-9][a-z0-9.-]*)?$")  # 3.11.11-slim-bookworm
DIGEST = re.compile(r"@sha256:[0-9a-f]{64}$")


def image_pin_problem(image: str) -> str | None:
    """None if ``image`` is pinned to an exact release tag or a digest."""
    if DIGEST.search(image):
        return None
    name, _, tag = image.rpartition(":")
    if not name or "/" in tag:  # no tag at all (a registry port is not a tag)
        return f"{image!r} has no tag: it means 'latest'"
    if tag == "latest":
        return f"{image!r} is 'latest'"
    if not EXACT_TAG.match(tag):
        return f"{image!r}: tag {tag!r} is not an exact major.minor.patch release"
    return None


def check_base_images(ins: list[Instruction]) -> list[str]:
    problems, stages = [], set()
    for i in ins:
        if i.name != "FROM":
            continue
        words = [w for w in i.args.split() if not w.startswith("--")]
        image = words[0]
        if image.lower() not in stages:  # FROM an earlier stage needs no pin
            p = image_pin_problem(image)
            if p:
                problems.append(p)
        if len(words) >= 3 and words[1].upper() == "AS":
            stages.add(words[2].lower())
    return problems


def check_user(ins: list[Instruction]) -> list[str]:
    """The final stage sets a non-root USER before CMD, and creates that uid."""
    stage = final_stage(ins)
    names = [i.name for i in stage]
    if "CMD" not in names:
        return ["no CMD in the final stage"]
    users = [i for i in stage[: names.index("CMD")] if i.name == "USER"]
    if not users:
        return ["no USER before CMD: the service would run as root"]
    user = users[-1].args.split(":")[0]
    if user in ("root", "0"):
        return [f"USER {users[-1].args} is root"]
    created = " ".join(i.args for i in stage if i.name == "RUN" and "useradd" in i.args)
    if user.isdigit() and not re.search(rf"--uid\s+{user}\b", created):
        return [f"USER {user} is not a uid made by useradd in the final stage"]
    if not user.isdigit() and not re.search(rf"useradd\b.*\s{re.escape(user)}\s*(&&|$)", created):
        return [f"USER {user} is not made by useradd in the final stage"]
    return []


def check_expose(ins: list[Instruction], port: int) -> list[str]:
    exposed = [
        p.split("/")[0] for i in final_stage(ins) if i.name == "EXPOSE" for p in i.args.split()
    ]
    return [] if exposed == [str(port)] else [f"EXPOSE {exposed} is not the service's port {port}"]


def healthcheck_argv(ins: list[Instruction]) -> list[str]:
    args = the(final_stage(ins), "HEALTHCHECK").args
    opts, sep, cmd = args.partition("CMD ")
    assert sep, "HEALTHCHECK needs a CMD"
    argv = exec_form(cmd.strip())
    assert argv, "HEALTHCHECK CMD must be in exec form (no shell in the way)"
    return argv


def check_healthcheck(argv: list[str], port: int, served: set[str]) -> list[str]:
    urls = re.findall(r"https?://[^\s'\"]+", " ".join(argv))
    if len(urls) != 1:
        return [f"expected one URL in the health check, found {urls}"]
    u = urlsplit(urls[0])
    problems = []
    if u.path != HEALTH_PATH:
        problems.append(f"health check asks {u.path!r}, not {HEALTH_PATH!r}")
    if u.path not in served:
        problems.append(f"health check asks {u.path!r}, which the app does not serve")
    if u.port != port:
        problems.append(f"health check asks port {u.port}, the service listens on {port}")
    if not ipaddress.ip_address(u.hostname or "0.0.0.0").is_loopback:
        problems.append(f"health check asks {u.hostname!r}: it runs inside the container")
    if argv[0] in ("curl", "wget"):
        problems.append(f"{argv[0]} is not in the slim base image")
    return problems


def check_cmd(argv: list[str], scripts: dict[str, str]) -> list[str]:
    """The command is a console script of this package and parses as ``serve -c FILE``."""
    if argv[0] not in scripts:
        return [f"CMD runs {argv[0]!r}, not a console script of the package ({sorted(scripts)})"]
    try:
        args = build_parser().parse_args(argv[1:])
    except SystemExit:
        return [f"quaver cannot parse {argv[1:]}"]
    if args.command != "serve" or not PurePosixPath(args.config).is_absolute():
        return [f"CMD is not 'serve -c /absolute/config.toml': {argv}"]
    return []


def served_paths() -> set[str]:
    """Every HTTP path the app serves (GET/POST routes and WebSocket routes)."""
    app = create_app(Hub())
    try:  # FastAPI >= 0.12x keeps included routers lazily; this walks them
        from fastapi.routing import iter_route_contexts

        return {rc.path for rc in iter_route_contexts(app.routes) if rc.path}
    except ImportError:
        return {r.path for r in app.routes if getattr(r, "path", None)}


# --- the Dockerfile ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def dockerfile() -> list[Instruction]:
    return parse_dockerfile(DOCKERFILE.read_text(encoding="utf-8"))


def test_reader_joins_continuations_and_skips_comments():
    ins = parse_dockerfile("# c\nFROM a:1.2.3 AS b\nRUN x \\\n  # inner\n  && y\nFROM b\nUSER 1\n")
    assert [(i.stage, i.name, i.args) for i in ins] == [
        (0, "FROM", "a:1.2.3 AS b"),
        (0, "RUN", "x && y"),
        (1, "FROM", "b"),
        (1, "USER", "1"),
    ]


def test_base_images_are_pinned(dockerfile):
    assert check_base_images(dockerfile) == []
    assert any(i.name == "FROM" and "slim" in i.args for i in final_stage(dockerfile))


@pytest.mark.parametrize(
    ("image", "problem"),
    [
        ("python", "has no tag"),
        ("python:latest", "is 'latest'"),
        ("python:3.11-slim", "not an exact"),
        ("python:3-slim-bookworm", "not an exact"),
        ("registry.local:5000/python", "has no tag"),
        ("python:3.11.11-slim-bookworm", None),
        ("python@sha256:" + "0" * 64, None),
    ],
)
def test_pin_rule(image, problem):
    got = image_pin_problem(image)
    assert (got is None) if problem is None else (problem in got)


def test_runs_as_a_non_root_user(dockerfile):
    assert check_user(dockerfile) == []


def test_user_check_can_fail(dockerfile):
    text = DOCKERFILE.read_text(encoding="utf-8")
    assert check_user(parse_dockerfile(text.replace("USER 10001:10001", "USER root"))) == [
        "USER root is root"
    ]
    no_user = parse_dockerfile(re.sub(r"(?m)^USER .*$", "", text))
    assert check_user(no_user) == ["no USER before CMD: the service would run as root"]
    assert check_user(parse_dockerfile(text.replace("--uid 10001", "--uid 10002"))) == [
        "USER 10001 is not a uid made by useradd in the final stage"
    ]


def test_exposes_the_default_port(dockerfile):
    assert default_port() == 8750  # the design notes, "Interfaces (contract)": 127.0.0.1:8750
    assert check_expose(dockerfile, default_port()) == []
    assert check_expose(dockerfile, 9999) == ["EXPOSE ['8750'] is not the service's port 9999"]


def test_healthcheck_asks_a_route_the_app_serves(dockerfile):
    served = served_paths()
    assert HEALTH_PATH in served
    argv = healthcheck_argv(dockerfile)
    assert check_healthcheck(argv, default_port(), served) == []
    spoiled = [a.replace(HEALTH_PATH, "/api/v1/healthz") for a in argv]
    assert check_healthcheck(spoiled, default_port(), served) == [
        f"health check asks '/api/v1/healthz', not {HEALTH_PATH!r}",
        "health check asks '/api/v1/healthz', which the app does not serve",
    ]


def test_health_answers_without_a_token_off_loopback():
    # The container listens on 0.0.0.0 with tokens; Docker's health check sends none.
    cfg = load_config(EXAMPLE_CONFIG, env={})
    hub = Hub()
    if "config" in inspect.signature(create_app).parameters:
        app = create_app(hub, config=cfg)
    else:  # an app that takes no config yet reads it from its state
        app = create_app(hub)
        app.state.config = cfg
    with TestClient(app, base_url="http://127.0.0.1:8750") as client:  # Docker's own probe
        r = client.get(HEALTH_PATH)
        details = client.get("/api/v1/health")
    assert r.status_code == 200, r.text
    assert r.json() == {"status": "ok"}  # no details without a token
    assert details.status_code == 401


class _Health(http.server.BaseHTTPRequestHandler):
    def do_GET(self) -> None:  # noqa: N802 - the http.server name
        self.send_response(200 if self.path == HEALTH_PATH else 503)
        self.send_header("Content-Length", "0")
        self.end_headers()

    def log_message(self, *args: object) -> None:
        pass


@pytest.fixture
def loopback_server() -> Iterator[int]:
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _Health)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05})
    thread.start()
    try:
        yield server.server_address[1]
    finally:
        server.shutdown()
        thread.join(timeout=5)
        server.server_close()


def _run_probe(argv: list[str], url: str) -> int:
    old = re.findall(r"https?://[^\s'\"]+", " ".join(argv))[0]
    assert argv[0] == "python"
    cmd = [sys.executable, *(a.replace(old, url) for a in argv[1:])]
    return subprocess.run(cmd, capture_output=True, timeout=SUBPROCESS_TIMEOUT_S).returncode


def test_healthcheck_command_exit_status(dockerfile, loopback_server):
    # Docker: exit 0 = healthy, 1 = unhealthy (Dockerfile reference, HEALTHCHECK).
    argv = healthcheck_argv(dockerfile)
    base = f"http://127.0.0.1:{loopback_server}"
    assert _run_probe(argv, base + HEALTH_PATH) == 0
    assert _run_probe(argv, base + "/api/v1/other") == 1  # an HTTP error status
    with socket.socket() as s:  # a port nobody listens on: connection refused
        s.bind(("127.0.0.1", 0))
        closed = s.getsockname()[1]
    assert _run_probe(argv, f"http://127.0.0.1:{closed}{HEALTH_PATH}") == 1


def test_cmd_is_the_packages_console_script(dockerfile):
    scripts = console_scripts()
    argv = cmd_argv(dockerfile)
    assert argv == ["quaver", "serve", "-c", "/etc/quaver/quaver.toml"]
    assert check_cmd(argv, scripts) == []
    module, _, func = scripts["quaver"].partition(":")
    assert callable(getattr(__import__(module, fromlist=[func]), func))
    assert check_cmd(["quaverd", *argv[1:]], scripts) == [
        "CMD runs 'quaverd', not a console script of the package (['quaver'])"
    ]
    assert check_cmd(["quaver", "serve", "-c", "quaver.toml"], scripts) == [
        "CMD is not 'serve -c /absolute/config.toml': ['quaver', 'serve', '-c', 'quaver.toml']"
    ]


def test_image_carries_the_example_config_at_the_cmd_path(dockerfile):
    config_path = cmd_argv(dockerfile)[-1]
    copies = [i.args.split() for i in final_stage(dockerfile) if i.name == "COPY"]
    targets = {c[-1]: c[-2] for c in copies if not c[-2].startswith("--")}
    assert targets.get(config_path) == "docker/quaver.toml"


def test_data_volume_env_and_config_agree(dockerfile):
    stage = final_stage(dockerfile)
    volumes = [
        v for i in stage if i.name == "VOLUME" for v in (exec_form(i.args) or i.args.split())
    ]
    assert volumes == [DATA_DIR]
    env = " ".join(i.args for i in stage if i.name == "ENV")
    assert re.search(rf"\bQUAVER_DATA_DIR={re.escape(DATA_DIR)}(\s|$)", env)
    assert load_config(EXAMPLE_CONFIG, env={}).service.data_dir == DATA_DIR
    # made and handed to the service user before VOLUME (a new volume copies its owner)
    names = [i.name for i in stage]
    before = " ".join(i.args for i in stage[: names.index("VOLUME")] if i.name == "RUN")
    assert f"chown quaver:quaver {DATA_DIR}" in before


# --- compose ----------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def compose_doc() -> dict:
    with open(COMPOSE, encoding="utf-8") as f:
        return yaml.safe_load(f)


@pytest.fixture(scope="module")
def compose(compose_doc) -> dict:
    return compose_doc["services"]["quaver"]


def parse_port(spec: str) -> tuple[str | None, int, int]:
    """A compose short port ``[HOST_IP:]HOST:CONTAINER`` as (host ip, host, container)."""
    parts = spec.rsplit(":", 2)
    if len(parts) == 3:
        return parts[0], int(parts[1]), int(parts[2])
    return None, int(parts[0]), int(parts[1])


def test_compose_builds_this_dockerfile(compose):
    build = compose["build"]
    assert (DOCKER / build["context"] / build["dockerfile"]).resolve() == DOCKERFILE
    assert (DOCKER / build["context"] / "pyproject.toml").is_file()


def test_compose_publishes_the_port_on_host_loopback(compose, dockerfile):
    exposed = int(the(final_stage(dockerfile), "EXPOSE").args)
    ports = [parse_port(p) for p in compose["ports"]]
    assert [p[2] for p in ports] == [exposed]
    host_ip = ports[0][0]
    # loopback by default: the example tokens are public (compose.yaml says why)
    assert host_ip is not None and ipaddress.ip_address(host_ip).is_loopback
    assert parse_port("8750:8750") == (None, 8750, 8750)


def test_compose_mounts_the_config_the_cmd_reads(compose_doc, compose, dockerfile):
    config_path = cmd_argv(dockerfile)[-1]
    mounts = [m.split(":") for m in compose["volumes"]]
    config_mounts = [m for m in mounts if m[1] == config_path]
    assert len(config_mounts) == 1
    source, _, *mode = config_mounts[0]
    assert (DOCKER / source).resolve() == EXAMPLE_CONFIG
    assert mode == ["ro"]
    # the data folder is a named volume declared at the top level (not a bind of some path)
    data = [m for m in mounts if m[1] == DATA_DIR]
    assert len(data) == 1 and data[0][0] in compose_doc["volumes"]


# --- the example config -----------------------------------------------------------------------


def test_example_config_is_valid_and_may_listen_on_all_interfaces():
    cfg = load_config(EXAMPLE_CONFIG, env={})
    check_listen_allowed(cfg)  # raises ConfigError if refused
    host, port = parse_listen(cfg.service.listen)
    assert host == "0.0.0.0" and port == default_port()
    assert cfg.tokens
    assert any(s.kind == "simulated" for s in cfg.sources)


def test_example_config_without_tokens_is_refused():
    with open(EXAMPLE_CONFIG, "rb") as f:
        data = tomllib.load(f)
    data.pop("tokens")
    cfg: Config = parse_config(data, env={})
    with pytest.raises(ConfigError, match=r"service\.listen: '0\.0\.0\.0:8750' is not a loopback"):
        check_listen_allowed(cfg)


def test_example_token_hashes_are_the_documented_examples():
    # The comment names the example tokens; their SHA-256 (FIPS 180-4, hashlib) must be the
    # configured hashes, so the file says truthfully what the hashes let in.
    text = EXAMPLE_CONFIG.read_text(encoding="utf-8")
    named = re.findall(r'"(example-[a-z-]+-replace-me)"', text)
    assert len(named) == 2
    digests = {hashlib.sha256(t.encode()).hexdigest() for t in named}
    cfg = load_config(EXAMPLE_CONFIG, env={})
    assert {t.sha256 for t in cfg.tokens} == digests
    assert "REPLACE THEM" in text


# --- the systemd unit -------------------------------------------------------------------------


def parse_unit(text: str) -> dict[str, list[tuple[str, str]]]:
    """Sections of a systemd unit as ordered (key, value) lists (keys may repeat)."""
    sections: dict[str, list[tuple[str, str]]] = {}
    current = None
    for raw in text.splitlines():
        line = raw.strip()
        if not line or line[0] in "#;":
            continue
        if line.startswith("[") and line.endswith("]"):
            current = sections.setdefault(line[1:-1], [])
            continue
        assert current is not None, f"key outside a section: {line!r}"
        key, sep, value = line.partition("=")
        assert sep, f"not key=value: {line!r}"
        current.append((key.strip(), value.strip()))
    return sections


def unit_values(unit: dict[str, list[tuple[str, str]]], section: str, key: str) -> list[str]:
    return [v for k, v in unit.get(section, []) if k == key]


def check_unit(unit: dict[str, list[tuple[str, str]]], scripts: dict[str, str]) -> list[str]:
    problems = []
    one = {
        k: unit_values(unit, "Service", k)
        for k in (
            "ExecStart",
            "User",
            "Restart",
            "NoNewPrivileges",
            "ProtectSystem",
            "StateDirectory",
            "WorkingDirectory",
        )
    }
    for k, v in one.items():
        if len(v) != 1:
            problems.append(f"[Service] {k}= appears {len(v)} times")
    if problems:
        return problems
    argv = shlex.split(one["ExecStart"][0])
    if PurePosixPath(argv[0]).name not in scripts or not PurePosixPath(argv[0]).is_absolute():
        problems.append(f"ExecStart runs {argv[0]!r}: not an absolute path to a console script")
    if argv[1:3] != ["serve", "-c"] or len(argv) != 4:
        problems.append(f"ExecStart is not 'quaver serve -c FILE': {argv[1:]}")
    else:
        args = build_parser().parse_args(argv[1:])
        if not PurePosixPath(args.config).is_absolute():
            problems.append(f"ExecStart config {args.config!r} is not an absolute path")
    if one["User"][0] in ("", "root", "0"):
        problems.append(f"User={one['User'][0]} is root")
    for key, want in (
        ("Restart", "on-failure"),
        ("NoNewPrivileges", "yes"),
        ("ProtectSystem", "strict"),
    ):
        if one[key][0] != want:
            problems.append(f"{key}={one[key][0]}, want {want}")
    data = f"/var/lib/{one['StateDirectory'][0]}"
    rw = [p for v in unit_values(unit, "Service", "ReadWritePaths") for p in v.split()]
    if data not in rw:
        problems.append(f"ReadWritePaths {rw} lacks the state directory {data}")
    if one["WorkingDirectory"][0] != data:
        problems.append(f"WorkingDirectory={one['WorkingDirectory'][0]}, want {data}")
    env = [e for v in unit_values(unit, "Service", "Environment") for e in shlex.split(v)]
    if f"QUAVER_DATA_DIR={data}" not in env:
        problems.append(f"Environment lacks QUAVER_DATA_DIR={data}")
    return problems


@pytest.fixture(scope="module")
def unit() -> dict[str, list[tuple[str, str]]]:
    return parse_unit(UNIT.read_text(encoding="utf-8"))


def test_systemd_unit(unit):
    assert check_unit(unit, console_scripts()) == []
    assert unit_values(unit, "Service", "StateDirectory") == [DATA_DIR.rsplit("/", 1)[1]]
    assert unit_values(unit, "Install", "WantedBy") == ["multi-user.target"]


def test_systemd_unit_checks_the_config_it_serves(unit):
    serve = shlex.split(unit_values(unit, "Service", "ExecStart")[0])
    (pre,) = unit_values(unit, "Service", "ExecStartPre")
    check = shlex.split(pre)
    assert check[0] == serve[0]
    assert check[1:] == ["check", "-c", serve[-1]]
    assert build_parser().parse_args(check[1:]).command == "check"


def test_systemd_unit_check_can_fail(unit):
    scripts = console_scripts()
    text = UNIT.read_text(encoding="utf-8")
    spoiled = (
        text.replace("quaver serve -c", "quaver demo --listen")
        .replace("ProtectSystem=strict", "ProtectSystem=full")
        .replace("User=quaver", "User=root")
    )
    assert check_unit(parse_unit(spoiled), scripts) == [
        "ExecStart is not 'quaver serve -c FILE': ['demo', '--listen', '/etc/quaver/quaver.toml']",
        "User=root is root",
        "ProtectSystem=full, want strict",
    ]
    no_rw = re.sub(r"(?m)^ReadWritePaths=.*$", "", text)
    assert check_unit(parse_unit(no_rw), scripts) == [
        "ReadWritePaths [] lacks the state directory /var/lib/quaver"
    ]
