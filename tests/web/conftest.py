"""Fixtures for the browser tests: the demo service in a subprocess, headless Chromium.

Knows the public HTTP API, the demo config and the dashboard's markup; nothing of the
service's internals. Everything listens on and talks to 127.0.0.1 only."""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import httpx
import pytest

from bench import harness

REPO = Path(__file__).resolve().parents[2]
ARTIFACTS = REPO / "test-artifacts"
LOOPBACK = "127.0.0.1"
CHROMIUM = Path("/usr/bin/chromium")
START_TIMEOUT_S = 25.0
STOP_TIMEOUT_S = 5.0
POLL_S = 0.1
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
# The operator token the alarm test configures (its SHA-256 goes in the config).
OPERATOR_TOKEN = "web-test-operator-7c1d"
VIEWER_TOKEN = "web-test-viewer-19ab"
# The demo has [[tokens]] (its operator), so every read needs a token (README "Access"):
# the harness and the pages use it unless a test signs in itself.
DEMO_TOKEN = "quaver-demo-operator"  # service/demo.py DEMO_OPERATOR_TOKEN

T = TypeVar("T")


def wait_for(probe: Callable[[], T | None | bool], what: str, timeout_s: float = 15.0) -> T:
    """Call ``probe`` until it returns something truthy; bounded by time and count."""
    deadline = time.monotonic() + timeout_s
    for _ in range(int(timeout_s / POLL_S) + 2):
        got = probe()
        if got:
            return got  # type: ignore[return-value]
        if time.monotonic() > deadline:
            break
        time.sleep(POLL_S)
    pytest.fail(f"timed out after {timeout_s:g} s waiting for {what}")


def free_port() -> int:
    return harness.free_ports(1)[0]


def _service_code(port: int, data_dir: Path, speed: float | None, tokens: bool) -> str:
    """Python for ``python -c``: the built-in demo on ``port`` (optionally faster, with tokens)."""
    if not tokens:
        return (
            "import service.demo as d, service.runner as a; "
            f"raise SystemExit(a.run_service(d.demo_config(listen='{LOOPBACK}:{port}', "
            f"data_dir={str(data_dir)!r}, speed={speed!r})))"
        )
    toks = [
        {
            "name": "web-test-operator",
            "role": "operator",
            "sha256": hashlib.sha256(OPERATOR_TOKEN.encode()).hexdigest(),
        },
        {
            "name": "web-test-viewer",
            "role": "viewer",
            "sha256": hashlib.sha256(VIEWER_TOKEN.encode()).hexdigest(),
        },
    ]
    return (
        "import service.demo as d, service.runner as a, service.config as c; "
        f"cfg = d.demo_config(listen='{LOOPBACK}:{port}', data_dir={str(data_dir)!r}, "
        f"speed={speed!r}); "
        f"cfg = cfg.model_copy(update={{'tokens': [c.TokenConfig(**t) for t in {toks!r}]}}); "
        "raise SystemExit(a.run_service(cfg))"
    )


@dataclass
class Service:
    """The demo service in a subprocess at ``base_url``; can be stopped and started again
    on the same port (to test the dashboard's reconnection)."""

    port: int
    data_dir: Path
    log_path: Path
    speed: float | None = None
    tokens: bool = False
    proc: subprocess.Popen[bytes] | None = None
    client: httpx.Client = field(init=False)

    def __post_init__(self) -> None:
        self.client = httpx.Client(
            base_url=self.base_url, timeout=5.0, trust_env=False,
            headers={"Authorization": f"Bearer {self.token}"},
        )

    @property
    def token(self) -> str:
        """The token the harness reads with (the viewer's when the test set its own)."""
        return VIEWER_TOKEN if self.tokens else DEMO_TOKEN

    @property
    def base_url(self) -> str:
        return f"http://{LOOPBACK}:{self.port}"

    def start(self) -> None:
        code = _service_code(self.port, self.data_dir, self.speed, self.tokens)
        self.proc = harness.launch([sys.executable, "-c", code], self.data_dir, self.log_path,
                                   append=True)
        wait_for(
            self._healthy,
            f"the service on port {self.port} to answer /health\n{self.log_tail()}",
            START_TIMEOUT_S,
        )

    def _healthy(self) -> bool:
        if self.proc is not None and self.proc.poll() is not None:
            pytest.fail(f"the service exited ({self.proc.returncode})\n{self.log_tail()}")
        try:
            return self.client.get("/api/v1/health/live").status_code == 200
        except httpx.HTTPError:
            return False

    def wait_all_channels(self) -> list[dict[str, Any]]:
        """Wait until every channel that has spectra has one (so the page never meets a
        503), and return those channels. A tacho channel (``kind = "tacho"``) has none: it
        is left out (its page shows its speed)."""

        def probe() -> list[dict[str, Any]] | None:
            ch = [c for c in self.get("channels") if c.get("kind") != "tacho"]
            return ch if ch and all(c["latest"] for c in ch) else None

        return wait_for(probe, "a spectrum on every channel that has spectra", START_TIMEOUT_S)

    def stop(self) -> None:
        p, self.proc = self.proc, None
        if p is not None:
            harness.stop_process(p, timeout_s=STOP_TIMEOUT_S)

    def get(self, path: str, **params: Any) -> Any:
        r = self.client.get(f"/api/v1/{path}", params=params or None)
        assert r.status_code == 200, f"GET {path} -> {r.status_code} {r.text[:200]}"
        return r.json()

    def status(self, path: str) -> tuple[int, Any]:
        r = self.client.get(f"/api/v1/{path}")
        try:
            return r.status_code, r.json()
        except ValueError:
            return r.status_code, None

    def has_route(self, path: str) -> bool:
        """False when the service answers FastAPI's generic 404 (no such route)."""
        code, body = self.status(path)
        return not (code == 404 and isinstance(body, dict) and body.get("detail") == "Not Found")

    def has_stream(self) -> bool:
        """Whether /api/v1/stream accepts a WebSocket."""
        from websockets.exceptions import InvalidHandshake
        from websockets.sync.client import connect

        try:
            with connect(f"ws://{LOOPBACK}:{self.port}/api/v1/stream", open_timeout=3, proxy=None,
                         additional_headers={"Authorization": f"Bearer {self.token}"}):
                return True
        except (InvalidHandshake, OSError, TimeoutError):
            return False

    def log_tail(self, n: int = 30) -> str:
        return "service log:\n" + harness.log_tail(self.log_path, n)

    def close(self) -> None:
        self.stop()
        self.client.close()


