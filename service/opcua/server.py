"""The OPC UA server, in the worker process (``service.opcua.worker``): builds the address
space of ``service.opcua.layout`` in an asyncua server, writes the values the service packs
for it (:mod:`service.opcua.pack`) with the frames' times, announces alarm and channel-state
changes as events, and serves the Acknowledge method by asking the service.

Knows asyncua, the layout and the packed batches; nothing of the hub, the alarm engine,
HTTP or the store (they live in the service process). Imported only in the worker."""

from __future__ import annotations

import asyncio
import functools
import logging
import math
import os
from collections.abc import Awaitable, Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from asyncua import Server, ua
from asyncua.crypto import cert_gen
from cryptography.x509.oid import ExtendedKeyUsageOID

from ..auth import TokenEntry
from ..config.opcua import OpcuaConfig
from .access import CALLER, QuaverRuleset, TokenUsers
from .layout import UNITS, WAITING, ChannelLayout, unit_id
from .pack import ALARM_VARS, CODES, UNMEASURED_CODE, FrameBatch

log = logging.getLogger("quaver.opcua")
ADD_CHUNK = 2000  # nodes added per call to the node management service (our choice)
YIELD_EVERY = 32  # frames written between two turns of the worker's loop (our choice)
EVENT_TYPE = "types/AlarmEventType"
# event fields of our AlarmEventType beyond BaseEventType's: (name, variant type)
EVENT_FIELDS: tuple[tuple[str, str], ...] = (
    ("Rule", "String"), ("Channel", "String"), ("Kind", "String"), ("FromState", "String"),
    ("ToState", "String"), ("Value", "Double"), ("Level", "Double"), ("Unit", "String"),
    ("QuaverEventId", "Int64"),
)
# BaseEventType Severity 1…1000 (IEC 62541-5): our choice of one value per level
SEVERITY = {"danger": 900, "alert": 600, "latched": 400, "normal": 200}
ALARM_TYPES = dict(ALARM_VARS)
# what the Acknowledge handler hands the service: (rule, who, note) → ("ok", to_state) or
# ("refused", StatusCode name)
AckCall = Callable[[str, str, str], Awaitable[tuple[str, str]]]
# what SetSpeed hands the service: (channel, rpm, who) → ("ok", "") or ("refused", code name)
SpeedCall = Callable[[str, float, str], Awaitable[tuple[str, str]]]


