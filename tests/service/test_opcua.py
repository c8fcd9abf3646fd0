"""The [opcua] server end to end: a real quaver service in a subprocess and a real asyncua
client over TCP on 127.0.0.1 — browse, read (equal to REST for the same frame), subscribe,
Acknowledge as operator and as viewer, alarm events, Bad status codes when the producer
stops, and a Basic256Sha256 SignAndEncrypt session with the certificate quaver made.

Knows the public REST API, the config shape and the address space documented in
docs/opcua.md; nothing of the service's internals."""

from __future__ import annotations

import asyncio
import hashlib
import math
import threading
import tomllib
from collections.abc import Awaitable, Callable, Iterator
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import pytest

from tests.service.conftest import (
    SMALL_FS,
    RunningService,
    free_ports,
    one_band_config,
    run_service,
    to_toml,
)

pytest.importorskip("asyncua")
from asyncua import Client, ua  # noqa: E402
from asyncua.crypto import cert_gen  # noqa: E402
from asyncua.crypto.security_policies import SecurityPolicyBasic256Sha256  # noqa: E402
from cryptography.x509.oid import ExtendedKeyUsageOID  # noqa: E402

from service.opcua.layout import UNITS, channel_code, escape, unit_id, value_code  # noqa: E402
from service.wire import encode_frame  # noqa: E402

T = TypeVar("T")
TOKENS = {"op": ("operator", "opcua-test-operator-7c1"), "watcher": ("viewer",
                                                                    "opcua-test-viewer-2b9")}
T0_NS = 1_750_000_000_000_000_000  # the plant clock of our producer (header times)
BLOCK = 256  # samples per framed block (0.1 s at SMALL_FS)
STALE_S = 3.0
SITE = "test-plant"
NS_URI = f"urn:quaver:{SITE}"
RULE = "a.band.b"
WAIT_S = 20.0


# --- pure parts (no service) ---------------------------------------------------------------


def test_unit_ids_follow_the_rec20_byte_rule() -> None:
    # IEC 62541-8 §5.6.3: UnitId = the Rec 20 common code's ASCII bytes, first byte highest
    assert unit_id("MSK") == (ord("M") << 16) | (ord("S") << 8) | ord("K") == 5067595
    assert unit_id("4H") == (0x34 << 8) | 0x48
    # UNECE Rec 20 (docs/references.md): K40 standard gravity, MSK m/s², IU in/s, 4H µm
    assert UNITS["g"][0] == "K40" and UNITS["m/s2"][0] == "MSK"
    assert UNITS["in/s"][0] == "IU" and UNITS["um"][0] == "4H"


def test_status_codes_of_each_channel_state() -> None:
    # our mapping, docs/opcua.md "Status codes" (names from IEC 62541-4 §7.34 / asyncua)
    assert [channel_code(s) for s in ("ok", "gap", "overrun")] == ["Good"] * 3
    assert channel_code("sensor-fault") == "UncertainSensorNotAccurate"
    assert channel_code("no-signal") == "BadNoCommunication"
    assert channel_code("failed") == "BadDeviceFailure"
    assert value_code("ok", "sensor-fault", 1.0) == "UncertainSensorNotAccurate"
    assert value_code("ok", "ok", math.nan) == "BadConfigurationError"
    assert value_code("no-signal", "ok", math.nan) == "BadNoCommunication"
    for name in ("UncertainSensorNotAccurate", "BadNoCommunication", "BadDeviceFailure",
                 "BadConfigurationError"):
        assert hasattr(ua.StatusCodes, name), name
    assert escape("a/b%c") == "a%2Fb%25c"


