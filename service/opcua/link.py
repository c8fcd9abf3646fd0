"""The link between the service and its OPC UA worker process: messages as length-prefixed
pickles over one socket pair, read and written with asyncio streams on both sides.

Pure transport: knows nothing of asyncua, the hub or the address space. A message is a
tuple whose first item names it (see docs/opcua.md "Architecture"). Both ends are our own
code from the same checkout, so pickle (numpy arrays travel as raw buffers) is safe here;
the socket is a private pair handed to the child, never a listening port."""

from __future__ import annotations

import asyncio
import pickle
import struct
from typing import Any

__all__ = ["MAX_MESSAGE", "read_message", "write_message"]

HEADER = struct.Struct("!I")
MAX_MESSAGE = 256 * 1024 * 1024  # a message longer than this is a broken link (our choice)


def write_message(writer: asyncio.StreamWriter, msg: tuple[Any, ...]) -> int:
    """Queue ``msg`` on ``writer`` without waiting (the caller bounds what is in flight);
    returns its size in bytes."""
    data = pickle.dumps(msg, protocol=pickle.HIGHEST_PROTOCOL)
    writer.write(HEADER.pack(len(data)) + data)
    return HEADER.size + len(data)


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
