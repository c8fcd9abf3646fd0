"""Tests for service.config: the contract shape, error paths and messages, lookups."""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path
from typing import Any

import pytest

from service import config as qc
from service.config import ConfigError, parse_config

# The contract shape, verbatim from the service issue (the design notes, "Config").
CONTRACT = """\
[service]
listen = "127.0.0.1:8750"
data_dir = "quaver-data"

[analysis]            # defaults for every channel; a channel may override any of them
fmax_hz = 5000
lines = 1600
window = "hann"       # rectangular | hann | hamming | blackman-harris | flattop | kaiser
overlap = 0.75
averaging = "exponential"   # linear | exponential | peak-hold
averages = 8                # linear: frames; exponential: equivalent frames
unit = "velocity"           # acceleration | velocity | displacement
amplitude = "rms"           # peak | rms | peak-to-peak

[[sources]]
id = "line-a"
kind = "tcp"                # tcp | udp | file | simulated
listen = "127.0.0.1:9101"
format = "f32le"            # s16le | s32le | f32le | f64le | framed
sample_rate_hz = 12800
channels = ["p1-de-h", "p1-de-v"]   # interleave order

[[channels]]
id = "p1-de-h"
input_unit = "g"            # g | m/s2
sensitivity = 1.0           # input units per raw sample unit
speed_rpm = 1480            # optional: enables orders

[[bands]]
channel = "p1-de-h"         # or "*" for every channel
name = "overall"
lo_hz = 10
hi_hz = 1000
"""

EXAMPLE = Path(__file__).resolve().parents[2] / "service" / "examples" / "plant.toml"


def _base() -> dict[str, Any]:
    return tomllib.loads(CONTRACT)


def _parse(d: dict[str, Any], env: dict[str, str] | None = None) -> qc.Config:
    return parse_config(d, env=env or {})


def test_contract_example_parses(tmp_path: Path) -> None:
    path = tmp_path / "quaver.toml"
    path.write_text(CONTRACT)
    cfg = qc.load_config(path, env={})
    (src,) = cfg.sources
    assert isinstance(src, qc.TcpSourceConfig)
    assert (src.id, src.listen, src.format, src.sample_rate_hz) == (
        "line-a",
        "127.0.0.1:9101",
        "f32le",
        12800.0,
    )
    assert qc.channel_ids(cfg) == ["p1-de-h", "p1-de-v"]
    assert cfg.service.data_dir == str(tmp_path / "quaver-data")  # next to the config file
    a = qc.effective_analysis(cfg, "p1-de-v")
    assert (
        a.fmax_hz,
        a.lines,
        a.window,
        a.overlap,
        a.averaging,
        a.averages,
        a.unit,
        a.amplitude,
        a.lowcut_hz,
        a.peaks,
        a.linear_end,
    ) == (5000.0, 1600, "hann", 0.75, "exponential", 8, "velocity", "rms", 2.0, 8, "restart")
    (band,) = qc.bands_for(cfg, "p1-de-h")
    assert (band.name, band.lo, band.hi, band.basis) == ("overall", 10.0, 1000.0, "hz")
    assert qc.bands_for(cfg, "p1-de-v") == []
    # p1-de-v has no [[channels]] entry: documented defaults
    d = qc.channel_settings(cfg, "p1-de-v")
    assert (d.input_unit, d.sensitivity, d.speed_rpm) == ("g", 1.0, None)
    assert qc.channel_settings(cfg, "p1-de-h").speed_rpm == 1480.0


def test_example_plant_config_loads() -> None:
    cfg = qc.load_config(EXAMPLE, env={})
    assert len(cfg.sources) == 3
    qc.check_listen_allowed(cfg)
    names = [b.name for b in qc.bands_for(cfg, "p1-de-h")]
    assert names == ["overall", "1X", "2X", "vane-pass"]
    thirds = {b.name: b for b in qc.bands_for(cfg, "f1-gb-h") if b.name.startswith("thirds")}
    # IEC 61260-1:2014 base-ten third-octave at 1 kHz: 891.2509 - 1122.0185 Hz
    assert thirds["thirds 1 kHz"].lo == pytest.approx(891.2509, abs=1e-4)
    assert thirds["thirds 1 kHz"].hi == pytest.approx(1122.0185, abs=1e-4)
    # nominal mid-bands 25 Hz ... 1.6 kHz (IEC 61260-1 annex): 19 bands
    assert len(thirds) == 19 and "thirds 25 Hz" in thirds and "thirds 1.6 kHz" in thirds
    assert qc.effective_analysis(cfg, "f1-gb-h").fmax_hz == 2000.0
    assert qc.effective_analysis(cfg, "f1-gb-h").lines == 800
    assert [t.name for t in qc.tones_for(cfg, "f1-gb-h")] == ["1X", "mesh"]
    src = qc.source_of(cfg, "f1-gb-h")
    assert isinstance(src, qc.FileSourceConfig)
    assert src.path == str(EXAMPLE.parent / "spool" / "fan-gearbox.csv")


