"""Averaging of power spectra over frames: linear (N frames), exponential, peak hold.

Knows nothing about streams or the service: it folds arrays of frames into an average.

Inputs are powers (rms² per line, or |X|²): averaging powers, not magnitudes, keeps a
steady sine at its level and gives noise its true mean power (Heinzel et al. 2002 §8
"RMS averaging"). Arrays are ``[C, P, ...]`` — channel, frame, then any trailing axes
(lines, tones); one call folds all P frames without a Python loop per frame.
"""

from __future__ import annotations

import numpy as np

from .types import AVERAGING_MODES, LINEAR_ENDS, AveragingMode, LinearEnd, check_choice

__all__ = ["Averager", "frames_for_time_constant"]


def frames_for_time_constant(tau_s: float, hop_s: float) -> float:
    """Equivalent number of frames of an exponential average with time constant ``tau_s``.

    A new frame arrives every ``hop_s`` seconds; the smoothing factor per frame is
    α = 1 − exp(−hop_s/tau_s) and the equivalent frame count is 1/α.

    Parameters
    ----------
    tau_s : float
        Time constant of the average, s (> 0).
    hop_s : float
        Time between frames, s (> 0).

    Returns
    -------
    float
        Equivalent number of frames (≥ 1, fractional), for ``Averager(averages=...)``.
    """
    if not (tau_s > 0 and hop_s > 0):
        raise ValueError(f"tau_s={tau_s!r} and hop_s={hop_s!r} must both be positive seconds")
    return float(1.0 / -np.expm1(-hop_s / tau_s))


