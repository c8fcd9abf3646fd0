"""Shared fixtures for tests that run a real quaver service in a subprocess on loopback.

Knows the config file shape, the CLI entry point and the public HTTP API; nothing of the
service's internals."""

from __future__ import annotations

import contextlib
import hashlib
import math
import signal
import socket
import ssl
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import httpx
import numpy as np
import pytest

from tests.proc import child_env

REPO = Path(__file__).resolve().parents[2]
LOOPBACK = "127.0.0.1"
START_TIMEOUT_S = 20.0  # the service must answer /health within this
STOP_TIMEOUT_S = 5.0  # SIGTERM, then kill after this
POLL_S = 0.05
START_ATTEMPTS = 3  # a free port can be taken between probing and binding: retry with new ones

# With [[tokens]] configured every read needs a viewer token (README "Access"); the harness
# reads with this one, added to any config that has tokens (see :func:`with_harness_token`).
HARNESS_TOKEN = "test-harness-viewer-5e1f"
HARNESS_NAME = "test-harness"

T = TypeVar("T")


def with_harness_token(tokens: list[dict[str, str]]) -> list[dict[str, str]]:
    """``tokens`` plus the harness's viewer token (once)."""
    entry = {"name": HARNESS_NAME, "role": "viewer",
             "sha256": hashlib.sha256(HARNESS_TOKEN.encode()).hexdigest()}
    return [*(t for t in tokens if t.get("name") != HARNESS_NAME), entry]


# --- free ports and a small TOML writer ----------------------------------------------------


def free_ports(n: int, kind: int = socket.SOCK_STREAM) -> list[int]:
    """``n`` distinct ports free on 127.0.0.1 right now (all probed at once, then released)."""
    socks = []
    try:
        for _ in range(n):
            s = socket.socket(socket.AF_INET, kind)
            s.bind((LOOPBACK, 0))
            socks.append(s)
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"TOML value {v!r} must be finite here")
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def to_toml(doc: dict[str, Any]) -> str:
    """A TOML document from ``{table: {key: value}}`` and ``{array: [{key: value}, ...]}``;
    dicts nested inside a table or array entry become inline tables."""
    out: list[str] = []
    for name, body in doc.items():
        if isinstance(body, dict):
            out.append(f"[{name}]")
            out += [f"{k} = {_toml_value(v)}" for k, v in body.items()]
        elif isinstance(body, list):
            for entry in body:
                out.append(f"[[{name}]]")
                out += [f"{k} = {_toml_value(v)}" for k, v in entry.items()]
        else:
            raise TypeError(f"top-level {name!r} must be a table or an array of tables")
        out.append("")
    return "\n".join(out)


# --- a one-channel service for fault and admin tests --------------------------------------

SMALL_FS = 2560.0  # Hz = 2.56 × 1 kHz (common practice: fs = 2.56·Fmax)


def one_band_config(**tables: Any) -> dict[str, Any]:
    """A config (as dicts, see :func:`run_service`) with one framed TCP source ``s`` of one
    channel ``a`` at SMALL_FS, peak g, band ``b`` = 100–150 Hz and an alarm on it at 0.5 g
    (alert) and 1.0 g (danger) RMS; ``tables`` replace or add top-level entries."""
    doc: dict[str, Any] = {
        "analysis": {"fmax_hz": 1000.0, "lines": 400, "averaging": "exponential",
                     "averages": 2, "unit": "acceleration", "output_unit": "g",
                     "amplitude": "peak"},
        "sources": [{"id": "s", "kind": "tcp", "listen": "auto", "format": "framed",
                     "sample_rate_hz": SMALL_FS, "channels": ["a"]}],
        "bands": [{"name": "b", "lo_hz": 100.0, "hi_hz": 150.0}],
        "alarms": [{"channel": "a", "band": "b", "alert": 0.5, "danger": 1.0}],
    }
    doc.update(tables)
    return doc


def feed_tone(sock: socket.socket, first: int, n: int, amp: float, block: int = 256) -> int:
    """Send ``n`` samples of a 123 Hz sine of peak ``amp`` g (inside band b) as framed
    blocks, stream indices from ``first``; returns the next index."""
    from service.wire import encode_frame

    t = (first + np.arange(n)) / SMALL_FS
    x = (amp * np.sin(2 * np.pi * 123.0 * t))[None, :].astype(np.float32)
    for k in range(0, n, block):
        sock.sendall(encode_frame(x[:, k:k + block], "f32le", SMALL_FS, first + k))
    return first + n


# --- polling -------------------------------------------------------------------------------


