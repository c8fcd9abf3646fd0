"""Tests for service.cli: check, serve's refusal, analyze against theory and scipy, feed over
loopback TCP (raw, framed, loop, reconnect), bench pass-through, option help and messages."""

from __future__ import annotations

import argparse
import asyncio
import io
import json
import math
import re
import socket
import sys
import types
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.io.wavfile
import scipy.signal

import service.demo
from service import cli
from service.config import parse_config
from service.wire import FrameDecoder, decode_raw

EXAMPLES = Path(__file__).resolve().parents[2] / "service" / "examples"
G_N = 9.80665  # m/s² per g, exact (3rd CGPM, 1901)
FS = 12800.0
N_FRAME = 4096  # 2.56 × 1600 lines (common practice: N = 2.56·lines)
DF = FS / N_FRAME  # line spacing fs/N, Hz

# --- check / serve / demo ------------------------------------------------------------------


def test_check_example_config_prints_every_channel(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["check", "-c", str(EXAMPLES / "plant.toml")]) == 0
    out = capsys.readouterr().out
    for cid in ("p1-de-h", "p1-de-v", "p2-de-h", "p2-de-v", "f1-gb-h"):
        assert cid in out
    # N = 2.56·lines and df = fs/N (common practice): 1600 lines at 12800/s, 800 at 5120/s
    assert ("p1-de-h (pump-1): fs 12800 Hz, Fmax 5000 Hz, 1600 lines, df 3.125 Hz, hann, "
            "N 4096, hop 1024") in out
    assert ("f1-gb-h (fan-1): fs 5120 Hz, Fmax 2000 Hz, 800 lines, df 2.5 Hz, hann, "
            "N 2048, hop 512") in out


GOOD = """
[analysis]
fmax_hz = 5000
lines = 1600
window = "hann"

[[sources]]
id = "line-a"
kind = "tcp"
listen = "127.0.0.1:9101"
format = "f32le"
sample_rate_hz = 12800
channels = ["p1-de-h", "p1-de-v"]

[[channels]]
id = "p1-de-h"
"""


def test_check_minimal_config_decimates_to_the_next_higher_fmax(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    p = tmp_path / "q.toml"
    p.write_text(GOOD.replace("fmax_hz = 5000", "fmax_hz = 2000"))
    assert cli.main(["check", "-c", str(p)]) == 0
    out = capsys.readouterr().out
    assert "p1-de-v (line-a)" in out
    # 12800/(2.56·2000) = 2.5 is not an integer: the chain decimates by 2 (stages of 2–10)
    # to 6400 Hz, whose Fmax 6400/2.56 = 2500 Hz is the next higher one (common practice)
    assert "decimated x2 (2) to 6400 Hz, Fmax 2500 Hz, 1600 lines, df 1.5625 Hz" in out
    assert ("note: fs_in/(2.56·Fmax) = 2.5 is not an integer: decimating by 2 to 6400 Hz "
            "gives the next higher Fmax, 2500 Hz (asked 2000 Hz)") in out


@pytest.mark.parametrize(
    ("edit", "expected"),
    [
        (('window = "hann"', 'window = "hanning"'), r"analysis\.window: 'hanning' is not one of"),
        (('id = "p1-de-h"', 'id = "p9-de-h"'),
         r"channels\[0\]\.id: 'p9-de-h' is not produced by any source"),
        (("lines = 1600", "lines = 1600 1600"), r"TOML syntax error: .*line 4"),
        (('[analysis]', '[service]\nlisten = "0.0.0.0:8750"\n[analysis]'),
         r"service\.listen: '0\.0\.0\.0:8750' is not a loopback address"),
    ],
)
def test_check_bad_config_prints_the_key_path(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], edit: tuple[str, str], expected: str
) -> None:
    p = tmp_path / "q.toml"
    p.write_text(GOOD.replace(*edit))
    assert cli.main(["check", "-c", str(p)]) == 2
    err = capsys.readouterr().err
    assert err.splitlines()[0].startswith(f"{p}: 1 problem")
    assert re.search(expected, err), err


