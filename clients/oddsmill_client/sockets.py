"""What the producer and the subscriber share about their sockets."""

from __future__ import annotations

import time
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


class NoAnswer(TimeoutError):
    """Nothing came from the daemon in time; `why` is what a probe of the connection found (ZeroMQ's
    monitor events), or None when the connection itself works."""

    def __init__(self, message: str, why: str | None) -> None:
        super().__init__(f"{message}: {why}" if why else message)
        self.why = why


_WATCHED = (
    zmq.EVENT_CONNECTED
    | zmq.EVENT_DISCONNECTED
    | zmq.EVENT_HANDSHAKE_SUCCEEDED
    | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL
    | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
    | zmq.EVENT_HANDSHAKE_FAILED_AUTH
)
_FAILED = zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL


def why_nothing(ctx: zmq.Context[Any], address: str, kind: int, curve: Any = None, seconds: float = 1.0) -> str | None:
    """Why a client of socket type `kind` (with CurveKeys `curve`, or none) gets nothing from
    `address`: a socket of its own connects for up to `seconds`, and ZeroMQ's monitor says how the
    connection went. ZeroMQ retries a failed connection without a word, so a client that waited
    could only say that nothing came: a daemon that requires CURVE, a key it does not allow and an
    address where nothing listens looked the same. None when the handshake succeeds."""
    sock = ctx.socket(kind)
    sock.setsockopt(zmq.LINGER, 0)
    if curve is not None:
        curve.apply(sock)
    watching = Handshake(sock)
    try:
        sock.connect(address)
        return watching.result(seconds, curve)
    finally:
        watching.stop()
        sock.close(0)


class Handshake:
    """ZeroMQ's monitor of `sock` (made before it connects) until its first handshake: `result`
    waits for it and says what went wrong, if anything; the monitor stops either way."""

    def __init__(self, sock: zmq.Socket[Any]) -> None:
        self._sock = sock
        self._monitor = sock.get_monitor_socket(_WATCHED)

    def result(self, seconds: float, curve: Any = None) -> str | None:
        """None once a handshake succeeds within `seconds`; otherwise why none did."""
        from zmq.utils.monitor import recv_monitor_message

        seen = 0
        try:
            deadline = time.monotonic() + seconds
            while (left := deadline - time.monotonic()) > 0 and self._monitor.poll(max(1, int(left * 1000))):
                seen |= recv_monitor_message(self._monitor)["event"]
                if seen & (zmq.EVENT_HANDSHAKE_SUCCEEDED | _FAILED | zmq.EVENT_HANDSHAKE_FAILED_AUTH):
                    break
        finally:
            self.stop()
        return _reason(seen, curve)

    def stop(self) -> None:
        """Stop the monitor (also after the socket was closed); once is enough."""
        if not self._sock.closed:
            self._sock.disable_monitor()
        self._monitor.close(0)


# What a probe can find (NoAnswer.why), one of these: callers compare with them, not with words.
KEY_REFUSED = "the daemon refused this client's key: its public key is not among those the daemon allows"
NEEDS_KEYS = "the daemon requires CURVE keys, and this client has none"
WRONG_DAEMON_KEY = (
    "the CURVE handshake failed: the daemon's public key is not the one this client was given, "
    "or the daemon does not use CURVE"
)
OTHER_KIND = (
    "the socket there does not take this kind of client (a daemon's ingest takes pub producers, "
    "or push ones with --ingest-kind pull; scores come from its scores address)"
)
NOT_ZEROMQ = "something accepts connections there, but it does not answer as ZeroMQ does"
NOTHING_THERE = "nothing accepts connections there"


def _reason(seen: int, curve: Any) -> str | None:
    if seen & zmq.EVENT_HANDSHAKE_SUCCEEDED:
        return None
    if seen & zmq.EVENT_HANDSHAKE_FAILED_AUTH:
        return KEY_REFUSED
    if seen & _FAILED:
        return NEEDS_KEYS if curve is None else WRONG_DAEMON_KEY
    if seen & zmq.EVENT_DISCONNECTED:
        return OTHER_KIND
    if seen & zmq.EVENT_CONNECTED:
        return NOT_ZEROMQ
    return NOTHING_THERE
