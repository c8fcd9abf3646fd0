"""Tests of ``quaver bench --dashboard``'s pure parts: the arithmetic of its figures against
hand-made samples and the standard library, the generated plant against the config loader,
and the options it refuses.

Knows bench.pagestats, bench.plant, the config loader and the CLI; no browser, no service
(the run end to end is tests/web/test_dashboard_bench.py), no timings."""

from __future__ import annotations

import base64
import math
from collections import Counter
from pathlib import Path

import pytest

from bench.pagestats import busy_shares, cpu_ratio, per_window_rates, ws_payload_bytes
from bench.plant import ALERT_GAIN, DANGER_GAIN, PER_SOURCE, PlantPlan, config_doc
from service.cli import main as cli_main
from service.config import parse_config

# --- arithmetic ------------------------------------------------------------------------------


def test_busy_share_is_task_time_over_wall_time_per_window():
    # 0.1 s of main-thread work per second for the first minute, 0.3 s per second after:
    # samples every 5 s of the cumulative TaskDuration, as Performance.getMetrics gives them.
    samples, busy = [], 0.0
    for k in range(0, 25):  # 0…120 s
        t = 1000.0 + 5.0 * k
        samples.append((t, busy))
        busy += 0.5 if t < 1060.0 else 1.5
    assert busy_shares(samples, 60.0) == pytest.approx([0.1, 0.3])


def test_windows_chain_so_no_interval_is_lost():
    # one sample per window: each window's rate still spans from the previous window's end
    samples = [(0.0, 0.0), (30.0, 300.0), (60.0, 900.0)]
    assert per_window_rates(samples, 30.0) == pytest.approx([10.0, 20.0])
    # a last sample just past a window's end (clock jitter) does not make a window of its own
    assert per_window_rates([(0.0, 0.0), (10.0, 600.0), (18.02, 1081.2)], 18.0) == \
        pytest.approx([60.0])


def test_busy_share_is_clamped_to_one_core():
    # rounding in the metrics can make the task time run a hair ahead of the clock
    assert busy_shares([(0.0, 0.0), (10.0, 10.001)], 60.0) == [1.0]
    assert busy_shares([(0.0, 5.0), (10.0, 5.0)], 60.0) == [0.0]


def test_too_few_samples_give_no_window_and_a_bad_window_is_refused():
    assert busy_shares([(0.0, 0.0)], 60.0) == []
    with pytest.raises(ValueError, match="window_s must be > 0"):
        per_window_rates([(0.0, 0.0), (1.0, 1.0)], 0.0)


@pytest.mark.parametrize("raw", [b"", b"a", b"ab", b"abc", bytes(range(256)) * 3 + b"xy"])
def test_binary_websocket_payload_counts_decoded_bytes(raw):
    # DevTools gives binary frames base64 encoded (RFC 4648); the count is the decoded length
    assert ws_payload_bytes(base64.b64encode(raw).decode(), opcode=2) == len(raw)


def test_text_websocket_payload_counts_utf8_bytes():
    assert ws_payload_bytes('{"unit":"µm"}', opcode=1) == len('{"unit":"µm"}'.encode())


def test_cpu_ratio_compares_shares_not_seconds():
    # 12 s of CPU in 120 s open against 6 s in 60 s closed: the same share
    assert cpu_ratio(12.0, 120.0, 6.0, 60.0) == pytest.approx(1.0)
    assert cpu_ratio(9.0, 60.0, 6.0, 60.0) == pytest.approx(1.5)
    assert math.isnan(cpu_ratio(1.0, 60.0, 0.0, 60.0))
    with pytest.raises(ValueError, match="wall spans"):
        cpu_ratio(1.0, 0.0, 1.0, 1.0)


# --- the generated plant ---------------------------------------------------------------------


def test_plant_spreads_channels_and_picks_distinct_abnormal_machines():
    plan = PlantPlan(channels=1030, machines=256, danger=3, alert=10)
    per_machine = Counter(m for _, m in plan.channel_machines())
    assert len(per_machine) == 256 and sum(per_machine.values()) == 1030
    assert set(per_machine.values()) == {4, 5}  # 1030 = 256·4 + 6
    danger, alert = plan.abnormal()
    assert len(danger) == 3 and len(alert) == 10 and not set(danger) & set(alert)
    assert "m001" not in danger + alert  # the first machine is never picked
    assert plan.abnormal() == PlantPlan(channels=1030, machines=256, danger=3,
                                        alert=10).abnormal()  # seeded
    sources = plan.sources()
    assert [len(c) for c in sources.values()] == [PER_SOURCE] * 64 + [6]
    gains = plan.gains()
    of = dict(plan.channel_machines())
    for sid, chans in sources.items():
        for cid, g in zip(chans, gains[sid], strict=True):
            assert g == (DANGER_GAIN if of[cid] in danger else
                         ALERT_GAIN if of[cid] in alert else 1.0)


def test_plant_config_is_a_valid_config(tmp_path: Path):
    plan = PlantPlan(channels=40, machines=8, danger=1, alert=2, token="t-example")
    doc = config_doc(plan)
    for i, s in enumerate(doc["sources"]):
        s["listen"] = f"127.0.0.1:{47000 + i}"
    cfg = parse_config(doc, base_dir=tmp_path, env={})
    assert len(cfg.channels) == 40
    assert {m.id for m in cfg.machines} == set(plan.machine_ids())
    assert cfg.machines[1].name == "Cooling fan 1"
    assert len(cfg.alarms) == 1 and cfg.alarms[0].overall
    # N = 2.56 × 400 = 1024, hop 512 at 50 % overlap: 2560 / 512 = 5 frames/s per channel
    assert plan.frames_per_s == 5.0 and plan.block == 256
    assert cfg.analysis.fmax_hz == pytest.approx(1000.0)
    assert [t.role for t in cfg.tokens] == ["viewer"]


@pytest.mark.parametrize("kw, message", [
    ({"channels": 4, "machines": 8}, "need 1 <= machines <= channels"),
    ({"machines": 4, "channels": 8, "danger": 3, "alert": 2}, "must not exceed the machines"),
])
def test_plant_refuses_impossible_sizes(kw, message):
    with pytest.raises(ValueError, match=message):
        PlantPlan(**kw)


# --- options ---------------------------------------------------------------------------------


@pytest.mark.parametrize("argv, message", [
    (["--machines", "8"], "--machines applies to --dashboard only"),
    (["--service", "--minutes", "1"], "--minutes applies to --dashboard only"),
    (["--json", "out.json"], "--json FILE applies to --dashboard"),
    (["--dashboard", "--channels", "4", "--machines", "8"], "need 1 <= machines <= channels"),
    (["--dashboard", "--channels", "8,16"], "expected one count with --dashboard"),
    (["--dashboard", "--repeats", "2"], "--repeats does not apply to --dashboard"),
    (["--dashboard", "--short"], "--short does not apply to --dashboard"),
    (["--dashboard", "--json", "no-such-folder-18/r.json"], "its folder does not exist"),
    (["--screenshot", "shot.png"], "--screenshot applies to --dashboard only"),
    (["--dashboard", "--screenshot", "no-such-folder-18/s.png"],
     "--screenshot 'no-such-folder-18/s.png': its folder does not exist"),
])
def test_bench_dashboard_refuses_bad_options(argv, message, capsys):
    assert cli_main(["bench", *argv]) == 2
    assert message in capsys.readouterr().err


def test_bench_service_and_dashboard_exclude_each_other(capsys):
    assert cli_main(["bench", "--service", "--dashboard"]) == 2
    assert "not allowed with argument" in capsys.readouterr().err
