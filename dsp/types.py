"""Closed option sets shared by the dsp modules, each with a run-time check, and the range of
stream sample indices.

Holds names and limits only; knows nothing about streams, files, the service or its config."""

from __future__ import annotations

from typing import Literal, TypeVar, get_args

__all__ = [
    "AMPLITUDES",
    "AVERAGING_MODES",
    "INDEX_MAX",
    "INDEX_MIN",
    "INPUT_UNITS",
    "LINEAR_ENDS",
    "OUTPUT_UNITS",
    "QUANTITIES",
    "WINDOW_NAMES",
    "Amplitude",
    "AveragingMode",
    "InputUnit",
    "LinearEnd",
    "OutputUnit",
    "Quantity",
    "WindowName",
    "check_choice",
    "check_index_span",
]

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

# Stream sample indices are signed 64-bit: frame starts come back as int64 arrays.
INDEX_MIN = -(2**63)
INDEX_MAX = 2**63 - 1


def check_choice(name: str, value: object, allowed: tuple[str, ...]) -> str:
    """Check that ``value`` is one of ``allowed``.

    Parameters
    ----------
    name : str
        The option's name, for the message.
    value : object
        The value given.
    allowed : tuple of str
        The accepted values.

    Returns
    -------
    str
        ``value`` itself.

    Raises
    ------
    ValueError
        Naming both, e.g. ``window='hanning' is not one of 'rectangular', 'hann', ...``.
    """
    if not isinstance(value, str) or value not in allowed:
        listed = ", ".join(repr(a) for a in allowed)
        raise ValueError(f"{name}={value!r} is not one of {listed}")
    return value


def check_index_span(first_index: int, n: int) -> int:
    """Check that a block of samples keeps its stream indices within int64.

    Samples ``first_index … first_index + n − 1`` and the index just after them must fit a
    signed 64-bit stream index: INDEX_MIN ≤ first_index and first_index + n ≤ INDEX_MAX.
    Streaming stages call it before they change any state, so a refused block leaves them as
    they were (the samples already pushed keep their frames and averages).

    Parameters
    ----------
    first_index : int
        Stream index of the block's first sample.
    n : int
        Samples in the block (per channel).

    Returns
    -------
    int
        ``first_index`` as a Python int.

    Raises
    ------
    ValueError
        If the span does not fit.
    """
    k = int(first_index)
    if k < INDEX_MIN or k + int(n) > INDEX_MAX:
        raise ValueError(
            f"first_index={k} with {int(n)} samples: stream indices must stay within int64 "
            f"(first_index >= {INDEX_MIN}, first_index + n <= {INDEX_MAX})"
        )
    return k
