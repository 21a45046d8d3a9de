"""What the producer and the subscriber share about their sockets."""

from __future__ import annotations

from typing import Any

import zmq


def connect(sock: zmq.Socket[Any], address: str) -> None:
    """Connect sock to address; on a bad address, close it and raise ValueError naming the address
    and ZeroMQ's reason (pyzmq's ZMQError says only "Invalid argument")."""
    try:
        sock.connect(address)
    except zmq.ZMQError as e:
        sock.close(0)
        raise ValueError(f"cannot connect to {address!r}: {e.strerror} (an address is like tcp://HOST:PORT)") from None
