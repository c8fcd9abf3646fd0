"""What defines one analysis (one "profile") of a channel group: :class:`AnalysisSpec` — its
frame grid, window, averaging, units, bands, tracked tones (:class:`ToneDef`) and peaks —
with the unit names it accepts (:func:`resolve_unit`) and the low-frequency limit that
follows from its window and grid (:func:`low_limit_hz`).

Checked values only; nothing here computes a spectrum (that is :mod:`dsp.analyzer`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .bands import Band
from .grid import FrameGrid
from .scaling import DEFAULT_UNIT
from .types import (
    AMPLITUDES,
    INPUT_UNITS,
    OUTPUT_UNITS,
    QUANTITIES,
    Amplitude,
    AveragingMode,
    InputUnit,
    LinearEnd,
    OutputUnit,
    WindowName,
    check_choice,
)
from .windows import DEFAULT_KAISER_BETA, check_window, window_info

__all__ = ["AnalysisSpec", "ToneDef", "low_limit_hz", "resolve_unit"]


def resolve_unit(unit: str) -> OutputUnit:
    """An output unit from a unit or a quantity name (velocity → mm/s, …); checked.

    Parameters
    ----------
    unit : str
        An output unit (g, m/s2, mm/s, in/s, um, mil) or a quantity (acceleration, velocity,
        displacement).

    Returns
    -------
    str
        The output unit (a quantity's default: g, mm/s or um).

    Raises
    ------
    ValueError
        For anything else.
    """
    if unit in QUANTITIES:
        return DEFAULT_UNIT[unit]  # type: ignore[return-value]
    return check_choice("unit", unit, OUTPUT_UNITS + QUANTITIES)  # type: ignore[return-value]


@dataclass(frozen=True)
class ToneDef:
    """A tracked tone: at ``hz`` (fixed frequency) or at ``order`` × running speed.

    Parameters
    ----------
    name : str
        Tone name.
    hz : float, optional
        Fixed frequency, Hz (> 0).
    order : float, optional
        Order of running speed (> 0); exactly one of ``hz`` and ``order``.
    """

    name: str
    hz: float | None = None
    order: float | None = None

    def __post_init__(self) -> None:
        if (self.hz is None) == (self.order is None):
            raise ValueError(f"tone {self.name!r}: give exactly one of hz or order")
        v = self.hz if self.hz is not None else self.order
        if not (v is not None and np.isfinite(v) and v > 0):
            raise ValueError(f"tone {self.name!r}: frequency/order must be a positive number")

    def frequency_hz(self, speed_hz: float | None) -> float:
        """The tone's frequency in Hz: ``hz`` as given, or ``order`` × ``speed_hz`` (Hz)."""
        if self.hz is not None:
            return float(self.hz)
        if speed_hz is None or not speed_hz > 0:
            raise ValueError(
                f"tone {self.name!r} is in orders but the channel has no running speed"
            )
        return float(self.order) * speed_hz  # type: ignore[arg-type]


@dataclass(frozen=True)
class AnalysisSpec:
    """Everything that defines one analysis (one "profile") of a channel group.

    ``grid`` fixes fs (Hz), frame length N and hop; ``averages`` is frames (linear) or
    equivalent frames (exponential); ``unit``/``amplitude`` are the default views;
    ``lowcut_hz`` is the integration cut; ``peaks`` the number of peaks reported.

    Parameters
    ----------
    grid : FrameGrid
        Sample rate (Hz), frame length N and hop (samples), lines kept.
    window : {'rectangular', 'hann', 'hamming', 'blackman-harris', 'flattop', 'kaiser'}, optional
        DFT window (default hann).
    beta : float, optional
        Kaiser β (default 8.6).
    averaging : {'exponential', 'linear', 'peak-hold'}, optional
        Kind of average (default exponential).
    averages : float, optional
        Frames (linear) or equivalent frames (exponential); default 8.
    linear_end : {'restart', 'hold'}, optional
        What a complete linear average does next (default restart).
    input_unit : {'g', 'm/s2'}, optional
        Acceleration unit of the samples pushed (default g).
    unit : str, optional
        Default output unit or quantity (default velocity, i.e. mm/s).
    amplitude : {'rms', 'peak', 'peak-to-peak'}, optional
        Default amplitude type (default rms).
    lowcut_hz : float, optional
        Integration cut, Hz (default 2); the window's main lobe can raise it
        (:func:`low_limit_hz`).
    bands : tuple of Band, optional
        Bands whose RMS is read out (names unique).
    tones : tuple of ToneDef, optional
        Tracked tones.
    peaks : int, optional
        Peaks reported, 0…256 (default 8).
    """

    grid: FrameGrid
    window: WindowName = "hann"
    beta: float = DEFAULT_KAISER_BETA
    averaging: AveragingMode = "exponential"
    averages: float = 8
    linear_end: LinearEnd = "restart"
    input_unit: InputUnit = "g"
    unit: str = "velocity"
    amplitude: Amplitude = "rms"
    lowcut_hz: float = 2.0
    bands: tuple[Band, ...] = ()
    tones: tuple[ToneDef, ...] = ()
    peaks: int = 8

    def __post_init__(self) -> None:
        check_window(self.window)
        check_choice("input_unit", self.input_unit, INPUT_UNITS)
        check_choice("amplitude", self.amplitude, AMPLITUDES)
        resolve_unit(self.unit)
        if not (0 <= self.peaks <= 256):
            raise ValueError(f"peaks={self.peaks!r} must be in [0, 256]")
        names = [b.name for b in self.bands]
        if len(set(names)) != len(names):
            raise ValueError(f"band names repeat: {sorted(n for n in names if names.count(n) > 1)}")

    def with_(self, **changes: object) -> AnalysisSpec:
        """A copy with the named fields changed (same units as the constructor's)."""
        return replace(self, **changes)  # type: ignore[arg-type]


def low_limit_hz(spec: AnalysisSpec) -> float:
    """The low-frequency limit in Hz: max(``lowcut_hz``, h·Δf), h the window's main-lobe
    half-width in lines (``WindowInfo.mainlobe_halfwidth_bins``: Hann 2, flat-top 5, ...).

    Lines below it hold the leakage of DC (a sensor's offset) through the window's main
    lobe, and integration to velocity or displacement (÷ω, ÷ω²) would magnify whatever is
    there without bound. So, in every unit: bands and the overall are summed from this
    limit up (a band wholly below it reads NaN), tracked tones below it read NaN, no peak is
    looked for below it, and the velocity/displacement spectrum reads 0 there (the
    acceleration spectrum shows the lines as they are). See docs/low-frequency.md.

    Parameters
    ----------
    spec : AnalysisSpec
        The analysis.

    Returns
    -------
    float
        The limit, Hz.
    """
    info = window_info(spec.window, spec.grid.n, beta=spec.beta)
    return max(float(spec.lowcut_hz), info.mainlobe_halfwidth_bins * spec.grid.df_hz)