def test_check_refuses_security_none_off_loopback(
    tmp_path: Path, quaver_cli: Callable[..., Any]
) -> None:
    doc = one_band_config(opcua={"enabled": True, "endpoint": "opc.tcp://0.0.0.0:4840/q"})
    doc["sources"][0]["listen"] = "127.0.0.1:17001"  # checked, never bound
    cfg = tmp_path / "q.toml"
    cfg.write_text(to_toml(doc), encoding="utf-8")
    r = quaver_cli("check", "-c", str(cfg))
    assert r.returncode != 0
    assert "opcua.security_policy: 'None' is refused" in r.stdout + r.stderr
    doc["opcua"] = {"enabled": True, "endpoint": "opc.tcp://10.1.2.3:4840/q",
                    "security_policy": "Basic256Sha256"}
    cfg.write_text(to_toml(doc), encoding="utf-8")
    r = quaver_cli("check", "-c", str(cfg))
    assert r.returncode != 0
    assert "opcua.endpoint: 'opc.tcp://10.1.2.3:4840/q' is not a loopback address; add " \
           "[[tokens]]" in r.stdout + r.stderr


@pytest.mark.parametrize(("opcua", "message"), [
    ({"endpoint": "http://127.0.0.1:4840"},
     r"opcua\.endpoint: 'http://127\.0\.0\.1:4840' is not opc\.tcp://host:port"),
    ({"endpoint": "opc.tcp://[::1]:0/q"}, r"opcua\.endpoint: .* with a port in 1-65535"),
    ({"certificate": "c.der"}, r"opcua\.private_key: give certificate and private_key together"),
    ({"security_policy": "Basic128"}, r"opcua\.security_policy: 'Basic128' is not one of"),
    ({"max_loop_share": 0.0}, r"opcua\.max_loop_share: "),
    ({"certificate": "missing.der", "private_key": "missing.pem"},
     r"opcua\.certificate: '.*missing\.der' is not a file"),
])
def test_bad_opcua_settings_name_their_key(opcua: dict[str, Any], message: str,
                                           tmp_path: Path) -> None:
    from service.config import ConfigError, parse_config

    doc = one_band_config(opcua={"enabled": True, **opcua})
    doc["sources"][0]["listen"] = "127.0.0.1:17002"
    with pytest.raises(ConfigError, match=message):
        parse_config(doc, base_dir=tmp_path)


def test_without_asyncua_the_service_imports_and_the_server_says_what_to_install() -> None:
    code = (
        "import asyncio, sys\n"
        "sys.modules['asyncua'] = None  # as if the extra were not installed\n"
        "from service.app import Service\n"
        "from service.config import parse_config\n"
        "cfg = parse_config({'sources': [{'id': 's', 'kind': 'simulated'}],\n"
        "                    'opcua': {'enabled': True}})\n"
        "svc = Service(cfg)\n"
        "try:\n"
        "    asyncio.run(svc.opcua.start())\n"
        "except RuntimeError as e:\n"
        "    print(e, svc.opcua.health()['state'])\n"
    )
    import subprocess
    import sys

    from tests.service.conftest import REPO, child_env

    r = subprocess.run([sys.executable, "-c", code], cwd=REPO, env=child_env(),
                       capture_output=True, text=True, timeout=60, check=False)
    assert r.returncode == 0, r.stderr
    assert "pip install 'quaver[opcua]'" in r.stdout and r.stdout.strip().endswith("failed")


# --- a running service ---------------------------------------------------------------------


def service_doc(port: int, **opcua: Any) -> dict[str, Any]:
    tokens = [{"name": n, "role": role, "sha256": hashlib.sha256(tok.encode()).hexdigest()}
              for n, (role, tok) in TOKENS.items()]
    return one_band_config(
        channels=[{"id": "a", "stale_after_s": STALE_S, "speed": "manual",
                   "speed_rpm": 1200.0}],
        tones=[{"name": "t123", "hz": 123.0}],
        tokens=tokens,
        opcua={"enabled": True, "endpoint": f"opc.tcp://127.0.0.1:{port}/quaver",
               "site": SITE, **opcua},
    )