def wait_for(probe: Callable[[], T | None], what: str, timeout_s: float = 15.0,
             on_fail: Callable[[], str] | None = None) -> T:
    """Call ``probe`` until it returns something other than None/False; bounded in time and
    in count. On time-out fail with ``what`` (and ``on_fail()``, e.g. the service log)."""
    deadline = time.monotonic() + timeout_s
    for _ in range(int(timeout_s / POLL_S) + 1):
        got = probe()
        if got is not None and got is not False:
            return got
        if time.monotonic() > deadline:
            break
        time.sleep(POLL_S)
    extra = f"\n{on_fail()}" if on_fail is not None else ""
    pytest.fail(f"timed out after {timeout_s:g} s waiting for {what}{extra}")


# --- a running service ---------------------------------------------------------------------


@dataclass
class RunningService:
    """A quaver service in a subprocess: HTTP at ``base_url``; ``ports`` maps each source
    id with a socket to its port; ``config_path`` is the TOML it was started with."""

    proc: subprocess.Popen[bytes]
    base_url: str
    http_port: int
    ports: dict[str, int]
    config_path: Path
    log_path: Path
    client: httpx.Client = field(repr=False)

    def alive(self) -> bool:
        return self.proc.poll() is None

    def log_tail(self, lines: int = 40) -> str:
        try:
            text = self.log_path.read_text(encoding="utf-8", errors="replace")
        except OSError:
            return "(no service log)"
        return "service log (last lines):\n" + "\n".join(text.splitlines()[-lines:])

    def get(self, path: str, **params: Any) -> Any:
        """GET ``/api/v1/{path}`` and return its JSON; any status but 200 fails the test."""
        r = self.client.get(f"/api/v1/{path}", params=params or None)
        if r.status_code != 200:
            pytest.fail(f"GET {path} {params or ''} -> {r.status_code} {r.text[:300]}\n"
                        f"{self.log_tail()}")
        return r.json()

    def get_or_none(self, path: str, **params: Any) -> Any | None:
        """Like :meth:`get`, but a 503 (no spectrum yet) gives None."""
        r = self.client.get(f"/api/v1/{path}", params=params or None)
        if r.status_code == 503:
            return None
        if r.status_code != 200:
            pytest.fail(f"GET {path} -> {r.status_code} {r.text[:300]}\n{self.log_tail()}")
        return r.json()

    def health(self) -> dict[str, Any]:
        return self.get("health")  # type: ignore[no-any-return]

    def source(self, source_id: str) -> dict[str, Any]:
        """The source's entry in /health (state and counters)."""
        return self.health()["sources"][source_id]  # type: ignore[no-any-return]

    def channel(self, channel_id: str) -> dict[str, Any]:
        """The channel's entry in /channels."""
        for ch in self.get("channels"):
            if ch["id"] == channel_id:
                return ch  # type: ignore[no-any-return]
        pytest.fail(f"channel {channel_id!r} is not listed by /channels")

    def wait(self, probe: Callable[[], T | None], what: str, timeout_s: float = 15.0) -> T:
        def checked() -> T | None:
            if not self.alive():
                pytest.fail(f"the service exited ({self.proc.returncode}) while waiting for "
                            f"{what}\n{self.log_tail()}")
            return probe()

        return wait_for(checked, what, timeout_s, on_fail=self.log_tail)

    def assert_healthy(self) -> None:
        """The process is still running, /health answers, its store writes and no source's
        pipeline has failed. (Its ``status`` also reads ``degraded`` while any channel is not
        ok — e.g. no-signal after a test's producer left — which tests check themselves.)"""
        assert self.alive(), f"the service exited ({self.proc.returncode})\n{self.log_tail()}"
        h = self.health()
        assert h["store"]["ok"], h["store"]
        failed = {s: v["pipeline"] for s, v in h["sources"].items()
                  if v.get("pipeline", {}).get("state") == "failed"}
        assert not failed, failed


def _stop(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=STOP_TIMEOUT_S)



