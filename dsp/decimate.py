"""Streaming decimation: anti-alias FIR stages of 2–10, chains planned from (fs, Fmax), shared taps.

Knows nothing about sources, files, asyncio, the service or its config; numpy and scipy only.

Why FIR, computed polyphase
    Each stage is a linear-phase FIR low-pass followed by keeping every R-th sample. A
    linear-phase filter delays every frequency by the same (N−1)/2 input samples, so a
    waveform keeps its shape and a time stamp is corrected by one constant; and because only
    every R-th output is kept, only those are computed (N multiply-adds per *output*, N/R
    per input sample). An elliptic or Chebyshev IIR meets the same magnitude spec with fewer
    coefficients, but its recursion must run at the input rate (no skipping outputs) and its
    phase bends near the band edge, which shifts tones and smears transients differently at
    each frequency. At factors 2–10 the FIR's skipped outputs pay for its longer taps, so
    stages are FIR (common practice).

Indices and time (one stage, factor R, taps h[0…N−1], N odd)
    * output sample k′ is computed when input sample k = k′·R + phase arrives:
      y[k′] = Σ_m h[m]·x[k′·R + phase − m], with x = 0 before the last reset (a gap);
    * ``delay_in`` = (N−1)/2 input samples (the group delay, exact for a symmetric FIR), so
      output k′ stands for the input at ``content_index(k′)`` = k′·R + phase − delay_in; its
      time is that over fs. phase = delay_in mod R, so that index is a multiple of R;
    * a chain of stages composes the same way: R = Π Rᵢ, phase = Σ phaseᵢ·Π_{j<i} Rⱼ and
      delay_in = Σ delayᵢ·Π_{j<i} Rⱼ, all in input samples of the chain;
    * the phase is global: after a gap at input index k₀ the next output is the first k′
      with k′·R + phase ≥ k₀, so output indices keep meaning the same input indices and the
      gap shows downstream as a jump in the output index (``FilterBank`` restarts on it).
    Blocks of any length give the same outputs as one block (streaming equals batch), to a
    few float32 roundings: sgemm may round the R-term sums differently for another block
    width; the filter state and the phase are carried exactly.

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
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.signal
from numpy.lib.stride_tricks import as_strided

from .buffer import SampleBuffer
from .filterbank import FMAX_RATIO
from .types import check_index_span

__all__ = [
    "MIN_FACTOR",
    "MAX_FACTOR",
    "ChainPlan",
    "DecimationChain",
    "Decimator",
    "MultiRate",
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


# -- streaming --------------------------------------------------------------------------


def _span(x: np.ndarray, first_index: int | None, next_index: int) -> int | None:
    """``first_index`` as an int (None: the stream goes on from ``next_index``) once every
    index of ``x`` [C, n] is known to fit int64 (``dsp.types.check_index_span``); raises
    before the caller changes any state."""
    k = check_index_span(next_index if first_index is None else first_index, x.shape[1])
    return None if first_index is None else k


def _as_block(block: np.ndarray, channels: int) -> np.ndarray:
    x = np.asarray(block)
    if x.ndim == 1 and channels == 1:
        x = x[None, :]
    if x.ndim != 2 or x.shape[0] != channels:
        raise ValueError(f"block has shape {np.shape(block)}; expected ({channels}, n)")
    return x


def _check_channels(channels: object) -> int:
    if isinstance(channels, bool) or not isinstance(channels, int | np.integer) or channels < 1:
        raise ValueError(f"channels={channels!r} must be a positive integer")
    return int(channels)


def _ceil_div(a: int, b: int) -> int:
    return -((-a) // b)


class Decimator:
    """One streaming stage: FIR low-pass at ``fs`` Hz, keep every ``factor``-th sample.

    ``push(block)`` takes float32 (or float64) ``[C, n]`` in any unit and returns float32
    ``[C, m]`` in the same unit (DC gain 1) at ``fs_out`` = fs/factor Hz; filter state and
    decimation phase carry across pushes. Index bookkeeping as in the module docstring:
    :meth:`index_in`, :meth:`content_index`, ``delay_in``, ``next_index``.

    By default the stage is designed for its own output: pass [0, fs_out/2.56], stop from
    fs_out − fs_out/2.56, ``ripple_db`` and ``atten_db`` as stated.

    Arithmetic is float32 with float32 taps: rounding adds noise near 2⁻²⁴ of the signal
    per sample, spread over the band (about −150 dB re full scale per line at 0.3 Hz lines),
    far below the 80 dB spec and no worse than the float32 samples themselves.

    Parameters
    ----------
    channels : int
        Number of channels C.
    factor : int
        Decimation factor, 2…10.
    fs : float
        Input sample rate, Hz.
    pass_hz, stop_hz : float, optional
        Passband and stopband edges, Hz (default: designed for its own output, as above).
    ripple_db : float, optional
        Passband ripple allowed, max − min, dB (default 0.1).
    atten_db : float, optional
        Stopband rejection required, dB (default 80).

    Examples
    --------
    1 s of a 1 V-peak 100 Hz sine at 10 240 Hz, decimated by 4 to 2560 Hz; once
    settled the output is the same sine, delayed by ``delay_in`` input samples, within the
    passband ripple (±0.05 dB, i.e. ±0.6 %).

    >>> import numpy as np
    >>> d = Decimator(1, 4, 10240.0)
    >>> x = np.sin(2 * np.pi * 100 * np.arange(10240) / 10240.0).astype(np.float32)
    >>> y = d.push(x)
    >>> k = np.arange(d.first_settled_index, y.shape[1])
    >>> ref = np.sin(2 * np.pi * 100 * d.content_index(k) / 10240.0)
    >>> y.shape, bool(np.abs(y[0, k] - ref).max() < 0.006)
    ((1, 2560), True)
    """

    def __init__(self, channels: int, factor: int, fs: float, *, pass_hz: float | None = None,
                 stop_hz: float | None = None, ripple_db: float = RIPPLE_DB,
                 atten_db: float = ATTEN_DB) -> None:
        factor = _check_factor(factor)
        fs = _check_rate("fs", fs)
        fmax_out = fs / factor / FMAX_RATIO
        stage = StagePlan(factor, fs, fmax_out if pass_hz is None else pass_hz,
                          fs / factor - fmax_out if stop_hz is None else stop_hz,
                          ripple_db, atten_db)
        self._setup(channels, stage)

    @classmethod
    def from_stage(cls, channels: int, stage: StagePlan) -> Decimator:
        """A decimator for a planned stage (see :class:`ChainPlan`)."""
        self = cls.__new__(cls)
        self._setup(channels, stage)
        return self

    def _setup(self, channels: int, stage: StagePlan) -> None:
        self.channels = _check_channels(channels)
        self.stage = stage
        self.factor = stage.factor
        self.fs = stage.fs
        self.fs_out = stage.fs_out
        self.taps = stage.taps()
        n = self.taps.size
        self.delay_in = (n - 1) // 2
        self.phase = self.delay_in % self.factor
        # Polyphase form: with g = taps reversed and padded in front to J·R, and the buffer
        # b holding inputs from k_o − J·R + 1 (k_o the next output's input index),
        # y[i] = Σ_j Z[j, i + j] where Z[j, t] = Σ_r g[j·R + r]·b[t·R + r]. Z is one matrix
        # product over contiguous rows (only kept outputs are computed); the sum over j runs
        # in a fixed order, so how the stream is cut does not change the arithmetic.
        r = self.factor
        self._j = -(-n // r)
        self._span = self._j * r
        g = np.zeros(self._span, dtype=np.float32)
        g[self._span - n :] = self.taps[::-1]
        self._g = g.reshape(self._j, r)  # [J, R]
        self._held = SampleBuffer(self.channels, max(4 * self._span, 8192))
        self.resets = -1
        self._restart(0, 0)

    # -- indices -----------------------------------------------------------------------
    @property
    def delay_out(self) -> float:
        """Group delay in output samples, delay_in/factor."""
        return self.delay_in / self.factor

    def index_in(self, k_out: int | np.ndarray) -> int | np.ndarray:
        """Input index at which output ``k_out`` is computed: k′·R + phase."""
        return k_out * self.factor + self.phase

    def content_index(self, k_out: int | np.ndarray) -> int | np.ndarray:
        """Input index output ``k_out`` stands for: k′·R + phase − delay_in (a multiple of R)."""
        return self.index_in(k_out) - self.delay_in

    @property
    def next_index(self) -> int:
        """Output index of the next output sample."""
        return self._next_out

    @property
    def next_input_index(self) -> int:
        """Input index expected for the next sample pushed."""
        return self._next_in

    @property
    def first_settled_index(self) -> int:
        """First output index whose inputs all came after the last reset (no zero history)."""
        return self._settled_out

    def response(self, f_hz: np.ndarray | float) -> np.ndarray:
        """Complex response H(f) at ``f_hz`` (Hz, at the input rate; periodic in fs),
        ``scipy.signal.freqz`` of the taps. |H| is the amplitude gain, arg H = −2π·f·delay_in/fs."""
        f = np.asarray(f_hz, dtype=np.float64)
        _, h = scipy.signal.freqz(self.taps, worN=np.atleast_1d(f).ravel(), fs=self.fs)
        result: np.ndarray = h.reshape(f.shape)
        return result

    # -- stream ------------------------------------------------------------------------
    def _restart(self, next_input_index: int, settled_from: int) -> None:
        k0 = int(next_input_index)
        self._next_out = _ceil_div(k0 - self.phase, self.factor)
        self._next_in = k0
        # The buffer starts span − 1 samples before the next output's input; those before
        # k0 are the zeros a restarted filter sees.
        zeros = self._span - 1 - (self._next_out * self.factor + self.phase - k0)
        self._held.clear(zeros)
        self._settled_out = _ceil_div(int(settled_from) + self.taps.size - 1 - self.phase,
                                      self.factor)
        self.resets += 1

    def reset(self, next_input_index: int | None = None) -> None:
        """A gap: clear the filter history; the stream resumes at ``next_input_index``
        (default: where it was). Outputs keep the global index mapping k = k′·R + phase."""
        k0 = self._next_in if next_input_index is None else int(next_input_index)
        self._restart(k0, k0)

    def _run(self, x: np.ndarray) -> np.ndarray:
        """Push ``[C, n]``; return the float32 outputs ``[C, m]`` (a new array)."""
        self._held.append(x)
        self._next_in += x.shape[1]
        r, j = self.factor, self._j
        held = self._held.held
        m = (held - self._span) // r + 1 if held >= self._span else 0
        if m == 0:
            return np.zeros((self.channels, 0), dtype=np.float32)
        rows = m + j - 1
        xb = self._held.view(rows * r).reshape(self.channels, rows, r)
        z = np.matmul(self._g, xb.transpose(0, 2, 1))  # [C, J, rows]
        if m > 1:
            # y[c, i] = Σ_j z[c, j, i + j]: a view whose last axis walks the diagonal. Its
            # i axis has the smallest stride, so numpy adds the j terms in order, as below.
            sc, sj, si = z.strides
            diag = as_strided(z, shape=(self.channels, m, j), strides=(sc, si, sj + si),
                              writeable=False)
            y = diag.sum(axis=2)
        else:  # one output: keep the same order of additions (no pairwise summation)
            y = z[:, 0, 0:1].copy()
            for jj in range(1, j):
                y += z[:, jj, jj : jj + 1]
        self._held.consume(m * r)
        self._next_out += m
        result: np.ndarray = y
        return result

    def push(self, block: np.ndarray, first_index: int | None = None) -> np.ndarray:
        """Filter and decimate ``block`` ([C, n], any n ≥ 0); return float32 ``[C, m]``.

        The outputs carry indices ``next_index`` (read before the push) onwards.
        ``first_index`` (optional) is the input index of ``block[:, 0]``; another value than
        :attr:`next_input_index` is a gap and calls :meth:`reset` there first.

        Parameters
        ----------
        block : ndarray
            [C, n] samples at ``fs`` Hz, any unit, any n ≥ 0.
        first_index : int, optional
            Stream index of the block's first input sample; another than the next expected
            one is a gap (:meth:`reset`).

        Returns
        -------
        ndarray
            float32 [C, m] at ``fs_out`` Hz, the block's unit (m may be 0).
        """
        x = _as_block(block, self.channels)
        first_index = _span(x, first_index, self._next_in)
        if first_index is not None and first_index != self._next_in:
            self.reset(first_index)
        return self._run(x)


class _Path:
    """Index bookkeeping and response of stages in series (shared by chains and taps)."""

    def __init__(self, stages: Sequence[Decimator], fs_in: float) -> None:
        self.path = tuple(stages)
        self.fs_in = fs_in
        factor, phase, delay = 1, 0, 0
        for s in self.path:
            phase += s.phase * factor
            delay += s.delay_in * factor
            factor *= s.factor
        self.factor, self.phase, self.delay_in = factor, phase, delay
        self.fs_out = fs_in / factor

    def index_in(self, k_out: int | np.ndarray) -> int | np.ndarray:
        """Input-stream index of the input sample at which output sample ``k_out`` is taken."""
        return k_out * self.factor + self.phase

    def content_index(self, k_out: int | np.ndarray) -> int | np.ndarray:
        """Input-stream index whose content output sample ``k_out`` carries:
        :meth:`index_in` less the chain's group delay in input samples."""
        return self.index_in(k_out) - self.delay_in

    def response(self, f_hz: np.ndarray | float) -> np.ndarray:
        """Complex response (dimensionless; 1 = unity gain) of the path at ``f_hz`` (Hz)."""
        h = np.ones(np.shape(f_hz), dtype=np.complex128)
        for s in self.path:
            h = h * s.response(f_hz)
        return h


