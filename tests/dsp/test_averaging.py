"""Averaging modes against plain per-frame reference loops written from their definitions."""

import numpy as np
import pytest

from dsp.averaging import Averager, frames_for_time_constant


def _frames(p=23, seed=3):
    return np.random.default_rng(seed).random((2, p, 5))


def _split(avg, x, cuts):
    for part in np.split(x, cuts, axis=1):
        avg.update(part)
    return avg


@pytest.mark.parametrize("cuts", [[], [1], [4, 5, 17], [8, 16]])
def test_linear_restart(cuts):
    x = _frames()
    a = _split(Averager("linear", 8), x, cuts)
    # 23 frames = two full averages of 8, then 7 frames into the third.
    np.testing.assert_allclose(a.value, x[:, 16:].mean(axis=1))
    assert (a.count, a.completed) == (7, 2)


def test_linear_hold_ignores_later_frames():
    x = _frames()
    a = _split(Averager("linear", 8, linear_end="hold"), x, [3, 12])
    np.testing.assert_allclose(a.value, x[:, :8].mean(axis=1))
    assert a.count == 8
    a.reset()
    assert a.value is None and a.count == 0


@pytest.mark.parametrize("cuts", [[], [1], [2, 3, 10, 11]])
def test_exponential_equals_per_frame_recursion(cuts):
    # Reference: y_k = y_{k-1} + (x_k − y_{k-1})/min(k, N), one frame at a time.
    x = _frames()
    n_eq = 4.5
    ref = np.zeros((2, 5))
    for k in range(1, x.shape[1] + 1):
        ref += (x[:, k - 1] - ref) / min(k, n_eq)
    a = _split(Averager("exponential", n_eq), x, cuts)
    np.testing.assert_allclose(a.value, ref, rtol=1e-12)
    assert a.count == 5


def test_exponential_of_a_constant_is_that_constant():
    a = Averager("exponential", 16)
    a.update(np.full((1, 40, 3), 2.5))
    np.testing.assert_allclose(a.value, 2.5, rtol=1e-12)


def test_peak_hold():
    x = _frames()
    a = _split(Averager("peak-hold"), x, [5, 6])
    np.testing.assert_array_equal(a.value, x.max(axis=1))
    assert a.count == 23


def test_time_constant():
    # α = 1 − exp(−hop/τ); for hop ≪ τ the equivalent count tends to τ/hop.
    assert frames_for_time_constant(10.0, 0.01) == pytest.approx(1000.5, rel=1e-4)
    assert frames_for_time_constant(1.0, 1.0) == pytest.approx(1 / (1 - np.exp(-1)))
    with pytest.raises(ValueError, match=r"tau_s=0 and hop_s=1 must both be positive"):
        frames_for_time_constant(0, 1)


def test_averager_errors():
    with pytest.raises(
        ValueError, match=r"averaging='rolling' is not one of 'linear', 'exponential', 'peak-hold'"
    ):
        Averager("rolling")
    with pytest.raises(ValueError, match=r"linear_end='stop' is not one of 'restart', 'hold'"):
        Averager("linear", 4, linear_end="stop")
    with pytest.raises(ValueError, match=r"averages=0.5 must be a number of frames >= 1"):
        Averager("exponential", 0.5)
    with pytest.raises(ValueError, match=r"averages=2.5 must be a whole number"):
        Averager("linear", 2.5)


@pytest.mark.parametrize("n_eq", [1, 4.5, 8])
def test_weighted_sum_equals_per_frame_recursion(n_eq):
    # frame_weights + update_weighted fold a push's frames as one weighted sum; reference:
    # y_k = y_{k-1} + (x_k − y_{k-1})/min(k, N), one frame at a time (the class docstring).
    x = _frames(p=31)
    ref = np.zeros((2, 5))
    for k in range(1, x.shape[1] + 1):
        ref += (x[:, k - 1] - ref) / min(k, n_eq)
    a = Averager("exponential", n_eq)
    for part in np.split(x, [1, 3, 4, 11, 12, 20], axis=1):  # pushes of 1, 2, 1, 7, 1, 8, 11
        weights, decay = a.frame_weights(part.shape[1])
        assert weights.shape == (part.shape[1],) and 0.0 <= decay < 1.0
        a.update_weighted(np.einsum("p,cpq->cq", weights, part), part.shape[1])
    np.testing.assert_allclose(a.value, ref, rtol=1e-12)
    assert a.count == int(np.ceil(n_eq))


def test_weighted_sum_errors():
    with pytest.raises(ValueError, match=r"need averaging='exponential', not 'linear'"):
        Averager("linear", 4).frame_weights(2)
    with pytest.raises(ValueError, match=r"sum needs averaging='exponential', not 'peak-hold'"):
        Averager("peak-hold").update_weighted(np.zeros((1, 3)), 2)
    with pytest.raises(ValueError, match=r"p_count=-1 must be a whole number of frames >= 0"):
        Averager("exponential", 4).frame_weights(-1)
