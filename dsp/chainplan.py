"""Anti-alias FIR stages and decimation chains planned from (fs, Fmax): the design half of
streaming decimation (``dsp.decimate`` runs the plans).

Knows nothing about sources, files, asyncio, the service or its config; numpy and scipy only.

Anti-alias specification (stated, designed with margin, tested)
    Fmax_out = fs_out/2.56 (the trade's ratio, ``FMAX_RATIO``). The whole chain's response
    H(f), f at the input rate, has passband ripple (max − min of 20·lg|H|) ≤ 0.1 dB on
    [0, Fmax_out] and |H| ≤ −80 dB on [fs_out − Fmax_out, fs_in/2] — everything that could fold
    into 0…Fmax_out. Between Fmax_out and fs_out − Fmax_out lies the roll-off; what lands
    there after folding lands above Fmax_out, on lines that are not shown.

Multi-stage design rule (so the *product* of the stages meets the spec above)
    With B = fs_out − Fmax_out, stage i (input rate fsᵢ₋₁, output fsᵢ) passes [0, Fmax_out]
    and stops [fsᵢ − B, fsᵢ₋₁/2] for every stage but the last, which stops
    [fs_out − Fmax_out, fsᵢ₋₁/2]. By induction from the last stage, the stages after i leave
    unrejected only frequencies within B of a multiple of fsᵢ, and stage i rejects those
    within B of the multiples that are not multiples of fsᵢ₋₁. (The classic design stops
    stage i only at fsᵢ − Fmax_out: cheaper by a few taps, but its product has bumps in
    the roll-off images that the stated spec forbids.) The ripple budget is split evenly
    over the stages; each stage is designed to half its share and 1 dB past the stop spec,
    so the stated spec holds on any grid and tone readings stay within ±0.025 dB.
"""

from __future__ import annotations

import functools
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.signal

from .grid import FMAX_RATIO

__all__ = [
    "MAX_FACTOR",
    "MIN_FACTOR",
    "ChainPlan",
    "StagePlan",
    "design_stage",
    "plan_chain",
]

MIN_FACTOR, MAX_FACTOR = 2, 10  # per stage; larger factors are cascaded
RIPPLE_DB, ATTEN_DB = 0.1, 80.0  # the stated anti-alias spec (see the module docstring)
_DESIGN_RIPPLE_SHARE = 0.5  # a stage is designed to this share of its ripple allowance …
_DESIGN_ATTEN_MARGIN_DB = 1.0  # … and this much past its stopband allowance
_MAX_TAPS = 4001


def _check_rate(name: str, value: float) -> float:
    if not (isinstance(value, int | float | np.floating | np.integer) and np.isfinite(value)
            and value > 0):
        raise ValueError(f"{name}={value!r} must be a positive number of Hz")
    return float(value)


def _check_spec(ripple_db: float, atten_db: float) -> None:
    if not (np.isfinite(ripple_db) and 0.0 < ripple_db <= 3.0):
        raise ValueError(f"ripple_db={ripple_db!r} must be in (0, 3] dB")
    if not (np.isfinite(atten_db) and 20.0 <= atten_db <= 140.0):
        raise ValueError(f"atten_db={atten_db!r} must be in [20, 140] dB")


def _ripple_delta(ripple_db: float) -> float:
    """Passband deviation δ with 20·lg((1+δ)/(1−δ)) = ripple_db (max − min in dB)."""
    g = 10.0 ** (ripple_db / 20.0)
    result: float = (g - 1.0) / (g + 1.0)
    return result


def _taps_estimate(fs: float, pass_hz: float, stop_hz: float, ripple_db: float,
                   atten_db: float) -> int:
    """Equiripple length N ≈ ⅔·lg(1/(10·δp·δs))·fs/Δf (Bellanger's estimate, from memory)."""
    dp, ds = _ripple_delta(ripple_db), 10.0 ** (-atten_db / 20.0)
    return int(math.ceil(2.0 / 3.0 * math.log10(1.0 / (10.0 * dp * ds)) * fs / (stop_hz - pass_hz)))