class DecimationChain:
    """Stages of a :class:`ChainPlan` in series, with the :class:`Decimator` API.

    ``push`` takes ``[C, n]`` at ``fs_in`` and returns float32 ``[C, m]`` at ``fs_out``
    (same unit, DC gain 1). ``factor``, ``phase`` and
    ``delay_in`` are the chain's (module docstring); ``response(f_hz)`` is the product of
    the stage responses, each from ``scipy.signal.freqz`` at its own input rate. A plan
    with no stages passes blocks through (a float32 block is returned as is, not copied).

    Parameters
    ----------
    channels : int
        Number of channels C.
    plan : ChainPlan
        The stages, from :func:`plan_chain`.
    """

    def __init__(self, channels: int, plan: ChainPlan) -> None:
        self.channels = _check_channels(channels)
        self.plan = plan
        self.stages = tuple(Decimator.from_stage(self.channels, s) for s in plan.stages)
        self._path = _Path(self.stages, plan.fs_in)
        self.fs_in, self.fs_out = plan.fs_in, self._path.fs_out
        self.factor, self.phase, self.delay_in = (self._path.factor, self._path.phase,
                                                  self._path.delay_in)
        self.fmax_hz = plan.fmax_hz
        self._next_in = 0
        self._settled = 0

    @property
    def delay_out(self) -> float:
        """Group delay in output samples."""
        return self.delay_in / self.factor

    def index_in(self, k_out: int | np.ndarray) -> int | np.ndarray:
        """Input index at which output ``k_out`` is computed: k′·R + phase."""
        return self._path.index_in(k_out)

    def content_index(self, k_out: int | np.ndarray) -> int | np.ndarray:
        """Input index output ``k_out`` stands for: k′·R + phase − delay_in."""
        return self._path.content_index(k_out)

    def response(self, f_hz: np.ndarray | float) -> np.ndarray:
        """Complex response of the whole chain at ``f_hz`` (Hz at the input rate)."""
        return self._path.response(f_hz)

    @property
    def next_index(self) -> int:
        """Output index of the next output sample."""
        return self.stages[-1].next_index if self.stages else self._next_in

    @property
    def next_input_index(self) -> int:
        """Input index expected for the next sample pushed."""
        return self.stages[0].next_input_index if self.stages else self._next_in

    @property
    def first_settled_index(self) -> int:
        """First output index whose inputs, through every stage, all came after the last
        reset: earlier outputs still carry the zeros a restarted filter starts from."""
        return self.stages[-1].first_settled_index if self.stages else self._settled

    def _restart(self, next_input_index: int, settled_from: int) -> None:
        k, settled = int(next_input_index), int(settled_from)
        self._next_in, self._settled = k, settled
        for s in self.stages:
            s._restart(k, settled)
            k, settled = s.next_index, s.first_settled_index

    def reset(self, next_input_index: int | None = None) -> None:
        """A gap: clear every stage; the stream resumes at ``next_input_index``."""
        k0 = self.next_input_index if next_input_index is None else int(next_input_index)
        self._restart(k0, k0)

    def _run(self, x: np.ndarray) -> np.ndarray:
        self._next_in += x.shape[1]
        for s in self.stages:
            x = s._run(x)
        return x

    def push(self, block: np.ndarray, first_index: int | None = None) -> np.ndarray:
        """As :meth:`Decimator.push`, through every stage."""
        x = _as_block(block, self.channels)
        first_index = _span(x, first_index, self.next_input_index)
        if first_index is not None and first_index != self.next_input_index:
            self.reset(first_index)
        return self._run(x).astype(np.float32, copy=False)


