"""The plant's tables: ``[[channels]]``, ``[[bands]]``, ``[[tones]]``, ``[[alarms]]``,
``[[machines]]`` and ``[[tokens]]``, each entry checked on its own.

Knows nothing about files, sources, sockets, storage or the engine; from dsp it takes only the
closed option sets."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AfterValidator, Field, model_validator

from dsp.bands import OCTAVE_FRACTIONS
from dsp.types import InputUnit

from ..entries import check_alarm_entry, check_band_entry, check_tone_entry
from .base import SHA256_PATTERN, Id, Name, Role, StrictModel, described
from .settings import AnalysisOverride


class ChannelConfig(StrictModel):
    id: Id = described("Channel id as named in its source's `channels` list (url-safe).")
    input_unit: InputUnit = Field(
        "g", description="Unit of the samples after sensitivity: g | m/s2."
    )
    sensitivity: float = Field(
        1.0,
        description="Input units per raw sample unit (e.g. "
        "0.000122 g per count; for WAV: per full scale).",
    )
    speed_rpm: float | None = Field(
        None, gt=0, description="Running speed, r/min; enables order bands and tones."
    )
    kind: Literal["vibration", "tacho"] = Field(
        "vibration",
        description="vibration: a sensor analysed into spectra | tacho: a pulse signal "
        "(once or pulses_per_rev per revolution) that gives running speed; no spectra.",
    )
    speed_from: str | None = Field(
        None,
        description="Id of the tacho channel (on the same source) whose pulses give this "
        "channel's running speed, frame by frame; order bands and tones follow it.",
    )
    speed: Literal["estimated", "manual"] | None = Field(
        None,
        description="estimated: running speed from the largest line in rpm_min…rpm_max "
        "(taken as 1X; choose the range to leave out 2X) | manual: written by an operator "
        "(PUT /api/v1/channels/{id}/speed), starting from speed_rpm if given.",
    )
    rpm_min: float = Field(
        30.0, gt=0, description="Lowest plausible running speed, r/min (tacho plausibility; "
        "the lower end of the range searched by speed = 'estimated')."
    )
    rpm_max: float = Field(
        30000.0, gt=0, description="Highest plausible running speed, r/min (tacho "
        "plausibility; the upper end of the range searched by speed = 'estimated'). Orders "
        "are placed within Fmax at this speed for channels whose speed is measured."
    )
    speed_tolerance: float = Field(
        0.05, gt=0, le=1,
        description="A frame is flagged speed_varied when its speed changed by more than "
        "this fraction of its mean within the frame (max − min over its revolutions).",
    )
    runup_orders: list[Annotated[float, Field(gt=0, le=64)]] = Field(
        default_factory=list, max_length=16,
        description="Orders whose amplitude and phase are kept against speed (run-up and "
        "coast-down data, GET /api/v1/channels/{id}/runup); needs speed_from.",
    )
    runup_rpm_step: float = Field(
        50.0, gt=0, description="Speed bins of the run-up data, r/min: each keeps the vector "
        "mean of the steps of its latest pass.",
    )
    runup_min_rpm: float | None = Field(
        None, gt=0, description="Lower end of the speed range a run-up or coast-down record "
        "covers, r/min: a record starts when the speed leaves one end inwards and is kept "
        "when it reaches the other (GET /api/v1/channels/{id}/runups); with runup_max_rpm "
        "and runup_orders.",
    )
    runup_max_rpm: float | None = Field(
        None, gt=0, description="Upper end of the speed range of run-up and coast-down "
        "records, r/min; above runup_min_rpm.",
    )
    pulses_per_rev: int = Field(1, ge=1, le=1024, description="Tacho: pulses per revolution.")
    trigger_level: float | None = Field(
        None,
        description="Tacho: trigger level in input units (after sensitivity); default: "
        "automatic, the middle of the recent min and max (follows DC drift).",
    )
    trigger_hysteresis: float | None = Field(
        None, gt=0,
        description="Tacho: distance between the two trigger thresholds: a fraction of the "
        "recent swing, below 1, with the automatic level (default 0.5); in input units with "
        "trigger_level (required then).",
    )
    min_swing: float = Field(
        1.0, ge=0,
        description="Tacho, automatic level: smallest peak-to-peak swing taken as pulses, "
        "input units (noise alone must stay below it).",
    )
    machine: str = Field(
        "", max_length=128, description="Machine this sensor is on (grouping label; its "
        "display name and group come from a [[machines]] entry of that id, if any)."
    )
    name: str = Field(
        "", max_length=128, description="Display name, e.g. 'drive end, horizontal'; "
        "default: the id."
    )
    description: str = Field("", max_length=1024, description="Free text, e.g. location.")
    clip_level: float | None = Field(
        None,
        gt=0,
        description="Raw sample magnitude at which the sensor chain clips "
        "(raw units); |x| >= clip_level is a sensor fault.",
    )
    range: float | None = Field(
        None,
        gt=0,
        description="Largest plausible |sample| in input_unit (after sensitivity): the "
        "sensor's measuring range. A sample beyond it (or NaN/inf) is a sensor fault and "
        "never reaches the analysis. Default: 2000 g (19613.3 m/s2).",
    )
    stale_after_s: float | None = Field(
        None,
        gt=0,
        le=86400,
        description="No new analysed spectrum for this long and the channel is no-signal, s. "
        "Default: max(5 s, 3 hops, one frame + 2 hops) of its slowest profile.",
    )
    loss_of_signal: Literal["alert", "danger", "off"] = Field(
        "alert",
        description="Level of the channel's loss-of-signal alarm (rule '<channel>.signal'), "
        "raised while the channel is no-signal or its source failed; 'off': none.",
    )
    analysis: AnalysisOverride = Field(  # type: ignore[valid-type]
        default_factory=AnalysisOverride, description="Per-channel analysis overrides."
    )
    bearing: Id | None = Field(
        None,
        description="Id of a [[bearings]] entry: the bearing this sensor watches. Its defect "
        "frequencies (BPFO, BPFI, BSF, FTF; orders of speed_rpm) become bands and tracked "
        "tones of the channel's envelope profiles.",
    )
    profiles: list[Id] | None = Field(
        None,
        description="Analysis profiles this channel runs, by name from [profiles]; the first "
        "is its primary one (what REST and the stream give when no profile is asked for). "
        "Default: every profile, in file order, except envelope and order profiles (kind = "
        "'envelope' or 'order' in their own table), which a channel runs only when it lists "
        "them.",
    )


    @model_validator(mode="after")
    def _speed_entry(self) -> ChannelConfig:
        if self.rpm_min >= self.rpm_max:
            raise ValueError(f"rpm_min {self.rpm_min:g} must be below rpm_max {self.rpm_max:g}")
        given = [k for k, v in (("speed_rpm", self.speed_rpm), ("speed_from", self.speed_from),
                                ("speed", self.speed)) if v is not None]
        if self.kind == "tacho" and given:
            raise ValueError(f"a tacho channel measures speed; it takes no {given[0]}")
        if self.speed_from is not None and len(given) > 1:
            other = next(g for g in given if g != "speed_from")
            raise ValueError(f"give one speed source: speed_from or {other}, not both")
        if self.runup_orders and self.speed_from is None:
            raise ValueError("runup_orders needs speed_from (a tacho gives the shaft angle)")
        sweep = (self.runup_min_rpm, self.runup_max_rpm)
        if (sweep[0] is None) != (sweep[1] is None):
            raise ValueError("give runup_min_rpm and runup_max_rpm together")
        if sweep[0] is not None and sweep[1] is not None:
            if not self.runup_orders:
                raise ValueError("runup_min_rpm/runup_max_rpm need runup_orders (the orders "
                                 "a record keeps)")
            if sweep[0] >= sweep[1]:
                raise ValueError(f"runup_min_rpm {sweep[0]:g} must be below runup_max_rpm "
                                 f"{sweep[1]:g}")
        if self.speed == "estimated" and self.speed_rpm is not None:
            raise ValueError("speed = 'estimated' takes no speed_rpm")
        if self.trigger_level is not None and self.trigger_hysteresis is None:
            raise ValueError("trigger_level needs trigger_hysteresis (input units)")
        if (self.trigger_level is None and self.trigger_hysteresis is not None
                and self.trigger_hysteresis >= 1):
            raise ValueError(f"trigger_hysteresis {self.trigger_hysteresis:g} must be a "
                             "fraction below 1 with the automatic level")
        return self

    @property
    def speed_source(self) -> str:
        """Where the running speed comes from: tacho | estimated | manual | fixed | '' (none)."""
        if self.speed_from is not None:
            return "tacho"
        if self.speed is not None:
            return self.speed
        return "fixed" if self.speed_rpm is not None else ""


_PROFILE_HELP = (
    "Profile name, or '*' for every profile of the channel whose fmax_hz covers it (an "
    "order profile's omax: orders only)."
)


class BandConfig(StrictModel):
    channel: str = Field("*", description="Channel id, or '*' for every channel.")
    profile: str = Field("*", description=_PROFILE_HELP)
    name: Name = described("Band name (unique per channel); for an octave set, the name prefix.")
    lo_hz: float | None = Field(None, ge=0, description="Lower edge, Hz.")
    hi_hz: float | None = Field(None, gt=0, description="Upper edge, Hz.")
    lo_order: float | None = Field(
        None, ge=0, description="Lower edge, orders of running speed (1 = once per revolution)."
    )
    hi_order: float | None = Field(None, gt=0, description="Upper edge, orders.")
    octave: int | None = Field(
        None,
        description="1/b-octave band set (IEC 61260-1), b in 1, 3, 6, 12, 24, over lo_hz…hi_hz.",
    )

    @model_validator(mode="after")
    def _entry(self) -> BandConfig:
        check_band_entry(lo_hz=self.lo_hz, hi_hz=self.hi_hz, lo_order=self.lo_order,
                         hi_order=self.hi_order, octave=self.octave,
                         octave_fractions=OCTAVE_FRACTIONS)
        return self


class ToneConfig(StrictModel):
    channel: str = Field("*", description="Channel id, or '*' for every channel.")
    profile: str = Field("*", description=_PROFILE_HELP)
    name: Name = described("Tone name (unique per channel), e.g. '1X' or 'mesh'.")
    hz: float | None = Field(None, gt=0, description="Fixed frequency, Hz.")
    order: float | None = Field(None, gt=0, description="Order of running speed.")

    @model_validator(mode="after")
    def _entry(self) -> ToneConfig:
        check_tone_entry(hz=self.hz, order=self.order)
        return self


class AlarmConfig(StrictModel):
    channel: str = Field("*", description="Channel id, or '*' for every channel.")
    profile: str | None = Field(
        None,
        description="Profile whose value is watched; default: the channel's first profile "
        "that has the band or tone (overall: its primary profile); '*': every profile "
        "that has it.",
    )
    band: str | None = Field(None, description="Band name watched.")
    tone: str | None = Field(None, description="Tone name watched.")
    overall: bool = Field(
        False,
        description="Watch the channel's overall RMS: over its band named 'overall' if it has "
        "one, else over lowcut_hz…fmax_hz.",
    )
    alert: float | None = Field(
        None, gt=0,
        description="Alert (first) level, in the channel's display unit and amplitude "
        "(bands and overall: RMS). Required unless baseline_learn_s is set.",
    )
    danger: float | None = Field(
        None, gt=0, description="Danger (second) level, same unit; must exceed alert."
    )
    baseline_learn_s: float | None = Field(
        None, gt=0, le=365 * 86400,
        description="Relative levels: learn the median of the first baseline_learn_s seconds "
        "of good data, then alert/danger at a factor or dB over it.",
    )
    alert_factor: float | None = Field(None, gt=1, description="Alert at this × the baseline.")
    danger_factor: float | None = Field(None, gt=1, description="Danger at this × the baseline.")
    alert_db: float | None = Field(None, gt=0, description="Alert at this many dB over baseline.")
    danger_db: float | None = Field(None, gt=0, description="Danger at this many dB over baseline.")
    hysteresis: float = Field(
        0.05,
        ge=0,
        le=0.5,
        description="Clear when the value falls below level·(1 − hysteresis); fraction 0…0.5.",
    )
    on_delay_s: float = Field(
        0.0, ge=0, le=86400, description="Time above a level before the alarm goes active, s."
    )
    off_delay_s: float = Field(0.0, ge=0, le=86400, description="Time below before it clears, s.")
    latch: bool = Field(False, description="Stay active until acknowledged.")

    @model_validator(mode="after")
    def _entry(self) -> AlarmConfig:
        check_alarm_entry(
            band=self.band, tone=self.tone, overall=self.overall, alert=self.alert,
            danger=self.danger, baseline_learn_s=self.baseline_learn_s,
            alert_factor=self.alert_factor, danger_factor=self.danger_factor,
            alert_db=self.alert_db, danger_db=self.danger_db,
        )
        return self


class BearingConfig(StrictModel):
    id: Id = described("Bearing id, named by a channel's `bearing`.")
    n_balls: int = Field(ge=1, le=500, description="Number of balls or rollers.")
    ball_d: float = Field(gt=0, description="Ball (roller) diameter, any length unit.")
    pitch_d: float = Field(gt=0, description="Pitch diameter, the same length unit as ball_d.")
    contact_angle_deg: float = Field(0.0, ge=0, lt=90, description="Contact angle, degrees.")

    @model_validator(mode="after")
    def _sizes(self) -> BearingConfig:
        if not self.ball_d < self.pitch_d:
            raise ValueError(f"ball_d={self.ball_d:g} must be smaller than "
                             f"pitch_d={self.pitch_d:g}")
        return self


class MachineConfig(StrictModel):
    id: str = Field(
        min_length=1, max_length=128,
        description="Machine id: the `machine` label its channels carry.",
    )
    name: str = Field("", max_length=128, description="Display name; default: the id.")
    group: str = Field(
        "", max_length=128, description="Group for filtering, e.g. an area or machine type."
    )
    description: str = Field("", max_length=1024, description="Free text.")


class TokenConfig(StrictModel):
    name: Name = described("Who holds the token (for logs).")
    role: Role = described(
        "viewer (read) | operator (also acknowledge alarms) | admin (also reload the config) "
        "| metrics (GET /metrics only: a scraper's token)."
    )
    sha256: Annotated[str, AfterValidator(str.lower)] = Field(
        pattern=SHA256_PATTERN,
        description="Hex SHA-256 of the token (the token itself is never stored); "
        "kept in lower case.",
    )
