"""ScoreSubscriber: receives the daemon's scores (PROTOCOL 3) and rejections (PROTOCOL 4)."""

from __future__ import annotations

import time
from collections.abc import Iterator, Sequence
from typing import Any

import msgpack
import zmq

from .keys import CurveKeys
from .sockets import connect, why_nothing


class ScoreSubscriber:
    """Subscribes to a daemon's score socket; `receive` returns (topic, decoded body).

    Columnar score blocks carry `p` and `logit` as float64 little-endian bytes; `decode_columns`
    turns them into lists. With `curve`, the connection is authenticated and encrypted (a daemon
    that requires CURVE sends nothing to a subscriber without an allowed key). A bad address raises
    ValueError.
    """

    def __init__(
        self,
        address: str = "tcp://127.0.0.1:7572",
        topics: Sequence[str] = ("scores", "rejects"),
        context: zmq.Context[Any] | None = None,
        curve: CurveKeys | None = None,
    ) -> None:
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.SUB)
        self._sock.setsockopt(zmq.LINGER, 0)
        if curve is not None:
            curve.apply(self._sock)
        for topic in topics:
            self._sock.setsockopt(zmq.SUBSCRIBE, topic.encode())
        connect(self._sock, address)
        self._address, self._curve = address, curve

    def receive(self, timeout: float | None = None) -> tuple[str, dict[str, Any]]:
        """The next message; TimeoutError when none arrives within `timeout` seconds (at once when
        `timeout` is 0 or less and none is waiting; None waits for ever)."""
        if timeout is not None and not self._sock.poll(max(0, int(timeout * 1000))):  # (ZeroMQ: < 0 is for ever)
            raise TimeoutError(f"no score within {timeout:g} s")
        topic, raw = self._sock.recv_multipart()
        return topic.decode(), msgpack.unpackb(raw, raw=False)

    def why_silent(self, seconds: float = 1.0) -> str | None:
        """Why nothing comes, when the connection is why: a probe connects as this subscriber does
        for up to `seconds` and says what ZeroMQ's handshake found (nothing listening, a daemon that
        requires CURVE, a key it refuses). None when the connection works (a quiet daemon)."""
        return why_nothing(self._ctx, self._address, zmq.SUB, self._curve, seconds)

    def await_daemon(self, producer: Any, timeout: float = 10.0) -> None:
        """Return once this subscription has reached the daemon (ZeroMQ's slow joiner): send probe
        scoring requests through `producer` until one is answered, then drop the answers to the
        extra probes. TimeoutError if none is answered in time. A probe has no id (nothing is
        held) and no feature (no name joins the model's vocabulary: a named one showed in every
        `fit` and `inspect` of the demo's model, at 0 with a warning)."""
        deadline = time.monotonic() + timeout
        while True:
            producer.send({"x": {}})
            producer.flush()
            try:
                self.receive(timeout=0.1)
                break
            except TimeoutError:
                if time.monotonic() > deadline:
                    raise TimeoutError(f"no probe answered within {timeout:g} s") from None
        while True:
            try:
                self.receive(timeout=0.3)
            except TimeoutError:
                return

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
