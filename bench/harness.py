"""One harness for a quaver service run as a child process on loopback, shared by the tests
and ``quaver bench --service``: free ports, the config written as TOML, start, wait until
/health answers, stop.

Knows the config file shape, the ``quaver`` command line and the HTTP health route; nothing of
the service's internals. Standard library and tomli-w only (no pytest, no httpx), so the
benchmark runs without the test extras; tests wrap :class:`Child` with their own client.
"""

from __future__ import annotations

import contextlib
import http.client
import json
import os
import signal
import socket
import ssl
import subprocess
import sys
import time
import urllib.request
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, TypeVar

import tomli_w

__all__ = [
    "LOOPBACK",
    "Child",
    "HarnessError",
    "child_env",
    "free_ports",
    "http_get",
    "http_json",
    "launch",
    "log_tail",
    "run_service",
    "serve_command",
    "start_service",
    "stop_process",
    "to_toml",
]

REPO = Path(__file__).resolve().parents[1]
LOOPBACK = "127.0.0.1"
START_TIMEOUT_S = 30.0  # the child must answer /health within this
STOP_TIMEOUT_S = 5.0  # SIGTERM (or the signal asked for), then SIGKILL after this
START_ATTEMPTS = 3  # a probed free port can be taken before the child binds it
HTTP_TIMEOUT_S = 10.0
POLL_S = 0.05


C = TypeVar("C", bound="Child")


class HarnessError(RuntimeError):
    """The child service did not start; the message holds the end of its log."""


def to_toml(doc: dict[str, Any]) -> str:
    """``doc`` as TOML text (tomli-w: tables, arrays of tables, inline values as needed)."""
    return tomli_w.dumps(doc)


def child_env() -> dict[str, str]:
    """This process's environment without QUAVER_* overrides and proxies (loopback only),
    with this checkout first on PYTHONPATH (so an installed copy cannot shadow it) and
    unbuffered output for the logs."""
    env = {
        k: v
        for k, v in os.environ.items()
        if not k.startswith("QUAVER_")
        and k.lower() not in ("http_proxy", "https_proxy", "all_proxy")
    }
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH")]))
    env["PYTHONUNBUFFERED"] = "1"
    return env


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


def serve_command(config_path: Path) -> list[str]:
    """``quaver serve -c FILE`` as this interpreter runs it."""
    return [sys.executable, "-m", "service", "serve", "-c", str(config_path)]


def launch(argv: list[str], cwd: Path, log_path: Path, *, append: bool = False,
           new_session: bool = False, env: dict[str, str] | None = None
           ) -> subprocess.Popen[bytes]:
    """Start ``argv`` in ``cwd`` with :func:`child_env` (plus ``env``, e.g. a test aid such
    as QUAVER_NOTIFY_HOLD_S), stdout and stderr to ``log_path``; ``new_session``: Ctrl-C in
    the terminal reaches only the parent (which then stops it)."""
    with open(log_path, "ab" if append else "wb") as log:
        return subprocess.Popen(argv, cwd=cwd, env={**child_env(), **(env or {})}, stdout=log,
                                stderr=subprocess.STDOUT, start_new_session=new_session)


def stop_process(proc: subprocess.Popen[Any], sig: int = signal.SIGTERM,
                 timeout_s: float = STOP_TIMEOUT_S) -> int:
    """Send ``sig`` (SIGTERM: orderly stop; SIGKILL: no clean-up), kill after ``timeout_s``,
    reap; the exit status."""
    if proc.poll() is None:
        with contextlib.suppress(ProcessLookupError):
            proc.send_signal(sig)
        try:
            proc.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=timeout_s)
    return int(proc.returncode)


def log_tail(path: Path, lines: int) -> str:
    """The last ``lines`` lines of a log file, or "(no service log)"."""
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except OSError:
        return "(no service log)"
    return "\n".join(text.splitlines()[-lines:])


_OPENER = urllib.request.build_opener(urllib.request.ProxyHandler({}))  # loopback: no proxies


def http_get(base: str, path: str, headers: dict[str, str] | None = None,
             context: ssl.SSLContext | None = None) -> bytes:
    """GET ``base + path`` without proxies (time-out HTTP_TIMEOUT_S s): the body;
    urllib.error.HTTPError for a status other than 2xx."""
    req = urllib.request.Request(f"{base}{path}", headers=headers or {})
    if context is not None:
        opener = urllib.request.build_opener(urllib.request.ProxyHandler({}),
                                             urllib.request.HTTPSHandler(context=context))
    else:
        opener = _OPENER
    with opener.open(req, timeout=HTTP_TIMEOUT_S) as r:
        return bytes(r.read())


def http_json(base: str, path: str, headers: dict[str, str] | None = None,
              context: ssl.SSLContext | None = None) -> Any:
    """:func:`http_get` and decode its JSON."""
    return json.loads(http_get(base, path, headers, context))