class Producer:
    """Our plant on the framed TCP source: a 123 Hz sine of peak ``amp`` g in band b at
    about real time, block k at plant time T0 + k·BLOCK/fs; ``pause``/``resume``."""

    def __init__(self, port: int) -> None:
        import socket

        self.sock = socket.create_connection(("127.0.0.1", port), timeout=10)
        self.amp = 0.3
        self.k = 0
        self.running = threading.Event()
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self) -> None:
        for _ in range(20000):  # bounded: 2000 s of signal at most
            if self.stop.is_set():
                return
            if not self.running.wait(0.05):
                continue
            first = self.k * BLOCK
            t = (first + np.arange(BLOCK)) / SMALL_FS
            x = (self.amp * np.sin(2 * np.pi * 123.0 * t))[None, :].astype(np.float32)
            self.sock.sendall(encode_frame(x, "f32le", SMALL_FS, first,
                                           T0_NS + round(first / SMALL_FS * 1e9)))
            self.k += 1
            self.stop.wait(BLOCK / SMALL_FS)

    def close(self) -> None:
        self.stop.set()
        self.thread.join(5)
        self.sock.close()


@pytest.fixture(scope="module")
def svc(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[RunningService, int]]:
    (port,) = free_ports(1)
    with run_service(service_doc(port), tmp_path_factory.mktemp("opcua")) as s:
        s.wait(lambda: s.health()["opcua"]["state"] == "running", "the OPC UA address space")
        yield s, port


@pytest.fixture(scope="module")
def plant(svc: tuple[RunningService, int]) -> Iterator[Producer]:
    p = Producer(svc[0].ports["s"])
    yield p
    p.close()


def run(coro: Awaitable[T], timeout_s: float = 60.0) -> T:
    async def bounded() -> T:
        return await asyncio.wait_for(coro, timeout_s)

    return asyncio.run(bounded())


def client(port: int, user: str | None = "watcher") -> Client:
    c = Client(f"opc.tcp://127.0.0.1:{port}/quaver", timeout=10)
    if user is not None:
        c.set_user(user)
        c.set_password(TOKENS[user][1])
    return c


async def until(probe: Callable[[], Awaitable[T | None]], what: str,
                timeout_s: float = WAIT_S) -> T:
    loop = asyncio.get_running_loop()
    end = loop.time() + timeout_s
    while loop.time() < end:
        got = await probe()
        if got is not None and got is not False:
            return got
        await asyncio.sleep(0.1)
    pytest.fail(f"timed out after {timeout_s:g} s waiting for {what}")


def us(t_ns: int) -> int:
    return t_ns // 1000


def ts_us(dt: Any) -> int:
    return round(dt.timestamp() * 1e6)


def test_browse_and_read_equal_rest(svc: tuple[RunningService, int], plant: Producer) -> None:
    s, port = svc
    plant.amp = 0.3
    plant.running.set()
    s.wait(lambda: s.get_or_none("channels/a/bands"), "a first spectrum")
    plant.running.clear()  # the latest frame stays put while we compare

    async def go() -> None:
        async with client(port) as c:
            idx = await c.get_namespace_index(NS_URI)
            root = c.get_node(ua.NodeId("machines", idx))
            names = [(await n.read_browse_name()).Name for n in await root.get_children()]
            assert names == ["(no machine)"]
            ch = c.get_node(ua.NodeId("-/a", idx))
            kids = {(await n.read_browse_name()).Name for n in await ch.get_children()}
            assert kids == {"status", "cause", "status_code", "default"}
            prof = c.get_node(ua.NodeId("-/a/default", idx))
            kids = {(await n.read_browse_name()).Name for n in await prof.get_children()}
            assert kids == {"overall", "bands", "tones", "spectrum"}
            await asyncio.sleep(0.5)  # the frames already sent are all analysed and written
            rest = s.get("channels/a/bands")
            tones = s.get("channels/a/tones")
            spec = s.get("channels/a/spectrum")
            paths = ["-/a/default/overall", "-/a/default/bands/b", "-/a/default/tones/t123",
                     "-/a/default/spectrum"]
            dvs = await c.read_attributes([c.get_node(ua.NodeId(p, idx)) for p in paths])
            assert rest["timestamp_ns"] == tones["timestamp_ns"] == spec["timestamp_ns"]
            for dv in dvs:
                assert dv.StatusCode.is_good(), dv.StatusCode
                assert ts_us(dv.SourceTimestamp) == us(rest["timestamp_ns"])  # the frame's time
            assert dvs[0].Value.Value == rest["overall"]
            assert dvs[1].Value.Value == {b["name"]: b["value"] for b in rest["bands"]}["b"]
            tone = {t["name"]: t for t in tones["tones"]}["t123"]
            assert dvs[2].Value.Value == tone["amplitude"]
            np.testing.assert_array_equal(np.float32(dvs[3].Value.Value),
                                          np.float32(spec["values"]))
            # a 123 Hz sine of peak 0.3 g reads 0.3/√2 RMS in band b (common practice)
            assert dvs[1].Value.Value == pytest.approx(0.3 / math.sqrt(2), rel=0.05)
            props = {(await n.read_browse_name()).Name: await n.read_value()
                     for n in await c.get_node(ua.NodeId(paths[3], idx)).get_properties()}
            assert props["df_hz"] == spec["df_hz"] and props["unit"] == spec["unit"] == "g"
            assert props["amplitude"] == spec["amplitude"]
            assert props["x_unit"] == spec["x_unit"] == "Hz"
            band = c.get_node(ua.NodeId(paths[1], idx))
            eu = await (await band.get_child(f"{idx}:EngineeringUnits")).read_value()
            assert eu.UnitId == unit_id("K40") and eu.DisplayName.Text == "g"
            assert await c.get_node(ua.NodeId("-/a/status", idx)).read_value() == "ok"
            # writes are refused: the address space is read-only for every user
            with pytest.raises(ua.UaStatusCodeError):
                await band.write_value(ua.DataValue(ua.Variant(1.0, ua.VariantType.Double)))

    run(go())
    h = s.health()["opcua"]
    assert h["state"] == "running" and h["frames"] > 0 and h["errors"] == 0


