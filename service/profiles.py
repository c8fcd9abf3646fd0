"""Turn validated config settings into dsp analyses: specs, decimation chains, profile banks.

Knows the config models and the dsp API; no I/O, no asyncio, no channel state.

A channel may run several named analysis *profiles* (e.g. ``wide`` up to 5 kHz and
``narrow`` up to 500 Hz with 0.3 Hz lines) from its one stream. A profile whose Fmax is
below fs/2.56 runs on a decimated copy of the stream (``dsp.decimate``: FIR stages of 2–10,
≤ 0.1 dB ripple to Fmax, ≥ 80 dB rejection of everything that would fold into the band).
Every profile of every channel of a source shares one decimation tree (``MultiRate``), and
channels of a source whose profile set-ups are identical share one vectorised Analyzer.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from dsp.analyzer import Analyzer
from dsp.bands import Band
from dsp.chainplan import plan_chain
from dsp.decimate import MultiRate
from dsp.grid import FMAX_RATIO, FrameGrid
from dsp.spec import AnalysisSpec, ToneDef, low_limit_hz, resolve_unit
from dsp.tacho import TachoTracker
from dsp.windows import window_info

from .config import (
    AnalysisSettings,
    Config,
    channel_settings,
    profiles_of,
)
from .config.settings import ORDER_MARGIN
from .envelope import EnvelopeFront, EnvelopeSetup
from .lookups import bands_for, effective_analysis, tones_for
from .orders import OrderFront, OrderSetup

OVERALL = "_overall"  # internal band: the channel's overall value (see overall_band)


@dataclass(frozen=True)
class SpecResult:
    spec: AnalysisSpec
    notes: tuple[str, ...]  # what was adjusted and why, for `check` and the log


def analysis_spec(
    settings: AnalysisSettings,
    fs: float,
    *,
    input_unit: str = "g",
    bands: list[Band] | tuple[Band, ...] = (),
    tones: list[ToneDef] | tuple[ToneDef, ...] = (),
) -> SpecResult:
    """The :class:`AnalysisSpec` for samples at ``fs`` Hz (after any decimation).

    The frame is N = 2.56·lines samples at ``fs``. When fs ≠ 2.56·fmax_hz the lines keep
    their count, so the line spacing is fs/N and the usable band is fs/2.56; a note says so
    (:class:`ProfileBank` decimates first, so this only happens when no integer chain
    reaches the asked Fmax exactly).
    """
    notes: list[str] = []
    grid = FrameGrid.from_fmax(fs / FMAX_RATIO, settings.lines, overlap=settings.overlap)
    if abs(grid.fs - fs) > 1e-6 * fs:  # from_fmax rounds through 2.56; keep the true rate
        grid = FrameGrid(fs=fs, n=grid.n, hop=grid.hop)
    if abs(fs / FMAX_RATIO - settings.fmax_hz) > 1e-6 * settings.fmax_hz:
        notes.append(
            f"fmax_hz={settings.fmax_hz:g} with a {fs:g} Hz stream: lines are "
            f"{grid.df_hz:g} Hz apart and the spectrum reaches {fs / FMAX_RATIO:g} Hz"
        )
    unit = settings.output_unit or settings.unit
    spec = AnalysisSpec(
        grid=grid,
        window=settings.window,
        beta=settings.kaiser_beta,
        averaging=settings.averaging,
        averages=settings.averages,
        linear_end=settings.linear_end,
        input_unit=input_unit,  # type: ignore[arg-type]
        unit=unit,
        amplitude=settings.amplitude,
        lowcut_hz=settings.lowcut_hz,
        bands=tuple(bands),
        tones=tuple(tones),
        peaks=settings.peaks,
    )
    return SpecResult(spec, tuple(notes))


def overall_band(bands: Sequence[Band], lowcut_hz: float, fmax_hz: float) -> Band:
    """The band the channel's *overall* value covers: its band named "overall" when it has
    one (e.g. velocity 10–1000 Hz, as severity standards define it), else lowcut…Fmax."""
    named = next((b for b in bands if b.name == "overall"), None)
    if named is not None:
        return Band(OVERALL, named.lo, named.hi, named.basis)
    return Band(OVERALL, lowcut_hz, fmax_hz)


def settled(y: np.ndarray, next_index: int, first_settled: int) -> tuple[np.ndarray, int]:
    """The outputs ``y`` [C, m] of a decimation chain that are clear of its start-up
    transient, and the output index of the first of them: the chain's outputs are indices
    next_index − m … next_index − 1, and those before ``first_settled`` are still reached by
    the zeros the chain started from after a (re)start."""
    k0 = next_index - y.shape[1]
    if k0 < first_settled:
        return y[:, min(first_settled - k0, y.shape[1]):], first_settled
    return y, k0


@dataclass(frozen=True)
class ProfilePlan:
    """What one profile of one channel runs on a stream of ``fs_in`` Hz.

    ``factor`` = fs_in/fs_hz is the decimation (1 = none; ``stages`` its factors, first
    first); ``fmax_hz`` = fs_hz/2.56 is the usable Fmax (≥ the asked ``fmax_asked_hz``;
    ``notes`` say why when they differ). Frequencies in Hz.
    """

    channel: str
    name: str
    primary: bool
    settings: AnalysisSettings
    spec: AnalysisSpec
    bands: tuple[Band, ...]  # user bands (the spec also holds OVERALL, last)
    fs_in: float
    factor: int
    stages: tuple[int, ...]
    notes: tuple[str, ...]
    envelope: EnvelopeSetup | None = None  # an envelope profile's demodulation
    # An order profile's resampling: then the spec's grid is in angle (fs = samples per
    # revolution, df = order resolution, "Hz" = orders) and ``factor`` decimates the stream
    # the resampler reads.
    order: OrderSetup | None = None

    @property
    def fs_hz(self) -> float:
        return self.spec.grid.fs

    @property
    def fmax_hz(self) -> float:
        return self.spec.grid.fs / FMAX_RATIO

    @property
    def x_unit(self) -> str:
        """The unit of the spectrum's x axis: "Hz", or "order" for an order profile."""
        return "Hz" if self.order is None else "order"

    @property
    def hop_s(self) -> float:
        """Time between frames, s (an order profile's: at its tacho's slowest speed)."""
        g = self.spec.grid
        return g.hop / g.fs * (1.0 if self.order is None else self.order.slowest_rev_s)

    @property
    def frame_s(self) -> float:
        """Time a frame spans, s (an order profile's: at its tacho's slowest speed)."""
        g = self.spec.grid
        return g.n / g.fs * (1.0 if self.order is None else self.order.slowest_rev_s)

    def as_dict(self) -> dict[str, object]:
        g, s = self.spec.grid, self.spec
        extra: dict[str, object] = {}
        if self.order is not None:
            extra = {"omax": self.fmax_hz, "order_resolution": g.df_hz,
                     "samples_per_rev": g.fs, "revs_per_frame": g.n / g.fs,
                     "speed_from": self.order.tacho,
                     "speed_band_pct": self.order.speed_band_pct,
                     # in Hz or s, not orders: the rate the resampler reads; a frame's
                     # duration depends on the speed
                     "sample_rate_hz": self.fs_in / self.factor, "frame_s": None}
        return {
            "name": self.name,
            "primary": self.primary,
            "fmax_hz": self.fmax_hz,
            "fmax_asked_hz": self.settings.fmax_hz,
            "lines": g.lines,
            "df_hz": g.df_hz,
            "n": g.n,
            "hop": g.hop,
            "frame_s": g.n / g.fs,
            "sample_rate_hz": g.fs,
            "decimation": self.factor,
            "stages": list(self.stages),
            "window": s.window,
            "averaging": s.averaging,
            "averages": s.averages,
            "unit": resolve_unit(s.unit),
            "low_limit_hz": low_limit_hz(s),
            "amplitude": s.amplitude,
            "bands": [b.name for b in self.bands],
            "tones": [t.name for t in s.tones],
            "notes": list(self.notes),
            "kind": ("order" if self.order is not None else "spectrum" if self.envelope is None
                     else "envelope"),
            "x_unit": self.x_unit,
            "envelope_band": None if self.envelope is None else (
                "auto" if self.envelope.band is None else list(self.envelope.band)),
            **extra,
        }


