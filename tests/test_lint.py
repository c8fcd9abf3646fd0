"""ruff and mypy on dsp/ and service/, as part of the test run (so CI needs no extra step)."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", *args], cwd=ROOT, capture_output=True,
                          text=True, timeout=600)


def test_ruff_clean() -> None:
    # Rules and line length live in pyproject.toml [tool.ruff].
    r = _run("ruff", "check", "dsp", "service", "--output-format", "concise")
    assert r.returncode == 0, r.stdout + r.stderr


def test_mypy_clean() -> None:
    # Settings in pyproject.toml [tool.mypy].
    r = _run("mypy", "dsp", "service")
    assert r.returncode == 0, r.stdout + r.stderr


def test_mypy_is_strict() -> None:
    # test_mypy_clean means little if the settings let untyped code through: strict for the
    # whole of dsp/ and service/, and missing stubs excused only per third-party module.
    import tomllib

    cfg = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["mypy"]
    assert cfg["strict"] is True
    assert "ignore_missing_imports" not in cfg
    for o in cfg.get("overrides", []):
        mods = o["module"] if isinstance(o["module"], list) else [o["module"]]
        assert not any(m.split(".")[0] in ("dsp", "service") for m in mods), o
