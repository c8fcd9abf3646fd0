"""The environment for a service started as a child process by the tests."""

from __future__ import annotations

import os
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def child_env() -> dict[str, str]:
    """This process's environment without QUAVER_* overrides and proxies (loopback only),
    with this checkout first on PYTHONPATH (so an installed copy cannot shadow it) and
    unbuffered output for the logs."""
    env = {
        k: v
        for k, v in os.environ.items()
        if not k.startswith("QUAVER_")
        and k.lower() not in ("http_proxy", "https_proxy", "all_proxy")
    }
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH")]))
    env["PYTHONUNBUFFERED"] = "1"
    return env