def min_band_lines(spec: AnalysisSpec) -> float:
    """The narrowest band, in lines, that reads a sine at its centre within 0.15 dB under
    ``spec``'s window: max(3, main-lobe half-width + 1) lines (rectangular, Hann, Hamming 3;
    Kaiser β 8.6 3.9; Blackman-Harris 5; flat-top 6). Measured with dsp.analyzer.Analyzer
    (a sine mid-band, band widths of 1-12 lines; table in docs/low-frequency.md)."""
    info = window_info(spec.window, spec.grid.n, beta=spec.beta)
    return max(3.0, info.mainlobe_halfwidth_bins + 1.0)


def plan_warnings(plan: ProfilePlan, speed_rpm: float | None, speed_why: str = "") -> list[str]:
    """What ``plan`` cannot measure as configured, for ``quaver check``: bands and tracked
    tones (orders at ``speed_rpm``) below the low-frequency limit (they read null, or from
    the limit up), and bands too narrow for the line spacing (they read a sine low).
    ``speed_why`` says where ``speed_rpm`` comes from (e.g. ", the lowest v1-tacho reads")."""
    spec = plan.spec
    u = "Hz"
    if plan.order is not None:  # the axis is in orders: read them at 1 revolution per s
        speed_rpm, u = 60.0, "orders"
    f_low = low_limit_hz(spec)
    df = spec.grid.df_hz
    speed_hz = None if speed_rpm is None else speed_rpm / 60.0
    why = (f"the low-frequency limit {f_low:g} {u} (max(lowcut_hz {spec.lowcut_hz:g}, "
           f"{spec.window}'s main lobe at {df:g} {u} lines))")
    need = min_band_lines(spec)
    out = []
    for b in plan.bands:
        if b.basis == "order" and speed_hz is None:
            continue
        lo, hi = b.edges_hz(speed_hz)
        at = ("" if b.basis == "hz" or plan.order is not None
              else f" at {speed_rpm:g} r/min{speed_why}")
        if hi <= f_low:
            out.append(f"band {b.name!r} ({lo:g}-{hi:g} {u}{at}) lies below {why}: "
                       "it reads null")
        elif lo < f_low:
            out.append(f"band {b.name!r} ({lo:g}-{hi:g} {u}{at}) starts below {why}: it is "
                       f"measured over {f_low:g}-{hi:g} {u}")
        elif (hi - lo) / df < need:
            out.append(f"band {b.name!r} ({lo:g}-{hi:g} {u}{at}) is {(hi - lo) / df:.2g} "
                       f"lines wide, under the {need:g} lines {spec.window} needs: a sine in "
                       "it reads low (more lines, or a wider band)")
    for t in spec.tones:
        if t.order is not None and speed_hz is None:
            continue
        f = t.frequency_hz(speed_hz)
        if f < f_low:
            at = "" if t.order is None or plan.order is not None else (
                f" (order {t.order:g} at {speed_rpm:g} r/min{speed_why})")
            out.append(f"tone {t.name!r} at {f:g} {u}{at} lies below {why}: it reads null")
    return out


