"""Stream sample indices anywhere in int64: the streaming stages give the same frames and
outputs near either end of the range as at 0, and refuse a block that would run past it
with a ValueError that changes nothing (the service must never die of an index).

Indices are the streaming contract of dsp.filterbank and dsp.decimate (their docstrings);
int64 is the dtype of FrameBatch.start."""

from __future__ import annotations

import numpy as np
import pytest

from dsp.analyzer import Analyzer
from dsp.chainplan import plan_chain
from dsp.decimate import DecimationChain, Decimator, MultiRate
from dsp.filterbank import FilterBank
from dsp.grid import FrameGrid
from dsp.spec import AnalysisSpec
from dsp.types import INDEX_MAX, INDEX_MIN, check_index_span

FS = 1024.0
GRID = FrameGrid(FS, 256, 64)
N = 4096
X = np.random.default_rng(7).standard_normal((2, N)).astype(np.float32)
CUTS = (0, 1000, 1001, 2500, N)  # uneven pushes; the same cuts for both runs
LCM = 2520  # every decimation factor 2…10 divides it: the output phase is the same as at 0
# Start indices whose whole block fits (the last index used is k0 + N <= INDEX_MAX).
STARTS = [INDEX_MAX - N, (INDEX_MAX - N) // LCM * LCM, INDEX_MIN, -(2**63 // LCM * LCM), -5]
REST = N - 1000  # the refused block is X[:, 1000:]: where it would not fit, and u64 values
REFUSED = [INDEX_MAX - REST + 1, INDEX_MAX, 2**63, 2**64 - 1, INDEX_MIN - 1]


def _parts(x: np.ndarray) -> list[np.ndarray]:
    return [x[:, a:b] for a, b in zip(CUTS[:-1], CUTS[1:], strict=True)]


def test_check_index_span_bounds():
    assert check_index_span(INDEX_MAX - 10, 10) == INDEX_MAX - 10
    assert check_index_span(INDEX_MIN, 0) == INDEX_MIN
    with pytest.raises(ValueError, match=r"first_index=9223372036854775797 with 11 samples"):
        check_index_span(INDEX_MAX - 10, 11)
    with pytest.raises(ValueError, match="within int64"):
        check_index_span(INDEX_MIN - 1, 1)


@pytest.mark.parametrize("k0", STARTS)
def test_filterbank_frames_are_the_same_anywhere_in_int64(k0):
    ref, fb = FilterBank(GRID, 2), FilterBank(GRID, 2)
    want = [ref.push(p, first_index=0 if i == 0 else None) for i, p in enumerate(_parts(X))]
    got = [fb.push(p, first_index=k0 if i == 0 else None) for i, p in enumerate(_parts(X))]
    starts = np.concatenate([b.start for b in got])
    assert starts.dtype == np.int64
    # exact Python-int arithmetic: no wrap-around near 2**63 - 1
    assert [int(s) for s in starts] == [k0 + int(s) for b in want for s in b.start]
    assert len(starts) == (N - GRID.n) // GRID.hop + 1
    for a, b in zip(got, want, strict=True):
        assert np.array_equal(a.spectra, b.spectra)
    assert fb.next_index == k0 + N


@pytest.mark.parametrize("k", REFUSED)
@pytest.mark.parametrize("method", ["push", "push_power"])
def test_filterbank_refuses_an_index_past_int64_and_changes_nothing(k, method):
    fb, ref = FilterBank(GRID, 2), FilterBank(GRID, 2)

    def push(bank: FilterBank, x: np.ndarray, first: int | None) -> np.ndarray:
        if method == "push":
            return bank.push(x, first_index=first).start
        w = np.ones(bank.frames_ready(x.shape[1]) if first in (None, bank.next_index) else 0)
        return bank.push_power(x, w, first_index=first).start

    a = push(fb, X[:, :1000], 0)
    state = (fb.next_index, fb.pending, fb.resets, fb.frames_out)
    with pytest.raises(ValueError, match="within int64"):
        push(fb, X[:, 1000:], k)
    assert (fb.next_index, fb.pending, fb.resets, fb.frames_out) == state
    assert state[0] == 1000
    b = push(fb, X[:, 1000:], None)  # the stream goes on as if the bad block never came
    assert np.array_equal(np.concatenate([a, b]), push(ref, X, 0))


def test_filterbank_refuses_to_run_past_the_top_without_a_declared_index():
    fb = FilterBank(GRID, 2)
    fb.push(X, first_index=INDEX_MAX - N)
    assert fb.next_index == INDEX_MAX
    with pytest.raises(ValueError, match="within int64"):
        fb.push(X[:, :1])
    assert fb.next_index == INDEX_MAX
    assert fb.push(X[:, :10], first_index=0).count == 0  # a restart is still possible


@pytest.mark.parametrize("k0", STARTS)
def test_analyzer_averages_are_the_same_anywhere_in_int64(k0):
    spec = AnalysisSpec(grid=GRID, averaging="linear", averages=100)
    ref, an = Analyzer(spec, 2), Analyzer(spec, 2)
    for i, p in enumerate(_parts(X)):
        ref.push(p, first_index=0 if i == 0 else None)
        an.push(p, first_index=k0 if i == 0 else None)
    assert an.last_end_index == k0 + ref.last_end_index
    assert np.array_equal(an.power(), ref.power())


@pytest.mark.parametrize("k", REFUSED)
def test_analyzer_refuses_an_index_past_int64_and_keeps_its_average(k):
    spec = AnalysisSpec(grid=GRID, averaging="linear", averages=100)
    an = Analyzer(spec, 2)
    an.push(X[:, :1000], first_index=0)
    before, count, end = an.power().copy(), an.count, an.last_end_index
    with pytest.raises(ValueError, match="within int64"):
        an.push(X[:, 1000:], first_index=k)
    assert (an.count, an.last_end_index) == (count, end)
    assert np.array_equal(an.power(), before)


def _decimators() -> list[tuple[str, object]]:
    return [
        ("stage", Decimator(2, 4, FS)),
        ("chain", DecimationChain(2, plan_chain(10240.0, 200.0))),
        ("multirate", MultiRate(2, 10240.0, {"a": 1000.0, "b": 200.0})),
    ]


def _outputs(d: object, x: np.ndarray, k0: int) -> list[np.ndarray]:
    out = []
    for i, p in enumerate(_parts(x)):
        y = d.push(p, first_index=k0 if i == 0 else None)  # type: ignore[attr-defined]
        out += list(y.values()) if isinstance(y, dict) else [y]
    return out


@pytest.mark.parametrize("k0", [k for k in STARTS if k % LCM == 0])
@pytest.mark.parametrize("which", ["stage", "chain", "multirate"])
def test_decimators_give_the_same_outputs_anywhere_in_int64(which, k0):
    d, ref = dict(_decimators())[which], dict(_decimators())[which]
    got, want = _outputs(d, X, k0), _outputs(ref, X, 0)
    assert sum(y.shape[1] for y in got) > 0
    for a, b in zip(got, want, strict=True):
        assert np.array_equal(a, b)


def _listed(y: object) -> list[np.ndarray]:
    return list(y.values()) if isinstance(y, dict) else [y]  # type: ignore[list-item]


@pytest.mark.parametrize("k", REFUSED)
@pytest.mark.parametrize("which", ["stage", "chain", "multirate"])
def test_decimators_refuse_an_index_past_int64_and_change_nothing(which, k):
    d, ref = dict(_decimators())[which], dict(_decimators())[which]
    a = _listed(d.push(X[:, :1000], first_index=0))  # type: ignore[attr-defined]
    with pytest.raises(ValueError, match="within int64"):
        d.push(X[:, 1000:], first_index=k)  # type: ignore[attr-defined]
    b = _listed(d.push(X[:, 1000:]))  # type: ignore[attr-defined]
    # streaming equals batch to a few float32 roundings (dsp.decimate's docstring)
    for ya, yb, w in zip(a, b, _listed(ref.push(X, first_index=0)), strict=True):  # type: ignore[attr-defined]
        np.testing.assert_allclose(np.concatenate([ya, yb], axis=1), w, rtol=0, atol=1e-5)
