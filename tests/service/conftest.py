"""Shared fixtures for tests that run a real quaver service in a subprocess on loopback.

Knows the config file shape, the CLI entry point and the public HTTP API; nothing of the
service's internals."""

from __future__ import annotations

import contextlib
import hashlib
import socket
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

from bench import harness
from bench.harness import LOOPBACK, child_env, free_ports, to_toml  # noqa: F401 (re-exported)

REPO = Path(__file__).resolve().parents[2]
START_TIMEOUT_S = 20.0  # the service must answer /health within this
POLL_S = 0.05

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
class RunningService(harness.Child):
    """A quaver service in a subprocess (``bench.harness.Child``): HTTP at ``base_url``
    through ``client``; ``ports`` maps each source id with a socket to its port;
    ``config_path`` is the TOML it was started with."""

    client: httpx.Client = field(default=None, repr=False)  # type: ignore[assignment]

    def log_tail(self, lines: int = 40) -> str:
        return "service log (last lines):\n" + super().log_tail(lines)

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


@contextlib.contextmanager
def run_service(
    doc: dict[str, Any], workdir: Path, wrap: Callable[[list[str]], list[str]] | None = None,
    *, listen_host: str = LOOPBACK,
) -> Iterator[RunningService]:
    """Start ``python -m service serve -c FILE`` for the config ``doc`` and stop it after
    (``bench.harness.start_service``; a service that does not start fails the test).

    ``wrap`` (optional) turns that command into the one actually run (e.g. inside a mount
    namespace); the wrapper must pass SIGTERM on to the service.

    ``doc`` is the config as dicts (written with :func:`to_toml`); its ``[service]`` (if any)
    is added to the listen address (``listen_host``, loopback unless a test runs in its own
    network namespace) and data folder the harness picks; every TCP or UDP source whose
    ``listen`` is ``"auto"`` gets a free loopback port. Waits (at most START_TIMEOUT_S) until
    ``GET /api/v1/health`` answers. With [[tokens]] the harness reads with its own viewer
    token (:data:`HARNESS_TOKEN`).
    """
    if doc.get("tokens"):
        doc = {**doc, "tokens": with_harness_token(doc["tokens"])}
    headers = {"Authorization": f"Bearer {HARNESS_TOKEN}"} if doc.get("tokens") else None
    try:
        child = harness.start_service(doc, workdir, wrap=wrap, listen_host=listen_host,
                                      headers=headers, timeout_s=START_TIMEOUT_S)
    except harness.HarnessError as e:
        pytest.fail(str(e))
    verify: Any = child.ssl_context if child.ssl_context is not None else True
    client = httpx.Client(base_url=child.base_url, timeout=10.0, trust_env=False,
                          headers=headers, verify=verify)
    try:
        yield child.promote(RunningService, client=client)
    finally:
        client.close()
        child.stop()


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
