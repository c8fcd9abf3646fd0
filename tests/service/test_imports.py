"""What importing a module pulls in: the light modules stay light (DEVELOPERS.md, Layout)."""

from __future__ import annotations

import json
import subprocess
import sys


def loaded_after(statement: str) -> set[str]:
    """Top-level and service modules in sys.modules after ``statement`` in a fresh Python."""
    code = f"{statement}\nimport json, sys\nprint(json.dumps(sorted(sys.modules)))"
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    return set(json.loads(out.stdout.strip().splitlines()[-1]))


def test_importing_auth_pulls_in_no_pydantic_scipy_or_engine() -> None:
    mods = loaded_after("import service.auth")
    assert "service.auth" in mods
    heavy = {m for m in mods if m.split(".")[0] in {"pydantic", "scipy", "numpy", "dsp"}}
    assert heavy == set()
    assert {m for m in mods if m.startswith(("service.config", "service.pipeline"))} == set()


def test_the_channel_states_load_without_the_config_models() -> None:
    mods = loaded_after("import service.quality")
    assert "service.quality" in mods
    assert "pydantic" not in mods
    assert {m for m in mods if m.startswith("service.config")} == set()


def test_the_moved_lookups_still_import_from_service_config() -> None:
    import service.config
    import service.lookups

    for name in ("bands_for", "tones_for", "effective_analysis"):
        assert getattr(service.config, name) is getattr(service.lookups, name)
