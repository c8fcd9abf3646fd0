"""Alarm rules: one rule per channel and value, expanded from ``[[alarms]]``.

Pure logic on a validated config; knows nothing about state, storage, HTTP or the engine's
buffers. The per-entry rules of ``[[alarms]]`` (alert < danger, factor/dB pairing) are
checked once, by the config's validators (``service.config.models``)."""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

from dsp.spec import resolve_unit
from dsp.types import check_choice

from ..config import Config, channel_ids, channel_settings, profiles_of
from ..entries import EntryProblem, check_alarm_entry, check_relative
from ..lookups import effective_analysis, missing_value, watched
from ..types import SpectralFrame
from .states import _ID_RE, RULE_KINDS, RuleKind

# the relative-level keys an [[alarms]] entry and a Baseline share
_BASELINE_KEYS = ("alert_factor", "danger_factor", "alert_db", "danger_db")

# --- rules ------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Baseline:
    """Relative levels: alert/danger = factor × median of the first ``learn_s`` s of data.

    Give ``alert_factor`` and ``danger_factor`` (amplitude ratios, e.g. 2 and 4) or
    ``alert_db`` and ``danger_db`` (dB over the baseline, amplitude: factor = 10^(dB/20),
    so +6 dB ≈ ×1.995). Values are RMS amplitudes, hence 20·log10 (IEC 60027-3).
    """

    learn_s: float
    alert_factor: float | None = None
    danger_factor: float | None = None
    alert_db: float | None = None
    danger_db: float | None = None

    def __post_init__(self) -> None:
        if not (math.isfinite(self.learn_s) and self.learn_s > 0):
            raise ValueError(f"baseline learn_s={self.learn_s!r} must be > 0 seconds")
        try:
            check_relative(self.alert_factor, self.danger_factor, self.alert_db, self.danger_db)
        except EntryProblem as e:
            raise ValueError(f"baseline: {e}") from None

    @property
    def factors(self) -> tuple[float, float]:
        """(alert, danger) as amplitude ratios over the baseline median."""
        if self.alert_factor is not None and self.danger_factor is not None:
            return float(self.alert_factor), float(self.danger_factor)
        return 10 ** (float(self.alert_db or 0) / 20), 10 ** (float(self.danger_db or 0) / 20)

    def as_dict(self) -> dict[str, float]:
        return {
            f.name: getattr(self, f.name) for f in fields(self) if getattr(self, f.name) is not None
        }


@dataclass(frozen=True, slots=True)
class Rule:
    """One alarm rule on one channel's value.

    ``id`` is stable and url-safe (see :func:`rule_id`). ``alert`` < ``danger`` are absolute
    levels in ``unit`` (the frame's display unit; RMS for bands and overall, the display
    amplitude for tones), or both None with ``baseline`` set. ``hysteresis`` is the fraction
    h in [0, 1): a level clears below level·(1 − h). Delays in seconds (>= 0).
    """

    id: str
    channel: str
    kind: RuleKind
    name: str
    alert: float | None
    danger: float | None
    hysteresis: float = 0.05
    on_delay_s: float = 0.0
    off_delay_s: float = 0.0
    latch: bool = False
    unit: str = ""
    baseline: Baseline | None = None
    profile: str = ""  # analysis profile watched; "" = the channel's primary one
    primary: bool = True  # is ``profile`` the channel's primary profile

    def __post_init__(self) -> None:
        check_choice("kind", self.kind, RULE_KINDS)
        if not _ID_RE.match(self.id):
            raise ValueError(f"rule id {self.id!r} is not url-safe (letters, digits, . _ -)")
        if isinstance(self.baseline, Mapping):
            object.__setattr__(self, "baseline", Baseline(**self.baseline))
        if self.kind == "signal":
            if self.baseline is not None or (self.alert is None) == (self.danger is None):
                raise ValueError(f"rule {self.id!r}: a signal rule has one level, alert or danger")
        else:  # the same rules as an [[alarms]] entry's (service.entries)
            bl = self.baseline
            try:
                check_alarm_entry(
                    band=None, tone=None, overall=True, alert=self.alert, danger=self.danger,
                    baseline_learn_s=None if bl is None else bl.learn_s,
                    **({} if bl is None else {k: getattr(bl, k) for k in _BASELINE_KEYS}),
                )
            except EntryProblem as e:
                raise ValueError(f"rule {self.id!r}: {e}") from None
        if not 0 <= self.hysteresis < 1:
            raise ValueError(f"rule {self.id!r}: hysteresis={self.hysteresis!r} must be in [0, 1)")
        for k in ("on_delay_s", "off_delay_s"):
            v = getattr(self, k)
            if not (math.isfinite(v) and v >= 0):
                raise ValueError(f"rule {self.id!r}: {k}={v!r} must be >= 0 seconds")

    def watches(self, frame: SpectralFrame) -> bool:
        """Is ``frame`` (of this rule's channel) from the profile this rule watches?"""
        if self.profile == frame.profile:
            return True
        return self.primary and frame.primary and self.profile in ("", frame.profile)

    def pick(self, frame: SpectralFrame) -> float:
        """This rule's value in ``frame`` (NaN when the frame lacks it)."""
        if self.kind == "signal":
            return math.nan  # not a value of the frame: see AlarmEngine.set_channel_status
        if self.kind == "overall":
            return float(frame.overall)
        items = frame.bands if self.kind == "band" else frame.tones
        for item in items:
            if item.name == self.name:
                return float(item.value)
        return math.nan

    def as_dict(self) -> dict[str, Any]:
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["baseline"] = self.baseline.as_dict() if self.baseline else None
        return d