@contextlib.contextmanager
def run_service(
    doc: dict[str, Any], workdir: Path, wrap: Callable[[list[str]], list[str]] | None = None,
    *, listen_host: str = LOOPBACK,
) -> Iterator[RunningService]:
    """Start ``python -m service serve -c FILE`` for the config ``doc`` and stop it after.

    ``wrap`` (optional) turns that command into the one actually run (e.g. inside a mount
    namespace); the wrapper must pass SIGTERM on to the service.

    ``doc`` is the config as dicts (see :func:`to_toml`); its ``[service]`` (if any) is added
    to the listen address (``listen_host``, loopback unless a test runs in its own network
    namespace) and data folder the harness picks; every TCP or
    UDP source whose ``listen`` is ``"auto"`` gets a free loopback port. Waits (at most
    START_TIMEOUT_S) until ``GET /api/v1/health`` answers; retries with fresh ports if a
    probed port was taken meanwhile. Stops with SIGTERM, then kill after STOP_TIMEOUT_S.
    """
    workdir.mkdir(parents=True, exist_ok=True)
    for attempt in range(1, START_ATTEMPTS + 1):
        auto = [s for s in doc.get("sources", []) if s.get("listen") == "auto"]
        tcp = free_ports(1 + sum(s["kind"] == "tcp" for s in auto))
        udp = free_ports(sum(s["kind"] == "udp" for s in auto), socket.SOCK_DGRAM)
        http_port, tcp_ports = tcp[0], iter(tcp[1:])
        udp_ports = iter(udp)
        ports: dict[str, int] = {}
        sources = []
        for s in doc.get("sources", []):
            s = dict(s)
            if s.get("listen") == "auto":
                ports[s["id"]] = next(tcp_ports if s["kind"] == "tcp" else udp_ports)
                s["listen"] = f"{LOOPBACK}:{ports[s['id']]}"
            sources.append(s)
        service = {"listen": f"{listen_host}:{http_port}", "data_dir": "quaver-data",
                   **doc.get("service", {})}
        full = {**{k: v for k, v in doc.items() if k != "sources"}, "service": service,
                "sources": sources}
        if full.get("tokens"):
            full["tokens"] = with_harness_token(full["tokens"])
        config_path = workdir / "quaver.toml"
        config_path.write_text(to_toml(full), encoding="utf-8")
        log_path = workdir / f"service-{attempt}.log"
        with open(log_path, "wb") as log:
            command = [sys.executable, "-m", "service", "serve", "-c", str(config_path)]
            proc = subprocess.Popen(
                wrap(command) if wrap is not None else command,
                cwd=workdir, env=child_env(), stdout=log, stderr=subprocess.STDOUT,
            )
        cert = service.get("tls_cert")  # HTTPS: the client trusts exactly that certificate
        base_url = f"{'https' if cert else 'http'}://{LOOPBACK}:{http_port}"
        headers = {"Authorization": f"Bearer {HARNESS_TOKEN}"} if full.get("tokens") else None
        verify: Any = ssl.create_default_context(cafile=cert) if cert else True
        client = httpx.Client(base_url=base_url, timeout=10.0, trust_env=False, headers=headers,
                              verify=verify)
        svc = RunningService(proc, base_url, http_port, ports, config_path, log_path, client)
        try:
            up = _wait_up(svc)
            if up:
                yield svc
                return
            text = svc.log_tail(200)
            if attempt == START_ATTEMPTS or "address already in use" not in text.lower():
                pytest.fail(f"the service did not start (exit {proc.returncode})\n{text}")
        finally:
            client.close()
            _stop(proc)


def _wait_up(svc: RunningService) -> bool:
    """True once /health answers; False if the process exited first; fails on time-out."""
    deadline = time.monotonic() + START_TIMEOUT_S
    for _ in range(int(START_TIMEOUT_S / POLL_S) + 1):
        if not svc.alive():
            return False
        with contextlib.suppress(httpx.TransportError):
            if svc.client.get("/api/v1/health").status_code == 200:
                return True
        if time.monotonic() > deadline:
            break
        time.sleep(POLL_S)
    pytest.fail(f"/api/v1/health did not answer within {START_TIMEOUT_S:g} s\n{svc.log_tail()}")


def run_cli(*argv: str, timeout_s: float = 60.0) -> subprocess.CompletedProcess[str]:
    """Run ``python -m service ARGV`` (the ``quaver`` command) from the repository, with the
    same clean environment as the service; bounded by ``timeout_s``."""
    return subprocess.run([sys.executable, "-m", "service", *argv], cwd=REPO, env=child_env(),
                          capture_output=True, text=True, timeout=timeout_s, check=False)


@pytest.fixture(scope="session")
def quaver_cli() -> Callable[..., subprocess.CompletedProcess[str]]:
    """``quaver_cli(*argv)`` runs the ``quaver`` command line in a subprocess (see run_cli)."""
    return run_cli


@pytest.fixture(scope="module")
def quaver_service_factory(
    tmp_path_factory: pytest.TempPathFactory,
) -> Iterator[Callable[[dict[str, Any]], RunningService]]:
    """``start(doc)`` runs a service for the config ``doc`` (see :func:`run_service`) until
    the end of the module; returns its :class:`RunningService`."""
    with contextlib.ExitStack() as stack:

        def start(doc: dict[str, Any]) -> RunningService:
            return stack.enter_context(run_service(doc, tmp_path_factory.mktemp("quaver")))

        yield start