def test_sign_in_needs_a_token(svc: tuple[RunningService, int]) -> None:
    _, port = svc

    async def go() -> None:
        for c in (client(port, None), _wrong_password(port)):
            with pytest.raises(ua.UaStatusCodeError):
                async with c:
                    pass

    run(go())


def _wrong_password(port: int) -> Client:
    c = client(port)
    c.set_password("not-the-token")
    return c


def test_subscription_carries_frame_times_then_bad_when_the_producer_stops(
    svc: tuple[RunningService, int], plant: Producer
) -> None:
    s, port = svc
    got: list[ua.DataValue] = []

    class Handler:
        def datachange_notification(self, node: Any, val: Any, data: Any) -> None:
            got.append(data.monitored_item.Value)

    async def go() -> None:
        async with client(port) as c:
            idx = await c.get_namespace_index(NS_URI)
            sub = await c.create_subscription(50, Handler())
            band = c.get_node(ua.NodeId("-/a/default/bands/b", idx))
            await sub.subscribe_data_change(band)
            n0 = len(got)
            plant.amp = 0.35
            plant.running.set()
            await until(lambda: _ready(len(got) >= n0 + 6), "six data changes")
            plant.running.clear()
            await asyncio.sleep(0.6)
            rest = s.get("channels/a/bands")
            good = [dv for dv in got if dv.StatusCode.is_good() and dv.SourceTimestamp]
            times = [ts_us(dv.SourceTimestamp) for dv in good]
            assert times == sorted(times) and len(set(times)) == len(times)
            assert times[-1] == us(rest["timestamp_ns"])
            assert good[-1].Value.Value == {b["name"]: b["value"] for b in rest["bands"]}["b"]
            for t in times[-5:]:  # each is a sample boundary of our plant clock
                k = (t * 1000 - T0_NS) * SMALL_FS / 1e9
                assert abs(k - round(k)) < SMALL_FS * 1e-6 + 1e-9
            # no new spectrum for stale_after_s: no-signal, values Bad (null)
            await until(lambda: _ready(any(dv.StatusCode.value ==
                                           ua.StatusCodes.BadNoCommunication for dv in got)),
                        "BadNoCommunication on the band", STALE_S + WAIT_S)
            assert got[-1].Value.Value is None
            status = await c.get_node(ua.NodeId("-/a/status", idx)).read_value()
            code = await c.get_node(ua.NodeId("-/a/status_code", idx)).read_value()
            assert status == "no-signal" == s.channel("a")["status"]
            assert code.value == ua.StatusCodes.BadNoCommunication
            dv = await c.get_node(ua.NodeId("-/a/default/overall", idx)).read_data_value(
                raise_on_bad_status=False)
            assert dv.StatusCode.value == ua.StatusCodes.BadNoCommunication
            assert s.health()["opcua"]["sessions"] >= 1
            await sub.delete()

    run(go(), 90)


