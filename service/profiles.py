"""Turn validated config settings into dsp analysis specs (one per channel group).

Knows the config models and the dsp API; no I/O, no asyncio."""

from __future__ import annotations

from dataclasses import dataclass

from dsp.analyzer import AnalysisSpec, ToneDef
from dsp.bands import Band
from dsp.filterbank import FMAX_RATIO, FrameGrid

from .config import AnalysisSettings


@dataclass(frozen=True)
class SpecResult:
    spec: AnalysisSpec
    notes: tuple[str, ...]  # what was adjusted and why, for `check` and the log


def analysis_spec(
    settings: AnalysisSettings,
    fs: float,
    *,
    input_unit: str = "g",
    bands: list[Band] | tuple[Band, ...] = (),
    tones: list[ToneDef] | tuple[ToneDef, ...] = (),
) -> SpecResult:
    """The :class:`AnalysisSpec` for a stream sampled at ``fs`` Hz with these settings.

    The frame is N = 2.56·lines samples at the source rate. When fs ≠ 2.56·fmax_hz the
    lines keep their count, so the line spacing is fs/N and the usable band is fs/2.56;
    a note says so (streaming decimation to honour any Fmax is a later addition).
    """
    notes: list[str] = []
    grid = FrameGrid.from_fmax(fs / FMAX_RATIO, settings.lines, overlap=settings.overlap)
    if abs(grid.fs - fs) > 1e-6 * fs:  # from_fmax rounds through 2.56; keep the true rate
        grid = FrameGrid(fs=fs, n=grid.n, hop=grid.hop)
    if abs(fs / FMAX_RATIO - settings.fmax_hz) > 1e-6 * settings.fmax_hz:
        notes.append(
            f"fmax_hz={settings.fmax_hz:g} with a {fs:g} Hz stream: lines are "
            f"{grid.df_hz:g} Hz apart and the spectrum reaches {fs / FMAX_RATIO:g} Hz"
        )
    unit = settings.output_unit or settings.unit
    spec = AnalysisSpec(
        grid=grid,
        window=settings.window,
        beta=settings.kaiser_beta,
        averaging=settings.averaging,
        averages=settings.averages,
        linear_end=settings.linear_end,
        input_unit=input_unit,  # type: ignore[arg-type]
        unit=unit,
        amplitude=settings.amplitude,
        lowcut_hz=settings.lowcut_hz,
        bands=tuple(bands),
        tones=tuple(tones),
        peaks=settings.peaks,
    )
    return SpecResult(spec, tuple(notes))
