"""The FIFO sample buffer's frame view against numpy's sliding_window_view."""

import numpy as np
import pytest
from numpy.lib.stride_tricks import sliding_window_view

from dsp.buffer import SampleBuffer


def test_frames_view_equals_sliding_window_view():
    # Reference: numpy.lib.stride_tricks.sliding_window_view, every hop-th window.
    rng = np.random.default_rng(4)
    buf = SampleBuffer(3, 64)
    held = np.zeros((3, 0), np.float32)
    for k in (40, 7, 33, 50, 1, 90):  # wraps and grows the storage on the way
        x = rng.normal(size=(3, k)).astype(np.float32)
        buf.append(x)
        held = np.concatenate((held, x), axis=1)
        n, hop = 16, 5
        count = (held.shape[1] - n) // hop + 1 if held.shape[1] >= n else 0
        ref = sliding_window_view(held, n, axis=1)[:, ::hop][:, :count]
        got = buf.frames(n, hop, count)
        np.testing.assert_array_equal(got, ref)
        assert not got.flags.writeable
        buf.consume(count * hop)
        held = held[:, count * hop :]


def test_frames_view_refuses_frames_past_the_held_samples():
    buf = SampleBuffer(2, 32)
    buf.append(np.zeros((2, 20), np.float32))
    with pytest.raises(ValueError, match=r"3 frames of 16 samples, 4 apart, need more than the 20"):
        buf.frames(16, 4, 3)
