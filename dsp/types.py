"""Closed option sets shared by the dsp modules, each with a run-time check.

Holds names only; knows nothing about streams, files, the service or its config."""

from __future__ import annotations

from typing import Literal, TypeVar, get_args

WindowName = Literal["rectangular", "hann", "hamming", "blackman-harris", "flattop", "kaiser"]
AveragingMode = Literal["linear", "exponential", "peak-hold"]
LinearEnd = Literal["restart", "hold"]
Amplitude = Literal["peak", "rms", "peak-to-peak"]
Quantity = Literal["acceleration", "velocity", "displacement"]
InputUnit = Literal["g", "m/s2"]
OutputUnit = Literal["g", "m/s2", "mm/s", "in/s", "um", "mil"]

WINDOW_NAMES: tuple[str, ...] = get_args(WindowName)
AVERAGING_MODES: tuple[str, ...] = get_args(AveragingMode)
LINEAR_ENDS: tuple[str, ...] = get_args(LinearEnd)
AMPLITUDES: tuple[str, ...] = get_args(Amplitude)
QUANTITIES: tuple[str, ...] = get_args(Quantity)
INPUT_UNITS: tuple[str, ...] = get_args(InputUnit)
OUTPUT_UNITS: tuple[str, ...] = get_args(OutputUnit)

T = TypeVar("T", bound=str)


def check_choice(name: str, value: object, allowed: tuple[str, ...]) -> str:
    """Return ``value`` if it is one of ``allowed``; else raise ValueError naming both.

    The message reads ``window='hanning' is not one of 'rectangular', 'hann', ...``.
    """
    if not isinstance(value, str) or value not in allowed:
        listed = ", ".join(repr(a) for a in allowed)
        raise ValueError(f"{name}={value!r} is not one of {listed}")
    return value
