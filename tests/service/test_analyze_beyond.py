"""Tests for `quaver analyze` and a config's bands and tones beyond the run's Fmax: a warning
line each, and a null row with its reason in the table and the JSON (nothing dropped silently)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile

from service import cli

FS = 12800  # Hz
CONFIG = """
[analysis]
fmax_hz = 2000
lines = 800

[[sources]]
id = "s"
kind = "tcp"
listen = "127.0.0.1:9101"
format = "f32le"
sample_rate_hz = 12800
channels = ["c1"]

[[channels]]
id = "c1"
speed_rpm = 1500

[[bands]]
channel = "c1"
name = "hi"
lo_hz = 1000
hi_hz = 1500

[[tones]]
channel = "c1"
name = "mesh"
hz = 1234.5

[[tones]]
channel = "*"
name = "line"
hz = 50

[[tones]]
channel = "c1"
name = "30X"
order = 30
"""


@pytest.fixture
def files(tmp_path: Path) -> tuple[Path, Path]:
    t = np.arange(4 * FS) / FS
    x = 0.5 * np.sin(2 * np.pi * 50 * t) + 0.1 * np.sin(2 * np.pi * 1234.5 * t)
    wav = tmp_path / "rec.wav"
    scipy.io.wavfile.write(wav, FS, x.astype(np.float32))
    cfg = tmp_path / "c.toml"
    cfg.write_text(CONFIG)
    return wav, cfg


def test_items_beyond_fmax_warn_and_carry_their_reason(
    files: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    wav, cfg = files
    assert cli.main(["analyze", str(wav), "-c", str(cfg), "--fmax", "500", "--unit", "g",
                     "--json"]) == 0
    out, err = capsys.readouterr()
    warnings = [ln for ln in err.splitlines() if ln.startswith("warning:")]
    tail = "lies beyond Fmax 500 Hz (channel 'c1', profile 'default'): not measured"
    # 30 orders of 1500 r/min = 750 Hz (orders times running speed, common practice)
    assert warnings == [
        f"warning: band 'hi' at 1000-1500 Hz {tail}; raise --fmax to include it",
        f"warning: tone 'mesh' at 1234.5 Hz {tail}; raise --fmax to include it",
        f"warning: tone '30X' at 750 Hz {tail}; raise --fmax to include it",
    ]
    (ch,) = json.loads(out)["channels"]
    assert ch["fmax_hz"] == 500
    assert ch["bands"] == [{"name": "hi", "lo_hz": 1000, "hi_hz": 1500, "value": None,
                            "reason": "beyond Fmax 500 Hz"}]
    tones = {t["name"]: t for t in ch["tones"]}
    assert tones["mesh"] == {"name": "mesh", "frequency_hz": 1234.5, "amplitude": None,
                             "reason": "beyond Fmax 500 Hz"}
    assert tones["30X"]["frequency_hz"] == pytest.approx(750.0)
    assert tones["30X"]["amplitude"] is None
    # the 50 Hz tone is measured: RMS of a 0.5 g sine = 0.5/sqrt(2) g, within the decimation
    # chain's passband ripple of at most 0.1 dB (1.2 %; dsp/chainplan.py)
    assert tones["line"]["amplitude"] == pytest.approx(0.5 / math.sqrt(2), rel=0.012)


def test_the_table_row_says_why(
    files: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    wav, cfg = files
    assert cli.main(["analyze", str(wav), "-c", str(cfg), "--fmax", "500", "--unit", "g"]) == 0
    out = capsys.readouterr().out
    rows = {ln.split()[0]: ln for ln in out.splitlines() if ln.startswith("    ")
            and not ln.strip()[0].isdigit()}
    assert rows["mesh"].split() == ["mesh", "1234.5", "Hz", "-", "(beyond", "Fmax", "500", "Hz)"]
    assert rows["hi"].split() == ["hi", "1000-1500", "Hz", "-", "(beyond", "Fmax", "500", "Hz)"]


def test_within_fmax_nothing_is_warned_and_the_tone_is_measured(
    files: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    wav, cfg = files
    assert cli.main(["analyze", str(wav), "-c", str(cfg), "--unit", "g", "--json"]) == 0
    out, err = capsys.readouterr()
    assert "warning" not in err
    (ch,) = json.loads(out)["channels"]
    tones = {t["name"]: t for t in ch["tones"]}
    assert tones["mesh"]["amplitude"] == pytest.approx(0.1 / math.sqrt(2), rel=1e-2)
    assert ch["bands"][0]["value"] == pytest.approx(0.1 / math.sqrt(2), rel=2e-2)


def test_an_octave_set_at_or_above_the_lowered_fmax_is_warned_of(
    files: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    wav, cfg = files
    cfg.write_text(CONFIG + '\n[[bands]]\nchannel = "c1"\nname = "hi3"\noctave = 3\n'
                   "lo_hz = 500\nhi_hz = 2000\n")
    assert cli.main(["analyze", str(wav), "-c", str(cfg), "--fmax", "500", "--unit", "g",
                     "--json"]) == 0
    out, err = capsys.readouterr()
    assert ("warning: band 'hi3' at 500-2000 Hz lies beyond Fmax 500 Hz (channel 'c1', "
            "profile 'default'): not measured; raise --fmax to include it") in err
    (ch,) = json.loads(out)["channels"]
    assert {"name": "hi3", "lo_hz": 500, "hi_hz": 2000, "value": None,
            "reason": "beyond Fmax 500 Hz"} in ch["bands"]
