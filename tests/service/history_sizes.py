"""Bytes per stored spectrum of the spectral history, measured on the simulated plant.

``python -m tests.service.history_sizes``: renders 60 s of the demo plant (fault growing), averages
it as the service does (exponential, 8 averages, 75 % overlap) at 800…6400 lines, and
encodes each channel's interval mean and single averaged spectra with the store's codec and
with the alternatives considered; then the growth per channel and profile at the defaults.
"""

from __future__ import annotations

import sqlite3
import tempfile
import zlib
from dataclasses import replace
from pathlib import Path

import numpy as np

from dsp.analyzer import Analyzer
from dsp.grid import FrameGrid
from dsp.spec import AnalysisSpec
from service.config import HistorySettings
from service.sources.simulated import demo_site
from service.store import HistoryPolicy, HistoryRow, Store
from service.store.history import encode, stored_bytes

DAY_S = 86400


def _alternatives(p: np.ndarray) -> dict[str, int]:
    db = 10 * np.log10(np.maximum(p, 1e-40))
    f32 = p.astype("<f4").tobytes()
    return {
        "float32": len(f32),
        "float32+zlib": len(zlib.compress(f32, 6)),
        "float16 dB+zlib": len(zlib.compress(db.astype("<f2").tobytes(), 6)),
        "stored (16-bit 0.02 dB+zlib)": len(encode(p)),
    }


def file_bytes_per_row(spectra: np.ndarray, rows: int = 600) -> float:
    """Bytes the history takes in the database file per row (pages of the table and its
    indexes), storing ``rows`` rows made of ``spectra`` [C, Q] in a new store."""
    base = HistoryRow(
        channel="c", profile="p", t_ns=0, span_ns=0, reason="interval", step_s=600,
        frames=1, averages=8, event_id=None, f0_hz=0.0, df_hz=1.0, fmax_hz=1.0,
        input_unit="g", unit="mm/s", amplitude="rms", lowcut_hz=2.0, window="hann",
        enbw_bins=1.5, power=spectra[0],
    )
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "h.db"
        with Store(path, history=HistoryPolicy(max_bytes=None)) as store:
            store.put_history([
                replace(base, channel=f"c{k % len(spectra)}", t_ns=k * 600 * 10**9,
                        power=spectra[k % len(spectra)])
                for k in range(rows)
            ]).result()
        c = sqlite3.connect(path)
        try:
            return stored_bytes(c)[1] / rows
        finally:
            c.close()


def measure(seconds: float = 60.0) -> dict[int, dict[str, float]]:
    """{lines: {codec: mean bytes per spectrum}} over the demo's channels (interval means),
    and "file" (bytes per row in the database file)."""
    model = demo_site(fault_start_s=0.0, fault_ramp_s=seconds)
    x = model.render(0, int(model.fs * seconds))
    out: dict[int, dict[str, float]] = {}
    for lines in (800, 1600, 3200, 6400):
        spec = AnalysisSpec(grid=FrameGrid.from_fmax(model.fs / 2.56, lines), averages=8)
        a = Analyzer(spec, channels=len(model.channel_ids))
        block = int(model.fs / 10)
        total = np.zeros((len(model.channel_ids), lines + 1))
        n = 0
        for k in range(0, x.shape[1] - block + 1, block):  # one frame per 0.1 s block
            if a.push(x[:, k:k + block]):
                total += a.power("g")
                n += 1
        sizes: dict[str, list[int]] = {}
        means = total / max(n, 1)
        for p in means:
            for name, b in _alternatives(p).items():
                sizes.setdefault(name, []).append(b)
        out[lines] = {k: float(np.mean(v)) for k, v in sizes.items()}
        out[lines]["file per row"] = file_bytes_per_row(means)
    return out


def main() -> None:
    h = HistorySettings.model_validate({})
    sizes = measure()
    print("bytes per stored spectrum (mean over the demo's 6 channels, 60 s interval means)")
    for lines, row in sizes.items():
        print(f"  {lines:5d} lines: " + ", ".join(f"{k} {v:,.0f}" for k, v in row.items()))
    per_day = DAY_S / h.interval_s
    print(f"\nat the defaults (interval {h.interval_s:g} s, {h.fine_days:g} days fine, then "
          f"one per {h.coarse_step_s} s for {h.coarse_days:g} days, bound {h.max_mb:g} MiB),"
          " per channel and profile, from the file bytes per row:")
    for lines, row in sizes.items():
        b = row["file per row"]
        fine = b * per_day * h.fine_days
        coarse = b * DAY_S / h.coarse_step_s * (h.coarse_days - h.fine_days)
        print(f"  {lines:5d} lines: {b * per_day / 1e6:6.2f} MB/day, "
              f"{b * per_day * 30 / 1e6:6.1f} MB/month, steady state "
              f"{(fine + coarse) / 1e6:6.1f} MB")


if __name__ == "__main__":
    main()
