"""service.evidence: the waveform kept around an event, as the pipeline drives it."""

import numpy as np

from service.evidence import EvidenceCapture
from service.types import SampleBlock

FS = 100.0
T0_NS = 1_700_000_000_000_000_000


def _block(first: int, n: int, channels: int = 2) -> tuple[np.ndarray, SampleBlock]:
    # sample k of channel c is 1000·c + k: every kept value says where it came from
    x = (np.arange(first, first + n)[None, :] + 1000.0 * np.arange(channels)[:, None])
    x = x.astype(np.float32)
    ids = tuple(f"c{c}" for c in range(channels))
    t0 = T0_NS + round(first * 1e9 / FS)
    return x, SampleBlock("s", ids, x, first, t0, FS)


def test_request_completes_once_the_samples_after_it_have_come() -> None:
    cap = EvidenceCapture(0.5, 0.3)  # 50 samples before, 30 after
    cap.restart(2, FS)
    for first in range(0, 200, 20):
        cap.append(*_block(first, 20))
    cap.request(7, "c1", 200, {"k": 1}, FS)
    assert cap.take() == []  # index 200 + 30 not reached yet
    cap.append(*_block(200, 20))
    assert cap.take() == []
    cap.append(*_block(220, 20))
    (ev,) = cap.take()
    assert (ev.event_id, ev.channel, ev.spectrum, ev.fs) == (7, "c1", {"k": 1}, FS)
    np.testing.assert_array_equal(ev.waveform, 1000.0 + np.arange(150, 230, dtype=np.float32))
    assert ev.t0_ns == T0_NS + round(150 * 1e9 / FS)
    assert cap.take() == []  # taken once


def test_finish_completes_with_what_is_kept_and_a_gap_empties_the_ring() -> None:
    cap = EvidenceCapture(0.5, 0.3)
    cap.restart(2, FS)
    cap.append(*_block(0, 100))
    cap.append(*_block(300, 40))  # a gap: samples before 300 are gone
    cap.request(1, "c0", 320, {}, FS)
    cap.finish()  # shut-down: 270…350 wanted, only 300…340 kept
    (ev,) = cap.take()
    np.testing.assert_array_equal(ev.waveform, np.arange(300, 340, dtype=np.float32))


def test_dropped_requests_never_complete() -> None:
    cap = EvidenceCapture(0.1, 0.1)
    cap.restart(1, FS)
    cap.append(*_block(0, 50, channels=1))
    cap.request(3, "c0", 40, {}, FS)
    cap.drop_requests()
    cap.append(*_block(50, 50, channels=1))
    cap.finish()
    assert cap.take() == []
