"""The OPC UA server: builds the address space of ``service.opcua.layout`` in an asyncua
server, writes every frame's values into it from a hub subscription, announces alarm and
channel-state changes as events, and serves the Acknowledge method.

Knows asyncua, the hub's subscriber, the alarm engine's views and the service's acknowledge;
nothing of HTTP, the store or the engine. Imported only when ``[opcua] enabled`` (asyncua is
an optional extra)."""

from __future__ import annotations

import asyncio
import functools
import logging
import math
import os
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from asyncua import Server, ua
from asyncua.crypto import cert_gen
from cryptography.x509.oid import ExtendedKeyUsageOID

from ..alarms import AckRefused, AlarmView, UnknownAlarm
from ..hub import Subscriber
from ..spectra import spectrum_values
from ..store import StoreError
from ..types import SpectralFrame
from .access import CALLER, QuaverRuleset, TokenUsers
from .host import OpcuaHost, PublisherStats
from .layout import (
    UNITS,
    WAITING,
    ChannelLayout,
    ProfileLayout,
    channel_code,
    namespace_uri,
    plan,
    unit_id,
    value_code,
)

log = logging.getLogger("quaver.opcua")
NS = 1_000_000_000
ADD_CHUNK = 100  # nodes added between two yields to the loop while building (our choice)
YIELD_EVERY = 32  # channels whose first state is written between two yields while building
SLICE_S = 0.005  # the longest run of writes before the loop gets its turn (our choice)
REST_MIN_S = 0.005  # rests shorter than this are gathered (timer overhead; our choice)
REST_MAX_S = 0.25  # the longest rest after one pass (our choice)
TICK_S = 0.25  # channel states are compared with what was published this often (our choice)
EVENT_TYPE = "types/AlarmEventType"
# event fields of our AlarmEventType beyond BaseEventType's: (name, variant type)
EVENT_FIELDS: tuple[tuple[str, str], ...] = (
    ("Rule", "String"), ("Channel", "String"), ("Kind", "String"), ("FromState", "String"),
    ("ToState", "String"), ("Value", "Double"), ("Level", "Double"), ("Unit", "String"),
    ("QuaverEventId", "Int64"),
)
# BaseEventType Severity 1…1000 (IEC 62541-5): our choice of one value per level
SEVERITY = {"danger": 900, "alert": 600, "latched": 400, "normal": 200}
ALARM_VARS: tuple[tuple[str, str], ...] = (
    ("state", "String"), ("value", "Double"), ("alert", "Double"), ("danger", "Double"),
    ("acknowledged", "Boolean"), ("latched", "Boolean"), ("shelved", "Boolean"),
    ("channel", "String"), ("unit", "String"),
)