def _meets(h: np.ndarray, fs: float, pass_hz: float, stop_hz: float, ripple_db: float,
           atten_db: float) -> bool:
    n = h.size
    fp = np.linspace(0.0, pass_hz, 16 * n + 256)
    fstop = np.linspace(stop_hz, fs / 2, 16 * n + 256)
    _, hp = scipy.signal.freqz(h, worN=fp, fs=fs)
    _, hs = scipy.signal.freqz(h, worN=fstop, fs=fs)
    with np.errstate(divide="ignore"):
        gp = 20.0 * np.log10(np.abs(hp))
        return bool(np.all(np.isfinite(gp)) and gp.max() - gp.min() <= ripple_db
                    and 20.0 * np.log10(np.abs(hs).max()) <= -atten_db)


@functools.lru_cache(maxsize=128)
def _design_cached(fs: float, pass_hz: float, stop_hz: float, ripple_db: float,
                   atten_db: float) -> np.ndarray:
    rip = _DESIGN_RIPPLE_SHARE * ripple_db
    att = atten_db + _DESIGN_ATTEN_MARGIN_DB
    dp, ds = _ripple_delta(rip), 10.0 ** (-att / 20.0)
    bands, weight = [0.0, pass_hz, stop_hz, fs / 2], [1.0, dp / ds]

    def remez(n: int) -> np.ndarray | None:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            try:
                h = scipy.signal.remez(n, bands, [1.0, 0.0], weight=weight, fs=fs, maxiter=50)
            except (ValueError, RuntimeWarning):
                return None
        # remez does not report a failure to converge: every design is checked on a dense grid.
        return h if _meets(h, fs, pass_hz, stop_hz, rip, att) else None

    est = _taps_estimate(fs, pass_hz, stop_hz, rip, att) | 1  # odd: type I, integer delay
    if est > _MAX_TAPS:
        raise ValueError(
            f"a stage at fs={fs:g} Hz passing {pass_hz:g} Hz and stopping from {stop_hz:g} Hz "
            f"needs about {est} taps (more than {_MAX_TAPS}); use more stages"
        )
    best = remez(est)
    n = est
    if best is not None:  # the estimate is usually close: try a few shorter ones
        while n > 3 and (shorter := remez(n - 2)) is not None:
            best, n = shorter, n - 2
    else:
        while best is None and n < max(2 * est, est + 40):
            n += 2
            best = remez(n)
    if best is None:  # remez did not converge: a Kaiser-window design always gets there
        beta = scipy.signal.kaiser_beta(att)
        n = est
        while best is None and n <= _MAX_TAPS:
            h = scipy.signal.firwin(n, (pass_hz + stop_hz) / 2, window=("kaiser", beta), fs=fs)
            best = h if _meets(h, fs, pass_hz, stop_hz, rip, att) else None
            n += 2
        if best is None:
            raise RuntimeError(f"no filter meets the stage spec at fs={fs:g} Hz")
    h = np.asarray(best, dtype=np.float64)
    # Exactly symmetric (the delay is exactly (N−1)/2) and float32 values, the precision the
    # stage computes in, so freqz of these taps is the response actually applied.
    h = (0.5 * (h + h[::-1])).astype(np.float32).astype(np.float64)
    if not _meets(h, fs, pass_hz, stop_hz, ripple_db, atten_db):
        raise RuntimeError(f"rounding the taps to float32 broke the stage spec at fs={fs:g} Hz")
    h.setflags(write=False)
    result: np.ndarray = h
    return result


