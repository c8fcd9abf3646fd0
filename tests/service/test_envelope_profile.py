"""Envelope profiles in the service: their config (kind, band, [[bearings]]), the defect
bands and tones a bearing gives them, the automatic band (kurtogram with hysteresis) and the
profile bank running them on the simulated pump with its growing outer-race defect."""

from __future__ import annotations

import copy
import json
import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.io.wavfile
import tomli_w

from dsp.kinematics import bearing_frequencies
from service import cli
from service.config import ConfigError, parse_config, profiles_of
from service.envelope import EnvelopeFront, EnvelopeSetup, keeps_band
from service.lookups import DEFECT_HALF_WIDTH, bands_for, effective_analysis, tones_for
from service.profiles import ProfileBank, plan_profiles
from service.sources.simulated import PUMP_DE_BEARING, demo_site

FS = 12_800.0


def base(**extra: Any) -> dict[str, Any]:
    """One TCP source of two channels at 12.8 kHz; a wide profile and an envelope one that
    channel 'a' (on a 9-ball bearing, 1480 r/min) lists."""
    doc: dict[str, Any] = {
        "analysis": {"fmax_hz": 5000.0, "lines": 1600, "unit": "velocity"},
        "profiles": {"wide": {}, "env": {"kind": "envelope", "fmax_hz": 500.0,
                                         "lines": 800}},
        "sources": [{"id": "s", "kind": "tcp", "listen": "127.0.0.1:9101", "format": "f32le",
                     "sample_rate_hz": FS, "channels": ["a", "b"]}],
        "bearings": [{"id": "de", "n_balls": 9, "ball_d": 11.9, "pitch_d": 52.5}],
        "channels": [{"id": "a", "speed_rpm": 1480.0, "bearing": "de",
                      "profiles": ["wide", "env"]}],
    }
    doc.update(copy.deepcopy(extra))
    return doc


def problems(doc: dict[str, Any]) -> list[str]:
    with pytest.raises(ConfigError) as e:
        parse_config(doc, env={})
    return e.value.problems


def test_an_envelope_profile_runs_only_where_listed_and_in_acceleration() -> None:
    cfg = parse_config(base(), env={})
    assert profiles_of(cfg, "a") == ["wide", "env"]
    assert profiles_of(cfg, "b") == ["wide"]  # not listed: no envelope profile
    env = effective_analysis(cfg, "a", "env")
    assert (env.kind, env.band, env.unit, env.output_unit) == (
        "envelope", "auto", "acceleration", None)
    assert effective_analysis(cfg, "a", "wide").unit == "velocity"


def test_bearing_defect_bands_and_tones_are_orders_of_speed() -> None:
    cfg = parse_config(base(), env={})
    # Randall & Antoni 2011: BPFO = (n·fr/2)(1 − d/D·cos φ); 9 balls, 11.9/52.5, 1480 r/min
    f = bearing_frequencies(9, 11.9, 52.5, 0.0, 1480 / 60)
    assert f.bpfo_hz == pytest.approx(85.84, abs=0.005)  # the demo's own comment
    bands = {b.name: b for b in bands_for(cfg, "a", "env")}
    assert list(bands) == ["BPFO", "2xBPFO", "3xBPFO", "BPFI", "2xBPFI", "BSF", "2xBSF"]
    fr = 1480 / 60
    for name, k, hz in (("BPFO", 1, f.bpfo_hz), ("2xBPFO", 2, f.bpfo_hz),
                        ("BPFI", 1, f.bpfi_hz), ("2xBSF", 2, f.bsf_hz)):
        b = bands[name]
        assert b.basis == "order"
        lo, hi = b.edges_hz(fr)
        assert (lo, hi) == pytest.approx((k * hz * (1 - DEFECT_HALF_WIDTH),
                                          k * hz * (1 + DEFECT_HALF_WIDTH)))
    tones = {t.name: t for t in tones_for(cfg, "a", "env")}
    assert tones["FTF"].frequency_hz(fr) == pytest.approx(f.ftf_hz)
    assert tones["1X"].frequency_hz(fr) == pytest.approx(fr)
    assert bands_for(cfg, "a", "wide") == []  # only envelope profiles get them
    # a band of the same name in the config wins over the generated one
    own = parse_config(base(bands=[{"channel": "a", "name": "BPFO", "lo_hz": 80.0,
                                    "hi_hz": 90.0}]), env={})
    assert [b for b in bands_for(own, "a", "env") if b.name == "BPFO"][0].basis == "hz"


