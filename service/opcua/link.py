"""The link between the service and its OPC UA worker process: messages as length-prefixed
pickles over one socket pair, read and written with asyncio streams on both sides.

Pure transport: knows nothing of asyncua, the hub or the address space. A message is a
tuple whose first item names it (see docs/opcua.md "Architecture"). Both ends are our own
code from the same checkout, so pickle (numpy arrays travel as raw buffers) is safe here;
the socket is a private pair handed to the child, never a listening port."""

from __future__ import annotations

import asyncio
import logging
import pickle
import queue
import socket
import struct
import threading
from typing import Any

__all__ = ["MAX_MESSAGE", "Sender", "encode", "read_message", "write_message"]

log = logging.getLogger("quaver.opcua")

HEADER = struct.Struct("!I")
MAX_MESSAGE = 256 * 1024 * 1024  # a message longer than this is a broken link (our choice)


def encode(msg: tuple[Any, ...]) -> bytes:
    data = pickle.dumps(msg, protocol=pickle.HIGHEST_PROTOCOL)
    return HEADER.pack(len(data)) + data


def write_message(writer: asyncio.StreamWriter, msg: tuple[Any, ...]) -> int:
    """Queue ``msg`` on ``writer`` without waiting (the caller bounds what is in flight);
    returns its size in bytes."""
    data = encode(msg)
    writer.write(data)
    return len(data)


class Sender:
    """Messages to the worker from a thread of their own, with blocking ``sendall`` on a
    socket of their own: a batch of spectra is megabytes, and through the service's event
    loop it went out a socket buffer (~200 kB) per loop turn, which on a busy loop took
    longer than writing it. :meth:`send` never waits (the caller bounds what is in flight);
    pickling and the copy happen on the thread, which waits in ``sendall`` without the
    interpreter lock."""

    def __init__(self, sock: socket.socket) -> None:
        sock.setblocking(True)
        self.sock = sock
        self.q: queue.SimpleQueue[tuple[Any, ...] | None] = queue.SimpleQueue()
        self.closed = False
        self.thread = threading.Thread(target=self._run, name="opcua-link-send", daemon=True)
        self.thread.start()

    def send(self, msg: tuple[Any, ...]) -> None:
        if not self.closed:
            self.q.put(msg)

    def close(self) -> None:
        """Stop after what is queued (the thread closes the socket)."""
        self.closed = True
        self.q.put(None)

    def _run(self) -> None:
        try:
            while (msg := self.q.get()) is not None:
                self.sock.sendall(encode(msg))
        except OSError as e:  # the worker ended: the service's watch says so
            log.debug("OPC UA link: %s", e)
        finally:
            self.closed = True
            self.sock.close()


async def read_message(reader: asyncio.StreamReader) -> tuple[Any, ...]:
    """The next message; ``asyncio.IncompleteReadError`` when the other end closed."""
    head = await reader.readexactly(HEADER.size)
    (n,) = HEADER.unpack(head)
    if n > MAX_MESSAGE:
        raise ValueError(f"OPC UA link: a message of {n} bytes (the link is broken)")
    msg = pickle.loads(await reader.readexactly(n))
    if not isinstance(msg, tuple) or not msg or not isinstance(msg[0], str):
        raise ValueError("OPC UA link: a message that is not a named tuple")
    return msg
