"""Cluster mode (``[cluster] engine = "ray"``): groups of sources on Ray actors, each doing
ingest, sensor checks and the engine, their per-push results pulled by the service process.

``transport`` and ``actor`` import no Ray; ``head`` imports it when a cluster starts, so the
default install (one process, no Ray) never needs it."""
