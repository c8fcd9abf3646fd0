"""Tests for `quaver --version`: the installed package's version, as pyproject.toml gives it."""

from __future__ import annotations

import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from service import cli

ROOT = Path(__file__).resolve().parents[2]


def test_version_is_the_package_metadata(capsys: pytest.CaptureFixture[str]) -> None:
    want = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"]
    assert cli.main(["--version"]) == 0
    assert capsys.readouterr().out == f"quaver {want}\n"


def test_version_through_python_m_service() -> None:
    want = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"]
    run = subprocess.run([sys.executable, "-m", "service", "--version"], cwd=ROOT,
                         capture_output=True, text=True, timeout=60, check=False)
    assert (run.returncode, run.stdout) == (0, f"quaver {want}\n")
