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

from .analyze import (
    MAX_AVERAGES,
    RECORDING_SOURCE,
    cmd_analyze,
)
from .bench import (
    cmd_bench,
)

# Everything the single-module service.cli offered is still importable from here.
from .common import (
    CHUNK_S,
    DEFAULT_LISTEN,
    FEED_ASK_TIMEOUT_S,
    FEED_BACKOFF_S,
    FEED_EOF_WAIT_S,
    FEED_FORMATS,
    FRAMED_PAYLOAD,
    TOKEN_ENV,
    CliError,
    Progress,
    parse_band,
    parse_tone,
)
from .feed import (
    ask_source,
    check_feed_target,
    cmd_feed,
    feed_recording,
    find_source,
)
from .parser import (
    build_parser,
    main,
)
from .run import (
    cmd_check,
    cmd_demo,
    cmd_serve,
)

__all__ = [
    "CHUNK_S",
    "CliError",
    "DEFAULT_LISTEN",
    "FEED_ASK_TIMEOUT_S",
    "FEED_BACKOFF_S",
    "FEED_EOF_WAIT_S",
    "FEED_FORMATS",
    "FRAMED_PAYLOAD",
    "MAX_AVERAGES",
    "Progress",
    "RECORDING_SOURCE",
    "TOKEN_ENV",
    "ask_source",
    "build_parser",
    "check_feed_target",
    "cmd_analyze",
    "cmd_bench",
    "cmd_check",
    "cmd_demo",
    "cmd_feed",
    "cmd_serve",
    "feed_recording",
    "find_source",
    "main",
    "parse_band",
    "parse_tone",
]