def _fake_app(monkeypatch: pytest.MonkeyPatch) -> dict[str, list[Any]]:
    """Stand in for service.runner and the demo's config so serve/demo wiring is seen without
    running a server."""
    calls: dict[str, list[Any]] = {"demo_config": [], "run_service": [], "config_path": []}

    def demo_config(**kw: Any) -> Any:
        calls["demo_config"].append(kw)
        return parse_config({"service": {"listen": kw["listen"] or "127.0.0.1:8750"},
                                  "sources": [{"id": "s", "kind": "simulated"}]}, env={})

    def run_service(cfg: Any, *, announce: Callable[[str], None] = print,
                    config_path: Any = None) -> int:
        calls["run_service"].append(cfg)
        calls["config_path"].append(config_path)
        announce("started")
        return 0

    mod = types.ModuleType("service.runner")
    mod.run_service = run_service  # type: ignore[attr-defined]
    monkeypatch.setitem(sys.modules, "service.runner", mod)
    monkeypatch.setattr(service.demo, "demo_config", demo_config)
    monkeypatch.setattr(service.demo, "DEMO_OPERATOR_TOKEN", "t-demo")
    return calls


def test_serve_with_a_bad_config_exits_2_without_starting(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    calls = _fake_app(monkeypatch)
    p = tmp_path / "q.toml"
    p.write_text(GOOD.replace('window = "hann"', 'window = "hanning"'))
    assert cli.main(["serve", "-c", str(p)]) == 2
    assert "analysis.window: 'hanning' is not one of" in capsys.readouterr().err
    wide = tmp_path / "wide.toml"
    wide.write_text('[service]\nlisten = "0.0.0.0:8750"\n' + GOOD)
    assert cli.main(["serve", "-c", str(wide)]) == 2
    assert "is not a loopback address" in capsys.readouterr().err
    assert calls["run_service"] == []
    p.write_text(GOOD)
    assert cli.main(["serve", "-c", str(p)]) == 0
    assert [c.service.listen for c in calls["run_service"]] == ["127.0.0.1:8750"]
    assert calls["config_path"] == [str(p)]  # what a reload re-reads


def test_demo_passes_its_options_to_the_service(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    calls = _fake_app(monkeypatch)
    from service.cli import run as run_cmd

    free = {"127.0.0.1:8751": True}  # what the demo finds of its input's port
    monkeypatch.setattr(run_cmd, "_port_free", lambda listen: free[listen])
    argv = ["demo", "--listen", "127.0.0.1:9999", "--data-dir", "d", "--speed", "10"]
    assert cli.main(argv) == 0
    assert calls["demo_config"] == [{"listen": "127.0.0.1:9999", "data_dir": "d", "speed": 10.0,
                                     "feed_listen": "127.0.0.1:8751"}]
    out = capsys.readouterr().out
    assert "started" in out and "demo operator token" in out and "t-demo" in out
    assert ("QUAVER_TOKEN=t-demo quaver feed FILE.wav --to 127.0.0.1:8751 --format framed "
            "--api http://127.0.0.1:9999") in out
    assert cli.main(["demo", "--listen", "0.0.0.0:8750"]) == 2  # no tokens: refused
    assert cli.main(["demo", "--feed-listen", "0.0.0.0:8751"]) == 2  # loopback only
    assert len(calls["run_service"]) == 1
    assert cli.main(["demo", "--feed-listen", "none"]) == 0
    assert calls["demo_config"][-1]["feed_listen"] is None
    assert "quaver feed" not in capsys.readouterr().out
    # the default port taken: the demo starts without its input and says so
    free["127.0.0.1:8751"] = False
    assert cli.main(["demo"]) == 0
    assert calls["demo_config"][-1]["feed_listen"] is None
    got = capsys.readouterr()
    assert "127.0.0.1:8751 is taken; starting without the TCP input" in got.err
    assert "quaver feed" not in got.out
    # an address asked for is used as it is (a taken one fails the start, as any source)
    assert cli.main(["demo", "--feed-listen", "127.0.0.1:8761"]) == 0
    assert calls["demo_config"][-1]["feed_listen"] == "127.0.0.1:8761"


def test_port_free_sees_a_listener() -> None:
    from service.cli.run import _port_free

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        taken = f"127.0.0.1:{s.getsockname()[1]}"
        assert not _port_free(taken)
    assert _port_free(taken)  # closed: free again


# --- analyze ---------------------------------------------------------------------------------


def _signal(seconds: float = 5.0) -> np.ndarray:
    """0.5 g RMS at 160.3 Hz + 0.1 g RMS at 1234.5 Hz (both between lines) + 0.01 g noise."""
    k = np.arange(int(seconds * FS))
    rng = np.random.default_rng(20240611)
    x = (0.5 * math.sqrt(2) * np.sin(2 * np.pi * 160.3 * k / FS + 0.3)
         + 0.1 * math.sqrt(2) * np.sin(2 * np.pi * 1234.5 * k / FS + 1.1)
         + rng.normal(0.0, 0.01, k.size))
    return x


def _analyze(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[dict[str, Any], str]:
    assert cli.main(["analyze", *argv, "--json"]) == 0
    cap = capsys.readouterr()
    return json.loads(cap.out), cap.err  # stdout is the JSON document and nothing else


def _near(peaks: list[dict[str, float]], f_hz: float) -> dict[str, float]:
    return min(peaks, key=lambda p: abs(p["frequency_hz"] - f_hz))


def _db(a: float, b: float) -> float:
    return abs(20 * math.log10(a / b))


@pytest.fixture(scope="module")
def wav_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    # int16 WAV whose full scale (2**15 counts) stands for 2 g: stored x/2, so --sensitivity 2
    # (g per full scale) restores g. 16-bit PCM full scale = 2**15 (WAV PCM, common practice).
    p = tmp_path_factory.mktemp("wav") / "rec.wav"
    scipy.io.wavfile.write(p, int(FS), np.round(_signal() / 2 * 2**15).astype(np.int16))
    return p


def test_analyze_wav_peaks_bands_and_tones_in_g(
    wav_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    doc, err = _analyze(capsys, str(wav_path), "--unit", "g", "--sensitivity", "2",
                        "--band", "one:100:200", "--tone", "t160:160.3", "--peaks", "4")
    (ch,) = doc["channels"]
    assert ch["fs_hz"] == FS and ch["df_hz"] == DF and ch["f0_hz"] == 0.0
    assert ch["unit"] == "g" and ch["amplitude"] == "rms" and ch["window"] == "hann"
    # linear over the whole recording: (64000 − 4096)//1024 + 1 frames (scipy.signal.welch's count)
    assert ch["averaging"] == "linear" and ch["averages"] == (64000 - N_FRAME) // 1024 + 1
    assert len(ch["spectrum"]) == 1601  # lines 0…1600, f = q·df
    for f_hz, a_rms in ((160.3, 0.5), (1234.5, 0.1)):
        p = _near(ch["peaks"], f_hz)
        # interpolated peaks: ±0.05 line and 0.1 dB, where the highest line alone of a Hann
        # spectrum can be up to 1.42 dB low (Harris 1978 Table 1, scalloping loss)
        assert abs(p["frequency_hz"] - f_hz) < 0.05 * DF
        assert _db(p["amplitude"], a_rms) < 0.1
    # a sine inside a band reads its RMS A/√2 for peak A (Heinzel et al. 2002 §10, Parseval)
    (band,) = ch["bands"]
    assert band["name"] == "one" and band["value"] == pytest.approx(0.5, rel=0.005)
    # a tracked tone is the DFT at its exact frequency: no scalloping (Heinzel et al. 2002 §9)
    (tone,) = ch["tones"]
    assert tone["name"] == "t160" and tone["frequency_hz"] == 160.3
    assert _db(tone["amplitude"], 0.5) < 0.05
    # overall 2–5000 Hz: √(0.5² + 0.1² + σ²·(5000−2)/6400) (Parseval; white noise σ² over fs/2)
    expect = math.sqrt(0.25 + 0.01 + 1e-4 * 4998 / 6400)
    assert ch["overall"] == pytest.approx(expect, rel=0.005)
    assert "100 %" in err  # progress went to stderr


def test_analyze_wav_scaling_and_spectrum_match_scipy_welch(
    wav_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    doc, _ = _analyze(capsys, str(wav_path), "--unit", "g")  # no sensitivity: ±1 full scale
    spectrum = np.array(doc["channels"][0]["spectrum"])
    _, x = scipy.io.wavfile.read(wav_path)
    # scipy.signal.welch: same periodic Hann frames, 75 % overlap, linear mean, RMS² per line;
    # lines q >= 1 of each frame less its window-weighted mean (docs/low-frequency.md), which
    # welch takes as a detrend function, and the DC line of the frames as they are
    w = scipy.signal.get_window("hann", N_FRAME)
    ps = [scipy.signal.welch(x / 2**15, FS, window="hann", nperseg=N_FRAME, noverlap=3072,
                             detrend=d, scaling="spectrum")[1]
          for d in (False, lambda seg: seg - (seg @ w / w.sum())[..., None])]
    ref = np.sqrt(np.r_[ps[0][:1], ps[1][1:1601]])
    big = ref > 1e-3 * ref.max()
    np.testing.assert_allclose(spectrum[big], ref[big], rtol=2e-4)
    np.testing.assert_allclose(spectrum[~big], ref[~big], atol=1e-6 * ref.max())
    assert _db(_near(doc["channels"][0]["peaks"], 160.3)["amplitude"], 0.25) < 0.1


def test_analyze_csv_velocity_and_peak_amplitude(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    x = _signal()
    p = tmp_path / "rec.csv"
    np.savetxt(p, np.c_[x, 0.5 * x], fmt="%.9g", delimiter=",", header="de-h,de-v", comments="")
    doc, _ = _analyze(capsys, str(p), "--rate", str(FS), "--unit", "velocity",
                      "--band", "low:100:200")
    assert [c["channel"] for c in doc["channels"]] == ["de-h", "de-v"]
    for ch, scale in zip(doc["channels"], (1.0, 0.5), strict=True):
        assert ch["unit"] == "mm/s"
        # v = a/(2πf) for a sine (common practice); g_n = 9.80665 m/s² exact (3rd CGPM 1901)
        v = scale * 0.5 * G_N / (2 * np.pi * 160.3) * 1000
        assert _near(ch["peaks"], 160.3)["amplitude"] == pytest.approx(v, rel=0.005)
        assert ch["bands"][0]["value"] == pytest.approx(v, rel=0.005)
    doc, _ = _analyze(capsys, str(p), "--rate", str(FS), "--unit", "g", "--amplitude", "peak")
    # peak amplitude of a sine = √2 × RMS (definition)
    assert _near(doc["channels"][0]["peaks"], 160.3)["amplitude"] == pytest.approx(
        0.5 * math.sqrt(2), rel=0.0116)  # 0.1 dB


def test_analyze_with_a_config_channel(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    cfg = tmp_path / "q.toml"
    cfg.write_text(GOOD.replace('[[channels]]\nid = "p1-de-h"',
                                '[[channels]]\nid = "p1-de-h"\nsensitivity = 2.0\nspeed_rpm = 9618')
                   + '\n[[bands]]\nname = "1X"\nlo_order = 0.9\nhi_order = 1.1\n'
                   + '\n[[tones]]\nname = "1X"\norder = 1\n')
    wav = tmp_path / "rec.wav"
    scipy.io.wavfile.write(wav, int(FS), np.round(_signal() / 2 * 2**15).astype(np.int16))
    doc, _ = _analyze(capsys, str(wav), "-c", str(cfg), "--channel", "p1-de-h", "--unit", "g")
    (ch,) = doc["channels"]
    assert ch["config_channel"] == "p1-de-h" and ch["sensitivity"] == 2.0
    # 9618 r/min = 160.3 Hz: the order band and order tone land on the 0.5 g sine
    assert ch["bands"][0]["name"] == "1X"
    assert ch["bands"][0]["value"] == pytest.approx(0.5, rel=0.005)
    assert ch["tones"][0]["frequency_hz"] == pytest.approx(160.3)
    assert _db(ch["tones"][0]["amplitude"], 0.5) < 0.05
    assert cli.main(["analyze", str(wav), "-c", str(cfg)]) == 2  # two channels: which one?
    assert "choose one with --channel (channels: 'p1-de-h', 'p1-de-v')" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("argv", "expected"),
    [
        (["--window", "hanning"], r"--window: invalid choice: 'hanning' \(choose from .*'hann'"),
        (["--unit", "furlong"], r"--unit: invalid choice: 'furlong' \(choose from .*'mm/s'"),
        (["--band", "x:200:100"], r"--band: 'x:200:100': need 0 <= LO_HZ < HI_HZ"),
        (["--lines", "1601"], r"--lines: 2\.56·1601 = 4098\.56 samples is not an integer"),
        (["--fmax", "6000"], r"--fmax 6000 Hz needs a sample rate of at least 2\.56\*fmax = 15360"),
        (["--overlap", "1.5"], r"--overlap: Input should be less than 1"),
        (["--format", "mp3"], r"--format: invalid choice: 'mp3'"),
    ],
)
def test_analyze_bad_options_are_one_line(
    wav_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str], expected: str
) -> None:
    assert cli.main(["analyze", str(wav_path), *argv]) != 0
    err = capsys.readouterr().err
    assert re.search(expected, err), err
    assert len(err.strip().splitlines()) == 1, err  # one readable line, no usage dump or traceback


def test_analyze_missing_file_and_raw_without_rate(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert cli.main(["analyze", str(tmp_path / "nope.wav")]) == 1
    assert "nope.wav: no such file" in capsys.readouterr().err
    raw = tmp_path / "rec.bin"
    raw.write_bytes(np.zeros(100, "<f4").tobytes())
    assert cli.main(["analyze", str(raw), "--format", "f32le", "--channels", "1"]) == 1
    assert "format 'f32le' needs the sample rate fs in Hz" in capsys.readouterr().err


def test_option_parsers_name_the_bad_value() -> None:
    with pytest.raises(ValueError, match=r"'overall' is not NAME:LO_HZ:HI_HZ"):
        cli.parse_band("overall")
    with pytest.raises(ValueError, match=r"'a:1:b': band edges must be numbers of Hz"):
        cli.parse_band("a:1:b")
    with pytest.raises(ValueError, match=r"'mesh' is not NAME:HZ"):
        cli.parse_tone("mesh")
    with pytest.raises(ValueError, match=r"'mesh:-3': the tone frequency must be > 0 Hz"):
        cli.parse_tone("mesh:-3")
    b = cli.parse_band("1X:20.5:30")
    assert (b.name, b.edges_hz()) == ("1X", (20.5, 30.0))
    with pytest.raises(ValueError, match=r"format='wav' is not one of 's16le', .*'framed'"):
        cli.feed_recording(np.zeros((1, 4)), 100.0, "127.0.0.1", 9, fmt="wav")


def test_progress_in_place_on_a_terminal_and_quarters_elsewhere() -> None:
    log = io.StringIO()
    p = cli.Progress("job", 1000, log)
    for done in range(0, 1001, 10):
        p.update(done)
    p.close()
    assert log.getvalue() == "job: 25 %\njob: 50 %\njob: 75 %\njob: 100 %\n"

    class Tty(io.StringIO):
        def isatty(self) -> bool:
            return True

    tty = Tty()
    p = cli.Progress("job", 200, tty)
    for done in range(0, 201):
        p.update(done)
    p.close()
    text = tty.getvalue()
    assert text.count("\r") == 101 and text.endswith("\rjob: 100 %\n") and text.count("\n") == 1


def test_every_option_has_help() -> None:
    # a setting without help is a bug (datasette's habit): every subcommand option documented
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    assert set(sub.choices) == {"demo", "serve", "check", "analyze", "feed", "bench"}
    for name, p in sub.choices.items():
        for action in p._actions:
            assert action.help and action.help.strip(), (name, action.dest)


# --- feed ------------------------------------------------------------------------------------

Handler = Callable[[asyncio.StreamReader, asyncio.StreamWriter], Awaitable[None]]


def _feed(argv: list[str], handler: Handler) -> int:
    """Run `quaver feed ... --to <a loopback server running handler>` in a thread; bounded."""

    async def scenario() -> int:
        server = await asyncio.start_server(handler, "127.0.0.1", 0)
        port = server.sockets[0].getsockname()[1]
        try:
            return await asyncio.wait_for(
                asyncio.to_thread(cli.main, ["feed", *argv, "--to", f"127.0.0.1:{port}"]), 60)
        finally:
            server.close()
            await server.wait_closed()

    return asyncio.run(scenario())


def _collector(conns: list[bytearray], first_limit: int | None = None) -> Handler:
    """Keep each connection's bytes; with first_limit, the first connection is closed by the
    server after that many bytes (mid-stream, with the producer still sending)."""

    async def handle(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        buf = bytearray()
        conns.append(buf)
        try:
            if first_limit is not None and len(conns) == 1:
                buf += await reader.readexactly(first_limit)
            else:
                while chunk := await reader.read(1 << 16):
                    buf += chunk
        finally:
            writer.close()
            try:
                await writer.wait_closed()
            except OSError:
                pass  # the reset we provoked

    return handle


def _float_wav(path: Path, seconds: float, channels: int = 2) -> np.ndarray:
    x = np.random.default_rng(5).normal(0.0, 0.3, (channels, int(seconds * FS))).astype(np.float32)
    scipy.io.wavfile.write(path, int(FS), x.T)  # float WAV: values kept as they are
    return x


def _frames(buf: bytes) -> tuple[list[Any], FrameDecoder]:
    dec = FrameDecoder()
    return dec.feed(bytes(buf)), dec


def test_feed_raw_sends_exactly_the_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    x = _float_wav(tmp_path / "a.wav", 2.0)
    conns: list[bytearray] = []
    assert _feed([str(tmp_path / "a.wav"), "--speed", "0"], _collector(conns)) == 0
    (buf,) = conns
    data, rest = decode_raw(bytes(buf), "f32le", 2)  # interleaved little-endian f32
    assert rest == b""
    np.testing.assert_array_equal(data, x)
    assert "done: 25600 samples per channel, 0 reconnect(s)" in capsys.readouterr().err


def test_feed_s16le_with_scale_restores_the_wav_counts(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    counts = np.random.default_rng(3).integers(-32768, 32768, (2, 3000)).astype(np.int16)
    scipy.io.wavfile.write(tmp_path / "a.wav", int(FS), counts.T)
    conns: list[bytearray] = []
    argv = [str(tmp_path / "a.wav"), "--speed", "0", "--format", "s16le", "--scale", "32768"]
    assert _feed(argv, _collector(conns)) == 0
    assert bytes(conns[0]) == counts.T.astype("<i2").tobytes()  # WAV's own interleaved bytes
    conns.clear()
    # without --scale the ±1 values are no counts at all; 2.0 does not fit s16le once scaled
    # by 32768·2, refused before connecting
    argv[-1] = "65536"
    assert _feed(argv, _collector(conns)) == 1
    assert "values do not fit s16le" in capsys.readouterr().err
    assert conns == []


def test_feed_framed_carries_rate_indices_and_time(tmp_path: Path) -> None:
    x = _float_wav(tmp_path / "a.wav", 1.0)
    conns: list[bytearray] = []
    argv = [str(tmp_path / "a.wav"), "--speed", "0", "--format", "framed", "--block-ms", "50",
            "--loop", "2"]
    assert _feed(argv, _collector(conns)) == 0
    frames, dec = _frames(conns[0])
    assert dec.malformed == 0 and dec.pending_bytes == 0
    block = 640  # 50 ms at 12800/s
    n = x.shape[1]
    assert [f.first_index for f in frames] == list(range(0, 2 * n, block))  # continuing indices
    assert {f.fs for f in frames} == {FS} and {f.channels for f in frames} == {2}
    np.testing.assert_array_equal(np.concatenate([f.data for f in frames], axis=1),
                                  np.concatenate([x, x], axis=1))
    dt = np.diff([f.t_ns for f in frames])
    assert np.all(np.abs(dt - block / FS * 1e9) <= 1)  # t = start + index/fs, rounded to ns


@pytest.mark.parametrize("fmt", ["framed", "f32le"])
def test_feed_reconnects_after_a_mid_stream_close(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], fmt: str
) -> None:
    # 60 s of 2 channels (6 MB) is far more than loopback buffers hold, so the producer is
    # still sending when the server closes after 30 000 bytes
    x = _float_wav(tmp_path / "a.wav", 60.0)
    n = x.shape[1]
    block = 1280
    conns: list[bytearray] = []
    rc = _feed([str(tmp_path / "a.wav"), "--speed", "0", "--format", fmt],
               _collector(conns, first_limit=30000))
    err = capsys.readouterr().err
    assert rc == 0, err
    assert len(conns) == 2 and "reconnected to 127.0.0.1" in err
    if fmt == "framed":
        first, dec1 = _frames(conns[0])
        assert dec1.pending_bytes > 0  # the cut-off frame: held by the receiver, never decoded
        second, dec2 = _frames(conns[1])
        assert dec2.malformed == 0 and dec2.pending_bytes == 0
        got1 = np.concatenate([f.data for f in first], axis=1)
        end1 = got1.shape[1]
        start2 = second[0].first_index
        assert [f.first_index for f in second] == list(range(start2, n, block))
        got2 = np.concatenate([f.data for f in second], axis=1)
    else:
        got1, _ = decode_raw(bytes(conns[0]), "f32le", 2)
        end1 = got1.shape[1]
        got2, rest = decode_raw(bytes(conns[1]), "f32le", 2)
        assert rest == b""
        start2 = n - got2.shape[1]
    # what arrived is the file, in order: a prefix, then from a block boundary to the end
    np.testing.assert_array_equal(got1, x[:, :end1])
    assert start2 % block == 0 and start2 >= end1
    assert f"resuming at sample {start2}" in err
    np.testing.assert_array_equal(got2, x[:, start2:])


def test_feed_gives_up_after_its_retries(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _float_wav(tmp_path / "a.wav", 0.1)
    with socket.socket() as s:  # a loopback port with nobody listening
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    rc = cli.main(["feed", str(tmp_path / "a.wav"), "--to", f"127.0.0.1:{port}", "--retries", "1"])
    assert rc == 1
    err = capsys.readouterr().err
    assert "attempt 1 of 1" in err and "cannot connect to 127.0.0.1" in err
    assert "after 2 attempt(s)" in err


# --- bench -----------------------------------------------------------------------------------


def test_bench_passes_options_through_and_prints_json(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["bench", "--channels", "1", "--seconds", "2", "--repeats", "1", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    (case,) = report["cases"]
    assert case["channels"] == 1 and case["fs_hz"] == 51200.0  # 2.56 × 20 kHz
    assert case["ratio"] > 0 and case["welch_ratio"] > 0 and case["loop_ratio"] > 0


@pytest.mark.parametrize("fmt", ["framed", "f32le"])
def test_feed_into_quaver_tcp_source(tmp_path: Path, fmt: str) -> None:
    # the real ingest: what the producer sends is what the source hands the pipeline
    from service.sources.tcp import TcpSource

    x = _float_wav(tmp_path / "a.wav", 1.0)

    async def scenario() -> tuple[int, list[Any]]:
        src = TcpSource("line-a", ["a", "b"], FS, "127.0.0.1", 0, fmt)
        await src.start()
        assert src.address is not None
        argv = ["feed", str(tmp_path / "a.wav"), "--speed", "0", "--format", fmt,
                "--to", f"127.0.0.1:{src.address[1]}"]
        producer = asyncio.create_task(asyncio.to_thread(cli.main, argv))
        blocks = []
        try:
            async with asyncio.timeout(30):
                async for b in src:
                    blocks.append(b)
                    if sum(b.n for b in blocks) >= x.shape[1]:
                        break
                rc = await producer
        finally:
            await src.aclose()
        return rc, blocks

    rc, blocks = asyncio.run(scenario())
    assert rc == 0
    assert blocks[0].first_index == 0
    assert [b.first_index for b in blocks[1:]] == list(np.cumsum([b.n for b in blocks])[:-1])
    np.testing.assert_array_equal(np.concatenate([b.data for b in blocks], axis=1), x)


def test_check_says_where_the_speed_of_an_order_warning_comes_from(
    capsys: pytest.CaptureFixture[str]
) -> None:
    # The demo's fan takes its speed from a tacho allowed down to 300 r/min: an order band
    # is judged at that lowest speed, and the warning says so rather than quoting 300 r/min
    # as if the fan ran there (a speed_rpm channel's warning stays as it was, test below).
    assert cli.main(["check", "-c", str(EXAMPLES / "demo.toml")]) == 0
    out = capsys.readouterr().out
    assert ("band '1x' (4-6 Hz at 300 r/min, the rpm_min of tacho v1-tacho) lies below the "
            "low-frequency limit") in out
    at_300 = [w for w in out.splitlines() if "at 300 r/min" in w]
    assert len(at_300) > 5 and all("at 300 r/min, the rpm_min of tacho v1-tacho" in w
                                   for w in at_300)


def test_check_warns_of_what_cannot_be_measured(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Regression (issue 14, items 4 and 5): check called these OK. Flat-top at 3.125 Hz lines
    # masks up to 5 lines = 15.625 Hz (its main-lobe half-width, Harris 1978), where 1X at
    # 720 r/min (12 Hz) lies; third-octave bands at 20-31.5 Hz (IEC 61260-1 base ten) are
    # 1.5-2.3 lines wide there, under the 6 lines flat-top needs.
    p = tmp_path / "q.toml"
    p.write_text(GOOD.replace('window = "hann"', 'window = "flattop"')
                 .replace('id = "p1-de-h"', 'id = "p1-de-h"\nspeed_rpm = 720')
                 + '\n[[tones]]\nchannel = "p1-de-h"\nname = "1X"\norder = 1\n'
                 + '\n[[bands]]\nchannel = "p1-de-h"\nname = "low"\nlo_hz = 1\nhi_hz = 10\n'
                 + '\n[[bands]]\nchannel = "p1-de-h"\nname = "t"\noctave = 3\nlo_hz = 17'
                 + '\nhi_hz = 36\n')
    assert cli.main(["check", "-c", str(p)]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"{p}: OK, with 5 warning(s) below")
    assert ("warning: tone '1X' at 12 Hz (order 1 at 720 r/min) lies below the low-frequency "
            "limit 15.625 Hz") in out
    assert "warning: band 'low' (1-10 Hz) lies below the low-frequency limit" in out
    assert "warning: band 't 20 Hz' (17.7828-22.3872 Hz) is 1.5 lines wide, under the 6" in out
    assert "warning: band 't 25 Hz' (22.3872-28.1838 Hz) is 1.9 lines wide, under the 6" in out
    assert "warning: band 't 31.5 Hz' (28.1838-35.4813 Hz) is 2.3 lines wide" in out
    # the other channel has none of these: no warning under it
    assert out.split("  p1-de-v (line-a)")[1].count("warning") == 0
    # Hann at the same lines, 1X at 1480 r/min (24.7 Hz): nothing to warn about
    p.write_text(GOOD.replace('id = "p1-de-h"', 'id = "p1-de-h"\nspeed_rpm = 1480')
                 + '\n[[tones]]\nchannel = "p1-de-h"\nname = "1X"\norder = 1\n'
                 + '\n[[bands]]\nchannel = "p1-de-h"\nname = "1X"\nlo_order = 0.8'
                 + '\nhi_order = 1.2\n')
    assert cli.main(["check", "-c", str(p)]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"{p}: OK\n") and "warning" not in out


def test_analyze_json_is_strict_with_bad_samples_and_unmeasurable_values(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # NaN/inf and absurd samples go through the service's own sensor checks (they become 0
    # and are counted); a tone below the low-frequency limit and an order tone without a
    # speed are null with a reason. The document is strict JSON (RFC 8259 has no NaN).
    x = _signal()
    x[1000:1010] = np.nan
    x[3000] = np.inf
    x[40000] = 1e30  # a later 1 s block: one reason a block
    p = tmp_path / "bad.csv"
    np.savetxt(p, x[:, None], fmt="%.9g", header="de-h", comments="")
    assert cli.main(["analyze", str(p), "--rate", str(FS), "--json", "--unit", "g",
                     "--tone", "low:3", "--band", "dc:0.5:4"]) == 0
    out = capsys.readouterr().out

    def no_constant(name: str) -> None:
        raise AssertionError(f"{name} in the JSON")

    doc = json.loads(out, parse_constant=no_constant)
    (ch,) = doc["channels"]
    assert ch["counters"]["nonfinite_blocks"] >= 1 and ch["counters"]["range_blocks"] >= 1
    assert ch["counters"]["sensor_faults"] >= 1
    assert all(v is not None for v in ch["spectrum"])
    (tone,) = ch["tones"]
    assert tone["amplitude"] is None and tone["reason"].startswith("below the low-frequency")
    (band,) = ch["bands"]
    assert band["value"] is None and "6.25 Hz" in band["reason"]


def test_console_script_and_python_m_service_reach_main() -> None:
    # pyproject's [project.scripts] target and `python -m service` both run cli.main
    import importlib
    import subprocess
    import tomllib

    root = Path(__file__).resolve().parents[2]
    target = tomllib.loads((root / "pyproject.toml").read_text())["project"]["scripts"]["quaver"]
    mod, _, fn = target.partition(":")
    assert getattr(importlib.import_module(mod), fn) is cli.main
    r = subprocess.run([sys.executable, "-m", "service", "check", "-c",
                        str(EXAMPLES / "plant.toml")], cwd=root, capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0 and r.stdout.startswith(f"{EXAMPLES / 'plant.toml'}: OK"), r