def plan_profiles(cfg: Config, channel_id: str, fs_in: float) -> list[ProfilePlan]:
    """The profiles of one channel (primary first) on a stream of ``fs_in`` Hz.

    A profile whose Fmax is above fs_in/2.56 (possible only where the config could not know
    the rate, e.g. a WAV file's) runs undecimated to fs_in/2.56, with a note saying so.
    A tacho channel has none: its pulses give speed (``service.speed``), not spectra."""
    ch = channel_settings(cfg, channel_id)
    if ch.kind == "tacho":
        return []
    out = []
    for i, name in enumerate(profiles_of(cfg, channel_id)):
        settings = effective_analysis(cfg, channel_id, name)
        if settings.kind == "order":
            plan = _order_plan(cfg, channel_id, name, i == 0, settings, fs_in)
            if plan is not None:  # None: no tacho (the config's cross-checks say so)
                out.append(plan)
            continue
        top = fs_in / FMAX_RATIO
        chain = plan_chain(fs_in, min(settings.fmax_hz, top))
        notes: tuple[str, ...] = ()
        if settings.fmax_hz > top * (1 + 1e-9):
            # a stream slower than the config expected (a WAV file's own rate): show what
            # it holds rather than refuse to run
            notes = (f"fmax_hz={settings.fmax_hz:g} is above this {fs_in:g} Hz stream's "
                     f"fs/2.56 = {top:g} Hz; the spectrum reaches {top:g} Hz",)
        elif abs(chain.fmax_hz - settings.fmax_hz) > 1e-6 * settings.fmax_hz:
            notes = (chain.note,)  # why the usable Fmax is the next higher one
        fs = chain.fs_out
        bands = tuple(bands_for(cfg, channel_id, name))
        tones = tuple(tones_for(cfg, channel_id, name))
        overall = overall_band(bands, settings.lowcut_hz, min(settings.fmax_hz, fs / FMAX_RATIO))
        res = analysis_spec(
            settings, fs, input_unit=ch.input_unit, bands=(*bands, overall), tones=tones
        )
        envelope = None
        if settings.kind == "envelope":
            band = settings.band
            envelope = EnvelopeSetup(
                band=None if band == "auto" else (float(band[0]), float(band[1])),
                interval_s=settings.kurtogram_interval_s,
                length_s=settings.kurtogram_length_s, levels=settings.kurtogram_levels,
            )
        out.append(
            ProfilePlan(
                channel=channel_id, name=name, primary=i == 0, settings=settings,
                spec=res.spec, bands=bands, fs_in=float(fs_in), factor=chain.factor,
                stages=chain.factors, notes=notes, envelope=envelope,
            )
        )
    return out