def _make_service(tmp: Path, **kw: Any) -> Service:
    tmp.mkdir(parents=True, exist_ok=True)
    return Service(port=free_port(), data_dir=tmp, log_path=tmp / "service.log", **kw)


@pytest.fixture(scope="session")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Service]:
    """The demo service at real-time pace, shared by the read-only tests."""
    svc = _make_service(tmp_path_factory.mktemp("demo"))
    try:
        svc.start()
        svc.wait_all_channels()
        yield svc
    finally:
        svc.close()


@pytest.fixture
def own_service(tmp_path: Path) -> Iterator[Callable[..., Service]]:
    """A factory for a service of the test's own (to stop, restart, or run faster)."""
    made: list[Service] = []

    def make(**kw: Any) -> Service:
        svc = _make_service(tmp_path / f"svc{len(made)}", **kw)
        made.append(svc)
        svc.start()
        return svc

    try:
        yield make
    finally:
        for s in made:
            s.close()


# --- the browser ---------------------------------------------------------------------------


@pytest.fixture(scope="session")
def chromium_path() -> Path:
    if not CHROMIUM.exists():
        msg = f"{CHROMIUM} is missing (apt-get install chromium)"
        if os.environ.get("CI", "").lower() in ("1", "true", "yes"):
            pytest.fail(msg)
        pytest.skip(msg)
    return CHROMIUM


@pytest.fixture(scope="session")
def browser(chromium_path: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    """A persistent headless Chromium context (profile and XDG dirs in a temp dir)."""
    try:
        from playwright.sync_api import sync_playwright
    except ImportError as e:  # pragma: no cover - depends on the environment
        if os.environ.get("CI", "").lower() in ("1", "true", "yes"):
            pytest.fail(f"playwright is not installed: {e}")
        pytest.skip(f"playwright is not installed: {e}")
    home = tmp_path_factory.mktemp("chromium")
    env: dict[str, str | float | bool] = {
        **os.environ,
        "XDG_CONFIG_HOME": str(home / "config"),
        "XDG_CACHE_HOME": str(home / "cache"),
    }
    with sync_playwright() as pw:
        ctx = pw.chromium.launch_persistent_context(
            str(home / "profile"),
            executable_path=str(chromium_path),
            headless=True,
            args=CHROMIUM_ARGS,
            env=env,
            viewport={"width": 1440, "height": 900},
        )
        # Loopback only: anything else the page might ask for is refused.
        ctx.route(
            lambda url: not url.startswith(f"http://{LOOPBACK}:"), lambda route: route.abort()
        )
        try:
            yield ctx
        finally:
            ctx.close()


@dataclass
class PageLog:
    """Console messages and uncaught errors of one page."""

    console: list[Any] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)

    def console_errors(self) -> list[tuple[str, str]]:
        return [
            (m.text, (m.location or {}).get("url", "")) for m in self.console if m.type == "error"
        ]


@pytest.fixture
def page(browser: Any) -> Iterator[tuple[Any, PageLog]]:
    """A fresh page with its console and page errors recorded, signed in to the demo (its
    token in sessionStorage, as the sign-in prompt leaves it; see :func:`signed_in_as`)."""
    pg = browser.new_page()
    signed_in_as(pg, DEMO_TOKEN)
    log = PageLog()
    pg.on("console", lambda m: log.console.append(m))
    pg.on("pageerror", lambda e: log.errors.append(str(e)))
    try:
        yield pg, log
    finally:
        pg.close()


def signed_in_as(pg: Any, token: str) -> None:
    """Every document the page opens from now on starts with ``token`` kept for the session."""
    key = "'quaver.token'"
    pg.add_init_script(
        f"if (!sessionStorage.getItem({key})) sessionStorage.setItem({key}, {token!r});"
    )


def screenshot(pg: Any, name: str, **kw: Any) -> Path:
    """Save a screenshot under test-artifacts/ (gitignored) for a person to look at."""
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / f"{name}.png"
    pg.screenshot(path=str(path), **kw)
    return path
