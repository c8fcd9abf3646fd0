"""``quaver bench --dashboard`` end to end at a tiny size: a real service fed at real time,
the plant view in headless Chromium, every figure of the report present and sane. Run as a
user runs it, in a child process (``python -m service bench --dashboard … --json FILE``): it
starts Playwright of its own, which cannot share this process with the session's browser.

Knows the benchmark's report (bench.dashboard); asserts presence, ranges and the abnormal
machines' place, never timings (those are the benchmark's output, docs/performance.md)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from bench import harness
from bench.plant import PlantPlan

pytestmark = [pytest.mark.slow, pytest.mark.browser]


def test_dashboard_bench_reports_every_figure(chromium_path: Path, tmp_path: Path) -> None:
    plan = PlantPlan(channels=8, machines=2, danger=1, alert=0)
    out = tmp_path / "report.json"
    res = subprocess.run(
        [sys.executable, "-m", "service", "bench", "--dashboard", "--channels", "8",
         "--machines", "2", "--danger", "1", "--alert", "0", "--minutes", "0.3",
         "--json", str(out)],
        cwd=tmp_path, env=harness.child_env(), capture_output=True, text=True, timeout=600,
    )
    assert res.returncode == 0, res.stderr[-3000:]
    r: dict[str, Any] = json.loads(out.read_text(encoding="utf-8"))
    danger, alert = plan.abnormal()
    assert r["setup"]["danger"] == danger == ["m002"] and alert == []
    p, c = r["page"], r["service_cpu"]
    assert p["render_s"] > 0
    assert p["first_screen"]["cards_in_dom"] == 8
    assert p["first_screen"]["in_first_screen"] == ["m002"]
    assert p["first_screen"]["all_abnormal_in_first_screen"] is True
    assert p["busy_share_per_window"] and all(0.0 <= b <= 1.0
                                              for b in p["busy_share_per_window"])
    assert p["fps_per_window"] and all(f > 0 for f in p["fps_per_window"])
    # two heap checkpoints (half way and at the end of a run shorter than a minute)
    assert [h["after_s"] for h in p["heap_retained"]] == pytest.approx([9.0, 18.0], abs=3.0)
    assert all(h["mb"] > 0 for h in p["heap_retained"])
    assert p["bytes_per_s"] > 0 and p["load_bytes"] > 0 and p["ws_messages"] > 0
    assert p["page_errors"] == []
    assert 0 < c["closed_share"] and 0 < c["open_share"] and c["open_over_closed"] > 0
    assert len(c["closed_windows"]) == 2
    h = r["service_health"]
    assert h["frames_per_s_fed"] == 40.0  # 8 channels × 2560 Hz / hop 512
    assert h["frames_per_s"] > 0 and h["drops"] >= 0 and h["overrun_channels_at_end"] >= 0
    text = res.stdout  # the table the command prints beside its --json FILE
    for row in ("first full render", "abnormal machines in first screen  1/1",
                "main-thread busy share", "frame rate", "retained JS heap",
                "received by the page", "service kept up", "service CPU, page closed",
                "service CPU, page open"):
        assert row in text
