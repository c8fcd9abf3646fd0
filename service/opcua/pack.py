"""The service's side of the hand-off to the OPC UA worker: a batch of frames as a few
numpy arrays (one row per frame; every frame's values in one flat array), made once per
push, and the status codes as small integers.

Knows the frame type, the layout and the value codes; nothing of asyncua or sockets."""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..types import SpectralFrame
from .layout import UNMEASURED, WAITING, value_code

__all__ = ["ALARM_VARS", "CODES", "UNMEASURED_CODE", "FrameBatch", "code_index", "pack_frames"]

# the variables of an alarm rule's node: (name, OPC UA variant type)
ALARM_VARS: tuple[tuple[str, str], ...] = (
    ("state", "String"), ("value", "Double"), ("alert", "Double"), ("danger", "Double"),
    ("acknowledged", "Boolean"), ("latched", "Boolean"), ("shelved", "Boolean"),
    ("channel", "String"), ("unit", "String"),
)
# every StatusCode name a value may carry, by index (the batches carry the index)
CODES: tuple[str, ...] = (
    "Good", "UncertainSensorNotAccurate", "BadNoCommunication", "BadDeviceFailure",
    UNMEASURED, WAITING,
)
_INDEX = {name: k for k, name in enumerate(CODES)}
UNMEASURED_CODE = _INDEX[UNMEASURED]


def code_index(name: str) -> int:
    return _INDEX[name]


@dataclass
class FrameBatch:
    """Frames for the worker. Row i: profile index ``profiles[i]`` (in the layout's
    order), frame time ``t_ns[i]``, StatusCode ``CODES[codes[i]]`` of its finite values (a
    NaN of a Good frame is BadConfigurationError), and its values overall, bands…, tones…
    at ``values[starts[i]:starts[i] + n]``. ``spectra``: (profile, t_ns, code, float32
    values, (df_hz, f0_hz, unit, amplitude)) of the profiles whose spectrum is due."""

    seq: int
    profiles: np.ndarray  # int32
    t_ns: np.ndarray  # int64
    codes: np.ndarray  # uint8
    starts: np.ndarray  # int64
    values: np.ndarray  # float64
    spectra: list[tuple[int, int, int, np.ndarray, tuple[Any, ...]]] = field(
        default_factory=list)


def pack_frames(seq: int, frames: Sequence[SpectralFrame], profile_index: Sequence[int],
                statuses: Sequence[str]) -> FrameBatch:
    """``frames`` (of the profiles ``profile_index``, their channels in ``statuses``) as
    one batch: the values are gathered by one ``np.fromiter`` over the frames, not one
    array per value."""
    n = len(frames)
    counts = np.fromiter((1 + len(f.bands) + len(f.tones) for f in frames), np.int64, n)
    starts = np.zeros(n, np.int64)
    if n:
        np.cumsum(counts[:-1], out=starts[1:])
    values = np.fromiter(
        itertools.chain.from_iterable(
            itertools.chain((f.overall,), (b.value for b in f.bands),
                            (t.value for t in f.tones)) for f in frames),
        np.float64, int(counts.sum()))
    codes = np.fromiter((_INDEX[value_code(st, f.quality, 0.0)]
                         for f, st in zip(frames, statuses, strict=True)), np.uint8, n)
    return FrameBatch(
        seq=seq,
        profiles=np.asarray(profile_index, np.int32),
        t_ns=np.fromiter((f.t_ns for f in frames), np.int64, n),
        codes=codes, starts=starts, values=values,
    )
