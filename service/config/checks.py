"""Cross-checks of a config that passed its models: what one entry cannot see alone (ids
repeated, channels and profiles named that do not exist, Fmax against the sample rate,
alarms on bands or tones a channel does not have), and the listening-address checks.

Knows nothing about files, sockets or storage."""

from __future__ import annotations

import ipaddress
from collections.abc import Callable, Mapping

from ..lookups import (
    _expand_band,
    _is_order_band,
    covers,
    effective_analysis,
    missing_value,
)
from .base import FRAME_RATIO, QUANTITY_OF_UNIT, ConfigError, parse_listen
from .models import Config
from .notify import check_notify_url, split_urls
from .plant import BandConfig, ToneConfig
from .queries import channel_settings, planning_rpm, profile_names, profiles_of
from .salvage import Doubts
from .settings import ORDER_MARGIN, AnalysisSettings
from .sources import FileSourceConfig, SimulatedSourceConfig, TcpSourceConfig, UdpSourceConfig


def open_source_warnings(cfg: Config) -> list[str]:
    """One line per TCP/UDP source that listens on a non-loopback address without
    ``allow_from`` (any host that reaches the port may feed it): warnings, not errors."""
    out = []
    for i, s in enumerate(cfg.sources):
        if not isinstance(s, TcpSourceConfig | UdpSourceConfig) or s.allow_from is not None:
            continue
        host, _ = parse_listen(s.listen)
        if host == "localhost":
            continue
        try:
            loopback = ipaddress.ip_address(host).is_loopback
        except ValueError:
            loopback = False  # a host name may resolve to anything
        if not loopback:
            out.append(
                f"sources[{i}] ({s.id}): listens on {s.listen!r}, not a loopback address, "
                "without allow_from: any host that can reach the port may feed it; set "
                "allow_from = [\"<network>/<bits>\", ...]"
            )
    return out


def check_listen_allowed(cfg: Config) -> None:
    """Raise ConfigError if ``service.listen`` is not loopback and no ``[[tokens]]`` exist."""
    host, _ = parse_listen(cfg.service.listen)
    if host == "localhost":
        return
    try:
        loopback = ipaddress.ip_address(host).is_loopback
    except ValueError:
        loopback = False  # a host name may resolve to anything
    if not loopback and not cfg.tokens:
        raise ConfigError(
            [
                f"service.listen: {cfg.service.listen!r} is not a loopback address; add "
                "[[tokens]] before serving beyond this machine, or listen on 127.0.0.1"
            ]
        )


def _fmt_hz(x: float) -> str:
    return f"{x:g} Hz"


