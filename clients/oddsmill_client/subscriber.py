"""ScoreSubscriber: receives the daemon's scores (PROTOCOL 3) and rejections (PROTOCOL 4)."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import Any

import msgpack
import zmq


class ScoreSubscriber:
    """Subscribes to a daemon's score socket; `receive` returns (topic, decoded body).

    Columnar score blocks carry `p` and `logit` as float64 little-endian bytes; `decode_columns`
    turns them into lists.
    """

    def __init__(
        self,
        address: str = "tcp://127.0.0.1:7572",
        topics: Sequence[str] = ("scores", "rejects"),
        context: zmq.Context[Any] | None = None,
    ) -> None:
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.SUB)
        self._sock.setsockopt(zmq.LINGER, 0)
        for topic in topics:
            self._sock.setsockopt(zmq.SUBSCRIBE, topic.encode())
        self._sock.connect(address)

    def receive(self, timeout: float | None = None) -> tuple[str, dict[str, Any]]:
        """The next message; TimeoutError when none arrives within `timeout` seconds."""
        if timeout is not None and not self._sock.poll(int(timeout * 1000)):
            raise TimeoutError(f"no score within {timeout:g} s")
        topic, raw = self._sock.recv_multipart()
        return topic.decode(), msgpack.unpackb(raw, raw=False)

    def __iter__(self) -> Iterator[tuple[str, dict[str, Any]]]:
        while True:
            yield self.receive()

    def close(self) -> None:
        self._sock.close()

    def __enter__(self) -> ScoreSubscriber:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def decode_columns(body: dict[str, Any]) -> dict[str, Any]:
    """A columnar score block with `p` and `logit` as lists of floats."""
    import struct

    out = dict(body)
    for key in ("p", "logit"):
        raw = body[key]
        out[key] = list(struct.unpack(f"<{len(raw) // 8}d", raw))
    return out
