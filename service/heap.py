"""Keep the start-up heap out of Python's full collections (``gc.freeze``), and again after
a reload replaced part of it.

Knows only the ``gc`` module."""

from __future__ import annotations

import gc
import logging

log = logging.getLogger("quaver")


def freeze_start_up_heap() -> None:
    """Keep the start-up heap out of Python's full collections.

    Imports, the app and the pipelines leave ~130 000 long-lived objects (functions, types,
    dicts). Each full (generation 2) collection walked them all: 80–120 ms with the whole
    service stopped, every 1–3 s at 64 channels (analysis frames make many short-lived
    objects), and that pause was the latency tail (quaver bench --service, 64 channels:
    p99 107–161 ms; with the heap frozen 47 ms). Garbage is collected first, so none of it
    is kept for good; objects made later are collected as usual."""
    gc.collect()
    gc.freeze()
    log.info("start-up heap frozen: %d objects left out of full collections",
             gc.get_freeze_count())