def _dt(t_ns: int) -> datetime:
    """An aware UTC datetime of ``t_ns`` (to the microsecond: asyncua's DateTime)."""
    return datetime.fromtimestamp(t_ns // 1000 / 1e6, UTC)


@functools.cache
def _code(name: str) -> ua.StatusCode:
    return ua.StatusCode(getattr(ua.StatusCodes, name))


class _Value(ua.DataValue):  # type: ignore[misc]
    """A DataValue built for one write and never changed after. asyncua deep-copies each
    value written once per monitored item (to guard against callers that change a value
    after writing it): three quarters of a write's CPU with one client subscribed (measured
    with cProfile: ~165 µs a write, ~44 µs without the copy). Ours need no copy."""

    def __deepcopy__(self, memo: dict[int, Any]) -> _Value:
        return self


@dataclass
class WorkerStats:
    """The worker's counters since it started (sent to the service for /health)."""

    frames: int = 0  # frames written into the address space
    updates: int = 0  # node values written
    events: int = 0  # OPC UA events fired
    errors: int = 0  # writes that failed
    last_error: str = ""


class OpcuaServer:
    """One asyncua server in the worker; see the module docstring."""

    def __init__(self, cfg: OpcuaConfig, tokens: Sequence[TokenEntry], data_dir: str,
                 ns_uri: str, ack: AckCall, set_speed: SpeedCall) -> None:
        # asyncua logs each node it loads and each request at INFO: thousands of lines at
        # start and a line per read in the service's log; its warnings and errors stay
        logging.getLogger("asyncua").setLevel(logging.WARNING)
        self.cfg, self.tokens, self.data_dir, self.ns_uri = cfg, list(tokens), data_dir, ns_uri
        self.ack_call = ack
        self.speed_call = set_speed
        self.stats = WorkerStats()
        self.server = Server(user_manager=TokenUsers(lambda: self.tokens))
        self.idx = 0
        self.layout: list[ChannelLayout] = []
        # per profile (the service's order): NodeIds of overall, bands…, tones…; spectrum
        self._value_nids: list[list[ua.NodeId]] = []
        self._spectrum_nid: list[ua.NodeId | None] = []
        self._spectrum_props: list[tuple[Any, ...] | None] = []
        self._channel_nids: list[list[ua.NodeId]] = []  # per channel: every value node
        self._alarm_nodes: set[str] = set()
        self._events: Any = None  # asyncua EventGenerator
        self._write = None  # the address space's write_attribute_value

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
        s.set_identity_tokens([ua.UserNameIdentityToken] if self.tokens
                              else [ua.AnonymousIdentityToken])
        self.idx = await s.register_namespace(self.ns_uri)
        await self._build_fixed()
        self._write = s.iserver.aspace.write_attribute_value
        await s.start()  # the endpoint's port is bound here: a taken one fails the start-up

    async def stop(self) -> None:
        await self.server.stop()

    async def _certificate(self) -> tuple[Path, Path]:
        """The configured pair, or quaver's own self-signed one in <data_dir>/opcua/ (made on
        first start with asyncua's helper, made again when it is expired or invalid)."""
        o = self.cfg
        if o.certificate is not None and o.private_key is not None:
            return Path(o.certificate), Path(o.private_key)
        folder = Path(self.data_dir) / "opcua"
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
        """The folders, the Acknowledge and SetSpeed methods and the event type (before the server
        listens)."""
        idx = self.idx
        objects = self.server.nodes.objects
        self._add([self._object("machines", "Machines", objects.nodeid, folder=True),
                   self._object("alarms", "Alarms", objects.nodeid, folder=True),
                   self._object("speed", "Speed", objects.nodeid, organizes=True,
                                description="Running speeds written by operators")])
        alarms = self.server.get_node(self.nid("alarms"))
        await alarms.add_method(
            self.nid("alarms/Acknowledge"), ua.QualifiedName("Acknowledge", idx), self._ack,
            [_arg("RuleId", ua.ObjectIds.String, "rule id, as in GET /api/v1/alarms"),
             _arg("Note", ua.ObjectIds.String, "why, for the event log (may be empty)")],
            [_arg("State", ua.ObjectIds.String, "the alarm's state after the acknowledgement")],
        )
        speed = self.server.get_node(self.nid("speed"))
        await speed.add_method(
            self.nid("speed/SetSpeed"), ua.QualifiedName("SetSpeed", idx), self._set_speed,
            [_arg("ChannelId", ua.ObjectIds.String, "channel id of a channel configured "
                  "speed = 'manual'"),
             _arg("Rpm", ua.ObjectIds.Double, "running speed, r/min, in (0, 1e6]")],
            [],
        )
        etype = await self.server.get_node(ua.ObjectIds.BaseEventType).add_object_type(
            self.nid(EVENT_TYPE), ua.QualifiedName("AlarmEventType", idx))
        for name, vt in EVENT_FIELDS:
            vtype = getattr(ua.VariantType, vt)
            await etype.add_property(self.nid(f"{EVENT_TYPE}/{name}"),
                                     ua.QualifiedName(name, idx), ua.get_default_value(vtype),
                                     varianttype=vtype)
        self._events = await self.server.get_event_generator(etype, ua.ObjectIds.Server)

    def build_plant(self, layout: list[ChannelLayout], machine_names: dict[str, str]) -> None:
        """Machines → channels → profiles → values (the worker has nothing else to do
        meanwhile: no yields)."""
        self.layout = layout
        items: list[ua.AddNodesItem] = []
        seen_machines: set[str] = set()
        for ch in layout:
            if ch.machine not in seen_machines:
                seen_machines.add(ch.machine)
                name = machine_names.get(ch.machine) or "(no machine)"
                items.append(self._object(ch.machine, name, self.nid("machines"), organizes=True))
            items.append(self._object(ch.path, ch.id, self.nid(ch.machine),
                                      description=ch.description))
            S = ua.VariantType.String
            items.append(self._var(ch.path, "status", ua.Variant("no-signal", S)))
            items.append(self._var(ch.path, "cause", ua.Variant("", S)))
            items.append(self._var(ch.path, "status_code", ua.Variant(
                _code(WAITING), ua.VariantType.StatusCode), datatype=ua.ObjectIds.StatusCode))
            chan_nids: list[ua.NodeId] = []
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
                nids = [self.nid(x) for x in (p.overall(), *map(p.band, p.bands),
                                              *map(p.tone, p.tones))]
                self._value_nids.append(nids)
                chan_nids += nids
                if self.cfg.spectra:
                    sp = p.spectrum()
                    items.append(self._var(p.path, "spectrum", ua.Variant(
                        [], ua.VariantType.Float), datatype=ua.ObjectIds.Float, rank=1))
                    for name, v in (("df_hz", ua.Variant(0.0, ua.VariantType.Double)),
                                    ("f0_hz", ua.Variant(0.0, ua.VariantType.Double)),
                                    ("unit", ua.Variant(p.unit, ua.VariantType.String)),
                                    ("amplitude", ua.Variant("", ua.VariantType.String)),
                                    ("x_unit", ua.Variant(p.x_unit, ua.VariantType.String))):
                        items.append(self._var(sp, name, v, prop=True))
                    self._spectrum_nid.append(self.nid(sp))
                    chan_nids.append(self.nid(sp))
                else:
                    self._spectrum_nid.append(None)
                self._spectrum_props.append(None)
            self._channel_nids.append(chan_nids)
            if len(items) >= ADD_CHUNK:
                self._add(items)
                items = []
        self._add(items)

    def _add(self, items: list[ua.AddNodesItem]) -> None:
        # straight to the node management service (asyncua's Node helpers make a request per
        # node; ~20 000 nodes of a 256-channel plant)
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

    def _add_alarm_rule(self, rule: str, description: str) -> None:
        if rule in self._alarm_nodes:
            return
        self._alarm_nodes.add(rule)
        base = f"alarms/{rule}"
        items = [self._object(base, rule, self.nid("alarms"), description=description)]
        for name, vt in ALARM_VARS:
            vtype = getattr(ua.VariantType, vt)
            items.append(self._var(base, name, ua.Variant(ua.get_default_value(vtype), vtype)))
        self._add(items)

    # -- writing values -------------------------------------------------------------------
    async def _put(self, nid: ua.NodeId, value: Any, vtype: ua.VariantType, code: str,
                   src: datetime, now: datetime) -> None:
        bad = code.startswith("Bad")
        dv = _Value(ua.Variant(None if bad else value, ua.VariantType.Null if bad else vtype),
                          StatusCode=_code(code), SourceTimestamp=src, ServerTimestamp=now)
        r = await self._write(nid, ua.AttributeIds.Value, dv)  # type: ignore[misc]
        if not r.is_good():
            self.stats.errors += 1
            self.stats.last_error = f"{nid.Identifier}: {r.name}"
            return
        self.stats.updates += 1

    async def write_frames(self, batch: FrameBatch) -> None:
        """One packed batch: every value of every frame, with its frame's time and code."""
        now = datetime.now(UTC)
        D = ua.VariantType.Double
        values = batch.values.tolist()
        finite = np.isfinite(batch.values).tolist()
        starts = batch.starts.tolist()
        codes = [CODES[c] for c in batch.codes.tolist()]
        good = _code("Good")
        for i, (prof, t_ns) in enumerate(zip(batch.profiles.tolist(), batch.t_ns.tolist(),
                                             strict=True)):
            src = _dt(t_ns)
            code = codes[i]
            nids = self._value_nids[prof]
            k0 = starts[i]
            if code == "Good":  # the common case, without the per-value code look-up
                for j, nid in enumerate(nids):
                    k = k0 + j
                    if finite[k]:
                        dv = _Value(ua.Variant(values[k], D), StatusCode=good,
                                          SourceTimestamp=src, ServerTimestamp=now)
                        r = await self._write(nid, ua.AttributeIds.Value, dv)  # type: ignore[misc]
                        if r.is_good():
                            self.stats.updates += 1
                        else:
                            self.stats.errors += 1
                            self.stats.last_error = f"{nid.Identifier}: {r.name}"
                    else:
                        await self._put(nid, None, D, CODES[UNMEASURED_CODE], src, now)
            else:
                for j, nid in enumerate(nids):  # Uncertain or Bad: NaN is not "unmeasured"
                    await self._put(nid, values[k0 + j], D, code, src, now)
            self.stats.frames += 1
            if i % YIELD_EVERY == YIELD_EVERY - 1:
                await asyncio.sleep(0)  # clients' requests and publishing get their turn
        for prof, t_ns, code_i, spectrum, props in batch.spectra:
            sp = self._spectrum_nid[prof]
            if sp is None:
                continue
            src = _dt(t_ns)
            await self._put(sp, spectrum.tolist(), ua.VariantType.Float, CODES[code_i], src, now)
            if self._spectrum_props[prof] != props:  # they change only with the set-up
                self._spectrum_props[prof] = props
                for name, v, vt in zip(("df_hz", "f0_hz", "unit", "amplitude"), props,
                                       (D, D, ua.VariantType.String, ua.VariantType.String),
                                       strict=True):
                    await self._put(self.nid(f"{sp.Identifier}/{name}"), v, vt, "Good", src, now)

    async def write_states(self, states: list[tuple[int, str, str, str, int]]) -> None:
        """Channels' status nodes; their values' StatusCode when they go Bad (their value is
        then null: IEC 62541-4 §7.7.1, and asyncua clears it)."""
        now = datetime.now(UTC)
        S = ua.VariantType.String
        for ch_i, status, cause, code, t_ns in states:
            ch = self.layout[ch_i]
            src = _dt(t_ns)
            await self._put(self.nid(f"{ch.path}/status"), status, S, "Good", src, now)
            await self._put(self.nid(f"{ch.path}/cause"), cause, S, "Good", src, now)
            await self._put(self.nid(f"{ch.path}/status_code"), _code(code),
                            ua.VariantType.StatusCode, "Good", src, now)
            if code.startswith("Bad"):
                for nid in self._channel_nids[ch_i]:
                    await self._put(nid, None, ua.VariantType.Null, code, src, now)

    async def write_alarms(self, rows: list[tuple[str, str, list[tuple[str, Any, str]], int]]
                           ) -> None:
        """Alarm nodes that changed: (rule, description, [(name, value, code)], t_ns)."""
        now = datetime.now(UTC)
        for rule, description, changes, t_ns in rows:
            self._add_alarm_rule(rule, description)
            src = _dt(t_ns) if t_ns else now
            for name, x, code in changes:
                vt = getattr(ua.VariantType, ALARM_TYPES[name])
                await self._put(self.nid(f"alarms/{rule}/{name}"), x, vt, code, src, now)

    async def announce(self, ev: dict[str, Any]) -> None:
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

    # -- the Acknowledge method -----------------------------------------------------------
    async def _ack(self, parent: ua.NodeId, rule: ua.Variant,
                   note: ua.Variant) -> list[ua.Variant] | ua.StatusCode:
        who = CALLER.get()
        if who is None or not who.may("operator"):
            return _code("BadUserAccessDenied")
        how, what = await self.ack_call(str(rule.Value or ""), who.name, str(note.Value or ""))
        if how != "ok":
            return _code(what)
        return [ua.Variant(what, ua.VariantType.String)]

    # -- the SetSpeed method ----------------------------------------------------------------
    async def _set_speed(self, parent: ua.NodeId, channel: ua.Variant,
                         rpm: ua.Variant) -> list[ua.Variant] | ua.StatusCode:
        who = CALLER.get()
        if who is None or not who.may("operator"):
            return _code("BadUserAccessDenied")
        if not isinstance(channel.Value, str) or not isinstance(rpm.Value, (int, float)):
            return _code("BadInvalidArgument")
        how, what = await self.speed_call(channel.Value, float(rpm.Value), who.name)
        if how != "ok":
            return _code(what)
        return []

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
