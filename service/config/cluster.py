"""The ``[cluster]`` table: run the sources' analysis on Ray actors (the optional ``ray``
extra) instead of in the service process, and where each source may run.

Knows pydantic and the source entries' shapes; nothing of Ray, actors or the hub (the
cross-checks with ``[[sources]]`` are :func:`cluster_problems`)."""

from __future__ import annotations

from typing import TYPE_CHECKING, Literal

from pydantic import Field

from .base import StrictModel

if TYPE_CHECKING:
    from .models import Config

__all__ = ["ClusterConfig", "Engine", "cluster_problems", "node_resource"]

Engine = Literal["process", "ray"]


def node_resource(node: str) -> str:
    """The Ray custom resource a worker node started for ``node = "<node>"`` sources holds
    (``ray start --resources '{"quaver-node-<node>": 1}'``)."""
    return f"quaver-node-{node}"


class ClusterConfig(StrictModel):
    engine: Engine = Field(
        "process",
        description="process (everything in the service process, no Ray) | ray (each group "
        "of sources runs on a Ray actor: ingest, sensor checks and the engine; needs the "
        "'ray' extra: pip install 'quaver[ray]'); see README 'When one machine is not enough'.",
    )
    address: str = Field(
        "local",
        min_length=1,
        max_length=256,
        description="local (start a Ray of `workers` processes on this machine with the "
        "service) | the address of an existing Ray cluster (host:port of its head, or 'auto' "
        "for the cluster this machine has joined).",
    )
    workers: int = Field(
        2, ge=1, le=4096,
        description="Actors the relocatable sources are spread over (round robin); with "
        "address 'local' also the CPUs of the local Ray.",
    )
    max_restarts: int = Field(
        3, ge=0, le=1000,
        description="Times Ray restarts an actor that died (its process or its node lost; "
        "relocatable sources come back on any node with room). Beyond it the service starts a "
        "new actor for its sources (at its back-off: 1, 2, 4 … 30 s between attempts).",
    )
    object_store_mb: int = Field(
        100, ge=75, le=1_000_000,
        description="With address 'local': the local Ray's object store, MiB.",
    )


def cluster_problems(cfg: Config) -> list[str]:
    """Sources the cluster cannot place: a network source on a cluster beyond this machine
    must name the node whose address it listens on; ``node`` means nothing without Ray."""
    out: list[str] = []
    cl = cfg.cluster
    for i, s in enumerate(cfg.sources):
        node = s.node
        if node is not None and cl.engine != "ray":
            out.append(f"sources[{i}].node: node is only used with [cluster] engine = \"ray\"")
        if (cl.engine == "ray" and cl.address != "local" and node is None
                and s.kind in ("tcp", "udp")):
            out.append(
                f"sources[{i}].node: a {s.kind} source on a Ray cluster must name the node "
                "whose address it listens on (node = \"<name>\", the worker started with the "
                f"resource {node_resource('<name>')!r})")
    return out
