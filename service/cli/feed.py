"""``quaver feed``: stream a recording to a running service's TCP or UDP source.

Knows the wire formats and asks the service (REST) which format the target reads."""

from __future__ import annotations

import argparse
import json
import os
import select
import socket
import time
import urllib.error
import urllib.request
from collections.abc import Callable
from typing import Any

import numpy as np

from ..config import (
    parse_listen,
)
from ..wire import encode_frame, encode_raw
from .analyze import _read
from .common import (
    FEED_ASK_TIMEOUT_S,
    FEED_BACKOFF_S,
    FEED_EOF_WAIT_S,
    FEED_FORMATS,
    FRAMED_PAYLOAD,
    TOKEN_ENV,
    CliError,
    Progress,
    _say,
)


class _Link:
    """A blocking TCP connection that reconnects: at most ``retries`` failed attempts in a row,
    waiting 0.2 s, 0.4 s, … (at most 5 s) between them."""

    def __init__(self, host: str, port: int, retries: int, say: Callable[[str], None]) -> None:
        self.host, self.port, self.retries, self.say = host, port, retries, say
        self.sock: socket.socket | None = None
        self.connections = 0
        self.drops = 0

    @property
    def where(self) -> str:
        return f"{self.host}:{self.port}"

    def _drop(self, why: str) -> None:
        if self.sock is not None:
            self.sock.close()
            self.sock = None
        self.drops += 1
        self.say(f"feed: connection to {self.where} lost ({why})")

    def _connect(self) -> None:
        delay, cap = FEED_BACKOFF_S
        failures = 0
        while True:
            if self.connections or failures:  # a reconnect, or a retry of the first connect
                time.sleep(delay)
                delay = min(2 * delay, cap)
            try:
                self.sock = socket.create_connection((self.host, self.port), timeout=10.0)
                self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                self.connections += 1
                if self.connections > 1:
                    self.say(f"feed: reconnected to {self.where}")
                return
            except OSError as e:
                failures += 1
                if failures > self.retries:
                    raise CliError(f"cannot connect to {self.where} after {failures} "
                                   f"attempt(s): {e}") from None
                self.say(f"feed: cannot connect to {self.where} ({e}); attempt {failures} of "
                         f"{self.retries}, next in {delay:g} s")

    def _peer_closed(self) -> str | None:
        """Why the receiver has gone, if it has (its FIN or RST is already here)."""
        assert self.sock is not None
        try:
            readable, _, _ = select.select([self.sock], [], [], 0)
            if not readable:
                return None
            data = self.sock.recv(65536, socket.MSG_DONTWAIT)
        except BlockingIOError:
            return None
        except OSError as e:
            return f"{type(e).__name__}: {e}"
        return "closed by the receiver" if not data else None  # data: ignored

    def send(self, payload: bytes, first_index: int) -> None:
        """Send one block whole; on a drop, reconnect and send the whole block again."""
        while True:
            if self.sock is None:
                self._connect()
                if self.connections > 1:
                    self.say(f"feed: resuming at sample {first_index} (this block is sent whole; "
                             "blocks the lost connection had buffered are not resent)")
            why = self._peer_closed()
            if why is None:
                try:
                    self.sock.sendall(payload)  # type: ignore[union-attr]
                    return
                except OSError as e:
                    why = f"{type(e).__name__}: {e}"
            self._drop(why)

    def finish(self) -> bool:
        """Half-close and wait (bounded) for the receiver to close; False if it reset."""
        if self.sock is None:
            return True
        sock, self.sock = self.sock, None
        try:
            sock.shutdown(socket.SHUT_WR)
            sock.settimeout(FEED_EOF_WAIT_S)
            while sock.recv(65536):
                pass
            return True
        except TimeoutError:
            return True  # the receiver keeps the connection open: nothing more to learn
        except OSError as e:
            self.say(f"feed: the receiver reset the connection after the last block ({e}); "
                     "the last blocks may not have arrived")
            return False
        finally:
            sock.close()


