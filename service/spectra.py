"""Views of a SpectralFrame in any unit and amplitude type, and its CSV/NPY encodings.

Pure functions over frames; knows nothing about HTTP, sockets or the engine's state."""

from __future__ import annotations

import functools
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
    w = _weights(frame.f0_hz, frame.df_hz, int(frame.power.size), frame.input_unit, u,
                 frame.lowcut_hz)
    vals = amplitude_from_power(frame.power * w, a)  # type: ignore[arg-type]
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