class _Checker:
    """Cross-field and cross-table checks of a config that passed the per-field checks."""

    def __init__(self, cfg: Config, doubts: Doubts | None = None) -> None:
        self.cfg = cfg
        # what entries that failed their models leave unknown: checks that depend on it are
        # skipped rather than report its consequences
        self.doubts = doubts or Doubts()
        self.problems: list[str] = []
        self.channel_source: dict[str, int] = {}
        self.open_ended = any(
            isinstance(s, SimulatedSourceConfig) and not s.channels for s in cfg.sources
        )
        self.entry_index = {c.id: j for j, c in enumerate(cfg.channels)}

    def add(self, problem: str) -> None:
        if problem not in self.problems:
            self.problems.append(problem)

    def run(self) -> list[str]:
        self.sources()
        self.channels()
        self.profiles()
        self.analysis()
        self.bands()
        self.tones()
        self.alarms()
        self.tokens()
        self.machines()
        self.bearings()
        self.notify()
        return self.problems

    def fs_of(self, ch: str) -> float | None:
        i = self.channel_source.get(ch)
        return None if i is None else self.cfg.sources[i].sample_rate_hz

    def known(self, ch: str, where: str) -> bool:
        if ch == "*" or ch in self.channel_source or self.open_ended or self.doubts.source(ch):
            return True
        listed = ", ".join(repr(c) for c in self.channel_source) or "none"
        self.add(f"{where}: {ch!r} is not a channel of any source (channels: {listed})")
        return False

    def targets(self, ch: str) -> list[str]:
        chans = list(self.channel_source) if ch == "*" else [ch]
        return [c for c in chans if not self.doubts.channel(c)]

    def sources(self) -> None:
        cfg = self.cfg
        if not cfg.sources and not self.doubts.any_failed("sources"):
            self.add("sources: at least one [[sources]] entry is required")
        seen_id: dict[str, int] = {}
        seen_listen: dict[tuple[str, str], int] = {}
        for i, s in enumerate(cfg.sources):
            if isinstance(s, SimulatedSourceConfig):
                from ..sources.simulated import SCENARIOS  # the plant model names them

                if s.scenario not in SCENARIOS:
                    listed = ", ".join(map(repr, SCENARIOS))
                    self.add(f"sources[{i}].scenario: {s.scenario!r} is not one of {listed}")
            if s.id in seen_id:
                self.add(f"sources[{i}].id: {s.id!r} repeats sources[{seen_id[s.id]}]")
            seen_id.setdefault(s.id, i)
            for k, ch in enumerate(s.channels):
                if ch in self.channel_source:
                    other = self.channel_source[ch]
                    self.add(
                        f"sources[{i}].channels[{k}]: {ch!r} is already a channel of "
                        f"sources[{other}]"
                    )
                else:
                    self.channel_source[ch] = i
            needs_fs = isinstance(s, TcpSourceConfig | UdpSourceConfig) or (
                isinstance(s, FileSourceConfig) and s.format != "wav"
            )
            if needs_fs and s.sample_rate_hz is None:
                self.add(
                    f"sources[{i}].sample_rate_hz: required for kind={s.kind!r}"
                    + (f" with format={s.format!r}" if isinstance(s, FileSourceConfig) else "")
                )
            if isinstance(s, TcpSourceConfig | UdpSourceConfig):
                key = (s.kind, s.listen)
                if key in seen_listen:
                    self.add(
                        f"sources[{i}].listen: {s.listen!r} is already used by "
                        f"sources[{seen_listen[key]}]"
                    )
                seen_listen.setdefault(key, i)
                if s.kind == "tcp" and not self.doubts.field("service.listen") and (
                    parse_listen(s.listen) == parse_listen(cfg.service.listen)
                ):
                    self.add(f"sources[{i}].listen: {s.listen!r} is the service's own address")

    def channels(self) -> None:
        seen: dict[str, int] = {}
        for j, c in enumerate(self.cfg.channels):
            if c.id in seen:
                self.add(f"channels[{j}].id: {c.id!r} repeats channels[{seen[c.id]}]")
            seen.setdefault(c.id, j)
            if c.id not in self.channel_source and not (
                self.open_ended or self.doubts.source(c.id)
            ):
                listed = ", ".join(repr(x) for x in self.channel_source) or "none"
                self.add(
                    f"channels[{j}].id: {c.id!r} is not produced by any source "
                    f"(source channels: {listed})"
                )
            if c.sensitivity == 0:
                self.add(f"channels[{j}].sensitivity: must not be 0")
            if c.speed_from is not None and not self.doubts.channel(c.speed_from):
                tacho = channel_settings(self.cfg, c.speed_from)
                if tacho.kind != "tacho":
                    self.add(f"channels[{j}].speed_from: {c.speed_from!r} is not a channel of "
                             "kind 'tacho'")
                elif self.channel_source.get(c.speed_from) != self.channel_source.get(c.id):
                    self.add(f"channels[{j}].speed_from: tacho {c.speed_from!r} is not on "
                             f"the source of channel {c.id!r} (pulses and vibration must share "
                             "one sample clock)")

    def profiles(self) -> None:
        names = profile_names(self.cfg)
        listed = ", ".join(map(repr, names))
        self.profiles_ok = True
        for j, c in enumerate(self.cfg.channels):
            seen: set[str] = set()
            for k, name in enumerate(c.profiles or ()):
                if name in self.doubts.profiles:  # its own entry failed: reported there
                    self.profiles_ok = False
                elif name not in names:
                    self.add(f"channels[{j}].profiles[{k}]: {name!r} is not a profile "
                             f"(profiles: {listed})")
                    self.profiles_ok = False
                elif name in seen:
                    self.add(f"channels[{j}].profiles[{k}]: {name!r} is listed twice")
                seen.add(name)
            if c.profiles is not None and not c.profiles:
                self.add(f"channels[{j}].profiles: give at least one profile, or leave it out")
                self.profiles_ok = False

    def profile_known(self, where: str, name: str | None, ch: str) -> bool:
        """Is ``name`` ('*', None or a profile) valid for channel ``ch`` ('*' = any)?"""
        if name is None or name == "*":
            return True
        names = profile_names(self.cfg)
        if name in self.doubts.profiles:
            return False
        if name not in names:
            listed = ", ".join(map(repr, names))
            self.add(f"{where}: {name!r} is not a profile (profiles: {listed})")
            return False
        if ch != "*" and self.profiles_ok and not self.doubts.channel(ch) and (
            name not in profiles_of(self.cfg, ch)
        ):
            runs = ", ".join(map(repr, profiles_of(self.cfg, ch)))
            self.add(f"{where}: channel {ch!r} does not run profile {name!r} (it runs {runs})")
            return False
        return True

    def channel_profiles(self, ch: str) -> list[str]:
        return profiles_of(self.cfg, ch) if self.profiles_ok else profile_names(self.cfg)[:1]

    def where(self, ch: str, field: str, profile: str | None = None) -> str:
        prof = self.cfg.profiles.get(profile) if profile is not None else None
        if prof is not None and getattr(prof, field) is not None:
            return f"profiles.{profile}.{field}"
        j = self.entry_index.get(ch)
        if j is not None and getattr(self.cfg.channels[j].analysis, field) is not None:
            return f"channels[{j}].analysis.{field}"
        return f"analysis.{field}"

    def analysis(self) -> None:
        pairs = [
            (ch, prof)
            for ch in dict.fromkeys([*self.channel_source, *(c.id for c in self.cfg.channels)])
            for prof in self.channel_profiles(ch)
        ]
        for ch, prof in pairs:
            self.analysis_of(ch, prof)

    def analysis_of(self, ch: str, prof: str) -> None:
        def where(field: str) -> str:
            return self.where(ch, field, prof)

        if self.doubts.channel(ch):
            return
        a = effective_analysis(self.cfg, ch, prof)
        sure = not self.doubts.profiles

        def doubt(*fields: str) -> bool:
            return not sure or any(self.doubts.field(f"analysis.{f}") for f in fields)

        if a.lines % 25 and not doubt("lines"):
            self.add(
                f"{where('lines')}: 2.56·{a.lines} = {a.lines * 2.56:g} "
                "samples is not an integer; use a multiple of 25 (e.g. 400, 800, "
                "1600, 3200, 6400)"
            )
        fs = self.fs_of(ch)
        if fs is not None and a.fmax_hz * FRAME_RATIO > fs * (1 + 1e-9) and not doubt("fmax_hz"):
            src = self.cfg.sources[self.channel_source[ch]]
            self.add(
                f"{where('fmax_hz')}: {_fmt_hz(a.fmax_hz)} needs a sample "
                f"rate of at least 2.56·fmax = {_fmt_hz(a.fmax_hz * FRAME_RATIO)}; "
                f"source {src.id!r} runs at {_fmt_hz(fs)}"
            )
        if a.output_unit is not None and QUANTITY_OF_UNIT[a.output_unit] != a.unit and not doubt(
            "output_unit", "unit"
        ):
            self.add(
                f"{where('output_unit')}: {a.output_unit!r} is not a unit "
                f"of {a.unit} (unit = {a.unit!r})"
            )
        if a.kind == "envelope" and a.band != "auto" and not doubt("band", "fmax_hz"):
            lo, hi = a.band
            if lo <= a.fmax_hz:
                self.add(f"{where('band')}: the envelope band's lower edge {_fmt_hz(lo)} must "
                         f"be above fmax_hz {_fmt_hz(a.fmax_hz)} (the rectifier puts "
                         "products at twice the band's frequencies)")
            if fs is not None and hi >= fs / 2:
                self.add(f"{where('band')}: the envelope band's upper edge {_fmt_hz(hi)} must "
                         f"be below half the sample rate, {_fmt_hz(fs / 2)}")
        if a.kind == "order":
            self.order_profile(ch, prof, a, where, fs)
        if a.lowcut_hz >= a.fmax_hz and not doubt("lowcut_hz", "fmax_hz"):
            self.add(
                f"{where('lowcut_hz')}: {_fmt_hz(a.lowcut_hz)} must be "
                f"below fmax_hz {_fmt_hz(a.fmax_hz)}"
            )

    def order_profile(self, ch: str, prof: str, a: AnalysisSettings,
                      where: Callable[[str], str], fs: float | None) -> None:
        """An order profile needs the shaft's angle from a tacho on the channel's source, and
        a sample rate that holds omax at the tacho's highest plausible speed."""
        j = self.entry_index.get(ch)
        at = f"channels[{j}].profiles" if j is not None else f"channel {ch!r}"
        c = channel_settings(self.cfg, ch)
        if c.kind == "tacho":
            return  # a tacho runs no profile (service.profiles.plan_profiles)
        if c.speed_from is None:
            has = {"fixed": f"a fixed speed_rpm ({c.speed_rpm:g} r/min)" if c.speed_rpm else "",
                   "estimated": "a speed estimated from its 1X line",
                   "manual": "a speed written by an operator"}.get(c.speed_source, "no speed")
            self.add(f"{at}: order profile {prof!r} needs speed_from = a tacho channel: "
                     "computed order tracking resamples at constant shaft angle, which only "
                     f"a tacho's pulses give; channel {ch!r} has {has or 'no speed'} (order "
                     "bands and tones of an ordinary profile follow such a speed instead)")
            return
        if self.doubts.channel(c.speed_from) or fs is None:
            return
        tacho = channel_settings(self.cfg, c.speed_from)
        if tacho.kind != "tacho":
            return  # reported at speed_from
        need = ORDER_MARGIN * a.omax * tacho.rpm_max / 60.0
        if need * FRAME_RATIO > fs * (1 + 1e-9):
            self.add(f"{where('omax')}: order {a.omax:g} at rpm_max {tacho.rpm_max:g} of tacho "
                     f"{c.speed_from!r} needs the signal to "
                     f"{ORDER_MARGIN:g}·omax·rpm_max/60 = {_fmt_hz(need)}, so a sample rate of "
                     f"at least {_fmt_hz(need * FRAME_RATIO)}; channel {ch!r}'s source runs at "
                     f"{_fmt_hz(fs)} (lower omax or the tacho's rpm_max)")

    def speed_needed(self, where: str, ch: str) -> None:
        targets = self.targets(ch)
        if self.doubts.channel(ch):
            return
        speeds = [planning_rpm(self.cfg, t) for t in targets]
        if ch != "*" and speeds and speeds[0] is None:
            self.add(f"{where}: channel {ch!r} has no speed_rpm, so orders cannot be placed")
        elif ch == "*" and targets and all(s is None for s in speeds):
            self.add(f"{where}: no channel has speed_rpm, so orders cannot be placed")

    def above_fmax(
        self, where: str, ch: str, hz: float | None, order: float | None, profile: str = "*"
    ) -> None:
        """A band edge or tone above Fmax: with ``profile = "*"`` it must fit at least one of
        the channel's profiles, else the named profile."""
        over = []
        if self.doubts.fmax(ch) and (ch != "*" or not self.targets(ch)):
            return
        for t in self.targets(ch):
            if self.doubts.fmax(t):
                continue
            mine = self.channel_profiles(t)
            profs = mine if profile == "*" else [profile] if profile in mine else []
            if not profs:
                continue
            rpm = planning_rpm(self.cfg, t)
            sets = [effective_analysis(self.cfg, t, p) for p in profs]
            if profile != "*" and sets[0].kind == "order" and order is None:
                self.add(f"{where}: profile {profile!r} is an order profile (kind = 'order'): "
                         "its bands and tones are in orders (lo_order/hi_order, order), not Hz")
                return
            if not any(covers(a, hz, order, rpm) for a in sets):
                top = max((a.omax if a.kind == "order" else a.fmax_hz) for a in sets)
                unit = " orders" if all(a.kind == "order" for a in sets) else ""
                over.append(f"{t!r} ({_fmt_hz(top) if not unit else f'omax {top:g}'})")
        if over:
            value = _fmt_hz(hz) if hz is not None else f"order {order:g}"
            of = "any profile of" if profile == "*" and len(self.cfg.profiles) > 1 else (
                f"profile {profile!r} of" if profile != "*" else "")
            self.add(f"{where}: {value} is above fmax_hz of {of} channel {', '.join(over)}"
                     .replace("of  channel", "of channel"))

    def names(
        self, table: str, scope: dict[tuple[str, str, str], int], j: int, ch: str,
        profile: str, names: list[str],
    ) -> None:
        for name in names:
            key = (ch, profile, name)
            if key in scope:
                self.add(
                    f"{table}[{j}].name: {name!r} repeats {table}[{scope[key]}] "
                    f"on channel {ch!r}" + ("" if profile == "*" else f", profile {profile!r}")
                )
            scope.setdefault(key, j)

    def bands(self) -> None:
        # each entry's own rules (edges, Hz or orders, octave sets) are its validator's
        scope: dict[tuple[str, str, str], int] = {}
        for j, b in enumerate(self.cfg.bands):
            w = f"bands[{j}]"
            before = len(self.problems)
            self.band(j, b, w, scope)
            if len(self.problems) > before:  # alarms on it would only echo this problem
                self.doubts.bands.add((b.channel, None if b.octave is not None else b.name))

    def band(
        self, j: int, b: BandConfig, w: str, scope: dict[tuple[str, str, str], int]
    ) -> None:
        if not self.known(b.channel, f"{w}.channel"):
            return
        if not self.profile_known(f"{w}.profile", b.profile, b.channel):
            return
        if b.octave is not None and not _expand_band(b):
            self.add(
                f"{w}: no 1/{b.octave}-octave band lies within {b.lo_hz:g}-{b.hi_hz:g} Hz"
            )
            return
        if not _is_order_band(b):
            self.above_fmax(f"{w}.hi_hz", b.channel, b.hi_hz, None, b.profile)
        else:
            self.speed_needed(f"{w}.lo_order", b.channel)
            self.above_fmax(f"{w}.hi_order", b.channel, None, b.hi_order, b.profile)
        self.names(
            "bands", scope, j, b.channel, b.profile, [x.name for x in _expand_band(b)]
        )

    def tones(self) -> None:
        scope: dict[tuple[str, str, str], int] = {}
        for j, t in enumerate(self.cfg.tones):
            w = f"tones[{j}]"
            before = len(self.problems)
            self.tone(j, t, w, scope)
            if len(self.problems) > before:  # alarms on it would only echo this problem
                self.doubts.tones.add((t.channel, t.name))

    def tone(
        self, j: int, t: ToneConfig, w: str, scope: dict[tuple[str, str, str], int]
    ) -> None:
        if not self.known(t.channel, f"{w}.channel"):
            return
        if not self.profile_known(f"{w}.profile", t.profile, t.channel):
            return
        if t.order is not None:
            self.speed_needed(f"{w}.order", t.channel)
        self.above_fmax(
            f"{w}.{'hz' if t.hz is not None else 'order'}", t.channel, t.hz, t.order,
            t.profile,
        )
        self.names("tones", scope, j, t.channel, t.profile, [t.name])

    def alarms(self) -> None:
        # each entry's own rules (one value, alert < danger, factor/dB pairs) are its
        # validator's; here: the channel, profile and value it names exist
        for j, a in enumerate(self.cfg.alarms):
            w = f"alarms[{j}]"
            if not self.known(a.channel, f"{w}.channel"):
                continue
            if not self.profile_known(f"{w}.profile", a.profile, a.channel):
                continue
            if self.open_ended or a.overall:
                continue
            kind, name = ("band", a.band) if a.band is not None else ("tone", a.tone)
            targets = self.targets(a.channel)
            if not targets or any(self.doubts.fmax(t) for t in targets) or self.doubts.value(
                kind, a.channel, str(name)
            ):
                continue  # what it watches is in doubt: its own entry's problem says why
            problem = missing_value(
                self.cfg, w, a.channel, a.profile, kind, str(name), targets,
                self.channel_profiles,
            )
            if problem:
                self.add(problem)

    def tokens(self) -> None:
        seen: dict[str, int] = {}
        for j, t in enumerate(self.cfg.tokens):
            if t.name in seen:
                self.add(f"tokens[{j}].name: {t.name!r} repeats tokens[{seen[t.name]}]")
            seen.setdefault(t.name, j)
        svc = self.cfg.service
        if self.doubts.field("service.tls_cert") or self.doubts.field("service.tls_key"):
            return
        if svc.tls_cert is not None and svc.tls_key is None:
            self.add("service.tls_key: missing; tls_cert needs its key (give both or neither)")
        if svc.tls_key is not None and svc.tls_cert is None:
            self.add("service.tls_cert: missing; tls_key needs its certificate (give both or "
                     "neither)")


    def machines(self) -> None:
        seen: dict[str, int] = {}
        used = {c.machine for c in self.cfg.channels if c.machine}
        channels_sure = not self.doubts.any_failed("channels")
        for j, m in enumerate(self.cfg.machines):
            if m.id in seen:
                self.add(f"machines[{j}].id: {m.id!r} repeats machines[{seen[m.id]}]")
            seen.setdefault(m.id, j)
            if m.id not in used and channels_sure:
                listed = ", ".join(repr(x) for x in sorted(used)) or "none"
                self.add(f"machines[{j}].id: {m.id!r} is not the machine of any channel "
                         f"(channels' machines: {listed})")

    def bearings(self) -> None:
        seen: dict[str, int] = {}
        for j, b in enumerate(self.cfg.bearings):
            if b.id in seen:
                self.add(f"bearings[{j}].id: {b.id!r} repeats bearings[{seen[b.id]}]")
            seen.setdefault(b.id, j)
        if self.doubts.any_failed("bearings"):
            return
        for j, c in enumerate(self.cfg.channels):
            if c.bearing is None:
                continue
            if c.bearing not in seen:
                listed = ", ".join(map(repr, seen)) or "none"
                self.add(f"channels[{j}].bearing: {c.bearing!r} is not a bearing "
                         f"(bearings: {listed})")
            elif not c.speed_source:
                self.add(f"channels[{j}].bearing: channel {c.id!r} has no running speed "
                         "(speed_rpm, speed_from or speed), so the bearing's defect "
                         "frequencies cannot be placed")

    def notify(self) -> None:
        seen: dict[str, int] = {}
        machines = {c.machine for c in self.cfg.channels if c.machine}
        for j, n in enumerate(self.cfg.notify):
            if n.name in seen:
                self.add(f"notify[{j}].name: {n.name!r} repeats notify[{seen[n.name]}]")
            seen.setdefault(n.name, j)
            for k, ch in enumerate(n.channels):
                if not _is_glob(ch):
                    self.known(ch, f"notify[{j}].channels[{k}]")
            for k, m in enumerate(n.machines):
                if not _is_glob(m) and m not in machines and not self.doubts.any_failed("channels"):
                    listed = ", ".join(repr(x) for x in sorted(machines)) or "none"
                    self.add(f"notify[{j}].machines[{k}]: {m!r} is not the machine of any "
                             f"channel (channels' machines: {listed})")


def _is_glob(pattern: str) -> bool:
    return any(ch in pattern for ch in "*?[")


def notify_env_problems(cfg: Config, env: Mapping[str, str]) -> list[str]:
    """One line per ``[[notify]] urls_env`` that is unset or empty in ``env`` or holds a URL
    apprise cannot use (the URL is not repeated: it may hold a password)."""
    out = []
    for j, n in enumerate(cfg.notify):
        if n.urls_env is None:
            continue
        urls = split_urls(env.get(n.urls_env, ""))
        if not urls:
            out.append(f"notify[{j}].urls_env: the environment variable {n.urls_env} is unset "
                       "or empty")
        for k, u in enumerate(urls):
            try:
                check_notify_url(u)
            except ValueError as e:
                out.append(f"notify[{j}].urls_env: URL {k + 1} of {n.urls_env}: {e}")
    return out


def _cross_check(cfg: Config, doubts: Doubts | None = None) -> list[str]:
    """Every cross-table problem; with ``doubts`` (a salvaged config, ``.salvage``) the
    entries' indices are the file's and what failed entries leave unknown is not checked."""
    problems = _Checker(cfg, doubts).run()
    return problems if doubts is None else [doubts.renumber(p) for p in problems]