class Averager:
    """Running average of power frames.

    * ``linear``: the mean of the frames since the last (re)start; after ``averages``
      frames it either holds (``linear_end="hold"``: later frames are ignored until
      :meth:`reset`) or restarts with the next frame (``"restart"``).
    * ``exponential``: y ← y + α·(x − y) with α = 1/min(k, averages) for the k-th frame
      since reset: a plain mean while fewer than ``averages`` frames have been seen (so
      the start is not biased toward zero), then a fixed α = 1/averages. ``averages`` may
      be fractional (see :func:`frames_for_time_constant`).
    * ``peak-hold``: the element-wise maximum since reset.

    :attr:`value` has the trailing shape of the frames; it is float64 for linear averages
    (long sums) and keeps the frames' dtype for exponential and peak hold, whose result
    is a convex combination or a maximum and so loses nothing to float32 rounding;
    :attr:`count` is the number of frames in the current average (for exponential: frames
    since reset, capped at ``averages``).

    Parameters
    ----------
    mode : {'exponential', 'linear', 'peak-hold'}, optional
        Kind of average (default exponential).
    averages : float, optional
        Linear: frames per average (a whole number); exponential: equivalent number of
        frames, ≥ 1 (default 8). Unused for peak hold.
    linear_end : {'restart', 'hold'}, optional
        What a complete linear average does with the next frame (default restart).

    Raises
    ------
    ValueError
        For an unknown mode or ``linear_end``, ``averages`` < 1, or a fractional
        ``averages`` with ``mode='linear'``.
    """

    def __init__(
        self,
        mode: AveragingMode = "exponential",
        averages: float = 8,
        *,
        linear_end: LinearEnd = "restart",
    ) -> None:
        check_choice("averaging", mode, AVERAGING_MODES)
        check_choice("linear_end", linear_end, LINEAR_ENDS)
        if not (np.isfinite(averages) and averages >= 1):
            raise ValueError(f"averages={averages!r} must be a number of frames >= 1")
        if mode == "linear" and int(averages) != averages:
            raise ValueError(f"averages={averages!r} must be a whole number of frames for linear")
        self.mode = mode
        self.averages = float(averages)
        self.linear_end = linear_end
        self._weights: dict[int, tuple[np.ndarray, float]] = {}
        self.reset()

    def reset(self) -> None:
        """Forget everything; the next frame starts a new average."""
        self._sum: np.ndarray | None = None  # linear: running sum; others: the value
        self._seen = 0  # frames since reset (exponential), frames in current block (linear)
        self.completed = 0  # linear: averages finished since reset

    @property
    def count(self) -> int:
        """Frames in the current average (an exponential one counts up to ``averages``)."""
        if self.mode == "exponential":
            return int(min(self._seen, np.ceil(self.averages)))
        return self._seen

    @property
    def value(self) -> np.ndarray | None:
        """The current average (float64), or None before the first frame."""
        if self._sum is None:
            return None
        if self.mode == "linear":
            return self._sum / max(self._seen, 1)
        return self._sum

    def update(self, frames: np.ndarray) -> None:
        """Fold frames ``[C, P, ...]`` (non-negative powers) into the average, in order."""
        x = np.asarray(frames)
        if x.ndim < 2:
            raise ValueError(f"frames has shape {x.shape}; expected [C, P, ...]")
        p_count = x.shape[1]
        if p_count == 0:
            return
        if self.mode == "peak-hold":
            m = x.max(axis=1)
            self._sum = m if self._sum is None else np.maximum(self._sum, m)
            self._seen += p_count
        elif self.mode == "exponential":
            self._update_exponential(x)
        else:
            self._update_linear(x)

    def frame_weights(self, p_count: int) -> tuple[np.ndarray, float]:
        """Exponential averaging of the next ``p_count`` frames as one weighted sum.

        Returns ``(a, d)``, float64 weights a[P] and a decay d (dimensionless), such that
        folding frames x_0…x_{P−1} in order gives y ← d·y + Σ_p a_p·x_p. Pass the sum to
        :meth:`update_weighted`.
        """
        if self.mode != "exponential":
            raise ValueError(f"frame weights need averaging='exponential', not {self.mode!r}")
        if int(p_count) != p_count or p_count < 0:
            raise ValueError(f"p_count={p_count!r} must be a whole number of frames >= 0")
        return self._exp_weights(int(p_count))

    def update_weighted(self, total: np.ndarray, p_count: int) -> None:
        """Fold ``p_count`` frames given as their weighted sum Σ_p a_p·x_p ([C, ...]), with
        the weights a from :meth:`frame_weights` (``p_count``) called in the current state.

        Same result as :meth:`update` on the frames themselves, up to rounding. ``total``
        becomes the average's storage when there is no average yet (it is not copied).
        """
        if self.mode != "exponential":
            raise ValueError(f"a weighted sum needs averaging='exponential', not {self.mode!r}")
        if p_count <= 0:
            return
        _, decay = self._exp_weights(int(p_count))
        if self._sum is None or decay == 0.0:
            self._sum = total
        else:
            self._sum *= decay  # a Python float keeps the float32 loop (NEP 50)
            self._sum += total
        self._seen += int(p_count)

    def _exp_weights(self, p_count: int) -> tuple[np.ndarray, float]:
        """Weights of P new frames and the decay of the old value (cached once steady)."""
        steady = self._seen >= self.averages
        key = p_count
        if steady and key in self._weights:
            return self._weights[key]
        # y_P = y_0·Π(1−α_j) + Σ_p α_p·Π_{j>p}(1−α_j)·x_p — weights from a suffix product,
        # in plain floats: a push brings a few frames, and array calls would cost more.
        weights = [0.0] * p_count
        suffix = 1.0
        for p in range(p_count - 1, -1, -1):
            alpha = 1.0 / min(self._seen + 1 + p, self.averages)
            weights[p] = alpha * suffix
            suffix *= 1.0 - alpha
        out = (np.array(weights), suffix)
        if steady:
            self._weights[key] = out
        return out

    def _update_exponential(self, x: np.ndarray) -> None:
        weights, decay = self._exp_weights(x.shape[1])
        # matmul over the frame axis: (P,) @ [C, P, M] → [C, M] (BLAS; tensordot would copy x).
        flat = x.reshape(x.shape[0], x.shape[1], -1)
        new = np.matmul(weights.astype(flat.dtype), flat).reshape(x.shape[:1] + x.shape[2:])
        if self._sum is None:
            self._sum = new
        else:
            self._sum *= decay  # a Python float keeps the float32 loop (NEP 50)
            self._sum += new
        self._seen += x.shape[1]

    def _update_linear(self, x: np.ndarray) -> None:
        n_avg = int(self.averages)
        p = 0
        while p < x.shape[1]:  # one pass per completed average, not per frame
            if self._seen >= n_avg:
                if self.linear_end == "hold":
                    return
                self._sum, self._seen = None, 0
            take = min(n_avg - self._seen, x.shape[1] - p)
            part = x[:, p : p + take].sum(axis=1, dtype=np.float64)
            self._sum = part if self._sum is None else self._sum + part
            self._seen += take
            p += take
            if self._seen >= n_avg:
                self.completed += 1
