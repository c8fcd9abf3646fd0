"""Spectral history over HTTP: list a channel's stored spectra, fetch one (JSON/CSV/NPY),
compare two times, and a time × frequency waterfall for the dashboard.

Reads the store through a worker thread (never on the event loop); knows nothing of frames
or the engine."""

from __future__ import annotations

import asyncio
import base64
import io
import time
from dataclasses import dataclass
from typing import Annotated, Any, Literal

import numpy as np
from fastapi import APIRouter, Depends, HTTPException, Query, Response
from fastapi import Path as Path_

from ..config import Config
from ..lookups import effective_analysis
from ..spectra import power_values, to_npy
from ..store.history import DB_STEP, codes_power
from ..timefmt import iso_time
from ..types import ChannelState
from ..waterfall import pool_rows
from .channels import AmplitudeQ, UnitQ
from .deps import ChannelDep, ConfigDep, ProfileQ, StoreDep, check_profile, invalid, invalid_query
from .security import Reader

router = APIRouter(tags=["history"])

_NS = 1_000_000_000
MAX_S = 9.2e9  # times in s whose ns still fit a signed 64-bit integer
MAX_CELLS = 2**22  # a waterfall's rows × cols at most (4 194 304 values, 16 MiB as float32)
PRECISION_DB = DB_STEP / 2  # every stored line is within this of the power stored, dB

SinceQ = Annotated[
    float | None,
    Query(ge=-MAX_S, le=MAX_S, description="start, s since the Unix epoch; default: a day "
          "before until"),
]
UntilQ = Annotated[
    float | None,
    Query(ge=-MAX_S, le=MAX_S, description="end, s since the Unix epoch; default: now"),
]
UnitHQ = Annotated[UnitQ | None, Query(description="Unit or quantity; default: the stored one")]
AmpHQ = Annotated[AmplitudeQ | None, Query(description="peak | rms | peak-to-peak")]
RANGE_422 = invalid("a value out of its range, or since not before until")


def _range(since: float | None, until: float | None, default_s: float = 86400.0
           ) -> tuple[float, float]:
    until_s = time.time() if until is None else until
    since_s = until_s - default_s if since is None else since
    if not since_s < until_s:
        invalid_query("since", f"since={since_s:g} must be before until={until_s:g}")
    return since_s, until_s


@dataclass(frozen=True)
class StoredRange:
    """What a history query names: the profile (checked) and the time range, s."""

    profile: str
    since_s: float
    until_s: float

    @property
    def ns(self) -> tuple[int, int]:
        return int(self.since_s * _NS), int(self.until_s * _NS)


def stored_range(
    channel: ChannelDep, profile: ProfileQ = None, since: SinceQ = None, until: UntilQ = None
) -> StoredRange:
    return StoredRange(check_profile(channel, profile), *_range(since, until))


RangeDep = Annotated[StoredRange, Depends(stored_range)]


def _x_unit(cfg: Config, channel_id: str, profile: str | None) -> str:
    """The unit of a profile's x values: "order" for an order profile (its stored spectra
    are on orders of running speed), else "Hz"."""
    return "order" if effective_analysis(cfg, channel_id, profile).kind == "order" else "Hz"


def _head(channel: ChannelState, span: StoredRange, cfg: Config) -> dict[str, Any]:
    """The fields every history answer over a range starts with."""
    return {
        "channel": channel.id, "profile": span.profile, "since": span.since_s,
        "until": span.until_s, "enabled": cfg.history.enabled,
        "interval_s": cfg.history.interval_s,
        "x_unit": _x_unit(cfg, channel.id, span.profile),
    }


def _item(r: dict[str, Any], tz: str) -> dict[str, Any]:
    """A stored spectrum's description (no values)."""
    return {
        "id": r["id"],
        "t_ns": r["t_ns"],
        "time": iso_time(int(r["t_ns"]), tz),
        "reason": r["reason"],
        "step_s": r["step_s"],
        "span_s": r["span_ns"] / _NS,
        "frames": r["frames"],
        "averages": r["averages"],
        "event_id": r["event_id"],
        "lines": r["lines"],
    }


def _values(r: dict[str, Any], unit: str | None, amplitude: str | None
            ) -> tuple[np.ndarray, str, str]:
    return power_values(r["power"], r["f0_hz"], r["df_hz"], r["input_unit"], r["lowcut_hz"],
                        unit or r["unit"], amplitude or r["amplitude"])


def _described(r: dict[str, Any], tz: str) -> dict[str, Any]:
    return {
        "channel": r["channel"],
        "profile": r["profile"],
        **_item(r, tz),
        "f0_hz": r["f0_hz"],
        "df_hz": r["df_hz"],
        "fmax_hz": r["fmax_hz"],
        "window": r["window"],
        "enbw_bins": r["enbw_bins"],
        "lowcut_hz": r["lowcut_hz"],
        "input_unit": r["input_unit"],
        "precision_db": PRECISION_DB,
    }