@dataclass
class Child:
    """A service in a child process: HTTP at ``base_url`` (read with ``headers``); ``ports``
    maps each source id the harness gave a port to that port."""

    proc: subprocess.Popen[bytes]
    base_url: str
    log_path: Path
    http_port: int = 0
    ports: dict[str, int] = field(default_factory=dict)
    config_path: Path | None = None
    headers: dict[str, str] = field(default_factory=dict)
    ssl_context: ssl.SSLContext | None = field(default=None, repr=False)

    @property
    def pid(self) -> int:
        return self.proc.pid

    def alive(self) -> bool:
        return self.proc.poll() is None

    def log_tail(self, lines: int = 40) -> str:
        return log_tail(self.log_path, lines)

    def get_json(self, path: str) -> Any:
        """GET ``path`` (e.g. ``/api/v1/health``) and decode its JSON."""
        return http_json(self.base_url, path, self.headers, self.ssl_context)

    def wait_up(self, path: str = "/api/v1/health", timeout_s: float = START_TIMEOUT_S) -> bool:
        """True once ``path`` answers 200; False if the process exited first; HarnessError
        after ``timeout_s``."""
        deadline = time.monotonic() + timeout_s
        for _ in range(int(timeout_s / POLL_S) + 1):
            if not self.alive():
                return False
            with contextlib.suppress(OSError, ValueError, http.client.HTTPException):
                self.get_json(path)
                return True
            if time.monotonic() > deadline:
                break
            time.sleep(POLL_S)
        raise HarnessError(f"{path} did not answer within {timeout_s:g} s\n{self.log_tail()}")

    def stop(self, sig: int = signal.SIGTERM) -> int:
        return stop_process(self.proc, sig)

    def promote(self, cls: type[C], **extra: Any) -> C:
        """This child as an instance of ``cls`` (a dataclass derived from Child, whose own
        fields come from ``extra``): how the tests and the bench add their own readers."""
        return cls(**{f.name: getattr(self, f.name) for f in fields(Child)}, **extra)


def with_ports(doc: dict[str, Any], listen_host: str = LOOPBACK
               ) -> tuple[dict[str, Any], int, dict[str, int]]:
    """``doc`` with the HTTP listen address on a free port and data folder ``quaver-data``
    (``doc["service"]`` keys win over the data folder), and every TCP or UDP source whose
    ``listen`` is ``"auto"`` on a free loopback port; also that HTTP port and the sources'."""
    auto = [s for s in doc.get("sources", []) if s.get("listen") == "auto"]
    tcp = free_ports(1 + sum(s["kind"] == "tcp" for s in auto))
    udp = iter(free_ports(sum(s["kind"] == "udp" for s in auto), socket.SOCK_DGRAM))
    http_port, tcp_ports = tcp[0], iter(tcp[1:])
    ports: dict[str, int] = {}
    sources = []
    for s in doc.get("sources", []):
        s = dict(s)
        if s.get("listen") == "auto":
            ports[s["id"]] = next(tcp_ports if s["kind"] == "tcp" else udp)
            s["listen"] = f"{LOOPBACK}:{ports[s['id']]}"
        sources.append(s)
    service = {"listen": f"{listen_host}:{http_port}", "data_dir": "quaver-data",
               **doc.get("service", {})}
    full = {"service": service, **{k: v for k, v in doc.items() if k not in ("service",
                                                                            "sources")}}
    if sources:
        full["sources"] = sources
    return full, http_port, ports


def start_service(
    doc: dict[str, Any],
    workdir: Path,
    *,
    command: Callable[[Path], list[str]] = serve_command,
    wrap: Callable[[list[str]], list[str]] | None = None,
    listen_host: str = LOOPBACK,
    headers: dict[str, str] | None = None,
    new_session: bool = False,
    health_path: str = "/api/v1/health",
    timeout_s: float = START_TIMEOUT_S,
    env: dict[str, str] | None = None,
) -> Child:
    """Write ``doc`` (see :func:`with_ports`) to ``workdir/quaver.toml``, run ``command(path)``
    (``wrap`` may turn it into the command actually run, e.g. inside a namespace; it must pass
    SIGTERM on) and wait until ``health_path`` answers. Retries with fresh ports when a
    probed port was taken meanwhile; HarnessError (with the log) when it does not start. The
    caller stops the :class:`Child`. A ``[service] tls_cert`` makes it HTTPS, trusting exactly
    that certificate. ``env``: variables added to the child's environment."""
    workdir.mkdir(parents=True, exist_ok=True)
    for attempt in range(1, START_ATTEMPTS + 1):
        full, http_port, ports = with_ports(doc, listen_host)
        config_path = workdir / "quaver.toml"
        config_path.write_text(to_toml(full), encoding="utf-8")
        log_path = workdir / f"service-{attempt}.log"
        argv = command(config_path)
        proc = launch(wrap(argv) if wrap is not None else argv, workdir, log_path,
                      new_session=new_session, env=env)
        cert = full["service"].get("tls_cert")
        child = Child(proc, f"{'https' if cert else 'http'}://{LOOPBACK}:{http_port}", log_path,
                      http_port, ports, config_path, dict(headers or {}),
                      ssl.create_default_context(cafile=cert) if cert else None)
        try:
            if child.wait_up(health_path, timeout_s):
                return child
        except BaseException:
            child.stop()
            raise
        child.stop()
        text = child.log_tail(200)
        if attempt == START_ATTEMPTS or "address already in use" not in text.lower():
            raise HarnessError(f"the service did not start (exit {proc.returncode})\n{text}")
    raise AssertionError("unreachable")


@contextlib.contextmanager
def run_service(doc: dict[str, Any], workdir: Path, **kw: Any) -> Iterator[Child]:
    """:func:`start_service` as a context: the child is always stopped on leaving."""
    child = start_service(doc, workdir, **kw)
    try:
        yield child
    finally:
        child.stop()
