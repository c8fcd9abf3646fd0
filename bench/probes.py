"""The machine and a process as /proc sees them: CPU model, cores, load; a pid's CPU seconds
and resident set size.

Linux /proc and the standard library only.
"""

from __future__ import annotations

import contextlib
import math
import os
import platform
import sys
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["BLAS_ENV", "descendants", "machine", "proc_cpu_s", "proc_rss_bytes", "tree_cpu_s"]

BLAS_ENV = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def machine() -> dict[str, Any]:
    """CPU model, cores, Python and numpy versions of this machine."""
    cpu = platform.processor() or platform.machine()
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    try:
        load = os.getloadavg()
    except OSError:
        load = (math.nan,) * 3
    return {"cpu": cpu, "cores": os.cpu_count(), "python": sys.version.split()[0],
            "numpy": np.__version__, "platform": platform.platform(),
            "loadavg_at_start": [round(v, 2) for v in load],
            # The service inherits these; unset, OpenBLAS starts one thread per core.
            "blas_env": {k: os.environ.get(k) for k in BLAS_ENV}}


_TICK_S = 1.0 / os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 0.01


def proc_cpu_s(pid: int) -> float:
    """User + system CPU seconds of process ``pid`` (all its threads), from /proc/PID/stat."""
    text = Path(f"/proc/{pid}/stat").read_text()
    fields = text[text.rindex(")") + 2 :].split()
    return (int(fields[11]) + int(fields[12])) * _TICK_S  # utime, stime (proc(5) fields 14, 15)


def proc_rss_bytes(pid: int) -> int:
    """Resident set size of ``pid`` in bytes (VmRSS in /proc/PID/status)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    raise OSError(f"no VmRSS for pid {pid}")


def descendants(pid: int) -> list[int]:
    """Every process below ``pid`` (children, their children …), from /proc/*/stat."""
    parent: dict[int, int] = {}
    for d in Path("/proc").iterdir():
        if not d.name.isdigit():
            continue
        with contextlib.suppress(OSError, ValueError, IndexError):
            text = (d / "stat").read_text()
            parent[int(d.name)] = int(text[text.rindex(")") + 2 :].split()[1])
    out: list[int] = []
    todo = [pid]
    while todo:
        p = todo.pop()
        kids = [c for c, pp in parent.items() if pp == p]
        out += kids
        todo += kids
    return out


def tree_cpu_s(pid: int, match: str | None = None) -> float:
    """CPU seconds of the processes below ``pid`` (not ``pid`` itself); with ``match``, only
    those whose command line contains it (e.g. Ray's ``ray::SourceGroup`` workers)."""
    total = 0.0
    for p in descendants(pid):
        with contextlib.suppress(OSError, ValueError, IndexError):
            if match is not None:
                cmd = Path(f"/proc/{p}/cmdline").read_bytes().replace(b"\0", b" ").decode(
                    errors="replace")
                if match not in cmd:
                    continue
            total += proc_cpu_s(p)
    return total