async def _ready(cond: bool) -> bool | None:
    return cond or None


def test_alarm_events_and_acknowledge(svc: tuple[RunningService, int], plant: Producer) -> None:
    s, port = svc
    events: list[Any] = []

    class Handler:
        def event_notification(self, ev: Any) -> None:
            events.append(ev)

    def of(kind: str, to: str) -> Any:
        return next((e for e in events if e.Rule == RULE and e.Kind == kind
                     and e.ToState == to), None)

    async def go() -> None:
        async with client(port, "op") as op, client(port, "watcher") as viewer:
            idx = await op.get_namespace_index(NS_URI)
            etype = op.get_node(ua.NodeId("types/AlarmEventType", idx))
            sub = await op.create_subscription(50, Handler())
            await sub.subscribe_events(op.nodes.server, etype)
            plant.amp = 1.2  # peak 1.2 g → 0.85 g RMS in band b: above alert 0.5, below danger 1
            plant.running.set()
            ev = await until(lambda: _ready(of("transition", "alert")), "the alert event")
            assert ev.Channel == "a" and ev.FromState == "normal" and ev.Level == 0.5
            assert ev.Value > 0.5 and ev.Severity == 600
            state = viewer.get_node(ua.NodeId(f"alarms/{RULE}/state", idx))
            assert await until(lambda: _eq(state, "alert"), "alarm state node")
            alarms = viewer.get_node(ua.NodeId("alarms", idx))
            method = ua.NodeId("alarms/Acknowledge", idx)
            with pytest.raises(ua.uaerrors.BadUserAccessDenied):
                await alarms.call_method(method, RULE, "seen by a viewer")
            assert not _rest_alarm(s)["acked"]  # the refused call changed nothing
            out = await op.get_node(ua.NodeId("alarms", idx)).call_method(
                method, RULE, "checked on site")
            assert out == "alert"
            a = _rest_alarm(s)
            assert a["acked"] and a["acked_by"] == "op" and a["note"] == "checked on site"
            ack = await until(lambda: _ready(of("ack", "alert")), "the ack event")
            assert ack.Message.Text and ack.QuaverEventId > 0
            acked = viewer.get_node(ua.NodeId(f"alarms/{RULE}/acknowledged", idx))
            assert await acked.read_value() is True
            with pytest.raises(ua.uaerrors.BadInvalidState):  # acknowledged already
                await op.get_node(ua.NodeId("alarms", idx)).call_method(method, RULE, "")
            with pytest.raises(ua.uaerrors.BadNotFound):
                await op.get_node(ua.NodeId("alarms", idx)).call_method(method, "no.such", "")
            await sub.delete()

    try:
        run(go(), 90)
    finally:
        plant.running.clear()
        plant.amp = 0.3


def test_set_speed_operator_only_and_bad_calls_refused(svc: tuple[RunningService, int]
                                                       ) -> None:
    s, port = svc
    before = s.get("channels/a")["speed"]
    assert (before["rpm"], before["source"]) == (1200.0, "manual")

    async def go() -> None:
        async with client(port, "op") as op, client(port, "watcher") as viewer:
            idx = await op.get_namespace_index(NS_URI)
            method = ua.NodeId("speed/SetSpeed", idx)
            rpm = ua.Variant(1500.0, ua.VariantType.Double)
            with pytest.raises(ua.uaerrors.BadUserAccessDenied):
                await viewer.get_node(ua.NodeId("speed", idx)).call_method(method, "a", rpm)
            assert s.get("channels/a")["speed"]["rpm"] == 1200.0  # refused: nothing written
            speed = op.get_node(ua.NodeId("speed", idx))
            assert await speed.call_method(method, "a", rpm) is None  # no outputs
            sp = s.get("channels/a")["speed"]
            assert (sp["rpm"], sp["source"], sp["written_by"]) == (1500.0, "manual", "opcua:op")
            with pytest.raises(ua.uaerrors.BadNotFound):
                await speed.call_method(method, "no-such-channel", rpm)
            for bad in (0.0, -10.0, math.nan, math.inf, 2e6):
                with pytest.raises(ua.uaerrors.BadOutOfRange):
                    await speed.call_method(method, "a", ua.Variant(bad,
                                                                       ua.VariantType.Double))
            with pytest.raises(ua.uaerrors.BadInvalidArgument):  # a string is not a speed
                await speed.call_method(method, "a", "1500")
            assert s.get("channels/a")["speed"]["rpm"] == 1500.0  # none of them changed it

    run(go(), 60)


