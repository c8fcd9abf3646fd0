"""The data folder turning read-only under a running service (as a file system does after
I/O errors): monitoring and alarms go on, the condition shows in /health and /metrics, and
what was stored before stays readable.

The service runs in a private mount namespace (``unshare --user --map-root-user --mount``)
where its data folder is a bind mount that the test remounts read-only mid-run; this works
for root, who ignores folder permissions, as well as for other users. Talks to the service
only through its sockets, HTTP API and the trigger files."""

from __future__ import annotations

import contextlib
import math
import shutil
import socket
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.service.conftest import (
    SMALL_FS,
    RunningService,
    feed_tone,
    one_band_config,
    run_service,
    wait_for,
)

LOOPBACK = "127.0.0.1"

# Runs the service (the arguments after the first three) in a private mount namespace:
#   mode "ro":   DATA is a read-only bind mount from the start;
#   mode "full": DATA is a 4 MiB tmpfs; when TRIGGER.fill appears a filler file takes every
#                free byte (a full disk), when TRIGGER.free appears it is deleted; each step
#                is answered with a ".done" file.
# Waits are bounded; SIGTERM is passed on to the service.
NAMESPACE_SCRIPT = r"""
mode="$1"; data="$2"; trigger="$3"; shift 3
if [ "$mode" = ro ]; then
  mount --bind "$data" "$data" && mount -o remount,bind,ro "$data" || exit 97
else
  mount -t tmpfs -o size=4m quaver-test "$data" || exit 97
fi
"$@" &
pid=$!
trap 'kill -TERM $pid 2>/dev/null; wait $pid; exit 0' TERM INT
for step in fill free; do
  i=0
  while [ ! -e "$trigger.$step" ] && [ $i -lt 3000 ] && kill -0 $pid 2>/dev/null; do
    sleep 0.05; i=$((i+1))
  done
  [ -e "$trigger.$step" ] || break
  if [ $step = fill ]; then cat /dev/zero > "$data/filler" 2>/dev/null
  else rm -f "$data/filler"; fi
  touch "$trigger.$step.done"
done
wait $pid
"""


def namespaces_work() -> str | None:
    """None if a read-only bind mount in a user+mount namespace works here, else why not."""
    if shutil.which("unshare") is None:
        return "no unshare(1) on this machine (util-linux)"
    probe = subprocess.run(["unshare", "--user", "--map-root-user", "--mount", "sh", "-c",
                            "mount --bind /tmp /tmp && mount -o remount,bind,ro /tmp"],
                           capture_output=True, text=True, timeout=20, check=False)
    if probe.returncode != 0:
        return f"user+mount namespaces are not allowed here: {probe.stderr.strip()[:200]}"
    return None


@contextlib.contextmanager
def service_in_namespace(workdir: Path, mode: str) -> Iterator[tuple[RunningService, Path]]:
    data = workdir / "quaver-data"  # the service's data_dir (relative to its config)
    data.mkdir(parents=True)
    trigger = workdir / "step"

    def wrap(command: list[str]) -> list[str]:
        return ["unshare", "--user", "--map-root-user", "--mount", "sh", "-c",
                NAMESPACE_SCRIPT, "sh", mode, str(data), str(trigger), *command]

    with run_service(one_band_config(), workdir, wrap=wrap) as svc:
        yield svc, trigger


def step(trigger: Path, name: str) -> None:
    Path(f"{trigger}.{name}").touch()
    wait_for(lambda: Path(f"{trigger}.{name}.done").exists(), f"the {name} step", 20.0)


def degraded(svc: RunningService) -> dict[str, Any]:
    def probe() -> dict[str, Any] | None:
        h = svc.health()
        return h if h["status"] == "degraded" else None

    return svc.wait(probe, "/health to report the store", 20.0)


def metric(svc: RunningService, name: str) -> float:
    text = httpx.get(f"{svc.base_url}/metrics", timeout=10).text
    line = next(ln for ln in text.splitlines() if ln.startswith(f"{name} "))
    return float(line.split()[1])


def monitoring_goes_on(svc: RunningService, k: int, amp: float) -> None:
    """Every sample up to index ``k`` taken, band b reads the tone of peak ``amp`` and its
    alarm is in danger, whatever the store is doing."""
    svc.wait(lambda: svc.channel("a")["counters"]["samples"] == k or None, "all samples")
    # band RMS of a sine: A/√2 (docs/references.md); the exponential average has settled
    assert svc.get("channels/a/bands")["bands"][0]["value"] == pytest.approx(
        amp / math.sqrt(2), rel=0.02)
    alarms = svc.wait(lambda: [a for a in svc.get("alarms") if a["state"] == "danger"]
                      or None, "the alarm in danger")
    assert [a["rule"] for a in alarms] == ["a.band.b"]
    assert metric(svc, "quaver_store_ok") == 0.0


@pytest.fixture
def namespaces() -> None:
    why = namespaces_work()
    if why is not None:
        pytest.skip(why)


@pytest.mark.usefixtures("namespaces")
def test_a_read_only_data_folder_is_reported_and_monitoring_goes_on(tmp_path: Path) -> None:
    with service_in_namespace(tmp_path, "ro") as (svc, _), \
            socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=10) as sock:
        store = degraded(svc)["store"]  # the store cannot even open its database
        assert (store["ok"], store["open"]) == (False, False)
        # SQLite's words for a database it cannot create (sqlite.org/rescode.html)
        assert "unable to open database file" in store["last_error"], store
        k = feed_tone(sock, 0, int(8 * SMALL_FS), 2.0)  # 1.41 g RMS in band b: over danger (1.0)
        monitoring_goes_on(svc, k, 2.0)
        assert metric(svc, "quaver_store_write_errors_total") >= 1
        assert svc.alive()


@pytest.mark.usefixtures("namespaces")
def test_a_full_disk_keeps_monitoring_loses_nothing_stored_and_recovers(tmp_path: Path) -> None:
    with service_in_namespace(tmp_path, "full") as (svc, trigger), \
            socket.create_connection((LOOPBACK, svc.ports["s"]), timeout=10) as sock:
        k = feed_tone(sock, 0, int(8 * SMALL_FS), 0.8)  # 0.57 g RMS in band b: over alert (0.5)
        first = svc.wait(lambda: svc.get("events")["events"] or None, "the stored event")
        assert [e["to_state"] for e in first] == ["alert"]
        assert svc.health()["status"] == "ok" and metric(svc, "quaver_store_ok") == 1.0

        step(trigger, "fill")  # the file system is full
        k = feed_tone(sock, k, int(8 * SMALL_FS), 2.0)  # 1.41 g RMS: over danger (1.0)
        store = degraded(svc)["store"]
        assert not store["ok"] and store["write_errors"] >= 1
        # SQLite's words for ENOSPC (sqlite.org/rescode.html: SQLITE_FULL)
        assert "database or disk is full" in store["last_error"], store
        monitoring_goes_on(svc, k, 2.0)  # every sample, the values follow, the escalation
        # what was stored before is all still there
        assert [e["id"] for e in svc.get("events")["events"]] == [e["id"] for e in first]

        step(trigger, "free")  # room again: the next writes succeed
        k = feed_tone(sock, k, int(4 * SMALL_FS), 0.1)  # quiet: the alarm clears (a new event)
        svc.wait(lambda: svc.health()["status"] == "ok" or None, "the store to recover", 20.0)
        assert metric(svc, "quaver_store_ok") == 1.0
        assert svc.alive()