class MultiRate:
    """One shared decimation tree serving several analyses of the same ``fs_in`` stream.

    ``fmax_hz`` maps a name (e.g. a profile) to the Fmax (Hz) it needs; each name gets the
    chain :func:`plan_chain` would pick for it (``plans[name]``, same R and note). Names are
    taken in order of rising R; a name's stages start from the existing tap with the
    largest R that divides its own (the input itself if none), so e.g. R = 40 and R = 200
    run 10·4 once and then ·5, and a name whose R is 1 is the input itself. Taps whose
    factors do not divide one another branch from the input. Each stage is designed for
    the tap right after it (the rule in the module docstring), which also protects every
    tap further down; the ripple budget is split over the longest path, so every name's
    chain meets ``ripple_db`` and ``atten_db`` as in :class:`ChainPlan`.

    ``push(block)`` returns ``{name: float32 [C, m]}`` at each name's ``fs_out``, in the
    block's unit (DC gain 1); a name with R = 1 gets the block itself (as float32).

    Parameters
    ----------
    channels : int
        Number of channels C.
    fs_in : float
        Input sample rate, Hz.
    fmax_hz : mapping of str to float
        Name → Fmax it needs, Hz.
    ripple_db : float, optional
        Passband ripple allowed, max − min, dB (default 0.1).
    atten_db : float, optional
        Stopband rejection required, dB (default 80).
    """

    def __init__(self, channels: int, fs_in: float, fmax_hz: Mapping[str, float], *,
                 ripple_db: float = RIPPLE_DB, atten_db: float = ATTEN_DB) -> None:
        self.channels = _check_channels(channels)
        fs_in = _check_rate("fs_in", fs_in)
        _check_spec(ripple_db, atten_db)
        if not fmax_hz:
            raise ValueError("fmax_hz is empty; give at least one name → Fmax in Hz")
        for name in fmax_hz:
            if not isinstance(name, str) or not name:
                raise ValueError(f"name {name!r} must be a non-empty string")
        picks = {name: _pick_factor(fs_in, f) for name, f in fmax_hz.items()}
        # The tree: node R → (parent R, segment factor); the root R = 1 is the input.
        parent: dict[int, int] = {1: 1}
        for r in sorted({r for r, _ in picks.values()}):
            if r not in parent:
                parent[r] = max(p for p in parent if r % p == 0)
        depth: dict[int, int] = {1: 0}
        for r in sorted(parent):
            if r != 1:
                depth[r] = depth[parent[r]] + _min_stages(r // parent[r])
        per_stage = ripple_db / max(1, max(depth.values()))
        self._nodes: dict[int, DecimationChain] = {}
        self._order = [r for r in sorted(parent) if r != 1]
        path_plans: dict[int, tuple[StagePlan, ...]] = {1: ()}
        for r in self._order:
            p = parent[r]
            fs_p, fs_t = fs_in / p, fs_in / r
            fmax_t = fs_t / FMAX_RATIO
            fac = _best_factors(fs_p, r // p, fmax_t, per_stage, atten_db)
            seg = _stage_plans(fs_p, fac, fmax_t, fs_t, per_stage, atten_db)
            path_plans[r] = path_plans[p] + seg
            self._nodes[r] = DecimationChain(self.channels, ChainPlan(
                fs_in=fs_p, fs_out=fs_t, factor=r // p, fmax_hz=fmax_t, fmax_asked_hz=fmax_t,
                stages=seg, ripple_db=ripple_db, atten_db=atten_db))
        self._parent = parent
        self.fs_in = fs_in
        self.plans: dict[str, ChainPlan] = {
            name: ChainPlan(fs_in=fs_in, fs_out=fs_in / r, factor=r,
                            fmax_hz=fs_in / r / FMAX_RATIO, fmax_asked_hz=float(fmax_hz[name]),
                            stages=path_plans[r], note=note, ripple_db=ripple_db,
                            atten_db=atten_db)
            for name, (r, note) in picks.items()
        }
        self._tap = {name: r for name, (r, _) in picks.items()}
        self._paths: dict[str, _Path] = {}
        for name, r in self._tap.items():
            stages: list[Decimator] = []
            node = r
            while node != 1:
                stages[:0] = self._nodes[node].stages
                node = parent[node]
            self._paths[name] = _Path(stages, fs_in)
        self._next_in = self._settled = 0

    @property
    def stage_count(self) -> int:
        """Stages actually run per push (shared stages counted once)."""
        return sum(len(c.stages) for c in self._nodes.values())

    def fs_out(self, name: str) -> float:
        """Output rate of ``name`` in Hz."""
        return self._paths[self._name(name)].fs_out

    def _name(self, name: str) -> str:
        if name not in self._tap:
            listed = ", ".join(repr(n) for n in self._tap)
            raise ValueError(f"name={name!r} is not one of {listed}")
        return name

    def index_in(self, name: str, k_out: int | np.ndarray) -> int | np.ndarray:
        """Input index at which output ``k_out`` of ``name`` is computed: k′·R + phase."""
        return self._paths[self._name(name)].index_in(k_out)

    def content_index(self, name: str, k_out: int | np.ndarray) -> int | np.ndarray:
        """Input index output ``k_out`` of ``name`` stands for (group delay removed)."""
        return self._paths[self._name(name)].content_index(k_out)

    def delay_in(self, name: str) -> int:
        """Group delay of ``name``'s chain in input samples."""
        return self._paths[self._name(name)].delay_in

    def response(self, name: str, f_hz: np.ndarray | float) -> np.ndarray:
        """Complex response of ``name``'s chain at ``f_hz`` (Hz at the input rate)."""
        return self._paths[self._name(name)].response(f_hz)

    def next_index(self, name: str) -> int:
        """Output index of ``name``'s next output sample."""
        r = self._tap[self._name(name)]
        return self._next_in if r == 1 else self._nodes[r].next_index

    def first_settled_index(self, name: str) -> int:
        """First output index of ``name`` not reached by the zeros after the last reset."""
        r = self._tap[self._name(name)]
        return self._settled if r == 1 else self._nodes[r].first_settled_index

    @property
    def next_input_index(self) -> int:
        """Input index expected for the next sample pushed."""
        return self._next_in

    def reset(self, next_input_index: int | None = None) -> None:
        """A gap: clear every stage; the stream resumes at ``next_input_index``."""
        k0 = self._next_in if next_input_index is None else int(next_input_index)
        self._next_in, self._settled = k0, k0
        for r in self._order:
            p = self._parent[r]
            if p == 1:
                self._nodes[r]._restart(k0, k0)
            else:
                self._nodes[r]._restart(self._nodes[p].next_index,
                                        self._nodes[p].first_settled_index)

    def push(self, block: np.ndarray, first_index: int | None = None) -> dict[str, np.ndarray]:
        """Feed ``[C, n]`` at ``fs_in``; return ``{name: float32 [C, m]}`` (``m`` may be 0).

        A ``first_index`` other than :attr:`next_input_index` is a gap: see :meth:`reset`.

        Parameters
        ----------
        block : ndarray
            [C, n] samples at ``fs_in`` Hz, any unit, any n ≥ 0.
        first_index : int, optional
            Stream index of the block's first input sample (a gap if not the next expected).

        Returns
        -------
        dict of str to ndarray
            Name → float32 [C, m] at that name's ``fs_out`` (m may be 0).
        """
        x = _as_block(block, self.channels)
        first_index = _span(x, first_index, self._next_in)
        if first_index is not None and first_index != self._next_in:
            self.reset(first_index)
        self._next_in += x.shape[1]
        out: dict[int, np.ndarray] = {1: x}
        for r in self._order:
            out[r] = self._nodes[r]._run(out[self._parent[r]])
        return {name: out[r].astype(np.float32, copy=False) for name, r in self._tap.items()}
