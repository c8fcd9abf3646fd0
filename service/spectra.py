"""Views of a SpectralFrame in any unit and amplitude type, and its CSV/NPY encodings.

Pure functions over frames; knows nothing about HTTP, sockets or the engine's state."""

from __future__ import annotations

import io

import numpy as np

from dsp.analyzer import resolve_unit
from dsp.scaling import amplitude_from_power, unit_power_weights
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
    u = resolve_unit(unit or frame.unit)
    a = check_choice("amplitude", amplitude or frame.amplitude, AMPLITUDES)
    f = frame.f0_hz + frame.df_hz * np.arange(frame.power.size)
    w = unit_power_weights(f, frame.input_unit, u, lowcut_hz=frame.lowcut_hz)  # type: ignore[arg-type]
    vals = amplitude_from_power(frame.power * w.astype(np.float32), a)  # type: ignore[arg-type]
    return vals.astype(np.float32), u, a


def frequencies(frame: SpectralFrame) -> np.ndarray:
    return frame.f0_hz + frame.df_hz * np.arange(frame.power.size)


def to_csv(frame: SpectralFrame, values: np.ndarray, unit: str, amplitude: str) -> str:
    """Two columns, frequency_hz and the value, with a header naming the unit."""
    buf = io.StringIO()
    buf.write(f"frequency_hz,{amplitude}_{unit.replace('/', '_per_')}\n")
    for fq, v in zip(frequencies(frame), values, strict=True):
        buf.write(f"{fq:.6g},{v:.7g}\n")
    return buf.getvalue()


def to_npy(values: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.asarray(values, dtype=np.float32), allow_pickle=False)
    return buf.getvalue()