@router.get(
    "/channels/{channel_id}/history",
    summary="The stored spectra of a channel's profile over a time range (no values)",
    responses={404: {"description": "unknown channel or profile"}, **RANGE_422},
)
async def list_history(
    channel: ChannelDep,
    store: StoreDep,
    cfg: ConfigDep,
    _: Reader,
    span: RangeDep,
    limit: Annotated[int, Query(ge=1, le=10000, description="most items (the newest)")] = 1000,
) -> dict[str, Any]:
    rows, total = await asyncio.to_thread(
        store.history_list, channel.id, span.profile, *span.ns, limit
    )
    tz = cfg.service.timezone
    return {
        **_head(channel, span, cfg),
        "count": total,
        "truncated": total > len(rows),
        "items": [_item(r, tz) for r in rows],
    }


async def _nearest(store: StoreDep, st: ChannelState, prof: str, t_s: float, param: str
                   ) -> dict[str, Any]:
    r = await asyncio.to_thread(store.history_nearest, st.id, prof, int(t_s * _NS))
    if r is None:
        raise HTTPException(404, f"no stored spectrum of {st.id!r} ({prof}) to compare "
                                 f"({param}={t_s:g})")
    return r


@router.get(
    "/channels/{channel_id}/history/compare",
    summary="The stored spectra nearest two times, and their difference in dB per line",
    responses={
        404: {"description": "unknown channel or profile, or nothing stored"},
        409: {"description": "the two spectra have different lines (settings changed)"},
        **invalid("a time out of range"),
    },
)
async def compare_history(
    channel: ChannelDep,
    store: StoreDep,
    cfg: ConfigDep,
    _: Reader,
    a: Annotated[float, Query(ge=-MAX_S, le=MAX_S, description="first time, s since the "
                              "Unix epoch (the reference)")],
    b: Annotated[float, Query(ge=-MAX_S, le=MAX_S, description="second time, s since the "
                              "Unix epoch")],
    profile: ProfileQ = None,
    unit: UnitHQ = None,
    amplitude: AmpHQ = None,
) -> dict[str, Any]:
    prof = check_profile(channel, profile)
    ra = await _nearest(store, channel, prof, a, "a")
    rb = await _nearest(store, channel, prof, b, "b")
    if (ra["lines"], ra["df_hz"], ra["f0_hz"]) != (rb["lines"], rb["df_hz"], rb["f0_hz"]):
        raise HTTPException(409, f"the spectra nearest a and b have different lines "
                                 f"({ra['lines']} × {ra['df_hz']:g} Hz against "
                                 f"{rb['lines']} × {rb['df_hz']:g} Hz): not comparable")
    va, u, amp = _values(ra, unit, amplitude)
    vb, _u, _amp = _values(rb, u, amp)
    with np.errstate(divide="ignore", invalid="ignore"):
        diff = 20.0 * np.log10(vb.astype(np.float64) / va.astype(np.float64))
    tz = cfg.service.timezone
    return {
        "channel": channel.id,
        "profile": prof,
        "unit": u,
        "amplitude": amp,
        "f0_hz": ra["f0_hz"],
        "df_hz": ra["df_hz"],
        "lines": ra["lines"],
        "precision_db": PRECISION_DB,
        "a": {**_item(ra, tz), "values": va.tolist()},
        "b": {**_item(rb, tz), "values": vb.tolist()},
        # b against a, dB per line; null where either is 0 (below the low-frequency cut)
        "diff_db": [float(x) if np.isfinite(x) else None for x in diff],
    }