def test_set_speed_refuses_a_channel_that_is_not_manual(tmp_path: Path) -> None:
    (port,) = free_ports(1)
    doc = service_doc(port)
    doc["channels"] = [{"id": "a", "speed_rpm": 1200.0}]  # fixed: not speed = manual
    with run_service(doc, tmp_path) as s:
        s.wait(lambda: s.health()["opcua"]["state"] == "running", "the OPC UA address space")

        async def go() -> None:
            async with client(port, "op") as op:
                idx = await op.get_namespace_index(NS_URI)
                with pytest.raises(ua.uaerrors.BadNotWritable):
                    await op.get_node(ua.NodeId("speed", idx)).call_method(
                        ua.NodeId("speed/SetSpeed", idx), "a",
                        ua.Variant(1500.0, ua.VariantType.Double))

        run(go(), 60)
        # nothing written: a written speed would show as {"source": "manual", …}; without
        # samples fed the channel has shown no speed yet
        assert s.get("channels/a")["speed"] is None


async def _eq(node: Any, want: Any) -> bool | None:
    return (await node.read_value() == want) or None


def _rest_alarm(s: RunningService) -> dict[str, Any]:
    return next(a for a in s.get("alarms") if a["rule"] == RULE)


def test_metrics_name_the_publisher(svc: tuple[RunningService, int]) -> None:
    s, _ = svc
    text = s.client.get("/metrics").text
    assert "quaver_opcua_up 1.0" in text
    frames = [ln for ln in text.splitlines() if ln.startswith("quaver_opcua_frames_total ")]
    assert frames and float(frames[0].split()[1]) > 0


def test_sign_and_encrypt_with_the_generated_certificate(tmp_path: Path) -> None:
    (port,) = free_ports(1)
    doc = service_doc(port, security_policy="Basic256Sha256", security_mode="SignAndEncrypt")
    with run_service(doc, tmp_path / "svc") as s:
        s.wait(lambda: s.health()["opcua"]["state"] == "running", "the OPC UA address space")
        assert s.config_path is not None
        data_dir = s.config_path.parent / tomllib.loads(s.config_path.read_text())["service"][
            "data_dir"]
        server_cert = data_dir / "opcua" / "server-cert.der"
        assert server_cert.is_file() and (data_dir / "opcua" / "server-key.pem").is_file()
        key, cert = tmp_path / "client-key.pem", tmp_path / "client-cert.der"

        async def go() -> None:
            await cert_gen.setup_self_signed_certificate(
                key, cert, "urn:quaver:test-client", "localhost",
                [ExtendedKeyUsageOID.CLIENT_AUTH], {"commonName": "test client"})
            c = client(port, "op")
            c.application_uri = "urn:quaver:test-client"
            await c.set_security(SecurityPolicyBasic256Sha256, str(cert), str(key),
                                 mode=ua.MessageSecurityMode.SignAndEncrypt)
            async with c:
                idx = await c.get_namespace_index(NS_URI)
                assert await c.get_node(ua.NodeId("-/a/status", idx)).read_value() in (
                    "no-signal", "ok")
                eps = await c.get_endpoints()
                assert {e.SecurityPolicyUri.rsplit("#", 1)[1] for e in eps} == {"Basic256Sha256"}
                assert all(e.ServerCertificate == server_cert.read_bytes() for e in eps)
                assert c.security_policy.Mode == ua.MessageSecurityMode.SignAndEncrypt
            plain = client(port, "op")  # no security: the server offers no such endpoint
            with pytest.raises(Exception):  # noqa: B017 (asyncua raises several kinds here)
                async with plain:
                    await plain.get_namespace_index(NS_URI)

        run(go())