@pytest.mark.parametrize(("change", "match"), [
    ({"profiles": {"env": {"kind": "envelope", "band": [300.0, 900.0], "fmax_hz": 500.0}}},
     r"profiles\.env\.band: the envelope band's lower edge 300 Hz must be above fmax_hz"),
    ({"profiles": {"env": {"kind": "envelope", "band": [1000.0, 7000.0], "fmax_hz": 500.0}}},
     r"profiles\.env\.band: the envelope band's upper edge 7000 Hz must be below half"),
    ({"profiles": {"env": {"kind": "envelope", "band": [900.0, 800.0]}}},
     r"profiles\.env\.band.*0 < lo_hz < hi_hz"),
    ({"profiles": {"env": {"kind": "demod"}}}, r"profiles\.env\.kind"),
    ({"channels": [{"id": "a", "bearing": "nope", "speed_rpm": 1480.0}]},
     r"channels\[0\]\.bearing: 'nope' is not a bearing \(bearings: 'de'\)"),
    ({"channels": [{"id": "a", "bearing": "de"}]},
     r"channels\[0\]\.bearing: channel 'a' has no running speed"),
    ({"bearings": [{"id": "de", "n_balls": 9, "ball_d": 60.0, "pitch_d": 52.5}]},
     r"bearings\[0\].*ball_d=60 must be smaller than pitch_d=52.5"),
    ({"bearings": [{"id": "de", "n_balls": 9, "ball_d": 11.9, "pitch_d": 52.5},
                   {"id": "de", "n_balls": 8, "ball_d": 10.0, "pitch_d": 50.0}]},
     r"bearings\[1\]\.id: 'de' repeats bearings\[0\]"),
])
def test_bad_envelope_and_bearing_config_is_named(change: dict[str, Any], match: str) -> None:
    found = problems(base(**change))
    assert any(re.search(match, p) for p in found), found


def test_keeps_band_needs_a_clear_margin() -> None:
    # our rule (service.envelope): max(0.1, 20 % of |held|)
    assert keeps_band(1.0, 1.19) and not keeps_band(1.0, 1.21)
    assert keeps_band(0.0, 0.1) and not keeps_band(0.0, 0.11)


def _fault(seconds: float, severity: float, seed: int = 3) -> np.ndarray:
    """The demo pump's p1-de-h at a fixed fault severity s (plant model, g): the ramp
    s(t) = (t − start)/ramp started long ago, so s stays put over the seconds rendered."""
    if severity:
        plant = demo_site(seed=seed, fault_start_s=-1e6, fault_ramp_s=1e6 / severity,
                          channels=["p1-de-h"], fs=FS)
    else:
        plant = demo_site(seed=seed, fault_start_s=1e9, channels=["p1-de-h"], fs=FS)
    return plant.render(0, int(seconds * FS))


