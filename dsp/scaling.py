"""Spectrum scaling (power, amplitude, PSD), engineering units and integration a → v → d.

Knows nothing about streams or the service; pure functions on arrays.

Conventions (Heinzel et al. 2002, §9; docs/references.md), with S1 = Σw, S2 = Σw² of the
window:

* power spectrum  PS[q]  = 2·|X[q]|²/S1²   in unit²  (RMS²; DC and Nyquist not doubled)
* PSD[q]                 = PS[q]/ENBW_Hz   in unit²/Hz, ENBW_Hz = fs·S2/S1²
* amplitude spectrum     = √PS (RMS), √(2·PS) (peak), 2·√(2·PS) (peak-to-peak)

A sine of peak A on a line centre reads PS = A²/2, RMS A/√2, peak A, peak-to-peak 2A.

Integration is done on power, line by line: velocity = acceleration/(2πf),
displacement = acceleration/(2πf)²; lines below the low-frequency cut are set to 0
so that DC and sub-Hz content (and the window's leakage of DC) do not blow up.
"""

from __future__ import annotations

import numpy as np

from .types import (
    AMPLITUDES,
    INPUT_UNITS,
    OUTPUT_UNITS,
    QUANTITIES,
    Amplitude,
    InputUnit,
    OutputUnit,
    Quantity,
    check_choice,
)

__all__ = [
    "G_N",
    "DEFAULT_UNIT",
    "amplitude_from_power",
    "power_from_amplitude",
    "power_spectrum",
    "psd_from_power",
    "quantity_of",
    "unit_power_weights",
]

G_N = 9.80665  # standard acceleration of gravity, m/s², exact (3rd CGPM, 1901)
IN_M = 0.0254  # inch in metres, exact (international yard and pound, 1959)

DEFAULT_UNIT: dict[str, str] = {"acceleration": "g", "velocity": "mm/s", "displacement": "um"}

# Output unit → (quantity, factor from SI base: m/s², m/s or m).
_UNITS: dict[str, tuple[str, float]] = {
    "g": ("acceleration", 1.0 / G_N),
    "m/s2": ("acceleration", 1.0),
    "mm/s": ("velocity", 1e3),
    "in/s": ("velocity", 1.0 / IN_M),
    "um": ("displacement", 1e6),
    "mil": ("displacement", 1.0 / (IN_M * 1e-3)),
}
_INPUT_TO_SI = {"g": G_N, "m/s2": 1.0}


def power_spectrum(x_q: np.ndarray, s1: float, n: int) -> np.ndarray:
    """One-sided power spectrum 2·|X|²/S1² of rfft output (Heinzel 2002 §9).

    Line 0 and, for even ``n``, the Nyquist line are not doubled.

    Parameters
    ----------
    x_q : ndarray of complex
        ``rfft(w·x)`` along the last axis of an ``n``-point frame, in the input's unit.
    s1 : float
        Σw, the window's sum (dimensionless).
    n : int
        Frame length, samples.

    Returns
    -------
    ndarray
        Power spectrum, RMS² per line in the input's unit², the shape and precision of
        ``x_q``'s real part (float32 for complex64 input).
    """
    ps = np.square(x_q.real)  # |X|² without complex temporaries (einsum is ~8× slower here)
    ps += np.square(x_q.imag)
    ps *= 2.0 / (s1 * s1)
    ps[..., 0] *= 0.5
    if n % 2 == 0:
        ps[..., -1] *= 0.5
    result: np.ndarray = ps
    return result


def psd_from_power(power: np.ndarray, enbw_hz: float) -> np.ndarray:
    """Power spectral density from a power spectrum: PS/ENBW_Hz (Heinzel 2002 eq. 23).

    Parameters
    ----------
    power : ndarray
        Power spectrum, unit² (RMS² per line).
    enbw_hz : float
        Equivalent noise bandwidth of one line, Hz (fs·S2/S1²).

    Returns
    -------
    ndarray
        PSD, unit²/Hz, the shape of ``power``.
    """
    return power / enbw_hz