# --- the worker process --------------------------------------------------------------------


def _pid_alive(pid: int) -> bool:
    """``pid`` runs (a zombie waiting to be reaped does not: it holds no socket, no CPU)."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return False
    state = next((ln.split()[1] for ln in status.splitlines() if ln.startswith("State:")), "")
    return state not in ("Z", "X")


def _wait_gone(pid: int, what: str, timeout_s: float = 15.0) -> None:
    import time

    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        if not _pid_alive(pid):
            return
        time.sleep(0.1)
    pytest.fail(f"{what}: the OPC UA worker (pid {pid}) still runs after {timeout_s:g} s")


def test_a_killed_worker_is_restarted_and_the_analysis_goes_on(tmp_path: Path) -> None:
    import os
    import signal

    (port,) = free_ports(1)
    with run_service(service_doc(port), tmp_path / "svc") as s:
        s.wait(lambda: s.health()["opcua"]["state"] == "running", "the OPC UA address space")
        h = s.health()["opcua"]
        first = h["worker_pid"]
        assert first != s.pid and _pid_alive(first) and h["restarts"] == 0
        # the worker yields the cores to the analysis (nice is additive, at most 19: POSIX)
        assert os.getpriority(os.PRIO_PROCESS, first) == min(
            19, os.getpriority(os.PRIO_PROCESS, s.pid) + 10)
        p = Producer(s.ports["s"])
        try:
            p.amp = 0.3
            p.running.set()
            s.wait(lambda: s.get_or_none("channels/a/bands"), "a first spectrum")
            os.kill(first, signal.SIGKILL)  # as a crash of asyncua would end it
            h = s.wait(lambda: (x := s.health()["opcua"])["state"] == "failed" and x,
                       "/health to say the server failed")
            assert not h["ok"] and f"pid {first}" in h["last_error"]
            t_down = s.get("channels/a/bands")["timestamp_ns"]
            s.wait(lambda: s.health()["opcua"]["state"] == "running", "the restarted server",
                   WAIT_S + 30)
            h = s.health()["opcua"]
            assert h["restarts"] == 1 and h["worker_pid"] not in (first, None)
            assert _pid_alive(h["worker_pid"]) and not _pid_alive(first)
            # the analysis went on while the server was down and coming back
            assert s.get("channels/a/bands")["timestamp_ns"] > t_down
            assert s.health()["sources"]["s"]["pipeline"]["state"] != "failed"
            p.running.clear()

            async def go() -> None:  # the new worker serves a client: same node ids, values
                async with client(port) as c:
                    idx = await c.get_namespace_index(NS_URI)
                    band = c.get_node(ua.NodeId("-/a/default/bands/b", idx))
                    await asyncio.sleep(0.6)  # the last frames are written
                    rest = s.get("channels/a/bands")
                    dv = await band.read_data_value()
                    assert dv.StatusCode.is_good()
                    assert ts_us(dv.SourceTimestamp) == us(rest["timestamp_ns"])
                    assert dv.Value.Value == {b["name"]: b["value"]
                                              for b in rest["bands"]}["b"]

            run(go())
            second = h["worker_pid"]
        finally:
            p.close()
    # the service stopped (SIGTERM): its worker ended with it
    _wait_gone(second, "after the service stopped")


def test_the_worker_ends_when_the_service_is_killed(tmp_path: Path) -> None:
    import signal

    (port,) = free_ports(1)
    with run_service(service_doc(port), tmp_path / "svc") as s:
        s.wait(lambda: s.health()["opcua"]["state"] == "running", "the OPC UA address space")
        pid = s.health()["opcua"]["worker_pid"]
        assert _pid_alive(pid)
        s.stop(signal.SIGKILL)  # no clean-up at all: the worker sees its socket close
        _wait_gone(pid, "after the service was killed")
