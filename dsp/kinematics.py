"""Machine kinematics: rolling-element bearing defect frequencies and gear mesh frequencies.

Knows nothing about spectra, streams, I/O or the service; numpy only.

Bearing formulas (Randall & Antoni 2011, "Rolling element bearing diagnostics — a
tutorial", MSSP 25(2)), for n rolling elements of diameter d on a pitch diameter D with
contact angle φ, outer race fixed, inner race turning at the shaft rate fr (Hz), and
ρ = (d/D)·cos φ:

* BPFO = (n·fr/2)·(1 − ρ)        ball pass frequency, outer race
* BPFI = (n·fr/2)·(1 + ρ)        ball pass frequency, inner race
* FTF  = (fr/2)·(1 − ρ)          fundamental train (cage) frequency
* BSF  = (D/(2d))·fr·(1 − ρ²)    ball (roller) spin frequency

They assume rolling without slip; real machines run about 1–2 % lower, so defect bands
should be a few per cent wide.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = [
    "BearingFrequencies",
    "BearingOrders",
    "bearing_frequencies",
    "gear_mesh_hz",
    "sidebands",
]


@dataclass(frozen=True)
class BearingOrders:
    """Bearing defect frequencies as orders: multiples of the shaft rate (dimensionless).

    Attributes
    ----------
    bpfo, bpfi : float
        Ball pass frequency of the outer and of the inner race, orders.
    ftf : float
        Fundamental train (cage) frequency, orders.
    bsf : float
        Ball (rolling element) spin frequency, orders.
    """

    bpfo: float
    bpfi: float
    ftf: float
    bsf: float


@dataclass(frozen=True)
class BearingFrequencies:
    """Bearing defect frequencies in Hz at shaft rate ``shaft_hz`` (see module docstring).

    Attributes
    ----------
    bpfo_hz, bpfi_hz : float
        Ball pass frequency of the outer and of the inner race, Hz.
    ftf_hz : float
        Fundamental train (cage) frequency, Hz.
    bsf_hz : float
        Ball (rolling element) spin frequency, Hz.
    shaft_hz : float
        The shaft rate they were computed for, Hz.
    """

    bpfo_hz: float
    bpfi_hz: float
    ftf_hz: float
    bsf_hz: float
    shaft_hz: float

    def as_orders(self) -> BearingOrders:
        """The same frequencies divided by the shaft rate: orders, valid at any speed."""
        fr = self.shaft_hz
        return BearingOrders(
            bpfo=self.bpfo_hz / fr,
            bpfi=self.bpfi_hz / fr,
            ftf=self.ftf_hz / fr,
            bsf=self.bsf_hz / fr,
        )


def _positive(name: str, value: float) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name}={value!r} must be a number > 0") from None
    if not (math.isfinite(v) and v > 0):
        raise ValueError(f"{name}={value!r} must be a finite number > 0")
    return v


def _count(name: str, value: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name}={value!r} must be an integer of at least 1")
    return int(value)


def bearing_frequencies(
    n_elements: int,
    element_diameter: float,
    pitch_diameter: float,
    contact_angle_deg: float,
    shaft_hz: float,
) -> BearingFrequencies:
    """Defect frequencies in Hz of a rolling-element bearing (Randall & Antoni 2011).

    The inner race turns at ``shaft_hz`` against a fixed outer race. Formulas in the module
    docstring.

    Parameters
    ----------
    n_elements : int
        Number of balls or rollers (≥ 1).
    element_diameter : float
        Ball or roller diameter d, any length unit (d < D).
    pitch_diameter : float
        Pitch diameter D, the same length unit.
    contact_angle_deg : float
        Contact angle φ, degrees (0 ≤ φ < 90).
    shaft_hz : float
        Shaft rate, Hz (r/min ÷ 60).

    Returns
    -------
    BearingFrequencies
        BPFO, BPFI, FTF and BSF in Hz (``.as_orders()`` for orders).

    Raises
    ------
    ValueError
        For a count below 1, a non-positive size or rate, d ≥ D, or φ outside [0, 90).

    Examples
    --------
    >>> b = bearing_frequencies(8, 10.0, 50.0, 0.0, 50.0)   # 3000 r/min
    >>> round(b.bpfo_hz, 9), round(b.bpfi_hz, 9), round(b.ftf_hz, 9), round(b.bsf_hz, 9)
    (160.0, 240.0, 20.0, 120.0)
    """
    n = _count("n_elements", n_elements)
    d = _positive("element_diameter", element_diameter)
    big_d = _positive("pitch_diameter", pitch_diameter)
    fr = _positive("shaft_hz", shaft_hz)
    if not d < big_d:
        raise ValueError(
            f"element_diameter={element_diameter!r} must be smaller than "
            f"pitch_diameter={pitch_diameter!r}"
        )
    phi = float(contact_angle_deg)
    if not (0.0 <= phi < 90.0):
        raise ValueError(f"contact_angle_deg={contact_angle_deg!r} must be in [0, 90) degrees")
    rho = (d / big_d) * math.cos(math.radians(phi))
    return BearingFrequencies(
        bpfo_hz=n * fr / 2 * (1 - rho),
        bpfi_hz=n * fr / 2 * (1 + rho),
        ftf_hz=fr / 2 * (1 - rho),
        bsf_hz=big_d / (2 * d) * fr * (1 - rho**2),
        shaft_hz=fr,
    )


def gear_mesh_hz(teeth: int, shaft_hz: float) -> float:
    """Gear mesh frequency: teeth × the rate of the shaft carrying that gear.

    Either gear of a pair gives the same value (z1·f1 = z2·f2). Common practice.

    Parameters
    ----------
    teeth : int
        Number of teeth of the gear (≥ 1).
    shaft_hz : float
        Rate of the shaft carrying it, Hz (> 0).

    Returns
    -------
    float
        Mesh frequency, Hz.
    """
    return _count("teeth", teeth) * _positive("shaft_hz", shaft_hz)


def sidebands(center_hz: float, spacing_hz: float, count: int) -> np.ndarray:
    """Frequencies of ``count`` sidebands each side of ``center_hz``, ``spacing_hz`` apart.

    Modulation at rate s (e.g. a gear shaft's 1X around its mesh frequency, or 1X around
    BPFI) puts lines there.

    Parameters
    ----------
    center_hz : float
        Centre (carrier) frequency, Hz (> 0).
    spacing_hz : float
        Sideband spacing, the modulation rate, Hz (> 0).
    count : int
        Sidebands on each side (≥ 1).

    Returns
    -------
    ndarray
        float64 of shape (2·count,), Hz, ascending, without the centre:
        [c − count·s, …, c − s, c + s, …, c + count·s].

    Raises
    ------
    ValueError
        If the lowest sideband would fall at or below 0 Hz.
    """
    c = _positive("center_hz", center_hz)
    s = _positive("spacing_hz", spacing_hz)
    m = _count("count", count)
    if c - m * s <= 0:
        raise ValueError(
            f"count={count!r} sidebands {spacing_hz!r} Hz apart reach {c - m * s!r} Hz, "
            f"at or below 0 Hz, below center_hz={center_hz!r}; use fewer"
        )
    k = np.arange(1, m + 1, dtype=np.float64)
    return np.concatenate((c - k[::-1] * s, c + k * s))
