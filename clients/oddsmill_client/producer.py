"""Producer: sends ingest bodies (PROTOCOL 2) to a daemon over ZeroMQ."""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import msgpack
import zmq

from .keys import CurveKeys
from .sockets import Handshake, NoAnswer, connect, why_nothing

if TYPE_CHECKING:
    import numpy as np

_HEAD = msgpack.Packer(use_bin_type=True)  # packs a batch's head (its events are packed already)


def _plain(value: object) -> object:
    """msgpack's hook for a value it cannot pack itself: numpy's scalars and arrays as the Python
    numbers and lists they hold (`tolist`, as both have it). numpy is not imported for it: the
    client needs only pyzmq and msgpack, and an application without numpy sends none of its values."""
    if type(value).__module__.partition(".")[0] == "numpy" and hasattr(value, "tolist"):
        return value.tolist()
    raise TypeError(f"a value of type {type(value).__name__} ({value!r:.40}) is not a number, string, boolean or None")


class Producer:
    """Streams events to an oddsmill daemon.

    `kind="pub"` (the default) connects an XPUB to the daemon's SUB and waits, up to
    `wait_for_daemon` seconds, until the daemon's subscription has arrived before the first send: a
    plain PUB would drop the first messages while the connection is being made (ZeroMQ's slow
    joiner). When such a producer outruns the daemon by more than the high-water marks, ZeroMQ
    drops messages; with `wait_when_behind` its send waits for room instead (ZeroMQ's
    XPUB_NODROP), as a push producer's does. `kind="push"` connects a PUSH to a daemon started with
    `ingest_kind = "pull"`: nothing is dropped, and `send` blocks while the daemon is behind.

    With `src`, events are numbered (`src`, `seq` from 0; each event of a batch, and each columnar
    block, has its own number) so the daemon can count what was lost and drop repeats. With
    `batch > 1`, events are sent `batch` at a time as `{"batch": [...]}`; `flush` sends what is
    waiting, and `close` flushes. With `curve`, the connection is authenticated and encrypted (a
    daemon that requires CURVE ignores a producer without an allowed key).

    Raises ValueError for a bad address, kind or batch, and TimeoutError when a pub producer's
    daemon has not subscribed within `wait_for_daemon` seconds, or a push producer's has not
    taken the connection (the socket is closed either way):
    a `NoAnswer`, whose `why` says what a probe of the connection found (nothing listening, a
    daemon that requires CURVE, a key it refuses), or None when the connection works.
    With `send_timeout`, a send that waits that long for the daemon (push, or pub with
    `wait_when_behind`) raises TimeoutError, the event not sent (without it a send waits as long as
    the daemon is behind).
    """

    def __init__(
        self,
        address: str = "tcp://127.0.0.1:7571",
        *,
        kind: str = "pub",
        src: str | None = None,
        topic: str = "events",
        batch: int = 1,
        wait_for_daemon: float = 10.0,
        context: zmq.Context[Any] | None = None,
        curve: CurveKeys | None = None,
        send_timeout: float | None = None,
        wait_when_behind: bool = False,
    ) -> None:
        if kind not in ("pub", "push"):
            raise ValueError(f"kind must be pub or push, got {kind!r}")
        if batch < 1:
            raise ValueError(f"batch must be >= 1, got {batch}")
        self._ctx = context or zmq.Context.instance()
        self._sock = self._ctx.socket(zmq.XPUB if kind == "pub" else zmq.PUSH)
        self._sock.setsockopt(zmq.LINGER, 2000)  # close waits this long for queued messages
        if wait_when_behind and kind == "pub":
            self._sock.setsockopt(zmq.XPUB_NODROP, 1)
        self._send_timeout = send_timeout
        if send_timeout is not None:
            self._sock.setsockopt(zmq.SNDTIMEO, max(0, int(send_timeout * 1000)))
        if curve is not None:
            curve.apply(self._sock)
        # a push producer's messages queue on a connection before it is made, and went nowhere
        # when none could be (nothing listening, a daemon of the other kind, a key refused): `send`
        # said "sent" of a file the daemon never saw. It waits for a handshake first, as a pub
        # producer waits for the daemon's subscription.
        handshake = Handshake(self._sock) if kind == "push" else None
        try:
            connect(self._sock, address)
        except ValueError:
            if handshake is not None:
                handshake.stop()
            raise
        self._address, self._curve = address, curve
        self._topic = topic.encode()
        self._src = src
        self._seq = 0
        self._batch = batch
        self._pending: list[bytes] = []  # a batch's events, packed
        # one packer for every body (a packer made a call, as packb makes it, cost a third of a
        # batched send); after an error it starts afresh, holding nothing
        self._packer = msgpack.Packer(use_bin_type=True, default=_plain)
        self.sent = 0
        if kind == "pub":
            self._await_subscription(wait_for_daemon)
        elif handshake is not None:
            why = handshake.result(wait_for_daemon, curve)
            if why is not None:
                self._sock.close(0)
                raise NoAnswer(f"no daemon took the connection within {wait_for_daemon:g} s", why)

    def _await_subscription(self, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                self._sock.close(0)
                why = why_nothing(self._ctx, self._address, zmq.XPUB, self._curve)
                raise NoAnswer(f"no daemon subscribed within {timeout:g} s", why)
            if self._sock.poll(int(left * 1000) + 1, zmq.POLLIN):
                message = self._sock.recv()
                if message[:1] == b"\x01" and self._topic.startswith(message[1:]):
                    return

    def _packed(self, body: dict[str, Any]) -> bytes:
        """The body as msgpack, numbered when the producer numbers (the number taken only once it
        packs: a body that cannot be sent leaves no gap for the daemon to count as lost). numpy's
        scalars and arrays go as the plain numbers and lists they hold; a value of any other type
        raises TypeError naming it, with nothing sent."""
        if self._src is not None:
            body = {**body, "src": self._src, "seq": self._seq}
        try:
            packed: bytes = self._packer.pack(body)
        except (TypeError, ValueError, OverflowError) as e:
            raise TypeError(f"this event cannot be sent: {e}") from None
        if self._src is not None:
            self._seq += 1
        return packed

    def _send(self, packed: bytes) -> None:
        try:
            self._sock.send_multipart([self._topic, packed])
        except zmq.Again:  # (only with send_timeout: a daemon that took nothing in time)
            why = why_nothing(self._ctx, self._address, self._sock.type, self._curve)
            raise NoAnswer(f"the daemon took no message within {self._send_timeout:g} s", why) from None
        self.sent += 1

    def send(self, event: Mapping[str, Any]) -> None:
        """Send one event (a training event, a scoring request or an outcome). TypeError, with
        nothing sent or held for a batch, for an event that is no mapping or holds a value msgpack
        cannot carry (numbers, strings, booleans and None can be sent, numpy's included)."""
        if not isinstance(event, dict) and not isinstance(event, Mapping):
            raise TypeError(f"an event is a mapping (PROTOCOL 2), got {type(event).__name__}")
        packed = self._packed(dict(event))
        if self._batch == 1:
            self._send(packed)
            return
        self._pending.append(packed)  # each event of a batch has its own number
        if len(self._pending) >= self._batch:
            self.flush()

    def flush(self) -> None:
        """Send the events waiting in a batch."""
        if self._pending:
            # {"batch": [event, ...]}, its events packed already when they were added
            head = _HEAD.pack_map_header(1) + _HEAD.pack("batch") + _HEAD.pack_array_header(len(self._pending))
            self._send(b"".join([head, *self._pending]))
            self._pending = []  # (after the send: a timed-out batch is still waiting)

    def send_columns(
        self,
        cols: Sequence[str],
        rows: np.ndarray,
        y: Sequence[int | None] | None = None,
        ids: Sequence[str | int] | None = None,
    ) -> None:
        """Send a columnar block of numeric features: `rows` is n x len(cols); `y` (0, 1, or None for
        a row to score only) and `ids`, when given, one a row. ValueError, with nothing sent, for a
        block the daemon would refuse for its shape. (Needs numpy, as its `rows` do.)"""
        import numpy as np

        matrix = np.ascontiguousarray(rows, dtype="<f8")
        if matrix.ndim != 2 or matrix.shape[1] != len(cols):
            raise ValueError(f"rows must be n x {len(cols)}, got shape {matrix.shape}")
        n = matrix.shape[0]
        body: dict[str, Any] = {"cols": list(cols), "rows": matrix.tobytes()}
        if y is not None:
            labels = list(y)
            if len(labels) != n:
                raise ValueError(f"y must have one label a row ({n}), got {len(labels)}")
            bad = [v for v in labels if v is not None and v not in (0, 1)]
            if bad:
                raise ValueError(f"a label must be 0, 1 or None, got {bad[0]!r}")
            body["y"] = bytes(255 if v is None else int(v) for v in labels)
        if ids is not None:
            if len(ids) != n:
                raise ValueError(f"ids must have one id a row ({n}), got {len(ids)}")
            body["id"] = list(ids)
        packed = self._packed(body)
        self.flush()
        self._send(packed)

    def close(self) -> None:
        self.flush()
        self._sock.close()

    def __enter__(self) -> Producer:
        return self

    def __exit__(self, kind: object, error: object, tb: object) -> None:
        if isinstance(error, TimeoutError):  # the daemon is not taking messages: no second wait
            self._sock.close(0)
            return
        self.close()