@router.get(
    "/channels/{channel_id}/history/{spectrum_id}",
    summary="One stored spectrum in any unit and amplitude type (JSON, CSV or NPY)",
    responses={
        200: {"content": {"application/json": {}, "text/csv": {}, "application/octet-stream": {}}},
        404: {"description": "unknown channel or profile, or no such stored spectrum on it"},
    },
)
async def get_history_spectrum(
    channel: ChannelDep,
    store: StoreDep,
    cfg: ConfigDep,
    _: Reader,
    spectrum_id: Annotated[int, Path_(ge=1, le=2**63 - 1, description="Stored spectrum id")],
    unit: UnitHQ = None,
    amplitude: AmpHQ = None,
    format: Annotated[
        Literal["json", "csv", "npy"], Query(description="json | csv | npy")
    ] = "json",
) -> Any:
    r = await asyncio.to_thread(store.history_spectrum, spectrum_id)
    if r is None or r["channel"] != channel.id:
        raise HTTPException(404, f"no stored spectrum {spectrum_id} on {channel.id!r}")
    values, u, amp = _values(r, unit, amplitude)
    if format == "csv":
        buf = io.StringIO()
        buf.write(f"frequency_hz,{amp}_{u.replace('/', '_per_')}\n")
        f = r["f0_hz"] + r["df_hz"] * np.arange(values.size)
        for fq, v in zip(f, values, strict=True):
            buf.write(f"{fq:.9g},{v:.9g}\n")  # 9 digits: the float32 values exactly
        return Response(buf.getvalue(), media_type="text/csv")
    if format == "npy":
        return Response(to_npy(values), media_type="application/octet-stream", headers={
            "X-Quaver-F0-Hz": repr(r["f0_hz"]),
            "X-Quaver-Df-Hz": repr(r["df_hz"]),
            "X-Quaver-Unit": u,
            "X-Quaver-Amplitude": amp,
            "X-Quaver-Profile": r["profile"],
            "X-Quaver-T-Ns": str(r["t_ns"]),
        })
    return {**_described(r, cfg.service.timezone), "unit": u, "amplitude": amp,
            "x_unit": _x_unit(cfg, r["channel"], r["profile"]), "values": values.tolist()}


@router.get(
    "/channels/{channel_id}/waterfall",
    summary="Stored spectra over a time range as at most rows × cols (max-pooled)",
    responses={404: {"description": "unknown channel or profile"},
               **invalid("a value out of its range, since not before until, fmin_hz "
                         "not below fmax_hz, or rows × cols above 4194304")},
)
async def get_waterfall(
    channel: ChannelDep,
    store: StoreDep,
    cfg: ConfigDep,
    _: Reader,
    span: RangeDep,
    rows: Annotated[int, Query(ge=1, le=2000, description="most rows")] = 300,
    cols: Annotated[int, Query(ge=8, le=8192, description="frequency columns")] = 512,
    fmin_hz: Annotated[float | None, Query(ge=-1e6, le=1e6, description="default: 0 (may be "
                                           "below 0, e.g. half a line below line 0)")] = None,
    fmax_hz: Annotated[float | None, Query(gt=0, le=1e6,
                                           description="default: the spectra's Fmax")] = None,
    unit: UnitHQ = None,
    amplitude: AmpHQ = None,
    format: Annotated[
        Literal["json", "base64"],
        Query(description="json: values as lists; base64: `data` holds float32 "
              "little-endian rows × cols (NaN: no value)"),
    ] = "json",
) -> dict[str, Any]:
    if rows * cols > MAX_CELLS:
        invalid_query("cols", f"rows × cols = {rows * cols} is above {MAX_CELLS}")
    found = await asyncio.to_thread(
        store.history_spectra, channel.id, span.profile, *span.ns, True
    )
    lo = 0.0 if fmin_hz is None else fmin_hz
    hi = fmax_hz if fmax_hz is not None else max((r["fmax_hz"] for r in found), default=0.0)
    if found and not lo < hi:
        invalid_query("fmin_hz", f"fmin_hz={lo:g} must be below fmax_hz={hi:g}")
    u = unit or (found[-1]["unit"] if found else channel.input_unit)
    amp = amplitude or (found[-1]["amplitude"] if found else "rms")
    if found:
        u, amp = _values({**found[-1], "power": np.zeros(1)}, u, amp)[1:]

    def convert(codes: np.ndarray, i: int) -> np.ndarray:
        # codes increase with the power: pooled as codes, converted once per cell group
        # (a group's spectra on the same lines share their unit settings but for a rare
        # change of input unit or low cut, where the last one's are used)
        return _values({**found[i], "power": codes_power(codes)}, u, amp)[0]

    spectra = [(int(r["t_ns"]), r["codes"], float(r["f0_hz"]), float(r["df_hz"]))
               for r in found]
    wf = pool_rows(spectra, rows, cols, lo, hi, convert) if spectra else None
    tz = cfg.service.timezone
    out: dict[str, Any] = {
        **_head(channel, span, cfg), "unit": u,
        "amplitude": amp, "fmin_hz": lo, "fmax_hz": hi if spectra else None,
        "cols": cols, "rows": 0 if wf is None else len(wf.t_ns), "spectra": len(spectra),
        "t0_ns": [] if wf is None else wf.t0_ns, "t_ns": [] if wf is None else wf.t_ns,
        "times": [] if wf is None else [iso_time(t, tz) for t in wf.t_ns],
        "pooled": [] if wf is None else wf.spectra,
    }
    vals = np.zeros((0, cols), np.float32) if wf is None else wf.values
    if format == "base64":
        out["data"] = base64.b64encode(vals.astype("<f4").tobytes()).decode("ascii")
    else:
        out["values"] = [[float(x) if np.isfinite(x) else None for x in row] for row in vals]
    return out
