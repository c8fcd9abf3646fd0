"""The OPC UA worker process: ``python -m service.opcua.worker --fd-in N --fd-out M``,
started by the service (:class:`service.opcua.host.OpcuaPublisher`) with one end of each of
two socket pairs.

It runs the asyncua server (:mod:`service.opcua.server`) so that the server's Python work
holds this process's interpreter lock, not the service's: the analysis threads never wait
for it. It does what the service's messages say (start, build the plant, write batches,
states, alarm rows, events), asks the service to acknowledge, sends its counters twice a
second, and ends when the service says stop or its end of the socket closes (the service
ended, however it ended: no orphan).

Knows asyncua (through ``server``), the link and the message names; nothing of the hub."""

from __future__ import annotations

import argparse
import asyncio
import itertools
import logging
import os
import socket
import sys
import time
from typing import Any

from .link import read_message, write_message

__all__ = ["main", "serve"]

log = logging.getLogger("quaver.opcua")
ACK_WAIT_S = 10.0  # the longest wait for the service's answer to an Acknowledge (our choice)
STATS_S = 0.5  # counters to the service this often (our choice)
READ_LIMIT = 16 * 1024 * 1024  # the reader's buffer (our choice)
# scheduling niceness of the worker (our choice): when the cores are all busy it gets what
# the analysis leaves, so OPC UA values update less often rather than frames going
# unanalysed
NICE = 10


async def serve(sock_in: socket.socket, sock_out: socket.socket) -> int:
    # a batch with spectra is megabytes: read it in few turns of the loop
    # (each pair's unused half is kept: a StreamWriter collected closes its socket)
    reader, _unused_writer = await asyncio.open_connection(sock=sock_in, limit=READ_LIMIT)
    _unused_reader, writer = await asyncio.open_connection(sock=sock_out)
    loop = asyncio.get_running_loop()
    first = await read_message(reader)
    if first[0] != "init":
        raise ValueError(f"OPC UA worker: expected init, got {first[0]!r}")
    init: dict[str, Any] = first[1]
    acks: dict[int, asyncio.Future[tuple[str, str]]] = {}
    ids = itertools.count(1)

    async def ack(rule: str, who: str, note: str) -> tuple[str, str]:
        n = next(ids)
        fut: asyncio.Future[tuple[str, str]] = loop.create_future()
        acks[n] = fut
        write_message(writer, ("ack", n, rule, who, note))
        try:
            return await asyncio.wait_for(fut, ACK_WAIT_S)
        except TimeoutError:  # the service did not answer: nothing is known to be acknowledged
            return ("refused", "BadTimeout")
        finally:
            acks.pop(n, None)

    async def set_speed(channel: str, rpm: float, who: str) -> tuple[str, str]:
        n = next(ids)
        fut: asyncio.Future[tuple[str, str]] = loop.create_future()
        acks[n] = fut
        write_message(writer, ("speed", n, channel, rpm, who))
        try:
            return await asyncio.wait_for(fut, ACK_WAIT_S)
        except TimeoutError:  # the service did not answer: the speed is not known to be set
            return ("refused", "BadTimeout")
        finally:
            acks.pop(n, None)

    try:
        from .server import OpcuaServer

        server = OpcuaServer(init["opcua"], init["tokens"], init["data_dir"], init["ns_uri"],
                             ack, set_speed)
        await server.start()
    except Exception as e:
        write_message(writer, ("failed", f"{type(e).__name__}: {e}"[:300]))
        await writer.drain()
        writer.close()
        return 2
    write_message(writer, ("listening", os.getpid()))

    async def stats() -> None:
        while True:
            s = server.stats
            write_message(writer, ("stats", {
                "sessions": server.sessions(), "frames": s.frames, "updates": s.updates,
                "events": s.events, "errors": s.errors, "last_error": s.last_error,
                "cpu_s": time.process_time()}))
            await asyncio.sleep(STATS_S)

    stats_task = asyncio.create_task(stats())
    try:
        while True:
            try:
                msg = await read_message(reader)
            except (asyncio.IncompleteReadError, ConnectionError):
                log.warning("OPC UA worker: the service's end closed; stopping")
                break
            kind = msg[0]
            try:
                if kind == "frames":
                    await server.write_frames(msg[1])
                    write_message(writer, ("done", msg[1].seq))
                elif kind == "states":
                    await server.write_states(msg[1])
                elif kind == "alarms":
                    await server.write_alarms(msg[1])
                elif kind == "event":
                    await server.announce(msg[1])
                elif kind in ("ack_reply", "speed_reply"):
                    fut = acks.get(msg[1])
                    if fut is not None and not fut.done():
                        fut.set_result((msg[2], msg[3]))
                elif kind == "plant":
                    t0 = time.monotonic()
                    server.build_plant(msg[1], msg[2])
                    write_message(writer, ("ready", round(time.monotonic() - t0, 2)))
                elif kind == "tokens":
                    server.tokens = list(msg[1])
                elif kind == "stop":
                    break
            except Exception as e:  # one bad message must not stop the server
                server.stats.errors += 1
                server.stats.last_error = f"{kind}: {type(e).__name__}: {e}"[:300]
                log.exception("OPC UA worker: %s", kind)
                if kind == "frames":
                    write_message(writer, ("done", msg[1].seq))
    finally:
        stats_task.cancel()
        await server.stop()
        writer.close()
    return 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m service.opcua.worker")
    ap.add_argument("--fd-in", type=int, required=True, help="the service's messages to us")
    ap.add_argument("--fd-out", type=int, required=True, help="ours to the service")
    args = ap.parse_args(argv)
    try:  # on a busy machine the analysis comes first: the kernel prefers the service
        os.nice(NICE)
    except OSError as e:
        print(f"opcua-worker: nice {NICE}: {e}", file=sys.stderr)
    logging.basicConfig(level=logging.WARNING, stream=sys.stderr,
                        format="%(asctime)s opcua-worker[%(process)d] %(levelname)s "
                               "%(name)s: %(message)s")
    return asyncio.run(serve(socket.socket(fileno=args.fd_in),
                             socket.socket(fileno=args.fd_out)))


if __name__ == "__main__":
    sys.exit(main())
