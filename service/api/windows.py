"""GET /api/v1/windows/{window}/response: the equivalent band-pass filter of one line.

Pure computation from dsp.windows; no hub, no state."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Query

from dsp.windows import bin_response, window_info

from .deps import invalid, invalid_query

router = APIRouter(tags=["windows"])
MAX_WORK = 2e8  # n × points evaluated: about a second of one core

WindowP = Literal["rectangular", "hann", "hamming", "blackman-harris", "flattop", "kaiser"]


@router.get(
    "/windows/{window}/response",
    summary="One spectrum line's filter response for a window, in dB",
    responses=invalid("a value out of its range, or n × (2·span_bins·points_per_bin + 1) over "
                      "2e8 (the work of one request is bounded)"),
)
def window_response(
    window: WindowP,
    n: Annotated[int, Query(ge=16, le=262144, description="frame length, samples")] = 4096,
    span_bins: Annotated[float, Query(gt=0, le=64, description="± lines shown")] = 8.0,
    points_per_bin: Annotated[int, Query(ge=1, le=64)] = 16,
    beta: Annotated[float, Query(ge=0, le=50, description="Kaiser β")] = 8.6,
) -> dict[str, Any]:
    points = (2 * span_bins * points_per_bin + 1) * n
    if points > MAX_WORK:  # the direct DTFT costs n multiply-adds per point shown
        invalid_query(
            "n", f"n·points = {points:.3g} is over {MAX_WORK:.0e}; ask for fewer lines or a "
            "smaller n (the line's shape hardly changes with n beyond a few thousand)"
        )
    nu, gain_db = bin_response(
        window, n, span_bins=span_bins, points_per_bin=points_per_bin, beta=beta
    )
    info = window_info(window, n, beta=beta)
    return {
        "window": window,
        "n": n,
        "offset_bins": nu.tolist(),
        "gain_db": [max(g, -300.0) for g in gain_db.tolist()],
        "coherent_gain": info.coherent_gain,
        "enbw_bins": info.enbw_bins,
        "scalloping_loss_db": info.scalloping_loss_db,
        "highest_sidelobe_db": info.highest_sidelobe_db,
    }
