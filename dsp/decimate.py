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

The filters and chains are designed in ``dsp.chainplan`` (the anti-alias specification and
the multi-stage design rule are stated there).
"""


from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import scipy.signal
from numpy.lib.stride_tricks import as_strided

from .buffer import SampleBuffer
from .chainplan import (
    ATTEN_DB,
    RIPPLE_DB,
    ChainPlan,
    StagePlan,
    _best_factors,
    _check_factor,
    _check_rate,
    _check_spec,
    _min_stages,
    _pick_factor,
    _stage_plans,
)
from .grid import FMAX_RATIO
from .types import check_index_span

__all__ = ["DecimationChain", "Decimator", "MultiRate"]

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
