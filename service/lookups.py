"""What one channel's profile analyses, from the config: its effective analysis settings,
its bands (as ``dsp.bands.Band``) and its tracked tones (as ``dsp.spec.ToneDef``).

The config → dsp lookups the profile plan (``service.profiles``), the alarm rules and the
config's cross-checks share. Pure functions over a validated config; no I/O."""

from __future__ import annotations

from collections.abc import Callable, Sequence

from pydantic import BaseModel

from dsp.bands import Band, octave_bands
from dsp.kinematics import BearingOrders, bearing_frequencies
from dsp.spec import ToneDef

from .config.models import Config
from .config.plant import BandConfig
from .config.queries import channel_settings, planning_rpm, profiles_of
from .config.settings import AnalysisSettings

__all__ = [
    "DEFECT_HALF_WIDTH",
    "bands_for",
    "bearing_orders",
    "covers",
    "defect_bands",
    "defect_tones",
    "effective_analysis",
    "missing_value",
    "tones_for",
    "watched",
]

# Half-width of a defect band, a fraction of its centre: real bearings run 1-2 % below the
# no-slip frequencies (Randall & Antoni 2011); ±3 % holds that and a speed off by 1 %.
DEFECT_HALF_WIDTH = 0.03


def _primary(cfg: Config, channel_id: str, profile: str | None) -> str:
    return profiles_of(cfg, channel_id)[0] if profile is None else profile


def effective_analysis(
    cfg: Config, channel_id: str, profile: str | None = None
) -> AnalysisSettings:
    """``[analysis]``, then the channel's own ``analysis`` overrides, then those of
    ``profile`` (default: the channel's primary profile) — the later wins."""
    override: BaseModel = channel_settings(cfg, channel_id).analysis
    out = cfg.analysis.model_copy(update=override.model_dump(exclude_none=True))
    prof: BaseModel | None = cfg.profiles.get(_primary(cfg, channel_id, profile))
    if prof is not None:
        out = out.model_copy(update=prof.model_dump(exclude_none=True))
    if out.kind in ("envelope", "order") and (
        out.unit != "acceleration" or out.output_unit not in (None, "g", "m/s2")
    ):
        # an envelope is of the acceleration signal; integrating it means nothing. An order
        # spectrum's lines are orders, whose frequency in Hz moves with the speed within a
        # frame, so ÷ω has no single ω per line: both stay in acceleration.
        out = out.model_copy(update={"unit": "acceleration", "output_unit": None})
    return out


def covers(settings: AnalysisSettings, hz: float | None, order: float | None,
           speed_rpm: float | None) -> bool:
    """Can a profile with ``settings`` measure a band edge or tone at ``hz`` or ``order``
    (placed at ``speed_rpm``)? An order profile's axis is orders up to ``omax``: it measures
    orders only, whatever the speed; a spectrum's measures what lies below ``fmax_hz``."""
    if settings.kind == "order":
        return order is not None and order <= settings.omax * (1 + 1e-9)
    return _covers(settings.fmax_hz, _top_hz(hz, order, speed_rpm))


def bearing_orders(cfg: Config, channel_id: str) -> BearingOrders | None:
    """The defect frequencies of the channel's ``bearing`` as orders of its shaft speed
    (``dsp.kinematics``), or None without one (or for an id no ``[[bearings]]`` has)."""
    bid = channel_settings(cfg, channel_id).bearing
    b = next((x for x in cfg.bearings if x.id == bid), None) if bid else None
    if b is None:
        return None
    return bearing_frequencies(b.n_balls, b.ball_d, b.pitch_d, b.contact_angle_deg,
                               1.0).as_orders()


def defect_bands(orders: BearingOrders) -> list[Band]:
    """Bands around the defect frequencies and harmonics, as orders (so they follow the
    speed however it is known): BPFO, 2xBPFO, 3xBPFO, BPFI, 2xBPFI, BSF, 2xBSF, each
    ±DEFECT_HALF_WIDTH of its centre."""
    w = DEFECT_HALF_WIDTH
    items = [("BPFO", orders.bpfo, 3), ("BPFI", orders.bpfi, 2), ("BSF", orders.bsf, 2)]
    return [
        Band(name if k == 1 else f"{k}x{name}", k * o * (1 - w), k * o * (1 + w), "order")
        for name, o, count in items for k in range(1, count + 1)
    ]