def _order_plan(cfg: Config, channel_id: str, name: str, primary: bool,
                settings: AnalysisSettings, fs_in: float) -> ProfilePlan | None:
    """An order profile's plan: the stream decimated to reach ORDER_MARGIN·omax orders at the
    tacho's rpm_max, resampled to 2.56·omax samples per revolution, framed in angle."""
    ch = channel_settings(cfg, channel_id)
    if ch.speed_from is None:
        return None
    tacho = channel_settings(cfg, ch.speed_from)
    top = fs_in / FMAX_RATIO
    need_hz = ORDER_MARGIN * settings.omax * tacho.rpm_max / 60.0
    chain = plan_chain(fs_in, min(need_hz, top))
    notes: tuple[str, ...] = ()
    if need_hz > top * (1 + 1e-9):
        notes = (f"omax {settings.omax:g} at rpm_max {tacho.rpm_max:g} needs the signal to "
                 f"{need_hz:g} Hz; this {fs_in:g} Hz stream holds {top:g} Hz, so orders above "
                 f"{top / ORDER_MARGIN / (tacho.rpm_max / 60.0):g} fold at the top speed",)
    bands = tuple(bands_for(cfg, channel_id, name))
    tones = tuple(tones_for(cfg, channel_id, name))
    # the angle domain's "Hz" are orders: no integration cut there (the unit is acceleration)
    settings = settings.model_copy(update={"fmax_hz": settings.omax, "lowcut_hz": 0.0})
    overall = overall_band(bands, 0.0, settings.omax)
    spr = FMAX_RATIO * settings.omax
    res = analysis_spec(settings, spr, input_unit=ch.input_unit, bands=(*bands, overall),
                        tones=tones)
    setup = OrderSetup(tacho=ch.speed_from, pulses_per_rev=tacho.pulses_per_rev,
                       samples_per_rev=spr, speed_band_pct=settings.speed_band_pct,
                       rpm_min=tacho.rpm_min, rpm_max=tacho.rpm_max)
    return ProfilePlan(
        channel=channel_id, name=name, primary=primary, settings=settings, spec=res.spec,
        bands=bands, fs_in=float(fs_in), factor=chain.factor, stages=chain.factors,
        notes=notes, order=setup,
    )