def feed_recording(
    data: np.ndarray,
    fs: float,
    host: str,
    port: int,
    *,
    fmt: str = "f32le",
    block_ms: float = 100.0,
    speed: float = 1.0,
    passes: int = 1,
    retries: int = 10,
    say: Callable[[str], None] = _say,
    progress: Progress | None = None,
) -> tuple[int, int]:
    """Send ``data`` (float ``[C, n]`` in the receiver's raw units) to a TCP receiver.

    Blocks hold round(block_ms·fs/1000) samples per channel. Block b, ending at stream
    sample k_end, is sent k_end/fs/``speed`` seconds after the start (``speed`` 0: at once).
    ``fmt`` is a raw format (s16le | s32le | f32le | f64le: interleaved samples, integer
    formats rounded, out-of-range values refused) or ``framed`` (service.wire frames with
    f32le payload, ``fs``, the first-sample index since the stream began and the first
    sample's time in ns: the wall time at the start plus index/fs). ``passes`` repeats the
    recording with continuing indices (0: until interrupted). Returns (samples sent per
    channel, reconnects). A lost connection is re-made (see :class:`_Link`) and the block
    whose send failed is sent again whole.
    """
    if fmt not in FEED_FORMATS:
        raise ValueError(f"format={fmt!r} is not one of {', '.join(map(repr, FEED_FORMATS))}")
    x = np.asarray(data, dtype=np.float64)
    c, n = x.shape
    block = max(1, int(round(block_ms * fs / 1000.0)))
    if fmt != "framed":  # refuse unsendable values before connecting
        encode_raw(np.array([[np.min(x), np.max(x)]]), fmt)
    link = _Link(host, port, retries, say)
    t_start = time.monotonic()
    wall_ns = time.time_ns()
    index = 0
    p = 0
    while passes == 0 or p < passes:
        for k in range(0, n, block):
            part = x[:, k : k + block]
            end = index + part.shape[1]
            if speed > 0:
                delay = t_start + end / fs / speed - time.monotonic()
                if delay > 0:
                    time.sleep(delay)
            if fmt == "framed":
                payload = encode_frame(part, FRAMED_PAYLOAD, fs, index,
                                       wall_ns + round(index * 1e9 / fs))
            else:
                payload = encode_raw(part, fmt)
            link.send(payload, index)
            index = end
            if progress is not None:
                progress.update(index)
        p += 1
    if progress is not None:
        progress.close()
    if not link.finish():
        raise CliError("the receiver reset the connection at the end; some samples may be lost")
    return index, max(link.connections - 1, 0)


def _wildcard(host: str) -> bool:
    return host in ("", "0.0.0.0", "::", "[::]")


def find_source(sources: dict[str, Any], host: str, port: int) -> tuple[str, dict[str, Any]] | None:
    """The entry of ``/api/v1/health``'s ``sources`` listening on ``host:port``: same port and
    the same host, a wildcard listen, or else the only source on that port."""
    on_port = []
    for sid, st in sources.items():
        listen = st.get("listen") if isinstance(st, dict) else None
        if not isinstance(listen, str) or ":" not in listen:
            continue
        lhost, _, lport = listen.rpartition(":")
        if lport.isdigit() and int(lport) == port:
            on_port.append((sid, st, lhost.strip("[]")))
    exact = [(sid, st) for sid, st, h in on_port if h == host or _wildcard(h)]
    if len(exact) == 1:
        return exact[0]
    return (on_port[0][0], on_port[0][1]) if len(on_port) == 1 else None


