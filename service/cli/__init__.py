"""The ``quaver`` console script: demo, serve, check, analyze, feed and bench.

Knows the config, recordings, wire formats and the engine's public API; holds no server code
(the running service is ``service.app``) and no DSP of its own (``analyze`` feeds the
service's ``SourcePipeline`` and reads its frames as the REST API does).

One module per command (``run``: demo, serve, check; ``analyze``; ``feed``; ``bench``), the
parser and ``main`` in ``parser``, what they share in ``common``.

Exit codes: 0 done; 1 a run-time failure (file, network); 2 bad usage or a bad config;
130 interrupted. Every error is one readable line on stderr (a config error: one problem
per line), never a traceback.
"""

from __future__ import annotations

from .common import CliError, Progress, parse_band, parse_tone
from .feed import feed_recording
from .parser import build_parser, main

__all__ = [
    "CliError",
    "Progress",
    "build_parser",
    "feed_recording",
    "main",
    "parse_band",
    "parse_tone",
]