@dataclass
class ChannelGroup:
    """Channels of one source that run one profile with identical set-ups: one Analyzer.

    ``rows`` index the source's blocks; ``tap`` names the decimated stream the analyzer
    reads (None: the input itself) and ``tap_rows`` index that stream's rows.
    """

    profile: str
    rows: np.ndarray
    channel_ids: tuple[str, ...]
    analyzer: Analyzer
    bands: tuple[Band, ...]  # user bands, in order (the analyzer also has OVERALL last)
    primary: tuple[bool, ...] = ()  # per channel: is this profile the channel's primary one
    tap: str | None = None
    tap_rows: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.intp))
    plan: ProfilePlan | None = None
    front: EnvelopeFront | None = None  # an envelope profile's demodulation
    order: OrderFront | None = None  # an order profile's angular resampling


class ProfileBank:
    """Every profile of a source's channels at one input rate ``fs_in`` (Hz).

    ``push(x, first_index)`` takes ``[C, n]`` samples in engineering units (rows in the
    source's channel order) and returns the groups that produced new frames, with how many.
    Decimated outputs still reached by the zeros after a (re)start are not analysed, so no
    frame holds the chain's start-up transient; output indices keep meaning input indices,
    so a gap upstream is a gap for every profile. :meth:`end_index` maps a group's newest
    frame back to the input stream (group delay removed) for time stamps and evidence.
    """

    def __init__(self, cfg: Config, channel_ids: Sequence[str], fs_in: float) -> None:
        self.fs_in = float(fs_in)
        self.plans: dict[str, list[ProfilePlan]] = {
            cid: plan_profiles(cfg, cid, fs_in) for cid in channel_ids
        }
        # one decimated stream per factor, over the rows that need it
        taps: dict[int, list[int]] = {}
        for row, cid in enumerate(channel_ids):
            for p in self.plans[cid]:
                if p.envelope is not None:
                    continue  # decimates its own envelope (service.envelope)
                if p.factor > 1 and row not in taps.setdefault(p.factor, []):
                    taps[p.factor].append(row)
        self.rates: MultiRate | None = None
        self._dec_rows = np.zeros(0, dtype=np.intp)
        self._pos: dict[int, int] = {}
        if taps:
            dec_rows = sorted({r for rows in taps.values() for r in rows})
            self._dec_rows = np.array(dec_rows, dtype=np.intp)
            self._pos = {r: i for i, r in enumerate(dec_rows)}
            # an Fmax that gives exactly fs_in/R stands for the factor R
            fmax = {f"x{r}": self.fs_in / r / FMAX_RATIO for r in taps}
            self.rates = MultiRate(len(dec_rows), self.fs_in, fmax)
        keyed: dict[str, list[int]] = {}
        plan_of: dict[str, ProfilePlan] = {}
        for row, cid in enumerate(channel_ids):
            input_unit = channel_settings(cfg, cid).input_unit
            for p in self.plans[cid]:
                # an order profile's channels share a group (one resampling) per tacho
                key = repr((p.name, p.spec, input_unit, p.factor, p.envelope, p.order))
                if p.envelope is not None and p.envelope.band is None:
                    key = repr((p.name, cid))  # an automatic band is the channel's own
                keyed.setdefault(key, []).append(row)
                plan_of[key] = p
        self.groups: list[ChannelGroup] = []
        for key, rows in keyed.items():
            p = plan_of[key]
            ids = tuple(channel_ids[r] for r in rows)
            speed = np.array(
                [(channel_settings(cfg, c).speed_rpm or math.nan) / 60.0 for c in ids]
            )
            tap = None if p.factor == 1 else f"x{p.factor}"
            front = None
            order = None
            if p.envelope is not None:
                front = EnvelopeFront(self.fs_in, p.fmax_hz, p.envelope, len(rows))
                tap = None
            if p.order is not None:
                order = OrderFront(p.order, self.fs_in / p.factor, len(rows))
                speed[:] = 1.0  # order bands and tones in orders: the angle domain's "Hz"
            self.groups.append(
                ChannelGroup(
                    profile=p.name,
                    rows=np.array(rows, dtype=np.intp),
                    channel_ids=ids,
                    analyzer=Analyzer(p.spec, len(ids), speed_hz=speed),
                    bands=p.bands,
                    primary=tuple(
                        next(q.primary for q in self.plans[c] if q.name == p.name) for c in ids
                    ),
                    tap=tap,
                    tap_rows=np.array([self._pos[r] for r in rows] if tap else rows,
                                      dtype=np.intp),
                    plan=p,
                    front=front,
                    order=order,
                )
            )

    @property
    def decimation_stages(self) -> int:
        """Decimation stages run per push (shared stages counted once)."""
        return 0 if self.rates is None else self.rates.stage_count

    def push(self, x: np.ndarray, first_index: int,
             tachos: Mapping[str, TachoTracker] | None = None
             ) -> list[tuple[ChannelGroup, int]]:
        """Analyse one block ``[C, n]`` whose first sample has stream index ``first_index``;
        ``tachos``: the source's tacho trackers by channel id, already fed this block (order
        profiles read their pulses; without them they make no frames)."""
        taps: dict[str, tuple[np.ndarray, int]] = {}
        if self.rates is not None:
            out = self.rates.push(x[self._dec_rows], first_index=first_index)
            for name, y in out.items():
                taps[name] = settled(
                    y, self.rates.next_index(name), self.rates.first_settled_index(name)
                )
        done = []
        for g in self.groups:
            if g.front is not None:
                env = g.front.push(x[g.rows], first_index)
                if env is None:
                    continue
                new = g.analyzer.push(env[0], first_index=env[1])
            elif g.order is not None:
                tracker = None if tachos is None else tachos.get(g.order.setup.tacho)
                if g.tap is None:
                    y, k0, t0_s = x[g.rows], first_index, first_index / self.fs_in
                else:
                    yt, k0 = taps[g.tap]
                    if not yt.shape[1]:
                        continue
                    y = yt[g.tap_rows]
                    t0_s = float(self.rates.content_index(g.tap, k0)) / self.fs_in  # type: ignore[union-attr]
                new = g.order.push(g.analyzer, y, t0_s, tracker)
            elif g.tap is None:
                new = g.analyzer.push(x[g.rows], first_index=first_index)
            else:
                y, k0 = taps[g.tap]
                if not y.shape[1]:
                    continue
                new = g.analyzer.push(y[g.tap_rows], first_index=k0)
            if new:
                done.append((g, new))
        return done

    def end_index(self, g: ChannelGroup) -> int:
        """Input-stream index just after the content of ``g``'s newest frame."""
        end = g.analyzer.last_end_index or 0
        if g.order is not None:
            return g.order.content_index(self.fs_in)
        if g.front is not None:
            return g.front.content_index(end)
        if g.tap is None or self.rates is None:
            return int(end)
        return int(self.rates.content_index(g.tap, end))