def amplitude_from_power(power: np.ndarray, amplitude: Amplitude) -> np.ndarray:
    """Amplitude spectrum from a power spectrum (RMS²).

    ``rms`` gives √PS, ``peak`` √(2·PS), ``peak-to-peak`` 2·√(2·PS). The peak forms are exact
    for a sine; for noise they are RMS × √2 (× 2) by convention.

    Parameters
    ----------
    power : ndarray
        Power spectrum, unit² (RMS² per line).
    amplitude : {'rms', 'peak', 'peak-to-peak'}
        Amplitude type wanted.

    Returns
    -------
    ndarray
        Amplitudes in the unit of √``power``, the shape and dtype of ``power``.

    Raises
    ------
    ValueError
        If ``amplitude`` is not one of the three.
    """
    check_choice("amplitude", amplitude, AMPLITUDES)
    a = np.sqrt(power)
    if amplitude == "peak":
        a *= float(np.sqrt(2.0))  # Python floats keep the input's dtype (NEP 50)
    elif amplitude == "peak-to-peak":
        a *= float(2.0 * np.sqrt(2.0))
    result: np.ndarray = a
    return result


def power_from_amplitude(value: np.ndarray | float, amplitude: Amplitude) -> np.ndarray:
    """Inverse of :func:`amplitude_from_power`: RMS² from an amplitude of the given type.

    Parameters
    ----------
    value : float or ndarray
        Amplitude(s) in some unit.
    amplitude : {'rms', 'peak', 'peak-to-peak'}
        Amplitude type of ``value``.

    Returns
    -------
    ndarray
        Power, RMS² in that unit², float64.
    """
    check_choice("amplitude", amplitude, AMPLITUDES)
    v = np.asarray(value, dtype=np.float64)
    if amplitude == "peak":
        v = v / np.sqrt(2.0)
    elif amplitude == "peak-to-peak":
        v = v / (2.0 * np.sqrt(2.0))
    return v * v


def quantity_of(unit: OutputUnit) -> Quantity:
    """The quantity an output unit measures.

    Parameters
    ----------
    unit : {'g', 'm/s2', 'mm/s', 'in/s', 'um', 'mil'}
        Output unit.

    Returns
    -------
    {'acceleration', 'velocity', 'displacement'}
        Its quantity.
    """
    check_choice("unit", unit, OUTPUT_UNITS)
    return _UNITS[unit][0]  # type: ignore[return-value]


def unit_power_weights(
    f_hz: np.ndarray,
    input_unit: InputUnit,
    unit: OutputUnit | Quantity,
    *,
    lowcut_hz: float = 2.0,
) -> np.ndarray:
    """Per-line factor turning an acceleration power spectrum into ``unit``².

    For velocity the factor is (c/(2πf))², for displacement (c/(2πf)²)², c converting the
    input unit to SI and SI to ``unit``; for acceleration it is c². Lines with f <
    ``lowcut_hz`` (and the DC line) get 0 for velocity and displacement.

    Example: 1 g RMS at 100 Hz → 9.80665/(2π·100) m/s = 15.608 mm/s RMS.

    Parameters
    ----------
    f_hz : ndarray
        Line frequencies, Hz.
    input_unit : {'g', 'm/s2'}
        Acceleration unit of the samples (and so of the power spectrum, unit²).
    unit : str
        Output unit (``g``, ``m/s2``, ``mm/s``, ``in/s``, ``um``, ``mil``) or a quantity
        (``acceleration``, ``velocity``, ``displacement``: then g, mm/s or µm).
    lowcut_hz : float, optional
        Integration cut, Hz (≥ 0; default 2).

    Returns
    -------
    ndarray
        float64 factors, the shape of ``f_hz``: multiply a power spectrum in
        ``input_unit``² by them to get ``unit``².
    """
    check_choice("input_unit", input_unit, INPUT_UNITS)
    if unit in QUANTITIES:
        unit = DEFAULT_UNIT[unit]  # type: ignore[assignment]
    quantity = quantity_of(unit)  # type: ignore[arg-type]
    if not (np.isfinite(lowcut_hz) and lowcut_hz >= 0):
        raise ValueError(f"lowcut_hz={lowcut_hz!r} must be a non-negative number of Hz")
    f = np.asarray(f_hz, dtype=np.float64)
    c = _INPUT_TO_SI[input_unit] * _UNITS[unit][1]
    if quantity == "acceleration":
        return np.full(f.shape, c * c)
    power_of_omega = 2 if quantity == "velocity" else 4
    keep = (f >= lowcut_hz) & (f > 0)
    omega = 2 * np.pi * np.where(keep, f, 1.0)
    return np.where(keep, (c * c) / omega**power_of_omega, 0.0)