def _slug(name: str) -> str:
    return re.sub(r"[^a-z0-9._-]+", "-", name.lower()).strip("-") or "x"


def rule_id(channel: str, kind: str, name: str = "", profile: str = "") -> str:
    """Stable url-safe rule id: ``"<channel>.overall"`` or ``"<channel>.<kind>.<slug>"``
    where slug is the name lower-cased with runs of other characters replaced by ``-``
    (e.g. band "thirds 1 kHz" on p1-de-h → ``"p1-de-h.band.thirds-1-khz"``). A rule on a
    profile other than the channel's primary one names it after the channel
    (``"p1-de-h.narrow.band.1x"``); give ``profile`` only in that case."""
    check_choice("kind", kind, RULE_KINDS)
    head = f"{channel}.{profile}" if profile else channel
    return f"{head}.overall" if kind == "overall" else f"{head}.{kind}.{_slug(name)}"




def rules_from_config(cfg: Config, channels: Sequence[str] | None = None) -> list[Rule]:
    """Expand ``[[alarms]]`` into one :class:`Rule` per channel and value.

    ``channels`` are the channel ids actually running (default: those the sources name;
    pass the pipeline's ids when a simulated source lists none). ``channel = "*"`` applies
    to every channel that has the band/tone (overall: every channel); an entry for one
    channel replaces a ``"*"`` entry for the same value on that channel. Units are each
    channel's display unit. Relative levels come from the AlarmConfig keys
    ``baseline_learn_s`` with ``alert_factor``/``danger_factor`` or ``alert_db``/``danger_db``.
    Raises ValueError (with the ``alarms[j]`` path) for a channel or value that does not
    exist, a repeated rule, or two names that give the same id.
    """
    chans = list(channels) if channels is not None else channel_ids(cfg)
    chosen: dict[tuple[str, str, str, str], tuple[int, Rule]] = {}
    for j, a in enumerate(cfg.alarms):
        kind: str = "band" if a.band is not None else "tone" if a.tone is not None else "overall"
        name = a.band if a.band is not None else a.tone if a.tone is not None else "overall"
        if a.channel == "*":
            targets = chans
        elif a.channel in chans:
            targets = [a.channel]
        else:
            listed = ", ".join(map(repr, chans)) or "none"
            raise ValueError(f"alarms[{j}].channel: {a.channel!r} is not a channel ({listed})")
        baseline = None
        if a.baseline_learn_s is not None:
            baseline = Baseline(a.baseline_learn_s, **{k: getattr(a, k) for k in _BASELINE_KEYS})
        if a.channel != "*" and kind != "overall":  # a "*" entry skips channels without it
            problem = missing_value(cfg, f"alarms[{j}]", a.channel, a.profile, kind, name,
                                    targets)
            if problem:
                raise ValueError(problem)
        for ch, prof in watched(cfg, targets, a.profile, kind, name):
            if prof is None:
                continue
            primary = prof == profiles_of(cfg, ch)[0]
            settings = effective_analysis(cfg, ch, prof)
            rule = Rule(
                id=rule_id(ch, kind, name, "" if primary else prof),
                profile=prof,
                primary=primary,
                channel=ch,
                kind=kind,  # type: ignore[arg-type]
                name=name,
                alert=None if baseline else a.alert,
                danger=None if baseline else a.danger,
                hysteresis=a.hysteresis,
                on_delay_s=a.on_delay_s,
                off_delay_s=a.off_delay_s,
                latch=a.latch,
                unit=resolve_unit(settings.output_unit or settings.unit),
                baseline=baseline,
            )
            key = (ch, prof, kind, name)
            if key in chosen:
                i, _ = chosen[key]
                own, prev_own = a.channel != "*", cfg.alarms[i].channel != "*"
                if own == prev_own:
                    raise ValueError(
                        f"alarms[{j}]: repeats alarms[{i}] ({kind} {name!r} on {ch!r}"
                        + ("" if primary else f", profile {prof!r}") + ")"
                    )
                if not own:
                    continue  # the channel's own entry wins
            chosen[key] = (j, rule)
    rules = [r for _, r in chosen.values()]
    for ch in chans:
        level = channel_settings(cfg, ch).loss_of_signal
        if level != "off":
            rules.append(signal_rule(ch, level))
    seen: dict[str, Rule] = {}
    for r in rules:
        if r.id in seen:
            raise ValueError(
                f"alarms: {seen[r.id].name!r} and {r.name!r} on {r.channel!r} both give rule id "
                f"{r.id!r}; rename one"
            )
        seen[r.id] = r
    return rules


def signal_rule(channel: str, level: str) -> Rule:
    """The loss-of-signal rule of ``channel`` at ``level`` (``"alert"`` or ``"danger"``).

    Its levels hold 1 (the channel is not delivering) in the slot of its level; the value
    it watches is 1 while the channel is ``no-signal`` or ``failed``, 0 otherwise."""
    return Rule(
        id=f"{channel}.signal",
        channel=channel,
        kind="signal",
        name="loss of signal",
        alert=1.0 if level == "alert" else None,
        danger=1.0 if level == "danger" else None,
        hysteresis=0.0,
    )