def test_auto_band_holds_the_default_on_noise_and_finds_the_resonance() -> None:
    rng = np.random.default_rng(2)
    setup = EnvelopeSetup(band=None, interval_s=1.0, length_s=1.0, levels=6)
    front = EnvelopeFront(FS, 500.0, setup)
    assert front.band == (1250.0, 0.45 * FS)  # the broad default: 2.5·Fmax … 0.45·fs
    k = 0
    for _ in range(12):  # 12 s of white noise: nothing significant, the default stays
        front.push(rng.standard_normal((1, int(FS))), k)
        k += int(FS)
    assert front.kurtogram is not None and not front.chosen and front.changes == 0
    # the pump's outer-race defect rings a 3.3 kHz resonance (simulated.py): early in the
    # fault (severity 0.15, noise still strong) the first significant band holds it, within
    # one band width. (At full severity the strikes' sharp onsets make every band
    # impulsive, the highest most.)
    x = _fault(4.0, 0.15)[None, 0]
    for i in range(4):
        front.push(x[:, i * int(FS):(i + 1) * int(FS)], k)
        k += int(FS)
    lo, hi = front.band
    assert front.chosen and front.changes == 1
    assert lo - (hi - lo) <= 3300.0 <= hi + (hi - lo), front.band
    kg = front.kurtogram
    assert kg is not None and kg.best.kurtosis > 6 * kg.noise_spread(kg.best.level)
    # held: ten more kurtograms of the same fault move nothing (hysteresis, service.envelope)
    band = front.band
    more = _fault(10.0, 0.15, seed=4)[None, 0]
    for i in range(10):
        front.push(more[:, i * int(FS):(i + 1) * int(FS)], k)
        k += int(FS)
    assert front.band == band and front.changes == 1


def test_a_clearly_better_band_wins_after_two_kurtograms() -> None:
    # severity 0.1 picks the band around the 3.3 kHz resonance; at severity 0.6 the strikes'
    # sharp onsets make a wider, lower band far more impulsive (K ≈ 9 against ≈ 3-4 of the
    # held band, measured): it is taken on the second kurtogram that finds it so, not the
    # first (service.envelope.CONFIRM)
    front = EnvelopeFront(FS, 500.0, EnvelopeSetup(band=None, interval_s=1.0, length_s=1.0))
    k = 0
    seen = []
    for sev in (0.1, 0.6):
        x = _fault(3.0, sev)[None, 0]
        for i in range(3):
            front.push(x[:, i * int(FS):(i + 1) * int(FS)], k)
            k += int(FS)
            seen.append((front.band, front.changes))
    first = seen[2][0]
    assert first[0] - (first[1] - first[0]) <= 3300.0 <= first[1] + (first[1] - first[0])
    assert [c for _, c in seen] == [1, 1, 1, 1, 2, 2]  # one win is not enough; two are
    assert seen[4][0] != first and front.held_kurtosis is not None
    kg = front.kurtogram
    assert kg is not None and front.held_kurtosis > 1.2 * kg.kurtosis_at(*first)


def test_bank_envelope_bpfo_grows_with_the_fault_and_is_the_top_envelope_line() -> None:
    doc = base(sources=[{"id": "s", "kind": "tcp", "listen": "127.0.0.1:9101",
                         "format": "f32le", "sample_rate_hz": FS, "channels": ["a"]}])
    doc["profiles"]["env"].update(kurtogram_interval_s=2.0, averages=4)
    cfg = parse_config(doc, env={})
    plan = {p.name: p for p in plan_profiles(cfg, "a", FS)}["env"]
    assert plan.envelope is not None and (plan.factor, plan.fmax_hz) == (10, 500.0)

    def run(severity: float) -> tuple[float, float, np.ndarray, np.ndarray]:
        bank = ProfileBank(cfg, ["a"], FS)
        g = next(g for g in bank.groups if g.profile == "env")
        x = _fault(12.0, severity).astype(np.float32)
        blk = 3200
        for k in range(0, x.shape[1], blk):
            bank.push(x[:, k:k + blk], k)
        an = g.analyzer
        names = [b.name for b in g.bands]
        return (float(an.bands()[0, names.index("BPFO")]),
                float(an.bands()[0, names.index("2xBSF")]), an.spectrum()[0],
                np.arange(an.grid.lines + 1) * an.grid.df_hz)

    healthy, _, _, _ = run(0.0)
    faulty, bsf, spec, f = run(0.3)
    bpfo = PUMP_DE_BEARING.frequencies(1480 / 60).bpfo_hz
    # Randall & Antoni 2011: the envelope of the demodulated resonance band shows BPFO; the
    # healthy pump's envelope BPFO band holds only noise
    assert faulty > 20 * healthy, (healthy, faulty)
    assert faulty > 5 * bsf
    keep = f > 20.0
    top = f[keep][np.argmax(spec[keep])]
    assert abs(top - bpfo) < 2 * f[1] + 0.01 * bpfo, (top, bpfo)
    assert math.isfinite(healthy)


