"""Views of a SpectralFrame in any unit and amplitude type, and its CSV/NPY encodings.

Pure functions over frames; knows nothing about HTTP, sockets or the engine's state."""

from __future__ import annotations

import functools
import io

import numpy as np

from dsp.scaling import amplitude_from_power, unit_power_weights
from dsp.spec import resolve_unit
from dsp.types import AMPLITUDES, check_choice

from .types import SpectralFrame


def spectrum_values(
    frame: SpectralFrame, unit: str | None = None, amplitude: str | None = None
) -> tuple[np.ndarray, str, str]:
    """(values float32 [lines+1], unit, amplitude) of the frame in the asked view.

    ``unit`` is a unit (g, m/s2, mm/s, in/s, um, mil) or a quantity (acceleration,
    velocity, displacement); ``amplitude`` is peak | rms | peak-to-peak. Velocity and
    displacement lines below the frame's low-frequency cut read 0.
    """
    return power_values(frame.power, frame.f0_hz, frame.df_hz, frame.input_unit,
                        frame.lowcut_hz, unit or frame.unit, amplitude or frame.amplitude)


def power_values(
    power: np.ndarray, f0_hz: float, df_hz: float, input_unit: str, lowcut_hz: float,
    unit: str, amplitude: str,
) -> tuple[np.ndarray, str, str]:
    """(values float32, unit, amplitude) of a power spectrum in ``input_unit``² (RMS² per
    line on f = f0_hz + q·df_hz), as :func:`spectrum_values` gives a frame's."""
    u = resolve_unit(unit)
    a = check_choice("amplitude", amplitude, AMPLITUDES)
    w = _weights(f0_hz, df_hz, int(power.size), input_unit, u, lowcut_hz)
    vals = amplitude_from_power(power * w, a)  # type: ignore[arg-type]
    return vals.astype(np.float32, copy=False), u, a


@functools.lru_cache(maxsize=256)
def _weights(
    f0_hz: float, df_hz: float, q: int, input_unit: str, unit: str, lowcut_hz: float
) -> np.ndarray:
    """float32 power weights input_unit² → unit² on f = f0 + q·df (read-only, cached: every
    frame of a channel and profile has the same lines, so they are computed once)."""
    f = f0_hz + df_hz * np.arange(q)
    w = unit_power_weights(f, input_unit, unit, lowcut_hz=lowcut_hz).astype(np.float32)  # type: ignore[arg-type]
    w.setflags(write=False)
    return w


def frequencies(frame: SpectralFrame) -> np.ndarray:
    return frame.f0_hz + frame.df_hz * np.arange(frame.power.size)


def to_csv(frame: SpectralFrame, values: np.ndarray, unit: str, amplitude: str) -> str:
    """Two columns, frequency_hz (an order profile's: order) and the value, with a header
    naming the unit."""
    buf = io.StringIO()
    x = "order" if frame.x_unit == "order" else "frequency_hz"
    buf.write(f"{x},{amplitude}_{unit.replace('/', '_per_')}\n")
    for fq, v in zip(frequencies(frame), values, strict=True):
        buf.write(f"{fq:.6g},{v:.7g}\n")
    return buf.getvalue()


def to_npy(values: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.asarray(values, dtype=np.float32), allow_pickle=False)
    return buf.getvalue()


def _num(v: float) -> float | None:
    """JSON has no NaN: a value that was not measured is null (with a reason beside it)."""
    return float(v) if np.isfinite(v) else None


def _xu(frame: SpectralFrame) -> str:
    return "Hz" if frame.x_unit == "Hz" else "orders"


def band_reason(frame: SpectralFrame, lo_hz: float, hi_hz: float) -> str:
    """Why a band (or the overall) of ``frame`` has no value; '' when it has one."""
    if not (np.isfinite(lo_hz) and np.isfinite(hi_hz)):
        return "order band: the channel has no running speed"
    if hi_hz <= frame.lowcut_hz:
        return f"below the low-frequency limit ({frame.lowcut_hz:g} {_xu(frame)})"
    return "not measured"


def tone_reason(frame: SpectralFrame, frequency_hz: float) -> str:
    """Why a tracked tone of ``frame`` has no value; '' when it has one."""
    if not np.isfinite(frequency_hz):
        return "order tone without a running speed, or above fs/2"
    if frequency_hz < frame.lowcut_hz:
        return f"below the low-frequency limit ({frame.lowcut_hz:g} {_xu(frame)})"
    if frequency_hz > frame.fmax_hz * (1 + 1e-9):
        return f"beyond Fmax {frame.fmax_hz:g} {_xu(frame)}"
    return "not measured"


def overall_item(frame: SpectralFrame) -> dict[str, object]:
    """The frame's overall (RMS in its unit) over the band it covers, as JSON fields."""
    out: dict[str, object] = {
        "overall": _num(frame.overall),
        "overall_lo_hz": _num(frame.overall_lo_hz),
        "overall_hi_hz": _num(frame.overall_hi_hz),
    }
    if out["overall"] is None:
        out["overall_reason"] = band_reason(frame, frame.overall_lo_hz, frame.overall_hi_hz)
    return out


def band_items(frame: SpectralFrame) -> list[dict[str, object]]:
    """Each band as JSON: name, measured edges (Hz), RMS value, and a reason when null."""
    out: list[dict[str, object]] = []
    for b in frame.bands:
        d: dict[str, object] = {"name": b.name, "lo_hz": _num(b.lo_hz), "hi_hz": _num(b.hi_hz),
                                "value": _num(b.value)}
        if d["value"] is None:
            d["reason"] = band_reason(frame, b.lo_hz, b.hi_hz)
        out.append(d)
    return out


def tone_items(frame: SpectralFrame) -> list[dict[str, object]]:
    """Each tracked tone as JSON: name, frequency (Hz), amplitude, and a reason when null."""
    out: list[dict[str, object]] = []
    for t in frame.tones:
        d: dict[str, object] = {"name": t.name, "frequency_hz": _num(t.frequency_hz),
                                "amplitude": _num(t.value)}
        if d["amplitude"] is None:
            d["reason"] = tone_reason(frame, t.frequency_hz)
        out.append(d)
    return out


def peak_items(frame: SpectralFrame) -> list[dict[str, object]]:
    """The frame's largest peaks as JSON: interpolated frequency (Hz) and amplitude."""
    return [{"frequency_hz": p.frequency_hz, "amplitude": p.value} for p in frame.peaks]


def frame_speed(frame: SpectralFrame) -> dict[str, object]:
    """The speed a frame's orders were placed at, with its source and status, and whether
    it changed within the frame by more than the channel's speed_tolerance (``varied``)."""
    return {
        "rpm": _num(frame.speed_rpm),
        "source": frame.speed_source,
        "status": frame.speed_status,
        "variation": _num(frame.speed_variation),
        "varied": frame.speed_varied,
        # an order profile's average spans one speed band (service.orders)
        **({"average_rpm": _num(frame.average_rpm),
            "average_restarted": frame.average_restarted} if frame.x_unit == "order" else {}),
    }