def defect_tones(orders: BearingOrders) -> list[ToneDef]:
    """Tracked tones at 1X and the four defect frequencies (orders); a display marks
    their harmonics and BPFI's 1X sidebands from them."""
    return [ToneDef("1X", order=1.0), ToneDef("FTF", order=orders.ftf),
            ToneDef("BSF", order=orders.bsf), ToneDef("BPFO", order=orders.bpfo),
            ToneDef("BPFI", order=orders.bpfi)]


def _defects(cfg: Config, channel_id: str, profile: str) -> BearingOrders | None:
    """The bearing orders when ``profile`` is an envelope profile of a channel with a
    bearing and a speed (fixed, manual, estimated or from a tacho); else None."""
    if effective_analysis(cfg, channel_id, profile).kind != "envelope":
        return None
    if not channel_settings(cfg, channel_id).speed_source:  # no speed to place them at
        return None
    return bearing_orders(cfg, channel_id)


def _expand_band(b: BandConfig) -> list[Band]:
    if b.octave is not None:  # _Checker has made sure 0 < lo_hz < hi_hz
        sets = octave_bands(b.octave, b.lo_hz or 0.0, b.hi_hz or 0.0)
        return [ob.as_band(prefix=f"{b.name} ") for ob in sets]
    if b.lo_order is not None and b.hi_order is not None:
        return [Band(b.name, b.lo_order, b.hi_order, "order")]
    return [Band(b.name, b.lo_hz or 0.0, b.hi_hz or 0.0, "hz")]


def _is_order_band(b: BandConfig) -> bool:
    return b.lo_order is not None or b.hi_order is not None


def _top_hz(hz: float | None, order: float | None, speed_rpm: float | None) -> float | None:
    """Highest frequency (Hz) a band edge or tone reaches; None if it has no speed to use."""
    if hz is not None:
        return hz
    return None if order is None or speed_rpm is None else order * speed_rpm / 60.0


def _covers(fmax_hz: float, top_hz: float | None) -> bool:
    return top_hz is None or top_hz <= fmax_hz * (1 + 1e-9)


def _applies(item_profile: str, profile: str, settings: AnalysisSettings, hz: float | None,
             order: float | None, speed_rpm: float | None) -> bool:
    """Does a band/tone given for ``item_profile`` belong to ``profile`` (``settings``)? An
    order profile takes only orders (the config's cross-checks refuse a Hz entry naming
    one)."""
    if item_profile == "*":
        return covers(settings, hz, order, speed_rpm)
    return item_profile == profile and (settings.kind != "order" or order is not None)


def bands_for(cfg: Config, channel_id: str, profile: str | None = None) -> list[Band]:
    """The bands of one channel's profile (default: its primary one), in file order, as
    :class:`dsp.bands.Band` (Hz or orders).

    ``"*"`` bands apply to every channel except where the channel has a band of the same
    name of its own; ``"*"`` order bands skip channels without a running speed (orders are
    placed at ``speed_rpm``, or ``rpm_max`` where the speed is measured); an octave set
    becomes one band per IEC 61260-1 band, named ``"<name> <mid-band>"`` (e.g. "thirds 1 kHz").
    A band with ``profile = "*"`` goes to each profile whose fmax_hz reaches its upper edge.
    """
    profile = _primary(cfg, channel_id, profile)
    ch = channel_settings(cfg, channel_id)
    if ch.kind == "tacho":
        return []  # a tacho channel gives speed, not spectra
    rpm = planning_rpm(cfg, channel_id)
    settings = effective_analysis(cfg, channel_id, profile)
    fmax = settings.fmax_hz

    def expand(b: BandConfig) -> list[Band]:
        return [
            band
            for band in _expand_band(b)
            if _applies(
                b.profile, profile, settings,
                band.hi if band.basis == "hz" else None,
                band.hi if band.basis == "order" else None, rpm,
            )
        ]

    own_names = {band.name for b in cfg.bands if b.channel == channel_id for band in expand(b)}
    out: list[Band] = []
    for b in cfg.bands:
        if b.channel == channel_id:
            out += expand(b)
        elif b.channel == "*" and (rpm is not None or not _is_order_band(b)):
            out += [band for band in expand(b) if band.name not in own_names]
    orders = _defects(cfg, channel_id, profile)
    if orders is not None:  # a configured band of the same name wins
        taken = {b.name for b in out}
        out += [b for b in defect_bands(orders) if b.name not in taken
                and _covers(fmax, b.hi * rpm / 60.0)]  # type: ignore[operator]
    return out


