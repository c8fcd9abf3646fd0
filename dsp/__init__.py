"""quaver's numerical engine: streaming spectra of vibration signals, as a library.

Needs numpy and scipy only; no I/O, no asyncio, nothing of the service. The public names
live in submodules and are exposed here, as ``scipy.signal`` exposes its functions::

    >>> import numpy as np, dsp
    >>> grid = dsp.FrameGrid.from_fmax(5000.0, 1600)        # fs 12.8 kHz, N 4096, 75 % overlap
    >>> spec = dsp.AnalysisSpec(grid, unit="g", bands=(dsp.Band("b", 100.0, 200.0),))
    >>> an = dsp.Analyzer(spec, channels=1)
    >>> t = np.arange(int(grid.fs)) / grid.fs               # 1 s of a 1 g-peak tone at 150 Hz
    >>> an.push(np.sin(2 * np.pi * 150.0 * t, dtype=np.float32)[None, :]) > 0
    True
    >>> round(float(an.bands()[0, 0]), 3)                   # its band RMS, g: 1/√2
    0.707

=================  ==========================================================================
submodule          what it holds
=================  ==========================================================================
``analyzer``       :class:`Analyzer` — one analysis of a multi-channel stream (filter bank →
                   averaging → units → bands, tones, peaks); :func:`spectrum_peaks`
``spec``           :class:`AnalysisSpec` — what defines one analysis; :class:`ToneDef`,
                   :func:`low_limit_hz`, :func:`resolve_unit`
``filterbank``     :class:`FilterBank` — framing, windowing and the batched rfft
``grid``           :class:`FrameGrid` (fs, N, hop, lines, Fmax), :data:`FMAX_RATIO`
``averaging``      :class:`Averager` — linear, exponential and peak-hold averages
``scaling``        power spectrum, PSD and amplitude scalings; unit and integration weights
``windows``        window samples and figures (coherent gain, ENBW, scalloping, sidelobe)
``bands``          bands in Hz, orders or 1/b octaves; band RMS and the overall
``tones``          peaks with interpolation, tracked tones (single-bin DFT, Goertzel)
``decimate``       the multi-stage FIR decimation chain behind narrow profiles
``envelope``       envelope (demodulation) spectrum
``kinematics``     bearing defect and gear-mesh frequencies
``kurtogram``      spectral kurtosis and Antoni's fast kurtogram (the band to demodulate)
``tacho``          tacho pulses → speed per revolution and its status; speed from the 1X line
``orders``         computed order tracking: angular resampling, order spectra, run-up data
``types``          the closed option sets (window names, units, …) and the index range
=================  ==========================================================================

Submodules are imported when one of their names is first used, so ``import dsp.types``
stays free of scipy (the service's light modules import it). Units and scalings are stated
in each function's docstring; the published sources are listed in docs/references.md.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

# name → submodule holding it; every submodule's __all__, nothing else
_SUBMODULES = (
    "analyzer", "averaging", "bands", "decimate", "envelope", "filterbank", "grid",
    "kinematics", "kurtogram", "orders", "scaling", "spec", "tacho", "tones", "types", "windows",
)
_PUBLIC: dict[str, str] = {
    "AnalysisSpec": "spec", "Analyzer": "analyzer", "ToneDef": "spec",
    "low_limit_hz": "spec", "resolve_unit": "spec", "spectrum_peaks": "analyzer",
    "Averager": "averaging", "frames_for_time_constant": "averaging",
    "BAND_BASES": "bands", "OCTAVE_FRACTIONS": "bands", "SEVERITY_PRESETS": "bands",
    "Band": "bands", "BandBasis": "bands", "OctaveBand": "bands", "SeverityPreset": "bands",
    "band_edges": "bands", "band_rms": "bands", "band_weights": "bands",
    "octave_bands": "bands", "overall_rms": "bands", "severity_range_hz": "bands",
    "severity_zone": "bands",
    "MIN_FACTOR": "chainplan", "MAX_FACTOR": "chainplan", "ChainPlan": "chainplan",
    "DecimationChain": "decimate", "Decimator": "decimate", "MultiRate": "decimate",
    "StagePlan": "chainplan", "design_stage": "chainplan", "plan_chain": "chainplan",
    "EnvelopeStream": "envelope", "envelope_spectrum": "envelope",
    "FMAX_RATIO": "grid", "FilterBank": "filterbank", "FrameBatch": "filterbank",
    "FrameGrid": "grid", "PowerBatch": "filterbank", "dc_shape": "filterbank",
    "BearingFrequencies": "kinematics", "BearingOrders": "kinematics",
    "bearing_frequencies": "kinematics", "gear_mesh_hz": "kinematics",
    "sidebands": "kinematics",
    "Kurtogram": "kurtogram", "KurtogramBand": "kurtogram", "complex_kurtosis": "kurtogram",
    "fast_kurtogram": "kurtogram", "kurtogram_levels": "kurtogram",
    "spectral_kurtosis": "kurtogram",
    "AngleStream": "orders", "OrderSpectrum": "orders", "OrderTrack": "orders",
    "angular_resample": "orders",
    "bin_by_speed": "orders", "order_spectrum": "orders", "order_track": "orders",
    "revolution_times": "orders",
    "G_N": "scaling", "DEFAULT_UNIT": "scaling", "amplitude_from_power": "scaling",
    "power_from_amplitude": "scaling", "power_spectrum": "scaling",
    "psd_from_power": "scaling", "quantity_of": "scaling", "unit_power_weights": "scaling",
    "Peaks": "tones", "find_peaks": "tones", "goertzel": "tones", "harmonics": "tones",
    "orders_to_hz": "tones", "tone_kernel": "tones", "tone_power": "tones",
    "AMPLITUDES": "types", "AVERAGING_MODES": "types", "INDEX_MAX": "types",
    "INDEX_MIN": "types", "INPUT_UNITS": "types", "LINEAR_ENDS": "types",
    "OUTPUT_UNITS": "types", "QUANTITIES": "types", "WINDOW_NAMES": "types",
    "Amplitude": "types", "AveragingMode": "types", "InputUnit": "types",
    "LinearEnd": "types", "OutputUnit": "types", "Quantity": "types", "WindowName": "types",
    "check_choice": "types", "check_index_span": "types",
    "SPEED_STATUSES": "tacho", "TACHO_EDGES": "tacho", "SpeedStatus": "tacho",
    "TachoEdge": "tacho", "TachoPush": "tacho", "TachoSettings": "tacho",
    "TachoTracker": "tacho", "speed_from_spectrum": "tacho", "tacho_edges": "tacho",
    "WindowInfo": "windows", "bin_response": "windows", "check_window": "windows",
    "get_window": "windows", "transform_magnitude": "windows", "window_info": "windows",
}

__all__ = [
    "AMPLITUDES",
    "AVERAGING_MODES",
    "Amplitude",
    "AnalysisSpec",
    "Analyzer",
    "AngleStream",
    "Averager",
    "AveragingMode",
    "BAND_BASES",
    "Band",
    "BandBasis",
    "BearingFrequencies",
    "BearingOrders",
    "ChainPlan",
    "DEFAULT_UNIT",
    "DecimationChain",
    "Decimator",
    "FMAX_RATIO",
    "FilterBank",
    "FrameBatch",
    "FrameGrid",
    "G_N",
    "INDEX_MAX",
    "INDEX_MIN",
    "INPUT_UNITS",
    "InputUnit",
    "Kurtogram",
    "KurtogramBand",
    "LINEAR_ENDS",
    "LinearEnd",
    "MAX_FACTOR",
    "MIN_FACTOR",
    "MultiRate",
    "OCTAVE_FRACTIONS",
    "OUTPUT_UNITS",
    "OctaveBand",
    "OrderSpectrum",
    "OrderTrack",
    "OutputUnit",
    "Peaks",
    "PowerBatch",
    "QUANTITIES",
    "Quantity",
    "SEVERITY_PRESETS",
    "SPEED_STATUSES",
    "SeverityPreset",
    "SpeedStatus",
    "StagePlan",
    "TACHO_EDGES",
    "TachoEdge",
    "TachoPush",
    "TachoSettings",
    "TachoTracker",
    "ToneDef",
    "WINDOW_NAMES",
    "WindowInfo",
    "WindowName",
    "amplitude_from_power",
    "angular_resample",
    "band_edges",
    "band_rms",
    "band_weights",
    "bearing_frequencies",
    "bin_by_speed",
    "bin_response",
    "check_choice",
    "complex_kurtosis",
    "dc_shape",
    "check_index_span",
    "check_window",
    "design_stage",
    "EnvelopeStream",
    "envelope_spectrum",
    "fast_kurtogram",
    "find_peaks",
    "frames_for_time_constant",
    "gear_mesh_hz",
    "get_window",
    "goertzel",
    "harmonics",
    "kurtogram_levels",
    "low_limit_hz",
    "octave_bands",
    "order_spectrum",
    "order_track",
    "orders_to_hz",
    "overall_rms",
    "plan_chain",
    "power_from_amplitude",
    "power_spectrum",
    "psd_from_power",
    "quantity_of",
    "resolve_unit",
    "revolution_times",
    "severity_range_hz",
    "severity_zone",
    "sidebands",
    "spectral_kurtosis",
    "spectrum_peaks",
    "speed_from_spectrum",
    "tacho_edges",
    "tone_kernel",
    "tone_power",
    "transform_magnitude",
    "unit_power_weights",
    "window_info",
]


def __getattr__(name: str) -> Any:
    """A public name, imported from its submodule on first use (PEP 562)."""
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'dsp' has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{module}"), name)
    globals()[name] = value  # the next look-up is a plain module attribute
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})


if TYPE_CHECKING:  # what type checkers and editors see; the run-time path is __getattr__
    from .analyzer import Analyzer, spectrum_peaks
    from .averaging import Averager, frames_for_time_constant
    from .bands import (
        BAND_BASES,
        OCTAVE_FRACTIONS,
        SEVERITY_PRESETS,
        Band,
        BandBasis,
        OctaveBand,
        SeverityPreset,
        band_edges,
        band_rms,
        band_weights,
        octave_bands,
        overall_rms,
        severity_range_hz,
        severity_zone,
    )
    from .chainplan import MAX_FACTOR, MIN_FACTOR, ChainPlan, StagePlan, design_stage, plan_chain
    from .decimate import DecimationChain, Decimator, MultiRate
    from .envelope import EnvelopeStream, envelope_spectrum
    from .filterbank import FilterBank, FrameBatch, PowerBatch, dc_shape
    from .grid import FMAX_RATIO, FrameGrid
    from .kinematics import (
        BearingFrequencies,
        BearingOrders,
        bearing_frequencies,
        gear_mesh_hz,
        sidebands,
    )
    from .kurtogram import (
        Kurtogram,
        KurtogramBand,
        complex_kurtosis,
        fast_kurtogram,
        kurtogram_levels,
        spectral_kurtosis,
    )
    from .orders import (
        AngleStream,
        OrderSpectrum,
        OrderTrack,
        angular_resample,
        bin_by_speed,
        order_spectrum,
        order_track,
        revolution_times,
    )
    from .scaling import (
        DEFAULT_UNIT,
        G_N,
        amplitude_from_power,
        power_from_amplitude,
        power_spectrum,
        psd_from_power,
        quantity_of,
        unit_power_weights,
    )
    from .spec import AnalysisSpec, ToneDef, low_limit_hz, resolve_unit
    from .tacho import (
        SPEED_STATUSES,
        TACHO_EDGES,
        SpeedStatus,
        TachoEdge,
        TachoPush,
        TachoSettings,
        TachoTracker,
        speed_from_spectrum,
        tacho_edges,
    )
    from .tones import (
        Peaks,
        find_peaks,
        goertzel,
        harmonics,
        orders_to_hz,
        tone_kernel,
        tone_power,
    )
    from .types import (
        AMPLITUDES,
        AVERAGING_MODES,
        INDEX_MAX,
        INDEX_MIN,
        INPUT_UNITS,
        LINEAR_ENDS,
        OUTPUT_UNITS,
        QUANTITIES,
        WINDOW_NAMES,
        Amplitude,
        AveragingMode,
        InputUnit,
        LinearEnd,
        OutputUnit,
        Quantity,
        WindowName,
        check_choice,
        check_index_span,
    )
    from .windows import (
        WindowInfo,
        bin_response,
        check_window,
        get_window,
        transform_magnitude,
        window_info,
    )