def _set(path: str, value: Any) -> Any:
    """A mutation setting ``a.b[0].c`` style ``path`` in the parsed contract."""

    def mutate(d: dict[str, Any]) -> None:
        keys = path.replace("]", "").replace("[", ".").split(".")
        node: Any = d
        for k in keys[:-1]:
            node = node[int(k)] if k.isdigit() else node.setdefault(k, {})
        node[keys[-1]] = value

    return mutate


def _append(table: str, entry: dict[str, Any]) -> Any:
    return lambda d: d.setdefault(table, []).append(entry)


BAD = [
    (
        _set("sources[0].format", "f16le"),
        r"sources\[0\]\.format: 'f16le' is not one of 's16le', 's32le', 'f32le', 'f64le', 'framed'",
    ),
    (
        _set("sources[0].kind", "serial"),
        r"sources\[0\]\.kind: 'serial' is not one of 'tcp', 'udp', 'file', 'simulated'",
    ),
    (
        lambda d: d["sources"][0].pop("kind"),
        r"sources\[0\]\.kind: required key is missing \(one of 'tcp', 'udp'",
    ),
    (lambda d: d["sources"][0].pop("listen"), r"sources\[0\]\.listen: required key is missing"),
    (_set("sources[0].listn", "x"), r"sources\[0\]\.listn: unknown key; did you mean 'listen'\?"),
    (
        _set("analysis.window", "hanning"),
        r"analysis\.window: 'hanning' is not one of 'rectangular', 'hann', 'hamming', "
        r"'blackman-harris', 'flattop', 'kaiser'",
    ),
    (
        _set("analysis.averaging", "rms"),
        r"analysis\.averaging: 'rms' is not one of 'linear', 'exponential', 'peak-hold'",
    ),
    (
        _set("analysis.unit", "mm/s"),
        r"analysis\.unit: 'mm/s' is not one of 'acceleration', 'velocity', 'displacement'",
    ),
    (
        _set("analysis.amplitude", "pk"),
        r"analysis\.amplitude: 'pk' is not one of 'peak', 'rms', 'peak-to-peak'",
    ),
    (
        _set("analysis.linear_end", "stop"),
        r"analysis\.linear_end: 'stop' is not one of 'restart', 'hold'",
    ),
    (
        _set("analysis.output_unit", "ips"),
        r"analysis\.output_unit: 'ips' is not one of 'g', 'm/s2'",
    ),
    (_set("analysis.output_unit", "g"), r"analysis\.output_unit: 'g' is not a unit of velocity"),
    (
        _set("channels[0].input_unit", "mV"),
        r"channels\[0\]\.input_unit: 'mV' is not one of 'g', 'm/s2'",
    ),
    (_set("analysis.overlap", 1.0), r"analysis\.overlap: Input should be less than 1"),
    (_set("analysis.fmax_hz", -5), r"analysis\.fmax_hz: Input should be greater than 0"),
    (_set("sources[0].sample_rate_hz", float("nan")), r"sources\[0\]\.sample_rate_hz: .*finite"),
    # 2.56·lines must be an integer (common practice: 400, 800, 1600 ... lines)
    (
        _set("analysis.lines", 1601),
        r"analysis\.lines: 2\.56·1601 = 4098\.56 samples is not an integer",
    ),
    # fs = 2.56·Fmax (common practice): 6000 Hz needs 15360 samples/s
    (
        _set("analysis.fmax_hz", 6000),
        r"analysis\.fmax_hz: 6000 Hz needs a sample rate of at least 2\.56·fmax = 15360 Hz; "
        r"source 'line-a' runs at 12800 Hz",
    ),
    (
        _set("channels[0].analysis", {"fmax_hz": 8000}),
        r"channels\[0\]\.analysis\.fmax_hz: 8000 Hz needs",
    ),
    (
        _set("channels[0].analysis", {"window": "hanning"}),
        r"channels\[0\]\.analysis\.window: 'hanning' is not one of",
    ),
    (
        _set("analysis.lowcut_hz", 6000),
        r"analysis\.lowcut_hz: 6000 Hz must be below fmax_hz 5000 Hz",
    ),
    (_set("service.listen", "localhost"), r"service\.listen: 'localhost' is not host:port"),
    (_set("service.listen", "::1:8750"), r"service\.listen: .*IPv6 address in brackets"),
    (_set("sources[0].listen", "127.0.0.1:70000"), r"sources\[0\]\.listen: .*port in 0-65535"),
    (
        _set("sources[0].listen", "127.0.0.1:8750"),
        r"sources\[0\]\.listen: .*the service's own address",
    ),
    (
        _set("sources[0].channels", ["a", "a"]),
        r"sources\[0\]\.channels\[1\]: 'a' is already a channel",
    ),
    (
        _set("sources[0].channels", ["p1 de h"]),
        r"sources\[0\]\.channels\[0\]: 'p1 de h' is not a url-safe id",
    ),
    (_set("sources[0].channels", []), r"sources\[0\]\.channels: List should have at least 1 item"),
    (
        lambda d: d["sources"][0].pop("sample_rate_hz"),
        r"sources\[0\]\.sample_rate_hz: required for kind='tcp'",
    ),
    (lambda d: d.pop("sources"), r"sources: at least one \[\[sources\]\] entry is required"),
    (
        _append(
            "sources",
            {
                "id": "line-a",
                "kind": "udp",
                "listen": "127.0.0.1:9",
                "sample_rate_hz": 100,
                "channels": ["u1"],
            },
        ),
        r"sources\[1\]\.id: 'line-a' repeats sources\[0\]",
    ),
    (
        _append(
            "sources",
            {
                "id": "b",
                "kind": "udp",
                "listen": "127.0.0.1:9",
                "format": "f32le",
                "sample_rate_hz": 100,
                "channels": ["u1"],
            },
        ),
        r"sources\[1\]\.format: 'f32le' is not one of 'framed'",
    ),
    (
        _append(
            "sources",
            {"id": "f", "kind": "file", "path": "x.bin", "format": "s16le", "channels": ["u1"]},
        ),
        r"sources\[1\]\.sample_rate_hz: required for kind='file' with format='s16le'",
    ),
    (
        _append(
            "sources", {"id": "f", "kind": "file", "path": "x", "format": "mp3", "channels": ["u1"]}
        ),
        r"sources\[1\]\.format: 'mp3' is not one of "
        r"'s16le', 's32le', 'f32le', 'f64le', 'csv', 'wav'",
    ),
    (
        _append(
            "sources",
            {
                "id": "f",
                "kind": "file",
                "path": "x",
                "format": "csv",
                "sample_rate_hz": 1e3,
                "channels": ["u1"],
                "start_at": "middle",
            },
        ),
        r"sources\[1\]\.start_at: 'middle' is not one of 'end', 'beginning'",
    ),
    (
        _append("channels", {"id": "p1-de-x"}),
        r"channels\[1\]\.id: 'p1-de-x' is not produced by any source "
        r"\(source channels: 'p1-de-h', 'p1-de-v'\)",
    ),
    (_append("channels", {"id": "p1-de-h"}), r"channels\[1\]\.id: 'p1-de-h' repeats channels\[0\]"),
    (_set("channels[0].sensitivity", 0), r"channels\[0\]\.sensitivity: must not be 0"),
    (
        _append("bands", {"channel": "p9", "name": "x", "lo_hz": 1, "hi_hz": 2}),
        r"bands\[1\]\.channel: 'p9' is not a channel of any source",
    ),
    (
        _append("bands", {"name": "x", "lo_hz": 100, "hi_hz": 50}),
        r"bands\[1\]\.hi_hz: 50 must be above lo_hz 100",
    ),
    (_append("bands", {"name": "x", "lo_hz": 100}), r"bands\[1\]\.hi_hz: required with lo_hz"),
    (
        _append("bands", {"name": "x", "lo_hz": 1, "hi_hz": 2, "lo_order": 1, "hi_order": 2}),
        r"bands\[1\]: give lo_hz and hi_hz \(Hz\) or lo_order and hi_order \(orders\), not both",
    ),
    (_append("bands", {"name": "x"}), r"bands\[1\]: give lo_hz and hi_hz"),
    (
        _append("bands", {"channel": "p1-de-v", "name": "1X", "lo_order": 0.8, "hi_order": 1.2}),
        r"bands\[1\]\.lo_order: channel 'p1-de-v' has no speed_rpm",
    ),
    (
        _append("bands", {"name": "hi", "lo_hz": 4000, "hi_hz": 6000}),
        r"bands\[1\]\.hi_hz: 6000 Hz is above fmax_hz of channel "
        r"'p1-de-h' \(5000 Hz\), 'p1-de-v' \(5000 Hz\)",
    ),
    (
        _append("bands", {"name": "t", "octave": 5, "lo_hz": 20, "hi_hz": 2000}),
        r"bands\[1\]\.octave: 5 is not one of 1, 3, 6, 12, 24",
    ),
    (
        _append("bands", {"name": "t", "octave": 1, "lo_hz": 900, "hi_hz": 1100}),
        r"bands\[1\]: no 1/1-octave band lies within 900-1100 Hz",
    ),
    (
        _append("bands", {"channel": "p1-de-h", "name": "overall", "lo_hz": 2, "hi_hz": 1000}),
        r"bands\[1\]\.name: 'overall' repeats bands\[0\] on channel 'p1-de-h'",
    ),
    (
        _append("tones", {"name": "1X", "order": 1, "hz": 24.6}),
        r"tones\[0\]: give exactly one of hz or order",
    ),
    (
        _append("tones", {"channel": "p1-de-v", "name": "1X", "order": 1}),
        r"tones\[0\]\.order: channel 'p1-de-v' has no speed_rpm",
    ),
    (
        _append("alarms", {"channel": "p1-de-h", "band": "overall", "alert": 7.1, "danger": 4.5}),
        r"alarms\[0\]\.danger: 4\.5 must be above alert 7\.1",
    ),
    (
        _append("alarms", {"channel": "p1-de-h", "band": "overal", "alert": 1, "danger": 2}),
        r"alarms\[0\]\.band: 'overal' is not a band of channel 'p1-de-h' \(bands: 'overall'\)",
    ),
    (
        _append("alarms", {"band": "overall", "overall": True, "alert": 1, "danger": 2}),
        r"alarms\[0\]: give exactly one of band, tone or overall = true",
    ),
    (
        _append("alarms", {"overall": True, "alert": 1, "danger": 2, "hysteresis": 0.6}),
        r"alarms\[0\]\.hysteresis: Input should be less than or equal to 0\.5",
    ),
    (
        _append("tokens", {"name": "a", "role": "root", "sha256": "0" * 64}),
        r"tokens\[0\]\.role: 'root' is not one of 'viewer', 'operator', 'admin'",
    ),
    (
        _append("tokens", {"name": "a", "role": "viewer", "sha256": "xyz"}),
        r"tokens\[0\]\.sha256: must be the 64 hex digits of a SHA-256 digest",
    ),
    (_set("bogus", 1), r"bogus: unknown key"),
    (  # a factor pair plus half a dB pair: the Baseline refused it only at start-up before
        _append("alarms", {"overall": True, "baseline_learn_s": 60, "alert_factor": 2,
                           "danger_factor": 4, "alert_db": 6}),
        r"alarms\[0\]: with baseline_learn_s give alert_factor and danger_factor, or "
        r"alert_db and danger_db",
    ),
    (  # factors the wrong way round: also refused by the config now, not first by Baseline
        _append("alarms", {"overall": True, "baseline_learn_s": 60, "alert_factor": 4,
                           "danger_factor": 2}),
        r"alarms\[0\]\.danger_factor: 2 must be above alert_factor 4",
    ),
]