def tones_for(cfg: Config, channel_id: str, profile: str | None = None) -> list[ToneDef]:
    """The tracked tones of one channel's profile (same rules as :func:`bands_for`)."""
    profile = _primary(cfg, channel_id, profile)
    ch = channel_settings(cfg, channel_id)
    if ch.kind == "tacho":
        return []
    rpm = planning_rpm(cfg, channel_id)
    settings = effective_analysis(cfg, channel_id, profile)
    fmax = settings.fmax_hz
    mine = [
        t for t in cfg.tones
        if _applies(t.profile, profile, settings, t.hz, t.order, rpm)
    ]
    own_names = {t.name for t in mine if t.channel == channel_id}
    out = [
        ToneDef(t.name, hz=t.hz, order=t.order)
        for t in mine
        if t.channel == channel_id
        or (t.channel == "*" and t.name not in own_names and (rpm is not None or t.order is None))
    ]
    orders = _defects(cfg, channel_id, profile)
    if orders is not None:
        taken = {t.name for t in out}
        out += [t for t in defect_tones(orders) if t.name not in taken
                and _covers(fmax, (t.order or 0.0) * rpm / 60.0)]  # type: ignore[operator]
    return out


def _watched_profiles(mine: list[str], profile: str | None) -> list[str]:
    return mine if profile in (None, "*") else [p for p in mine if p == profile]


def watched(
    cfg: Config, targets: Sequence[str], profile: str | None, kind: str, name: str
) -> list[tuple[str, str | None]]:
    """(channel, profile) pairs an alarm entry watches; profile None: the value is missing.

    ``profile`` None: the channel's first profile that has the value (overall: its primary
    one); ``"*"``: every profile that has it; a name: that profile (skipped on channels that
    do not run it)."""
    out: list[tuple[str, str | None]] = []
    for ch in targets:
        mine = profiles_of(cfg, ch)
        if profile not in (None, "*"):
            if profile not in mine:
                continue
            mine = [profile]
        if kind == "overall":
            have = mine
        else:
            lookup = bands_for if kind == "band" else tones_for
            have = [p for p in mine if name in [x.name for x in lookup(cfg, ch, p)]]
        if not have:
            out.append((ch, None))
        else:
            out += [(ch, p) for p in (have if profile == "*" else have[:1])]
    return out


def missing_value(
    cfg: Config,
    where: str,
    channel: str,
    profile: str | None,
    kind: str,
    name: str,
    targets: Sequence[str],
    profiles: Callable[[str], list[str]] | None = None,
) -> str | None:
    """The problem of an alarm entry (at ``where``) on band or tone ``name`` that none of
    its ``targets`` has in the profiles it watches (``profiles(ch)``: a channel's profiles,
    default its configured ones), listing the names there are; None if one has it.
    The config's cross-checks and :func:`service.alarms.rules_from_config` both ask this."""
    lookup = bands_for if kind == "band" else tones_for
    runs = profiles or (lambda ch: profiles_of(cfg, ch))
    have = {
        t: [x.name for p in _watched_profiles(runs(t), profile) for x in lookup(cfg, t, p)]
        for t in targets
    }
    if any(name in names for names in have.values()):
        return None
    listed = sorted({n for names in have.values() for n in names})
    on = "any channel" if channel == "*" else f"channel {channel!r}"
    if profile not in (None, "*"):
        on += f", profile {profile!r}"
    return (f"{where}.{kind}: {name!r} is not a {kind} of {on} "
            f"({kind}s: {', '.join(map(repr, listed)) or 'none'})")