def _dt(t_ns: int) -> datetime:
    """An aware UTC datetime of ``t_ns`` (to the microsecond: asyncua's DateTime)."""
    return datetime.fromtimestamp(t_ns // 1000 / 1e6, UTC)


@functools.cache
def _code(name: str) -> ua.StatusCode:
    return ua.StatusCode(getattr(ua.StatusCodes, name))


class OpcuaServer:
    """One asyncua server over a running service (``host``); see the package docstring."""

    def __init__(self, host: OpcuaHost, stats: PublisherStats) -> None:
        # asyncua logs each node it loads and each request at INFO: thousands of lines at
        # start and a line per read in the service's log; its warnings and errors stay
        logging.getLogger("asyncua").setLevel(logging.WARNING)
        self.host, self.stats = host, stats
        self.cfg = host.cfg.opcua
        self.server = Server(user_manager=TokenUsers(lambda: self.host.cfg.tokens))
        self.idx = 0
        self.layout: list[ChannelLayout] = []
        self._sub: Subscriber | None = None
        self._task: asyncio.Task[None] | None = None
        self._published: dict[str, str] = {}  # channel → status last written to its nodes
        self._alarm_rows: dict[str, dict[str, Any]] = {}  # rule → values last written
        self._alarm_nodes: set[str] = set()
        self._last_alarm_refresh = 0.0
        self._events: Any = None  # asyncua EventGenerator
        self.ready = False  # every node built and the hub subscribed
        self.failed = ""  # why building the address space failed
        self._nids: dict[str, ua.NodeId] = {}
        self._spectrum_props: dict[str, tuple[float, float, str, str]] = {}

    # -- start and stop -------------------------------------------------------------------
    async def start(self) -> None:
        s, o = self.server, self.cfg
        await s.init()
        s.set_endpoint(o.endpoint)
        s.set_server_name(f"quaver {o.site}")
        await s.set_application_uri(f"urn:quaver:{o.site}:server")
        ruleset = QuaverRuleset()
        if o.security_policy == "None":
            s.set_security_policy([ua.SecurityPolicyType.NoSecurity], permission_ruleset=ruleset)
        else:
            policy = (ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt
                      if o.security_mode == "SignAndEncrypt"
                      else ua.SecurityPolicyType.Basic256Sha256_Sign)
            s.set_security_policy([policy], permission_ruleset=ruleset)
            cert, key = await self._certificate()
            await s.load_certificate(str(cert))
            await s.load_private_key(str(key))
        s.set_identity_tokens([ua.UserNameIdentityToken] if self.host.cfg.tokens
                              else [ua.AnonymousIdentityToken])
        self.idx = await s.register_namespace(namespace_uri(self.host.cfg))
        await self._build_fixed()
        await s.start()  # the endpoint's port is bound here: a taken one fails the start-up

    def begin(self) -> None:
        """Build the plant's nodes and publish, on a task of its own (after the sources
        started: the build takes seconds of loop time for a large plant)."""
        self._task = asyncio.create_task(self._populate_and_run(), name="opcua-publisher")

    async def _populate_and_run(self) -> None:
        """The plant's nodes (in chunks: the loop keeps serving the sources and HTTP), then
        the hub subscription and the loop. ``ready`` is set once clients see every node."""
        try:
            await self._build_plant()
            self._sub = Subscriber(None, max_events=4096, profiles=frozenset({"*"}))
            self.host.hub.subscribers.add(self._sub)
            await self._write_all_states(time.time_ns())
            await self._refresh_alarms()
            self._last_alarm_refresh = time.monotonic()
            self.ready = True
            log.info("OPC UA address space ready: %d channels, %d alarm rules",
                     len(self.layout), len(self._alarm_nodes))
        except Exception as e:
            self.failed = f"{type(e).__name__}: {e}"[:300]
            log.exception("OPC UA address space not built")
            raise
        await self._run()

    async def stop(self) -> None:
        if self._sub is not None:
            self.host.hub.unsubscribe(self._sub)
        if self._task is not None:
            self._task.cancel()
            await asyncio.gather(self._task, return_exceptions=True)
        await self.server.stop()

    async def _certificate(self) -> tuple[Path, Path]:
        """The configured pair, or quaver's own self-signed one in <data_dir>/opcua/ (made on
        first start with asyncua's helper, made again when it is expired or invalid)."""
        o = self.cfg
        if o.certificate is not None and o.private_key is not None:
            return Path(o.certificate), Path(o.private_key)
        folder = Path(self.host.cfg.service.data_dir) / "opcua"
        folder.mkdir(parents=True, exist_ok=True)
        cert, key = folder / "server-cert.der", folder / "server-key.pem"
        host = o.endpoint.split("://", 1)[1].rsplit(":", 1)[0].strip("[]")
        await cert_gen.setup_self_signed_certificate(
            key, cert, f"urn:quaver:{o.site}:server", host,
            [ExtendedKeyUsageOID.SERVER_AUTH, ExtendedKeyUsageOID.CLIENT_AUTH],
            {"organizationName": "quaver", "commonName": f"quaver {o.site}"},
        )
        os.chmod(key, 0o600)
        return cert, key

    # -- the address space ----------------------------------------------------------------
    def nid(self, path: str) -> ua.NodeId:
        return ua.NodeId(path, self.idx)

    async def _build_fixed(self) -> None:
        """The folders, the Acknowledge method and the event type (before the server
        listens)."""
        idx = self.idx
        objects = self.server.nodes.objects
        self._add([self._object("machines", "Machines", objects.nodeid, folder=True),
                   self._object("alarms", "Alarms", objects.nodeid, folder=True)])
        alarms = self.server.get_node(self.nid("alarms"))
        await alarms.add_method(
            self.nid("alarms/Acknowledge"), ua.QualifiedName("Acknowledge", idx), self._ack,
            [_arg("RuleId", ua.ObjectIds.String, "rule id, as in GET /api/v1/alarms"),
             _arg("Note", ua.ObjectIds.String, "why, for the event log (may be empty)")],
            [_arg("State", ua.ObjectIds.String, "the alarm's state after the acknowledgement")],
        )
        etype = await self.server.get_node(ua.ObjectIds.BaseEventType).add_object_type(
            self.nid(EVENT_TYPE), ua.QualifiedName("AlarmEventType", idx))
        for name, vt in EVENT_FIELDS:
            vtype = getattr(ua.VariantType, vt)
            await etype.add_property(self.nid(f"{EVENT_TYPE}/{name}"),
                                     ua.QualifiedName(name, idx), ua.get_default_value(vtype),
                                     varianttype=vtype)
        self._events = await self.server.get_event_generator(etype, ua.ObjectIds.Server)

    async def _build_plant(self) -> None:
        """Machines → channels → profiles → values, and the alarm rules."""
        self.layout = plan(self.host.cfg, self.host.hub.channels)
        items: list[ua.AddNodesItem] = []
        machines_names = {m.id: m.name or m.id for m in self.host.cfg.machines}
        seen_machines: set[str] = set()
        for ch in self.layout:
            st = self.host.hub.channels[ch.id]
            if ch.machine not in seen_machines:
                seen_machines.add(ch.machine)
                name = machines_names.get(st.machine, st.machine) or "(no machine)"
                items.append(self._object(ch.machine, name, self.nid("machines"), organizes=True))
            if len(items) >= ADD_CHUNK:  # a channel at a time; the loop serves in between
                self._add(items)
                items = []
                await asyncio.sleep(0)
            items.append(self._object(ch.path, ch.id, self.nid(ch.machine),
                                      description=ch.description))
            S = ua.VariantType.String
            items.append(self._var(ch.path, "status", ua.Variant("no-signal", S)))
            items.append(self._var(ch.path, "cause", ua.Variant("", S)))
            items.append(self._var(ch.path, "status_code", ua.Variant(
                _code(WAITING), ua.VariantType.StatusCode), datatype=ua.ObjectIds.StatusCode))
            for p in ch.profiles:
                items.append(self._object(p.path, p.profile, self.nid(ch.path)))
                items += self._analog(p.path, "overall", p.unit, ch)
                items.append(self._object(f"{p.path}/bands", "bands", self.nid(p.path),
                                          folder=True))
                for b in p.bands:
                    items += self._analog(f"{p.path}/bands", b, p.unit, ch, path=p.band(b))
                items.append(self._object(f"{p.path}/tones", "tones", self.nid(p.path),
                                          folder=True))
                for t in p.tones:
                    items += self._analog(f"{p.path}/tones", t, p.unit, ch, path=p.tone(t))
                if self.cfg.spectra:
                    sp = p.spectrum()
                    items.append(self._var(p.path, "spectrum", ua.Variant(
                        [], ua.VariantType.Float), datatype=ua.ObjectIds.Float, rank=1))
                    for name, v in (("df_hz", ua.Variant(0.0, ua.VariantType.Double)),
                                    ("f0_hz", ua.Variant(0.0, ua.VariantType.Double)),
                                    ("unit", ua.Variant(p.unit, ua.VariantType.String)),
                                    ("amplitude", ua.Variant("", ua.VariantType.String))):
                        items.append(self._var(sp, name, v, prop=True))
        self._add(items)
        await self._add_alarm_rules(self.host.alarms.views())

    def _add(self, items: list[ua.AddNodesItem]) -> None:
        # straight to the node management service (asyncua's Node helpers make a request per
        # node); ~20 000 nodes of a 256-channel plant take seconds, so callers add in chunks
        for r in self.server.iserver.node_mgt_service.add_nodes(items):
            r.StatusCode.check()

    def _object(self, path: str, name: str, parent: ua.NodeId, *, folder: bool = False,
                organizes: bool = False, description: str = "") -> ua.AddNodesItem:
        it = ua.AddNodesItem()
        it.RequestedNewNodeId = self.nid(path)
        it.BrowseName = ua.QualifiedName(name, self.idx)
        it.ParentNodeId = parent
        it.NodeClass = ua.NodeClass.Object
        it.ReferenceTypeId = ua.NodeId(ua.ObjectIds.Organizes if (folder or organizes)
                                       else ua.ObjectIds.HasComponent)
        it.TypeDefinition = ua.NodeId(ua.ObjectIds.FolderType if folder
                                      else ua.ObjectIds.BaseObjectType)
        a = ua.ObjectAttributes()
        a.DisplayName = ua.LocalizedText(name)
        a.Description = ua.LocalizedText(description or name)
        a.EventNotifier = 0
        it.NodeAttributes = a
        return it

    def _var(self, parent_path: str, name: str, value: ua.Variant, *, path: str | None = None,
             datatype: int | None = None, prop: bool = False, rank: int = -1,
             typedef: int = ua.ObjectIds.BaseDataVariableType) -> ua.AddNodesItem:
        it = ua.AddNodesItem()
        it.RequestedNewNodeId = self.nid(path or f"{parent_path}/{name}")
        it.BrowseName = ua.QualifiedName(name, self.idx)
        it.ParentNodeId = self.nid(parent_path)
        it.NodeClass = ua.NodeClass.Variable
        it.ReferenceTypeId = ua.NodeId(ua.ObjectIds.HasProperty if prop
                                       else ua.ObjectIds.HasComponent)
        it.TypeDefinition = ua.NodeId(ua.ObjectIds.PropertyType if prop else typedef)
        a = ua.VariableAttributes()
        a.DisplayName = ua.LocalizedText(name)
        a.Description = ua.LocalizedText(name)
        a.DataType = ua.NodeId(datatype if datatype is not None
                               else getattr(ua.ObjectIds, value.VariantType.name))
        a.Value = value
        a.ValueRank = rank
        a.ArrayDimensions = [0] if rank == 1 else None
        a.AccessLevel = a.UserAccessLevel = ua.AccessLevel.CurrentRead.mask  # read-only
        a.WriteMask = a.UserWriteMask = 0
        a.Historizing = False
        it.NodeAttributes = a
        return it

    def _analog(self, parent: str, name: str, unit: str, ch: ChannelLayout,
                path: str | None = None) -> list[ua.AddNodesItem]:
        """A Double of AnalogItemType (IEC 62541-8) with EngineeringUnits, and EURange when
        the channel's range is known and the value is in its input unit."""
        p = path or f"{parent}/{name}"
        out = [self._var(parent, name, ua.Variant(0.0, ua.VariantType.Double), path=p,
                         typedef=ua.ObjectIds.AnalogItemType)]
        code = UNITS.get(unit)
        eu = ua.EUInformation(
            NamespaceUri="http://www.opcfoundation.org/UA/units/un/cefact",
            UnitId=unit_id(code[0]) if code else -1,
            DisplayName=ua.LocalizedText(unit), Description=ua.LocalizedText(
                code[1] if code else unit))
        out.append(self._var(p, "EngineeringUnits", ua.Variant(eu, ua.VariantType.ExtensionObject),
                             datatype=ua.ObjectIds.EUInformation, prop=True))
        if ch.range is not None and unit == ch.input_unit:
            rng = ua.Range(Low=0.0, High=float(ch.range))
            out.append(self._var(p, "EURange", ua.Variant(rng, ua.VariantType.ExtensionObject),
                                 datatype=ua.ObjectIds.Range, prop=True))
        return out

    async def _add_alarm_rules(self, views: list[AlarmView]) -> None:
        items = []
        for v in views:
            if v.rule in self._alarm_nodes:
                continue
            self._alarm_nodes.add(v.rule)
            base = f"alarms/{v.rule}"
            items.append(self._object(base, v.rule, self.nid("alarms"),
                                      description=f"{v.channel}: {v.kind} {v.name}".strip()))
            for name, vt in ALARM_VARS:
                vtype = getattr(ua.VariantType, vt)
                items.append(self._var(base, name, ua.Variant(ua.get_default_value(vtype), vtype)))
            if len(items) >= ADD_CHUNK:
                self._add(items)
                items = []
                await asyncio.sleep(0)
        if items:
            self._add(items)

    # -- writing values -------------------------------------------------------------------
    async def _put(self, path: str, value: Any, vtype: ua.VariantType, code: str,
                   src: datetime, now: datetime) -> None:
        nid = self._nids.get(path)
        if nid is None:
            nid = self._nids[path] = self.nid(path)
        bad = code.startswith("Bad")
        dv = ua.DataValue(ua.Variant(None if bad else value, ua.VariantType.Null if bad else vtype),
                          StatusCode=_code(code), SourceTimestamp=src, ServerTimestamp=now)
        r = await self.server.iserver.aspace.write_attribute_value(nid, ua.AttributeIds.Value, dv)
        if not r.is_good():
            self.stats.errors += 1
            self.stats.last_error = f"{path}: {r.name}"
            return
        self.stats.updates += 1

    async def _write_frame(self, f: SpectralFrame, p: ProfileLayout) -> None:
        st = self.host.hub.channels[f.channel]
        src, now = _dt(f.t_ns), datetime.now(UTC)
        D = ua.VariantType.Double
        status, q = st.status, f.quality
        await self._put(p.overall(), float(f.overall), D, value_code(status, q, f.overall),
                        src, now)
        for b in f.bands:
            await self._put(p.band(b.name), float(b.value), D, value_code(status, q, b.value),
                            src, now)
        for t in f.tones:
            await self._put(p.tone(t.name), float(t.value), D, value_code(status, q, t.value),
                            src, now)
        if self.cfg.spectra:
            values, unit, amp = spectrum_values(f)
            sp = p.spectrum()
            await self._put(sp, values.tolist(), ua.VariantType.Float,
                            value_code(status, q, 0.0), src, now)
            props = (f.df_hz, f.f0_hz, unit, amp)
            if self._spectrum_props.get(sp) != props:  # they change only with the set-up
                self._spectrum_props[sp] = props
                for name, v, vt in (("df_hz", f.df_hz, D), ("f0_hz", f.f0_hz, D),
                                    ("unit", unit, ua.VariantType.String),
                                    ("amplitude", amp, ua.VariantType.String)):
                    await self._put(f"{sp}/{name}", v, vt, "Good", src, now)
        self.stats.frames += 1

    async def _write_state(self, ch: ChannelLayout, t_ns: int) -> None:
        """The channel's status nodes; its values' StatusCode when it goes Bad (their value
        is then null: IEC 62541-4 §7.7.1, and asyncua clears it) or comes back."""
        st = self.host.hub.channels[ch.id]
        before = self._published.get(ch.id)
        self._published[ch.id] = st.status
        src, now = _dt(st.status_since_ns or t_ns), datetime.now(UTC)
        S = ua.VariantType.String
        code = channel_code(st.status) if st.last_frame_mono is not None or before else WAITING
        if st.status == "no-signal" and not self._seen(ch):
            code = WAITING  # nothing analysed yet since the start
        await self._put(f"{ch.path}/status", st.status, S, "Good", src, now)
        await self._put(f"{ch.path}/cause", st.fault, S, "Good", src, now)
        await self._put(f"{ch.path}/status_code", _code(code), ua.VariantType.StatusCode,
                        "Good", src, now)
        if code.startswith("Bad"):
            for p in ch.profiles:
                for path in (p.overall(), *map(p.band, p.bands), *map(p.tone, p.tones),
                             *((p.spectrum(),) if self.cfg.spectra else ())):
                    await self._put(path, None, ua.VariantType.Null, code, src, now)

    def _seen(self, ch: ChannelLayout) -> bool:
        return any(self.host.hub.frame(ch.id, p.profile) is not None for p in ch.profiles)

    async def _write_all_states(self, t_ns: int) -> None:
        for k, ch in enumerate(self.layout):
            await self._write_state(ch, t_ns)
            if k % YIELD_EVERY == YIELD_EVERY - 1:
                await asyncio.sleep(0)

    async def _check_states(self) -> None:
        """Write the state of every channel whose state changed since it was written (the
        hub's status events say so too, but the first spectrum after the start is none)."""
        chans = self.host.hub.channels
        for ch in self.layout:
            if chans[ch.id].status != self._published.get(ch.id):
                await self._write_state(ch, time.time_ns())

    async def _refresh_alarms(self, rule: str | None = None) -> None:
        """Write the alarm nodes that changed: of ``rule`` (after its event), or of every
        rule (each alarm_refresh_s; a rule added by a config reload gets its nodes)."""
        if rule is None:
            views = self.host.alarms.views()
            await self._add_alarm_rules(views)
        else:
            try:  # one rule: its event must not cost a pass over every rule
                views = [self.host.alarms.view(rule)]
            except UnknownAlarm:  # a channel-state event ("<channel>.status"), or gone
                return
            await self._add_alarm_rules(views)
        now = datetime.now(UTC)
        for v in views:
            row = {"state": v.state.value, "value": v.value, "alert": v.alert, "danger": v.danger,
                   "acknowledged": v.acked, "latched": v.latched, "shelved": v.shelved,
                   "channel": v.channel, "unit": v.unit}
            old = self._alarm_rows.get(v.rule, {})
            src = _dt(v.value_ns) if v.value_ns else now
            for name, vt in ALARM_VARS:
                x = row[name]
                if old.get(name, ()) == x:
                    continue
                if x is None or (isinstance(x, float) and not math.isfinite(x)):
                    # no value yet, learning a baseline, or suspended while not live
                    await self._put(f"alarms/{v.rule}/{name}", None, ua.VariantType.Null,
                                    WAITING if v.value_ns is None else "BadNoCommunication"
                                    if v.suspended else "BadWaitingForInitialData", src, now)
                else:
                    await self._put(f"alarms/{v.rule}/{name}", x, getattr(ua.VariantType, vt),
                                    "Good", src, now)
            self._alarm_rows[v.rule] = row

    async def _announce(self, ev: dict[str, Any]) -> None:
        """An alarm or channel-state event (already committed) as an OPC UA event."""
        e = self._events.event
        e.Rule, e.Channel, e.Kind = str(ev["rule"]), str(ev["channel"]), str(ev["kind"])
        e.FromState, e.ToState = str(ev["from_state"]), str(ev["to_state"])
        e.Value = float(ev["value"]) if ev.get("value") is not None else math.nan
        e.Level = float(ev["level"]) if ev.get("level") is not None else math.nan
        e.Unit = str(ev.get("unit") or "")
        e.QuaverEventId = int(ev["id"]) if ev.get("id") is not None else -1
        e.SourceName = str(ev["rule"])
        rule_node = f"alarms/{ev['rule']}"
        e.SourceNode = self.nid(rule_node) if ev["rule"] in self._alarm_nodes else ua.NodeId(
            ua.ObjectIds.Server)
        to = str(ev["to_state"])
        e.Severity = SEVERITY.get(to, 500 if ev["kind"] == "status" and to != "ok" else 200)
        await self._events.trigger(_dt(int(ev["t_ns"])), str(ev.get("message", "")))
        self.stats.events += 1

    # -- the loop -------------------------------------------------------------------------
    async def _run(self) -> None:
        """Take the hub's items and write them, a slice of work at a time.

        The hub hands pending items over without waiting and asyncua's writes do not wait
        either, so a slice's time (the loop thread's CPU) is ours alone. After each slice
        (at most SLICE_S) the loop gets its turn, and we rest in proportion to the time the
        slice took, so that publishing takes at most ``max_loop_share`` of the loop: the hub
        keeps the newest frame of each channel meanwhile (drop to newest, counted)."""
        assert self._sub is not None
        sub = self._sub
        profiles = {(p.channel, p.profile): p for ch in self.layout for p in ch.profiles}
        last_tick = time.monotonic()
        rest = 0.0  # s owed to the rest of the loop
        while True:
            try:
                item: SpectralFrame | dict[str, Any] | None = await sub.get(timeout=TICK_S)
            except TimeoutError:
                item = None
            t0 = time.thread_time()
            try:
                while item is not None:
                    await self._handle(item, profiles)
                    if not sub.pending() or time.thread_time() - t0 >= SLICE_S:
                        break
                    item = await sub.get()  # returns at once: items are pending
                now = time.monotonic()
                if now - last_tick >= TICK_S:
                    last_tick = now
                    await self._check_states()
                if now - self._last_alarm_refresh >= self.cfg.alarm_refresh_s:
                    self._last_alarm_refresh = now
                    await self._refresh_alarms()
                self.stats.dropped = sub.missed
            except asyncio.CancelledError:
                raise
            except Exception as e:  # one bad write must not stop the publisher
                self.stats.errors += 1
                self.stats.last_error = f"{type(e).__name__}: {e}"[:300]
                log.exception("OPC UA publisher")
            rest += (time.thread_time() - t0) * (1.0 / self.cfg.max_loop_share - 1.0)
            if rest >= REST_MIN_S:
                # a long pass (a plant-wide state change) is not repaid for seconds
                await asyncio.sleep(min(rest, REST_MAX_S))
                rest = 0.0
            else:
                await asyncio.sleep(0)

    async def _handle(self, item: SpectralFrame | dict[str, Any],
                      profiles: dict[tuple[str, str], ProfileLayout]) -> None:
        if isinstance(item, SpectralFrame):
            p = profiles.get((item.channel, item.profile))
            if p is not None:
                if self.host.hub.channels[item.channel].status != self._published.get(
                        item.channel):
                    await self._check_states()
                await self._write_frame(item, p)
        else:
            await self._refresh_alarms(str(item["rule"]))
            await self._announce(item)

    # -- the Acknowledge method -----------------------------------------------------------
    async def _ack(self, parent: ua.NodeId, rule: ua.Variant,
                   note: ua.Variant) -> list[ua.Variant] | ua.StatusCode:
        who = CALLER.get()
        if who is None or not who.may("operator"):
            return _code("BadUserAccessDenied")
        rid = str(rule.Value or "")
        try:
            out = await self.host.acknowledge(rid, who.name, str(note.Value or ""))
        except UnknownAlarm:
            return _code("BadNotFound")
        except AckRefused:
            return _code("BadInvalidState")
        except StoreError:
            return _code("BadResourceUnavailable")  # nothing was acknowledged: retry later
        await self._refresh_alarms(rid)
        return [ua.Variant(str(out.get("to_state", "")), ua.VariantType.String)]

    def sessions(self) -> int:
        b = self.server.bserver
        if b is None:
            return 0
        return sum(1 for c in list(b.clients)
                   if c.processor is not None and c.processor.session is not None)


def _arg(name: str, datatype: int, text: str) -> ua.Argument:
    a = ua.Argument()
    a.Name = name
    a.DataType = ua.NodeId(datatype)
    a.ValueRank = -1
    a.Description = ua.LocalizedText(text)
    return a


__all__ = ["OpcuaServer"]