@pytest.mark.parametrize(("mutate", "message"), BAD, ids=[m for _, m in BAD])
def test_each_bad_key_names_its_path(mutate: Any, message: str) -> None:
    d = _base()
    mutate(d)
    with pytest.raises(ConfigError, match=message):
        _parse(d)


def test_all_problems_reported_at_once() -> None:
    d = _base()
    d["analysis"]["window"] = "hanning"
    d["sources"][0]["format"] = "f16le"
    with pytest.raises(ConfigError) as e:
        _parse(d)
    assert len(e.value.problems) == 2
    assert str(e.value).startswith("config: 2 problems\n  ")


def test_toml_syntax_error_has_line_number(tmp_path: Path) -> None:
    path = tmp_path / "bad.toml"
    path.write_text('[service]\nlisten = "127.0.0.1:8750"\ndata_dir = quaver-data\n')
    with pytest.raises(ConfigError, match=r"bad\.toml: 1 problem\n  TOML syntax error: .*line 3"):
        qc.load_config(path)


def test_missing_file_is_a_config_error(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="cannot read"):
        qc.load_config(tmp_path / "nope.toml")


def test_env_overrides_service_settings(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "q.toml"
    path.write_text(CONTRACT)
    monkeypatch.setenv("QUAVER_LISTEN", "127.0.0.2:9000")
    monkeypatch.setenv("QUAVER_DATA_DIR", "/srv/quaver")
    cfg = qc.load_config(path)
    assert (cfg.service.listen, cfg.service.data_dir) == ("127.0.0.2:9000", "/srv/quaver")
    monkeypatch.setenv("QUAVER_LISTEN", "nope")
    with pytest.raises(
        ConfigError, match=r"service\.listen \(from QUAVER_LISTEN\): 'nope' is not host:port"
    ):
        qc.load_config(path)
    # an explicit env mapping replaces os.environ
    assert qc.load_config(path, env={}).service.listen == "127.0.0.1:8750"


@pytest.mark.parametrize(
    ("listen", "allowed"),
    [
        ("127.0.0.1:8750", True),
        ("127.3.4.5:1", True),
        ("[::1]:8750", True),
        ("localhost:8750", True),
        ("0.0.0.0:8750", False),
        ("[::]:8750", False),
        ("192.168.10.5:8750", False),
        ("plant-box.example:8750", False),
    ],
)
def test_non_loopback_refused_without_tokens(listen: str, allowed: bool) -> None:
    d = _base()
    d["service"]["listen"] = listen
    cfg = _parse(d)
    if allowed:
        qc.check_listen_allowed(cfg)
    else:
        with pytest.raises(
            ConfigError, match=r"service\.listen: .* is not a loopback address; add \[\[tokens\]\]"
        ):
            qc.check_listen_allowed(cfg)
    d["tokens"] = [{"name": "scada", "role": "viewer", "sha256": "AB" * 32}]
    with_tokens = _parse(d)
    qc.check_listen_allowed(with_tokens)
    assert with_tokens.tokens[0].sha256 == "ab" * 32


def test_parse_listen() -> None:
    assert qc.parse_listen("127.0.0.1:8750") == ("127.0.0.1", 8750)
    assert qc.parse_listen("[::1]:0") == ("::1", 0)
    assert qc.parse_listen("plant-box:9101") == ("plant-box", 9101)
    with pytest.raises(ValueError, match="is not host:port"):
        qc.parse_listen(":80")


def test_channel_override_and_star_replacement() -> None:
    d = _base()
    d["channels"].append({"id": "p1-de-v", "analysis": {"lines": 3200, "window": "flattop"}})
    d["bands"] += [
        {"channel": "*", "name": "overall", "lo_hz": 10, "hi_hz": 1000},
        {"channel": "*", "name": "1X", "lo_order": 0.8, "hi_order": 1.2},
        {"channel": "p1-de-v", "name": "low", "lo_hz": 2, "hi_hz": 10},
    ]
    d["tones"] = [{"name": "1X", "order": 1}, {"channel": "p1-de-v", "name": "line", "hz": 50}]
    cfg = _parse(d)
    v = qc.effective_analysis(cfg, "p1-de-v")
    assert (v.lines, v.window, v.fmax_hz) == (3200, "flattop", 5000.0)
    assert qc.effective_analysis(cfg, "p1-de-h").lines == 1600
    h_bands = {b.name: (b.lo, b.hi, b.basis) for b in qc.bands_for(cfg, "p1-de-h")}
    # the channel's own 'overall' (bands[0]) replaces the '*' one; '1X' in orders needs speed
    assert h_bands == {"overall": (10.0, 1000.0, "hz"), "1X": (0.8, 1.2, "order")}
    v_bands = [b.name for b in qc.bands_for(cfg, "p1-de-v")]
    assert v_bands == ["overall", "low"]  # no speed_rpm: the '*' order band is skipped
    assert [(t.name, t.order) for t in qc.tones_for(cfg, "p1-de-h")] == [("1X", 1.0)]
    assert [(t.name, t.hz) for t in qc.tones_for(cfg, "p1-de-v")] == [("line", 50.0)]


def test_relative_file_path_taken_from_config_folder(tmp_path: Path) -> None:
    d = _base()
    d["sources"].append(
        {"id": "f", "kind": "file", "path": "spool/a.wav", "format": "wav", "channels": ["w1"]}
    )
    p = tmp_path / "q.toml"
    p.write_text(
        CONTRACT + '\n[[sources]]\nid = "f"\nkind = "file"\npath = "spool/a.wav"\n'
        'format = "wav"\nchannels = ["w1"]\n'
    )
    cfg = qc.load_config(p, env={})
    src = cfg.sources[1]
    assert isinstance(src, qc.FileSourceConfig)
    assert src.path == str(tmp_path / "spool" / "a.wav")
    assert (src.follow, src.replay_speed, src.poll_ms, src.start_at) == (True, 1.0, 50.0, "end")
    assert _parse(copy.deepcopy(d)).sources[1].path == "spool/a.wav"  # no base_dir: unchanged


def test_simulated_source_without_channel_list_defers_channel_checks() -> None:
    d = {
        "sources": [{"id": "demo", "kind": "simulated", "scenario": "demo", "speed": 10}],
        "bands": [{"channel": "pump-1-de", "name": "overall", "lo_hz": 10, "hi_hz": 1000}],
    }
    cfg = _parse(d)
    src = cfg.sources[0]
    assert isinstance(src, qc.SimulatedSourceConfig)
    assert (src.scenario, src.speed, src.channels) == ("demo", 10.0, [])
    d["sources"][0]["scenario"] = "refinery"
    with pytest.raises(
        ConfigError, match=r"sources\[0\]\.scenario: 'refinery' is not one of 'demo'"
    ):
        _parse(d)


def test_every_setting_has_help_text() -> None:
    for model in qc.MODELS:
        for name, field in model.model_fields.items():
            assert field.description and len(field.description) > 5, f"{model.__name__}.{name}"


def test_simulated_source_built_from_config() -> None:
    from service.sources import Source, make_source

    d = {
        "sources": [
            {
                "id": "demo",
                "kind": "simulated",
                "scenario": "demo",
                "sample_rate_hz": 12800,
                "channels": ["p1-de-h", "f1-gb-h"],
                "speed": 0,
            }
        ]
    }
    src = make_source(_parse(d).sources[0])
    assert isinstance(src, Source)
    assert (src.id, src.channel_ids, src.fs) == ("demo", ("p1-de-h", "f1-gb-h"), 12800.0)


def test_settings_reference_lists_every_key_with_help() -> None:
    rows = {key: (kind, default, text) for key, kind, default, text in qc.describe_settings()}
    assert rows["[analysis] window"][:2] == (
        "'rectangular' | 'hann' | 'hamming' | 'blackman-harris' | 'flattop' | 'kaiser'",
        "'hann'",
    )
    assert rows['[[sources]] kind="tcp" listen'][1] == "required"
    assert rows["[[channels]] analysis fmax_hz"][:2] == ("float (optional)", "None")
    assert all(len(text) > 5 for _, _, text in rows.values())
    n_fields = sum(len(m.model_fields) for m in qc.MODELS if m is not qc.Config)
    assert len(rows) == n_fields - 1  # every field but [[channels]].analysis, listed by key


@pytest.mark.parametrize(("given", "problem"), [
    ({"tls_cert": "c.pem"}, "service.tls_key: missing; tls_cert needs its key"),
    ({"tls_key": "k.pem"}, "service.tls_cert: missing; tls_key needs its certificate"),
])
def test_tls_needs_both_files(given: dict[str, str], problem: str) -> None:
    d = _base()
    d["service"] = {**d.get("service", {}), **given}
    with pytest.raises(ConfigError) as e:
        _parse(d)
    assert any(p.startswith(problem) for p in e.value.problems), e.value.problems


def test_an_alarm_entry_and_a_rule_refuse_the_same_levels() -> None:
    # one rule (service/entries.py) behind both: the config's message and the Rule's agree
    from service.alarms import Rule

    d = _base()
    d["alarms"] = [{"channel": "p1-de-h", "overall": True, "alert": 3.0, "danger": 2.0}]
    with pytest.raises(ConfigError) as e:
        _parse(d)
    assert e.value.problems == ["alarms[0].danger: 2 must be above alert 3"]
    with pytest.raises(ValueError) as r:
        Rule(id="p1-de-h.overall", channel="p1-de-h", kind="overall", name="overall",
             alert=3.0, danger=2.0)
    assert str(r.value) == "rule 'p1-de-h.overall': danger: 2 must be above alert 3"