def test_analyze_runs_an_envelope_profile_on_a_recording(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the demo pump's p1-de-h early in its fault (severity 0.3), 12 s as a float WAV
    wav = tmp_path / "p1.wav"
    scipy.io.wavfile.write(wav, int(FS), _fault(12.0, 0.3)[0].astype(np.float32))
    doc = base(sources=[{"id": "s", "kind": "tcp", "listen": "127.0.0.1:9101",
                         "format": "f32le", "sample_rate_hz": FS, "channels": ["a"]}])
    doc["profiles"]["env"].update(kurtogram_interval_s=2.0, averages=4)
    cfg = tmp_path / "q.toml"
    cfg.write_bytes(tomli_w.dumps(doc).encode())
    assert cli.main(["analyze", str(wav), "-c", str(cfg), "--profile", "env", "--json"]) == 0
    (ch,) = json.loads(capsys.readouterr().out)["channels"]
    bands = {b["name"]: b for b in ch["bands"]}
    tones = {t["name"]: t for t in ch["tones"]}
    bpfo = PUMP_DE_BEARING.frequencies(1480 / 60).bpfo_hz
    # the same numbers as the profile bank gives (test above): BPFO stands out of the
    # envelope, far above the BSF harmonic band; the tracked tone sits at BPFO
    assert bands["BPFO"]["value"] > 5 * bands["2xBSF"]["value"] > 0
    assert tones["BPFO"]["frequency_hz"] == pytest.approx(bpfo)
    assert ch["unit"] == "g"


@pytest.mark.parametrize("blocks", [[12_800], [1000, 4321, 7479], [256] * 50])
def test_fixed_band_channels_share_one_front_and_streaming_equals_batch(
    blocks: list[int]
) -> None:
    # two channels with the same fixed band run one vectorised envelope; cutting the same
    # 2 s into other blocks gives the same envelope band values (streaming equals batch),
    # to float32 rounding
    doc = base(channels=[{"id": c, "speed_rpm": 1480.0, "bearing": "de",
                          "profiles": ["wide", "env"]} for c in ("a", "b")])
    doc["profiles"]["env"].update(band=[2500.0, 4500.0], averages=2)
    cfg = parse_config(doc, env={})
    x = np.concatenate([_fault(2.0, 0.3), _fault(2.0, 0.0)]).astype(np.float32)

    def run(sizes: list[int]) -> np.ndarray:
        bank = ProfileBank(cfg, ["a", "b"], FS)
        (g,) = [g for g in bank.groups if g.profile == "env"]
        assert g.channel_ids == ("a", "b") and g.front is not None
        k = 0
        for n in sizes * (x.shape[1] // sum(sizes)) + [x.shape[1] % sum(sizes)]:
            if n:
                bank.push(x[:, k:k + n], k)
                k += n
        assert k == x.shape[1]
        return np.asarray(g.analyzer.bands())

    one = run([x.shape[1]])
    got = run(blocks)
    np.testing.assert_allclose(got, one, rtol=1e-4)
    names = [b.name for b in bands_for(cfg, "a", "env")]
    i = names.index("BPFO")
    assert one[0, i] > 10 * one[1, i]  # the faulty channel against the healthy one