def design_stage(fs: float, pass_hz: float, stop_hz: float, *, ripple_db: float = RIPPLE_DB,
                 atten_db: float = ATTEN_DB) -> np.ndarray:
    """Taps (odd length, symmetric, DC gain ≈ 1) of one anti-alias low-pass at ``fs`` Hz.

    float64 array holding float32 values (the precision stages compute in).

    Meets, on a grid of 16 points per tap in each band: 20·lg|H| varies by at most
    ``ripple_db`` (max − min, dB) on [0, pass_hz] and stays ≤ −``atten_db`` dB on
    [stop_hz, fs/2] — designed to half that ripple and 1 dB more rejection. Equiripple
    (``scipy.signal.remez``), shortest odd length found near the estimate; a Kaiser-window
    ``firwin`` design if remez does not converge. Results are cached (read-only array).

    Parameters
    ----------
    fs : float
        Input sample rate, Hz.
    pass_hz : float
        Passband edge, Hz.
    stop_hz : float
        Stopband edge, Hz (pass_hz < stop_hz ≤ fs/2).
    ripple_db : float, optional
        Passband ripple allowed, max − min, dB (default 0.1).
    atten_db : float, optional
        Stopband rejection required, dB (default 80).

    Returns
    -------
    ndarray
        The taps (float64 holding float32 values), dimensionless, read-only.
    """
    fs = _check_rate("fs", fs)
    _check_spec(ripple_db, atten_db)
    if not (np.isfinite(pass_hz) and np.isfinite(stop_hz) and 0 < pass_hz < stop_hz <= fs / 2):
        raise ValueError(
            f"pass_hz={pass_hz!r} and stop_hz={stop_hz!r} must satisfy "
            f"0 < pass_hz < stop_hz <= fs/2 = {fs / 2:g} Hz"
        )
    return _design_cached(fs, float(pass_hz), float(stop_hz), float(ripple_db), float(atten_db))


# -- plans ------------------------------------------------------------------------------


@dataclass(frozen=True)
class StagePlan:
    """One stage: low-pass at input rate ``fs`` (Hz), then keep every ``factor``-th sample.

    Passes [0, ``pass_hz``] with at most ``ripple_db`` (max − min) and stops
    [``stop_hz``, fs/2] by at least ``atten_db`` (see :func:`design_stage`).

    Parameters
    ----------
    factor : int
        Decimation factor of the stage, 2…10.
    fs : float
        Input sample rate, Hz.
    pass_hz, stop_hz : float
        Passband and stopband edges, Hz.
    ripple_db : float, optional
        Passband ripple allowed, max − min, dB (default 0.1).
    atten_db : float, optional
        Stopband rejection required, dB (default 80).
    """

    factor: int
    fs: float
    pass_hz: float
    stop_hz: float
    ripple_db: float = RIPPLE_DB
    atten_db: float = ATTEN_DB

    def __post_init__(self) -> None:
        _check_factor(self.factor)

    @property
    def fs_out(self) -> float:
        """Output rate in Hz, fs/factor."""
        return self.fs / self.factor

    def taps(self) -> np.ndarray:
        """The designed taps (cached, read-only float64)."""
        return design_stage(self.fs, self.pass_hz, self.stop_hz, ripple_db=self.ripple_db,
                            atten_db=self.atten_db)


@dataclass(frozen=True)
class ChainPlan:
    """Stages from ``fs_in`` to ``fs_out`` = fs_in/``factor`` (Hz) for a usable ``fmax_hz``.

    ``fmax_hz`` = fs_out/2.56 ≥ ``fmax_asked_hz``; ``note`` says why they differ ("" when the
    asked Fmax is met exactly). ``stages`` is empty when no decimation is needed. The whole
    chain meets ``ripple_db`` on [0, fmax_hz] and ``atten_db`` on [fs_out − fmax_hz, fs_in/2].

    Parameters
    ----------
    fs_in, fs_out : float
        Input and output sample rates, Hz.
    factor : int
        Total decimation factor R.
    fmax_hz : float
        Usable Fmax, Hz.
    fmax_asked_hz : float
        Fmax asked for, Hz.
    stages : tuple of StagePlan
        The stages in order (empty: no decimation).
    note : str, optional
        Why ``fmax_hz`` differs from the asked one ("" when it does not).
    ripple_db : float, optional
        Passband ripple allowed, max − min, dB (default 0.1).
    atten_db : float, optional
        Stopband rejection required, dB (default 80).
    """

    fs_in: float
    fs_out: float
    factor: int
    fmax_hz: float
    fmax_asked_hz: float
    stages: tuple[StagePlan, ...]
    note: str = ""
    ripple_db: float = RIPPLE_DB
    atten_db: float = ATTEN_DB

    @property
    def stop_from_hz(self) -> float:
        """Lowest frequency (Hz) that must be rejected: fs_out − Fmax."""
        return self.fs_out - self.fmax_hz

    @property
    def factors(self) -> tuple[int, ...]:
        """Each stage's decimation factor, first stage first (product = ``factor``)."""
        return tuple(s.factor for s in self.stages)


