"""The service under test: its config (as a document the harness writes as TOML) and a
handle with the figures the benchmark reads (HTTP, CPU seconds, RSS).

Knows the config file shape and the HTTP API; runs the service through ``bench.harness``.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from . import harness
from .probes import proc_cpu_s, proc_rss_bytes, tree_cpu_s

__all__ = ["BenchService", "config_doc", "run_service"]


def config_doc(analysis: dict[str, Any], sources: list[dict[str, Any]],
               speed_rpm: float) -> dict[str, Any]:
    """The config of a bench service: the sources given, 16 bands, 8 tracked orders and two
    alarm rules per channel (levels far above the test signal, so no event storm)."""
    bands = [(f"b{i:02d}", 10.0 + 500.0 * i, 500.0 + 500.0 * i) for i in range(15)]
    bands.append(("overall", 10.0, 1000.0))
    return {
        "analysis": dict(analysis),
        "sources": [dict(s) for s in sources],
        "channels": [{"id": cid, "speed_rpm": float(speed_rpm)}
                     for s in sources for cid in s["channels"]],
        "bands": [{"name": name, "lo_hz": lo, "hi_hz": min(hi, 0.999 * analysis["fmax_hz"])}
                  for name, lo, hi in bands],
        "tones": [{"name": f"{h}x", "order": float(h)} for h in range(1, 9)],
        "alarms": [{"overall": True, "alert": 1000.0, "danger": 2000.0},
                   {"band": "b01", "alert": 1000.0, "danger": 2000.0}],
    }


@dataclass
class BenchService(harness.Child):
    """A running service under test and what the bench reads of it."""

    def get(self, path: str) -> Any:
        return self.get_json(f"/api/v1/{path}")

    def text(self, path: str) -> str:
        """The body of ``path`` (e.g. ``/metrics``) as text."""
        return harness.http_get(self.base_url, path).decode()

    def cpu_s(self) -> float:
        return proc_cpu_s(self.pid)

    def workers_cpu_s(self) -> float:
        """CPU seconds of the service's Ray actors (cluster mode with a local Ray)."""
        return tree_cpu_s(self.pid, "SourceGroup")

    def ray_cpu_s(self) -> float:
        """CPU seconds of every process the service started (a local Ray: its actors, raylet,
        GCS and helpers)."""
        return tree_cpu_s(self.pid)

    def rss(self) -> int:
        return proc_rss_bytes(self.pid)

    def channels(self) -> dict[str, dict[str, Any]]:
        return {c["id"]: c for c in self.get("channels")}


@contextlib.contextmanager
def run_service(workdir: Path, analysis: dict[str, Any], sources: list[dict[str, Any]],
                speed_rpm: float = 1485.0, extra: dict[str, Any] | None = None,
                start_timeout_s: float = harness.START_TIMEOUT_S) -> Iterator[BenchService]:
    """Start the service for ``sources`` (each on a free loopback port) in ``workdir``; wait
    until /api/v1/health answers; always stop it on leaving. In a session of its own, so
    Ctrl-C reaches the bench, which then stops it. ``extra``: more tables (``mqtt``, ``opcua``)."""
    doc = config_doc(analysis, [{**s, "listen": "auto"} for s in sources], speed_rpm)
    doc.update(extra or {})
    with harness.run_service(doc, workdir, new_session=True, timeout_s=start_timeout_s) as child:
        yield child.promote(BenchService)