def ask_source(api: str, host: str, port: int,
               token: str | None) -> tuple[str, dict[str, Any]] | str:
    """The service's status of the source at ``host:port`` (from ``GET api/v1/health``), or
    why it could not be known."""
    url = api.rstrip("/") + "/api/v1/health"
    req = urllib.request.Request(url, headers={"Accept": "application/json"})
    if token:
        req.add_header("Authorization", f"Bearer {token}")
    try:
        with urllib.request.urlopen(req, timeout=FEED_ASK_TIMEOUT_S) as r:  # noqa: S310 - http(s) only
            doc = json.loads(r.read(1 << 22))
    except urllib.error.HTTPError as e:
        need = f" (set {TOKEN_ENV} to a viewer token)" if e.code in (401, 403) else ""
        return f"{url} answered {e.code}{need}"
    except (OSError, ValueError) as e:
        return f"no answer from {url} ({e})"
    sources = doc.get("sources") if isinstance(doc, dict) else None
    if not isinstance(sources, dict):
        return f"{url} lists no sources"
    found = find_source(sources, host, port)
    if found is None:
        return f"the service at {api} has no source listening on {host}:{port}"
    return found


def check_feed_target(api: str, host: str, port: int, fmt: str, token: str | None,
                      channels: int, fs: float, say: Callable[[str], None] = _say) -> None:
    """Refuse (CliError) to send ``fmt``, ``channels`` channels at ``fs`` Hz to a source
    that reads another format, channel count or rate; warn when the service cannot tell."""
    got = ask_source(api, host, port, token)
    if isinstance(got, str):
        say(f"feed: warning: cannot check which format {host}:{port} reads: {got}; sending "
            f"{fmt} unchecked (--api names the service's HTTP address)")
        return
    sid, st = got
    kind, want = st.get("kind"), st.get("format")
    if kind != "tcp":
        raise CliError(f"{host}:{port} is source {sid!r} of kind {kind!r}; quaver feed sends "
                       "over TCP to a kind = \"tcp\" source")
    if want != fmt:
        hint = (" (it would read the frame headers as samples)" if fmt == "framed" else
                " (it would look for frame headers in raw samples)" if want == "framed" else "")
        raise CliError(f"source {sid!r} at {host}:{port} reads {want}, not {fmt}{hint}; "
                       f"send with --format {want}, or change the source's format")
    names, rate = st.get("channels"), st.get("fs")
    if isinstance(names, list) and len(names) != channels:
        raise CliError(f"source {sid!r} at {host}:{port} takes {len(names)} channel(s) "
                       f"({', '.join(map(str, names))}); the recording has {channels}"
                       + (" (raw samples would be de-interleaved wrongly)" if want != "framed"
                          else ""))
    if isinstance(rate, int | float) and abs(rate - fs) > 1e-9 * rate:
        raise CliError(f"source {sid!r} at {host}:{port} runs at {rate:g} Hz; the recording "
                       f"is {fs:g} Hz (resample it, or use --rate for a raw or text file)")
    say(f"feed: source {sid!r} at {host}:{port} reads {want}, {channels} channel(s) at "
        f"{fs:g} Hz: matches")


def cmd_feed(args: argparse.Namespace) -> int:
    host, port = parse_listen(args.to)
    rec = _read(args.file, args.file_format, args.channels, args.rate)
    if args.api != "none":
        api = args.api or f"http://{host if not _wildcard(host) else '127.0.0.1'}:8750"
        check_feed_target(api, host, port, args.format, os.environ.get(TOKEN_ENV) or None,
                          rec.data.shape[0], rec.fs)
    for p in rec.problems:
        _say(f"{args.file}: {p}")
    passes = 1 if args.loop is None else args.loop
    pace = "as fast as possible" if args.speed == 0 else f"x{args.speed:g} real time"
    c, n = rec.data.shape
    _say(f"feed: {args.file} ({c} ch, {rec.fs:g} Hz, {n / rec.fs:.3f} s) to {host}:{port} as "
         f"{args.format}, {args.block_ms:g} ms blocks, {pace}"
         + ("" if passes == 1 else (", looping" if passes == 0 else f", {passes} passes")))
    progress = Progress("feed", n * passes) if passes else None
    sent, reconnects = feed_recording(
        rec.data * args.scale if args.scale != 1.0 else rec.data, rec.fs, host, port,
        fmt=args.format, block_ms=args.block_ms, speed=args.speed, passes=passes,
        retries=args.retries, progress=progress,
    )
    _say(f"feed: done: {sent} samples per channel, {reconnects} reconnect(s)")
    return 0