def _check_factor(factor: object) -> int:
    if isinstance(factor, bool) or not isinstance(factor, int | np.integer) \
            or not (MIN_FACTOR <= factor <= MAX_FACTOR):
        raise ValueError(
            f"factor={factor!r} must be an integer in [{MIN_FACTOR}, {MAX_FACTOR}]; "
            "cascade stages for larger factors (plan_chain)"
        )
    return int(factor)


def _is_smooth(r: int) -> bool:
    """True if r factors into stages of 2–10, i.e. has no prime factor above 7."""
    for p in (2, 3, 5, 7):
        while r % p == 0:
            r //= p
    return r == 1


def _min_stages(r: int) -> int:
    k = 0
    while MAX_FACTOR**k < r:
        k += 1
    while not _factorizations(r, k):  # e.g. 98 = 2·7·7 < 10² still needs three stages
        k += 1
    return k


@functools.lru_cache(maxsize=256)
def _factorizations(r: int, k: int) -> tuple[tuple[int, ...], ...]:
    """All ordered k-tuples of factors in [2, 10] whose product is r."""
    if k == 0:
        return ((),) if r == 1 else ()
    if r > MAX_FACTOR**k or r < MIN_FACTOR**k:
        return ()
    out: list[tuple[int, ...]] = []
    for f in range(MAX_FACTOR, MIN_FACTOR - 1, -1):
        if r % f == 0:
            out += [(f, *rest) for rest in _factorizations(r // f, k - 1)]
    return tuple(out)


def _stage_plans(fs_in: float, factors: Sequence[int], fmax_hz: float, fs_tap: float,
                 ripple_db: float, atten_db: float) -> tuple[StagePlan, ...]:
    """Stages from fs_in through ``factors`` ending at a tap of rate fs_tap, Fmax fmax_hz
    (the design rule in the module docstring); each gets ``ripple_db``."""
    stages = []
    fs = fs_in
    b = fs_tap - fmax_hz
    for i, f in enumerate(factors):
        fs_next = fs / f
        stop = fs_next - fmax_hz if i == len(factors) - 1 else fs_next - b
        stages.append(StagePlan(f, fs, fmax_hz, min(stop, fs / 2), ripple_db, atten_db))
        fs = fs_next
    return tuple(stages)


def _best_factors(fs_in: float, r: int, fmax_hz: float, ripple_db: float,
                  atten_db: float) -> tuple[int, ...]:
    """The fewest stages (each is a pass over the data and a call per push), and among those
    the fewest estimated multiply-adds per input sample, Σ Nᵢ/(R₁·…·Rᵢ)."""
    if r == 1:
        return ()
    best: tuple[float, tuple[int, ...]] | None = None
    fs_tap = fs_in / r
    for fac in _factorizations(r, _min_stages(r)):
        cost, div = 0.0, 1
        for s in _stage_plans(fs_in, fac, fmax_hz, fs_tap, ripple_db, atten_db):
            div *= s.factor
            n = _taps_estimate(s.fs, s.pass_hz, s.stop_hz, _DESIGN_RIPPLE_SHARE * ripple_db,
                               atten_db + _DESIGN_ATTEN_MARGIN_DB)
            cost += n / div
        if best is None or cost < best[0] - 1e-9:
            best = (cost, fac)
    assert best is not None  # r is smooth, so a factorization exists
    return best[1]


def _pick_factor(fs_in: float, fmax_hz: float) -> tuple[int, str]:
    """Largest R with fs_in/R ≥ 2.56·fmax_hz that stages of 2–10 can make, and a note."""
    fs_in = _check_rate("fs_in", fs_in)
    fmax_hz = _check_rate("fmax_hz", fmax_hz)
    ratio = fs_in / (FMAX_RATIO * fmax_hz)
    if ratio < 1.0 - 1e-9:
        raise ValueError(
            f"fmax_hz={fmax_hz!r} exceeds fs_in/2.56 = {fs_in / FMAX_RATIO:g} Hz; "
            "a stream cannot be analysed above its own Fmax"
        )
    limit = max(1, int(math.floor(ratio + 1e-9)))
    r = limit
    while not _is_smooth(r):
        r -= 1
    exact = abs(ratio - limit) <= 1e-9 * ratio
    if exact and r == limit:
        return r, ("no decimation: fs_in = 2.56·Fmax" if r == 1 else "")
    reasons = []
    if not exact:
        reasons.append(f"fs_in/(2.56·Fmax) = {ratio:.6g} is not an integer")
    if r != limit:
        reasons.append(f"{limit} has a prime factor above 7 (stages are {MIN_FACTOR}–{MAX_FACTOR})")
    why = "; ".join(reasons)
    fs_out = fs_in / r
    if r == 1:
        return 1, (f"no decimation ({why}): usable Fmax {fs_out / FMAX_RATIO:.6g} Hz "
                   f"(asked {fmax_hz:g} Hz)")
    return r, (f"{why}: decimating by {r} to {fs_out:.6g} Hz gives the next higher Fmax, "
               f"{fs_out / FMAX_RATIO:.6g} Hz (asked {fmax_hz:g} Hz)")


def plan_chain(fs_in: float, fmax_hz: float, *, ripple_db: float = RIPPLE_DB,
               atten_db: float = ATTEN_DB) -> ChainPlan:
    """Plan the decimation of an ``fs_in`` Hz stream for analysis up to ``fmax_hz`` Hz.

    Picks the largest integer R with fs_in/R ≥ 2.56·fmax_hz that stages of 2–10 can make
    (no prime factor above 7); fs_out = fs_in/R and the usable Fmax = fs_out/2.56, which is
    the asked one when fs_in/(2.56·fmax_hz) is such an integer and otherwise the next higher
    one, explained in ``note``. R is split into the fewest stages, ordered for the fewest
    multiply-adds per input sample. The whole chain meets ``ripple_db`` (max − min, dB) on
    [0, Fmax] and ``atten_db`` of rejection on [fs_out − Fmax, fs_in/2].

    Parameters
    ----------
    fs_in : float
        Input sample rate, Hz.
    fmax_hz : float
        Highest frequency to analyse, Hz.
    ripple_db : float, optional
        Passband ripple allowed, max − min, dB (default 0.1).
    atten_db : float, optional
        Stopband rejection required, dB (default 80).

    Returns
    -------
    ChainPlan
        Factors, ``fs_out`` and the usable ``fmax_hz`` (Hz), stages and note.

    Examples
    --------
    >>> p = plan_chain(51200.0, 500.0)
    >>> p.factors, p.fs_out, p.fmax_hz, p.note
    ((10, 4), 1280.0, 500.0, '')
    """
    _check_spec(ripple_db, atten_db)
    r, note = _pick_factor(fs_in, fmax_hz)
    fs_out = fs_in / r
    fmax_usable = fs_out / FMAX_RATIO
    depth = _min_stages(r) if r > 1 else 1
    per_stage = ripple_db / depth
    factors = _best_factors(fs_in, r, fmax_usable, per_stage, atten_db)
    stages = _stage_plans(fs_in, factors, fmax_usable, fs_out, per_stage, atten_db)
    return ChainPlan(fs_in=float(fs_in), fs_out=fs_out, factor=r, fmax_hz=fmax_usable,
                     fmax_asked_hz=float(fmax_hz), stages=stages, note=note,
                     ripple_db=ripple_db, atten_db=atten_db)
