"""The access policy as one table over a real service (README "Access" says exactly this).

Every route and the WebSocket × {no token, wrong token, viewer, operator, admin, metrics}
× {tokens configured, none} × {client on loopback, client on a non-loopback address}. The
non-loopback rows run in a private network namespace (``unshare -n``, as root; skipped with
the reason otherwise): the service listens on 0.0.0.0 there, which reaches nothing outside
that namespace. Without tokens the service only ever listens on loopback (a non-loopback
``listen`` without tokens is refused: the last row, and test_alarm_api's check test)."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import socket
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from websockets.exceptions import ConnectionClosed
from websockets.sync.client import connect as ws_connect

from bench.harness import child_env
from service.api import create_app
from service.hub import Hub
from tests.service.conftest import (
    REPO,
    SMALL_FS,
    RunningService,
    feed_tone,
    one_band_config,
    run_cli,
    run_service,
    to_toml,
)

LOOPBACK = "127.0.0.1"
NETNS_ADDR = "10.99.0.1"  # the veth address inside the test's own network namespace
NETNS_ENV = "QUAVER_TEST_NETNS"  # set by the outer test for the run inside the namespace
ARTIFACTS = REPO / "test-artifacts"

PLAIN = {  # who → (token name, role, token); the config holds only the SHA-256
    "viewer": ("vera", "viewer", "tok-viewer-3d9a"),
    "operator": ("otto", "operator", "tok-operator-81c2"),
    "admin": ("ada", "admin", "tok-admin-5b07"),
    "metrics": ("scraper", "metrics", "tok-metrics-e4f6"),
}
CALLERS = ("none", "wrong", "viewer", "operator", "admin", "metrics")
TOKENS_CFG = [
    {"name": n, "role": r, "sha256": hashlib.sha256(t.encode()).hexdigest()}
    for n, r, t in PLAIN.values()
]

# Every route the app serves (the test fails when one is added and not listed here), as
# (method, path to request, class). Classes: public (no token ever), read (viewer and up;
# /metrics also the metrics token), ack (operator), reload (admin), ws (the stream).
ROUTES: list[tuple[str, str, str]] = [
    ("GET", "/api/v1/health/live", "public"),
    ("GET", "/", "public"),
    ("GET", "/static/main.js", "public"),
    ("GET", "/docs", "public"),
    ("GET", "/redoc", "public"),
    ("GET", "/docs-assets/swagger-ui.css", "public"),
    ("GET", "/docs-assets/redoc.standalone.js", "public"),
    ("GET", "/openapi.json", "read"),
    ("GET", "/metrics", "metrics"),
    ("GET", "/api/v1/health", "read"),
    ("GET", "/api/v1/session", "read"),
    ("GET", "/api/v1/channels", "read"),
    ("GET", "/api/v1/channels/a", "read"),
    ("GET", "/api/v1/channels/a/spectrum", "read"),
    ("GET", "/api/v1/channels/a/bands", "read"),
    ("GET", "/api/v1/channels/a/tones", "read"),
    ("GET", "/api/v1/channels/a/trend?name=overall", "read"),
    ("GET", "/api/v1/channels/a/waveform", "read"),
    ("GET", "/api/v1/rules", "read"),
    ("GET", "/api/v1/alarms/shelved", "read"),
    ("GET", "/api/v1/channels/a/history", "read"),
    ("GET", "/api/v1/channels/a/history/1", "read"),
    ("GET", "/api/v1/channels/a/history/compare?a=0&b=1", "read"),
    ("GET", "/api/v1/channels/a/waterfall", "read"),
    ("GET", "/api/v1/channels/a/kurtogram", "read"),
    ("GET", "/api/v1/channels/a/orders", "read"),
    ("GET", "/api/v1/channels/a/runup", "read"),
    ("GET", "/api/v1/channels/a/runups", "read"),
    ("GET", "/api/v1/channels/a/runups/1", "read"),
    ("PUT", "/api/v1/channels/a/speed", "ack"),
    ("GET", "/api/v1/windows/hann/response", "read"),
    ("GET", "/api/v1/meta", "read"),
    ("GET", "/api/v1/alarms", "read"),
    ("GET", "/api/v1/events", "read"),
    ("GET", "/api/v1/events/1", "read"),
    ("GET", "/api/v1/events/1/evidence", "read"),
    ("POST", "/api/v1/alarms/a.band.b/ack", "ack"),
    ("POST", "/api/v1/alarms/ack", "ack"),
    ("POST", "/api/v1/alarms/a.band.b/shelve", "ack"),
    ("POST", "/api/v1/alarms/a.band.b/unshelve", "ack"),
    ("POST", "/api/v1/admin/reload", "reload"),
    ("WS", "/api/v1/stream", "ws"),
]
ROUTE_TEMPLATES = {  # the app's path templates the ROUTES above stand for
    "/api/v1/health/live", "/", "/static", "/docs", "/redoc", "/docs-assets",
    "/docs-assets/redoc.standalone.js", "/openapi.json",
    "/metrics", "/api/v1/health", "/api/v1/session", "/api/v1/channels",
    "/api/v1/channels/{channel_id}", "/api/v1/channels/{channel_id}/spectrum",
    "/api/v1/channels/{channel_id}/bands", "/api/v1/channels/{channel_id}/tones",
    "/api/v1/channels/{channel_id}/trend", "/api/v1/windows/{window}/response",
    "/api/v1/channels/{channel_id}/history", "/api/v1/channels/{channel_id}/history/compare",
    "/api/v1/channels/{channel_id}/history/{spectrum_id}",
    "/api/v1/channels/{channel_id}/waterfall",
    "/api/v1/alarms", "/api/v1/events", "/api/v1/events/{event_id}",
    "/api/v1/events/{event_id}/evidence", "/api/v1/alarms/{rule}/ack",
    "/api/v1/admin/reload", "/api/v1/stream", "/api/v1/meta",
    "/api/v1/channels/{channel_id}/waveform", "/api/v1/rules", "/api/v1/alarms/shelved",
    "/api/v1/alarms/ack", "/api/v1/alarms/{rule}/shelve", "/api/v1/alarms/{rule}/unshelve",
    "/api/v1/channels/{channel_id}/kurtogram", "/api/v1/channels/{channel_id}/orders",
    "/api/v1/channels/{channel_id}/runup", "/api/v1/channels/{channel_id}/speed",
    "/api/v1/channels/{channel_id}/runups", "/api/v1/channels/{channel_id}/runups/{runup_id}",
}


def expected(kind: str, caller: str, tokens: bool) -> str:
    """The policy: "ok" (past the access checks: the route's own answer), or the refusal
    "401" / "403" (HTTP) and "1008" (WebSocket closed with 1008)."""
    role = PLAIN[caller][1] if caller in PLAIN else None
    if kind == "public":
        return "ok"
    if tokens and role is None:
        return "1008" if kind == "ws" else "401"
    if tokens and role == "metrics" and kind != "metrics":
        return "1008" if kind == "ws" else "403"
    if kind in ("ack", "reload") and not tokens:
        return "401"  # no token is known, so nobody may
    if kind == "ack" or kind == "reload":
        need = "operator" if kind == "ack" else "admin"
        if role is None or role == "metrics":
            return "401" if role is None else "403"
        order = ("viewer", "operator", "admin")
        return "ok" if order.index(role) >= order.index(need) else "403"
    return "ok"


def outcome(base: str, method: str, path: str, caller: str) -> str:
    token = PLAIN[caller][2] if caller in PLAIN else ("nope-0000" if caller == "wrong" else None)
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    if method == "WS":
        url = base.replace("http://", "ws://") + path
        try:
            with ws_connect(url, open_timeout=10, additional_headers=headers, proxy=None) as ws:
                first = json.loads(ws.recv(timeout=10))
                return "ok" if first["kind"] == "hello" else f"ws:{first['kind']}"
        except ConnectionClosed as e:
            return str(e.rcvd.code) if e.rcvd is not None else "closed"
    with httpx.Client(base_url=base, timeout=10.0, trust_env=False) as c:
        r = c.request(method, path, headers=headers,
                      json={} if method == "POST" and "ack" in path
                      else {"rpm": 1000.0} if method == "PUT" else None)
    if r.status_code in (401, 403):
        return str(r.status_code)
    assert r.status_code < 500, (method, path, caller, r.status_code, r.text[:200])
    return "ok"


def run_table(svc: RunningService, base: str, tokens: bool, label: str) -> list[str]:
    """Every route × caller against ``base``; returns the rows that differ from the policy
    (and writes the table to test-artifacts/ for a person to read)."""
    bad, lines = [], [f"| route ({label}) | " + " | ".join(CALLERS) + " |",
                      "|---|" + "---|" * len(CALLERS)]
    for method, path, kind in ROUTES:
        cells = []
        for caller in CALLERS:
            got = outcome(base, method, path, caller)
            want = expected(kind, caller, tokens)
            cells.append(got if got == want else f"**{got}≠{want}**")
            if got != want:
                bad.append(f"{method} {path} as {caller}: {got}, policy says {want}")
        lines.append(f"| {method} {path} | " + " | ".join(cells) + " |")
    ARTIFACTS.mkdir(exist_ok=True)
    (ARTIFACTS / f"access-table-{label}.md").write_text("\n".join(lines) + "\n")
    return bad


def _fed(svc: RunningService) -> None:
    """One channel with spectra, so reads answer 200 rather than 503."""
    with socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=10) as sock:
        n = feed_tone(sock, 0, int(3 * SMALL_FS), 0.2)
    svc.wait(lambda: svc.channel("a")["counters"]["samples"] == n or None, "the samples")


@pytest.fixture(scope="module")
def with_tokens(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RunningService]:
    doc = one_band_config(tokens=TOKENS_CFG)
    if os.environ.get(NETNS_ENV):
        doc["service"] = {"allowed_hosts": [NETNS_ADDR, LOOPBACK, "localhost"]}
        cm = run_service(doc, tmp_path_factory.mktemp("acc-t"), listen_host="0.0.0.0")
    else:
        cm = run_service(doc, tmp_path_factory.mktemp("acc-t"))
    with cm as svc:
        _fed(svc)
        yield svc


@pytest.fixture(scope="module")
def without_tokens(tmp_path_factory: pytest.TempPathFactory) -> Iterator[RunningService]:
    with run_service(one_band_config(), tmp_path_factory.mktemp("acc-n")) as svc:
        _fed(svc)
        yield svc


def _paths(routes: list[Any], prefix: str = "") -> set[str]:
    """Path templates of ``routes``, through included routers (FastAPI keeps those as
    wrappers holding the router and its prefix)."""
    out = set()
    for r in routes:
        ctx = getattr(r, "include_context", None)
        if ctx is not None:
            out |= _paths(r.original_router.routes, prefix + ctx.prefix)
        elif getattr(r, "path", None) is not None:
            out.add(prefix + r.path)
    return out


def test_the_table_names_every_route() -> None:
    assert _paths(create_app(Hub()).routes) == ROUTE_TEMPLATES


def test_tokens_configured_client_on_loopback(with_tokens: RunningService) -> None:
    base = with_tokens.base_url
    assert run_table(with_tokens, base, True, "tokens-loopback") == []


def test_no_tokens_client_on_loopback(without_tokens: RunningService) -> None:
    assert run_table(without_tokens, without_tokens.base_url, False, "none-loopback") == []


@pytest.mark.skipif(not os.environ.get(NETNS_ENV), reason="runs inside the network namespace")
def test_tokens_configured_client_off_loopback(with_tokens: RunningService) -> None:
    base = f"http://{NETNS_ADDR}:{with_tokens.http_port}"
    assert run_table(with_tokens, base, True, "tokens-non-loopback") == []


def test_no_tokens_off_loopback_is_refused(tmp_path: Path) -> None:
    doc = one_band_config()
    doc["sources"][0]["listen"] = f"{LOOPBACK}:9"
    doc["service"] = {"listen": "0.0.0.0:8750", "data_dir": "d"}
    path = tmp_path / "open.toml"
    path.write_text(to_toml(doc), encoding="utf-8")
    r = run_cli("check", "-c", str(path))
    assert r.returncode == 2 and "service.listen" in r.stderr and "tokens" in r.stderr


def test_details_only_for_viewers(with_tokens: RunningService) -> None:
    c = httpx.Client(base_url=with_tokens.base_url, timeout=10.0, trust_env=False)
    with c:
        live = c.get("/api/v1/health/live")
        assert live.status_code == 200 and live.json() == {"status": "ok"}
        assert c.get("/api/v1/health").status_code == 401
        full = c.get("/api/v1/health",
                     headers={"Authorization": f"Bearer {PLAIN['viewer'][2]}"}).json()
        assert set(full["sources"]["s"]) >= {"state"} and "store" in full


def test_the_table_off_loopback_in_a_network_namespace() -> None:
    """Re-runs this file inside ``unshare -n`` with a veth address (root only)."""
    if os.environ.get(NETNS_ENV):
        pytest.skip("already inside the namespace")
    if os.geteuid() != 0 or shutil.which("unshare") is None or shutil.which("ip") is None:
        pytest.skip("needs root, unshare(1) and ip(8) for a private network namespace")
    setup = (
        "ip link set lo up && ip link add qv0 type veth peer name qv1 && "
        f"ip addr add {NETNS_ADDR}/24 dev qv0 && ip link set qv0 up && ip link set qv1 up"
    )
    probe = subprocess.run(["unshare", "-n", "sh", "-c", setup], capture_output=True,
                           text=True, timeout=30, check=False)
    if probe.returncode != 0:
        pytest.skip(f"no private network namespace here: {probe.stderr.strip()[:200]}")
    cmd = (f"{setup} && exec {sys.executable} -m pytest -q -p no:cacheprovider "
           f"{Path(__file__).relative_to(REPO)} -k 'loopback or details'")
    r = subprocess.run(["unshare", "-n", "sh", "-c", cmd], cwd=REPO,
                       env={**child_env(), NETNS_ENV: "1"}, capture_output=True, text=True,
                       timeout=300, check=False)
    assert r.returncode == 0, r.stdout[-3000:] + r.stderr[-2000:]
    # the three tables, the refusal and the details check; this test itself skips inside
    assert "5 passed, 1 skipped" in r.stdout, r.stdout[-1500:]


def test_a_chunked_body_is_refused_at_the_limit_not_after_it(
    without_tokens: RunningService,
) -> None:
    """Issue 15 item 8: a chunked body used to be read whole before the 413. Chunks of 64 KiB
    go out until the service answers; it must answer 413 after about max_body_bytes (64 KiB
    by default), not after the 64 MiB offered."""
    chunk = b"x" * 65536
    sent = 0
    with socket.create_connection((LOOPBACK, without_tokens.http_port), timeout=10) as s:
        s.sendall(f"POST /api/v1/alarms/a.band.b/ack HTTP/1.1\r\nHost: {LOOPBACK}\r\n"
                  "Content-Type: application/json\r\nTransfer-Encoding: chunked\r\n\r\n"
                  .encode())
        s.settimeout(0.2)
        answer = b""
        for _ in range(1024):  # at most 64 MiB
            try:
                s.sendall(b"%x\r\n%s\r\n" % (len(chunk), chunk))
                sent += len(chunk)
                answer += s.recv(4096)
            except TimeoutError:
                continue
            except OSError:
                break
            if answer:
                break
        s.settimeout(10)
        while b"\r\n\r\n" not in answer:
            more = s.recv(4096)
            if not more:
                break
            answer += more
    assert answer.startswith(b"HTTP/1.1 413"), answer[:200]
    assert sent <= 16 * len(chunk), sent  # a few socket buffers' worth, not the 64 MiB


def test_a_request_head_that_never_ends_is_cut_off(tmp_path: Path) -> None:
    """Issue 15 item 8 (slowloris): a head that trickles in is closed after header_timeout_s."""
    doc = one_band_config()
    doc["service"] = {"header_timeout_s": 0.5}
    with run_service(doc, tmp_path) as svc, socket.create_connection(
        (LOOPBACK, svc.http_port), timeout=10
    ) as s:
        s.sendall(b"GET /api/v1/health/live HTTP/1.1\r\nHost: 127.0.0.1\r\n")
        s.settimeout(10)  # bounded: the service must close first
        closed = s.recv(1) == b""  # EOF: the service closed it, and sent nothing
    assert closed


def _self_signed(folder: Path) -> tuple[Path, Path]:
    """A certificate for 127.0.0.1 (IP SAN) and its key, made here (cryptography.x509)."""
    import datetime as dt
    import ipaddress

    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "quaver test")])
    now = dt.datetime.now(dt.UTC)
    cert = (
        x509.CertificateBuilder().subject_name(name).issuer_name(name)
        .public_key(key.public_key()).serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(minutes=5))
        .not_valid_after(now + dt.timedelta(days=1))
        .add_extension(x509.SubjectAlternativeName(
            [x509.IPAddress(ipaddress.ip_address(LOOPBACK))]), critical=False)
        .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
        .sign(key, hashes.SHA256())
    )
    cert_path, key_path = folder / "cert.pem", folder / "key.pem"
    cert_path.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_path.write_bytes(key.private_bytes(serialization.Encoding.PEM,
                                           serialization.PrivateFormat.PKCS8,
                                           serialization.NoEncryption()))
    return cert_path, key_path


def test_tls_serves_https_and_wss(tmp_path: Path) -> None:
    """Issue 15: service.tls_cert/tls_key serve HTTPS and WSS (uvicorn's ssl_certfile)."""
    import ssl

    cert, key = _self_signed(tmp_path)
    doc = one_band_config(tokens=TOKENS_CFG)
    doc["service"] = {"tls_cert": str(cert), "tls_key": str(key)}
    with run_service(doc, tmp_path / "svc") as svc:
        assert svc.base_url.startswith("https://")
        auth = {"Authorization": f"Bearer {PLAIN['viewer'][2]}"}
        r = svc.client.get("/api/v1/channels", headers=auth)
        assert r.status_code == 200 and [c["id"] for c in r.json()] == ["a"]
        assert svc.client.get("/api/v1/channels", headers={"Authorization": ""}).status_code == 401
        ctx = ssl.create_default_context(cafile=str(cert))
        url = f"wss://{LOOPBACK}:{svc.http_port}/api/v1/stream"
        with ws_connect(url, ssl=ctx, additional_headers=auth, open_timeout=10) as ws:
            assert json.loads(ws.recv(timeout=10))["kind"] == "hello"
        with pytest.raises(httpx.RemoteProtocolError):  # plain HTTP is not answered
            httpx.get(f"http://{LOOPBACK}:{svc.http_port}/api/v1/health/live", timeout=10,
                      trust_env=False)


def test_connections_beyond_max_connections_get_503(tmp_path: Path) -> None:
    """Issue 15 item 8: 2000 held connections were all kept. Beyond max_connections a request
    gets 503 (uvicorn limit_concurrency); once the held ones go, it is served again."""
    doc = one_band_config()
    doc["service"] = {"max_connections": 4}
    with run_service(doc, tmp_path) as svc:
        url = "/api/v1/health/live"
        held = [socket.create_connection((LOOPBACK, svc.http_port), timeout=10)
                for _ in range(4)]
        try:
            with httpx.Client(base_url=svc.base_url, timeout=10, trust_env=False) as c:
                r = c.get(url)
            assert r.status_code == 503, r.text
        finally:
            for s in held:
                s.close()
        for _ in range(100):  # the server notices the closes; bounded
            with httpx.Client(base_url=svc.base_url, timeout=10, trust_env=False) as c:
                r = c.get(url)
            if r.status_code == 200:
                break
        assert r.status_code == 200 and r.json() == {"status": "ok"}


def test_a_foreign_host_is_refused_on_http_and_websocket(without_tokens: RunningService) -> None:
    """Issue 15 item 3 (DNS rebinding): Host and Origin both naming another host got 200 and
    a WebSocket hello, with reads open on loopback. Now 400 / 1008."""
    evil = "rebind.example"
    with httpx.Client(base_url=without_tokens.base_url, timeout=10, trust_env=False) as c:
        r = c.get("/api/v1/channels", headers={"Host": f"{evil}:{without_tokens.http_port}"})
        assert r.status_code == 400 and r.json()["detail"] == (
            f"host {evil!r} is not in service.allowed_hosts"
        )
        ok = c.get("/api/v1/channels", headers={"Host": f"localhost:{without_tokens.http_port}"})
        assert ok.status_code == 200
        r = c.get("/api/v1/channels", headers={"Origin": f"http://{evil}"})
        assert r.status_code == 403 and r.json()["detail"] == "origin not allowed"
    # the socket goes to 127.0.0.1; the URL (so Host and Origin) names the rebinding host
    url = f"ws://{evil}:{without_tokens.http_port}/api/v1/stream"
    sock = socket.create_connection((LOOPBACK, without_tokens.http_port), timeout=10)
    with ws_connect(url, sock=sock, open_timeout=10,
                    origin=f"http://{evil}:{without_tokens.http_port}") as ws:  # type: ignore[arg-type]
        with pytest.raises(ConnectionClosed) as e:
            ws.recv(timeout=10)
    assert e.value.rcvd is not None
    assert (e.value.rcvd.code, e.value.rcvd.reason) == (
        1008, f"host {evil!r} is not in service.allowed_hosts")
