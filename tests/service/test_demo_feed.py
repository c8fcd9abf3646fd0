"""Tests for the demo's network input: `quaver demo`'s framed TCP source fed by `quaver feed`
out of the box, read back through REST with the tone that was sent."""

from __future__ import annotations

import math
import re
import shlex
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from service.demo import demo_config
from service.recording import load_recording
from tests.service.conftest import HARNESS_TOKEN, REPO, child_env, run_service

FS = 12800.0  # the input's rate (service/examples/demo-feed.toml)
TONE_HZ = 120.0
AMP_G = 0.1  # peak, g
G_N = 9.80665  # m/s² per g, exact (3rd CGPM, 1901)


def _demo_with_input() -> dict[str, Any]:
    """The demo as `quaver demo` runs it, its fault moved out of reach, the input on a free
    loopback port (the harness's "auto")."""
    cfg = demo_config(fault_start_s=1e6, feed_listen="127.0.0.1:8751")
    doc = cfg.model_dump(mode="json", exclude_none=True, exclude_defaults=True)
    doc.pop("service", None)
    (rig,) = [s for s in doc["sources"] if s["id"] == "workshop-rig"]
    assert (rig["kind"], rig["format"], rig["channels"]) == ("tcp", "framed", ["rig-h"])
    rig["listen"] = "auto"
    return doc


def _readme_commands() -> tuple[str, list[str]]:
    """The README's two lines that feed the demo: the Python that writes the recording, and
    the `quaver feed` command (as argv after `quaver`)."""
    text = (REPO / "README.md").read_text(encoding="utf-8")
    make = re.search(r'^python -c "(.*write_wav.*)"$', text, re.M)
    feed = re.search(r"^QUAVER_TOKEN=\S+ quaver (feed .*--to 127\.0\.0\.1:8751.*)$", text, re.M)
    assert make and feed, "the README shows how to feed the demo"
    return make.group(1), shlex.split(feed.group(1))


def test_quaver_feed_reaches_the_demo_input(tmp_path: Path) -> None:
    make, feed = _readme_commands()
    subprocess.run([sys.executable, "-c", make], cwd=tmp_path, env=child_env(), check=True,
                   timeout=60)
    rec = load_recording(tmp_path / "tone.wav")
    assert (rec.fs, rec.data.shape) == (FS, (1, 128000))  # 10 s at the input's rate
    assert float(np.max(rec.data)) == pytest.approx(AMP_G, rel=1e-4)
    assert feed[feed.index("--format") + 1] == "framed" and "--loop" in feed
    with run_service(_demo_with_input(), tmp_path / "svc") as svc:
        port = svc.ports["workshop-rig"]
        assert svc.channel("rig-h")["status"] == "no-signal"  # nothing fed yet
        # the README's command on the test's port, once through at 4x and checked against
        # this service (the README's --api default is the demo's own 127.0.0.1:8750)
        argv = [a if a != "127.0.0.1:8751" else f"127.0.0.1:{port}" for a in feed
                if a != "--loop"]
        run = subprocess.run(
            [sys.executable, "-m", "service", *argv, "--api", svc.base_url, "--speed", "4"],
            cwd=tmp_path, env={**child_env(), "QUAVER_TOKEN": HARNESS_TOKEN},
            capture_output=True, text=True, timeout=60, check=False,
        )
        assert run.returncode == 0, run.stderr
        # feed asked the service which format the input reads, and it matched
        assert (f"feed: source 'workshop-rig' at 127.0.0.1:{port} reads framed, 1 channel(s) "
                "at 12800 Hz: matches") in run.stderr
        assert "feed: done: 128000 samples per channel, 0 reconnect(s)" in run.stderr
        assert svc.source("workshop-rig")["counters"]["samples"] == 128000
        tones = svc.wait(lambda: svc.get_or_none("channels/rig-h/tones"), "rig-h's spectrum")
        top = max(tones["peaks"], key=lambda p: p["amplitude"])
        # velocity RMS of an a = A·sin(2πft) acceleration: A·g/(2πf)/√2 (common practice)
        want_mm_s = AMP_G * G_N / (2 * math.pi * TONE_HZ) / math.sqrt(2) * 1000
        assert tones["unit"] == "mm/s"
        assert top["frequency_hz"] == pytest.approx(TONE_HZ, abs=0.01 * 3.125)  # df 3.125 Hz
        assert top["amplitude"] == pytest.approx(want_mm_s, rel=0.01)
        spectrum = svc.get("channels/rig-h/spectrum")
        q = int(np.argmax(spectrum["values"]))
        assert q * spectrum["df_hz"] == pytest.approx(TONE_HZ, abs=spectrum["df_hz"] / 2)
