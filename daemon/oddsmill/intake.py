"""A wake-up of the quick path without the interpreter: wait, receive, journal, learn and publish
in one compiled call, calling ZeroMQ's C library directly.

While the daemon's blocks are those `quick._journal_and_learn` takes (messages of one numeric
training event or scoring request each, of the names the block before had), the loop hands each
wake-up to `_serve`:
it waits for the ingest socket (zmq_poll, with the GIL released), takes the arrival time, receives
what is waiting (the block `server._drain` takes: at most `most` messages, stopping once they hold
`most_bytes`), and when the block is one of those, journals it, learns it and publishes its score
bodies (zmq_send), as `Server._quick` does in its one call. Otherwise it hands the block back as it
came (`Intake.handed`) and the loop's usual path takes it; nothing has been done with it.

The floor of the benchmark is a receive-decode-publish loop in Python. Its receiving and sending
through pyzmq, one message at a time, were most of what kept oddsmill's latency above it: a
scratch floor compiled the same way answered in 0.90x to 0.94x of its median time, at 47 against
61 us of CPU a message (2026-12-03).

Messages of other than two frames are refused by their count alone (`Server._block`): for them the
intake keeps the count, and hands back empty frames.
"""

from __future__ import annotations

import ctypes
import errno
import os
import re
from pathlib import Path
from typing import Any

import numpy as np
import zmq
from llvmlite import binding as llvm
from numba import njit, types

from .fastpath import NOT_SUCH, READ
from .protocol import MAX_MESSAGE
from .quick import WRITE_FAILED, Known, _journal_and_learn, pieces

EMPTY = -20  # `_serve`: nothing came within the wait
HANDED = -21  # `_serve`: a block the one call does not take (or too large to copy): handed back
EXPIRY_DUE = -22  # `_serve`: a pending request's time-to-live ended: handed back, for the usual path
MSG_BYTES = 64  # sizeof(zmq_msg_t)
_DONTWAIT, _SNDMORE, _POLLIN = 1, 2, 1
_EINTR = errno.EINTR
_TOPIC = np.frombuffer(b"scores", dtype=np.uint8)
# ictl: the call's integer settings and results
I_SIN, I_SOUT, I_WAIT_MS, I_MOST, I_MOST_BYTES, I_FD, I_M, I_SLOTS, I_SENT_ERR, I_POLL_ERR = range(10)
N_ICTL = 10
# fctl: its floats
F_OLDEST, F_TTL, F_ARRIVAL, F_T0 = range(4)
N_FCTL = 4


def _libzmq() -> ctypes.CDLL | None:
    """The ZeroMQ library pyzmq is running on (the same one, so that its sockets are ours to
    call): the shared library it loaded, or its own extension when it was built with it inside."""
    from zmq.backend.cython import _zmq

    candidates = [_zmq.__file__]
    try:
        maps = Path("/proc/self/maps").read_text()
    except OSError:
        maps = ""
    candidates[:0] = sorted({m for m in re.findall(r"(/\S*/libzmq[^/\s]*\.so[^/\s]*)$", maps, re.M)})
    for path in candidates:
        try:
            lib = ctypes.CDLL(path)
            lib.zmq_msg_recv  # noqa: B018 (present, or AttributeError)
        except (OSError, AttributeError):
            continue
        return lib
    return None


# ZeroMQ's functions, called by name from compiled code (so that numba's cache keeps it, as
# quick.py does for zlib-ng); pyzmq loads the library with its names private: their addresses are
# given to LLVM here. (clock_gettime and memcpy are the C library's, which LLVM finds itself.)
_NAMES = ["zmq_poll", "zmq_msg_init", "zmq_msg_recv", "zmq_msg_data", "zmq_msg_size", "zmq_msg_more"]
_NAMES += ["zmq_msg_close", "zmq_send", "zmq_errno"]
_lib = _libzmq()
AVAILABLE = _lib is not None
if _lib is not None:
    for _name in _NAMES:
        llvm.add_symbol(_name, ctypes.cast(getattr(_lib, _name), ctypes.c_void_p).value)
_u, _i = types.uintp, types.intc
_poll: Any = types.ExternalFunction("zmq_poll", _i(_u, _i, types.long_))
_msg_init: Any = types.ExternalFunction("zmq_msg_init", _i(_u))
_msg_recv: Any = types.ExternalFunction("zmq_msg_recv", _i(_u, _u, _i))
_msg_data: Any = types.ExternalFunction("zmq_msg_data", _u(_u))  # (the address of a message's bytes)
_msg_size: Any = types.ExternalFunction("zmq_msg_size", _u(_u))
_msg_more: Any = types.ExternalFunction("zmq_msg_more", _i(_u))
_msg_close: Any = types.ExternalFunction("zmq_msg_close", _i(_u))
_send: Any = types.ExternalFunction("zmq_send", _i(_u, _u, _u, _i))
_zmq_errno: Any = types.ExternalFunction("zmq_errno", _i())
_clock_gettime: Any = types.ExternalFunction("clock_gettime", _i(_i, _u))
_memcpy: Any = types.ExternalFunction("memcpy", _u(_u, _u, _u))
_CLOCK_REALTIME, _CLOCK_MONOTONIC = 0, 1


@njit(cache=True, error_model="numpy")
def _receive(ictl, msgs, nfr, sizes, spare):  # type: ignore[no-untyped-def]
    """Receive the messages waiting, as `server._drain` takes them, into msgs (two zmq_msg_t a
    message; the frames past a message's second are counted in nfr, their bytes let go of in
    spare); sizes: each kept frame's. The count of messages, and of open zmq_msg_t in ictl."""
    sin = np.uintp(ictl[I_SIN])
    base = msgs.ctypes.data
    most, most_bytes = ictl[I_MOST], ictl[I_MOST_BYTES]
    m = 0
    used = 0
    total = 0
    while m < most and total < most_bytes:
        a = base + MSG_BYTES * used
        _msg_init(a)
        if _msg_recv(a, sin, _DONTWAIT) < 0:
            _msg_close(a)
            break
        sizes[used] = _msg_size(a)
        total += sizes[used]
        used += 1
        n = 1
        more = _msg_more(a)
        if more:  # the body (the frames of a message come together: no wait)
            a = base + MSG_BYTES * used
            _msg_init(a)
            _msg_recv(a, sin, 0)
            sizes[used] = _msg_size(a)
            total += sizes[used]
            used += 1
            n = 2
            more = _msg_more(a)
        while more:  # frames past the second: counted
            a = spare.ctypes.data
            _msg_init(a)
            _msg_recv(a, sin, 0)
            total += _msg_size(a)
            more = _msg_more(a)
            _msg_close(a)
            n += 1
        nfr[m] = n
        m += 1
    ictl[I_M] = m
    ictl[I_SLOTS] = used
    return m


@njit(cache=True, error_model="numpy")
def _close(msgs, used):  # type: ignore[no-untyped-def]
    base = msgs.ctypes.data
    for s in range(used):
        _msg_close(base + MSG_BYTES * s)


@njit(cache=True, error_model="numpy")
def _copy_out(msgs, used, sizes, dest):  # type: ignore[no-untyped-def]
    """The open frames, end to end into dest, then let go of."""
    base = msgs.ctypes.data
    to = dest.ctypes.data
    at = 0
    for s in range(used):
        a = base + MSG_BYTES * s
        n = sizes[s]
        _memcpy(to + at, _msg_data(a), n)
        at += n
        _msg_close(a)


@njit(cache=True, error_model="numpy", nogil=True)
def _serve(  # type: ignore[no-untyped-def]
    ictl, fctl, msgs, nfr, sizes, spare, pollitem, clock, b, starts, key, values, ys, ids, nkeys, keypos, heads, iov,
    done, slots, prm, sc, sl, fl, cl, wq, dt, rz, ry, rll, chunks, dirty, history, ms, out, ends, z
):  # fmt: skip
    """One wake-up: wait up to ictl[I_WAIT_MS] for the ingest socket, take the time (fctl), receive
    the block, and when `_journal_and_learn` takes it (READ), publish its score bodies; otherwise
    leave its frames open for `Intake.handed`. EMPTY, READ, WRITE_FAILED (nothing learned), HANDED
    or EXPIRY_DUE (when the oldest pending request, fctl[F_OLDEST], is past its time-to-live at
    this arrival: the usual path expires it first)."""
    ictl[I_M] = 0
    ictl[I_SLOTS] = 0
    ictl[I_POLL_ERR] = 0
    pi = pollitem.view(np.uint8)
    pollitem[0] = ictl[I_SIN]
    pollitem[1] = 0
    pi[12] = _POLLIN
    r = _poll(pollitem.ctypes.data, np.intc(1), ictl[I_WAIT_MS])
    if r < 0:
        ictl[I_POLL_ERR] = _zmq_errno()
        return EMPTY
    if r == 0:
        return EMPTY
    _clock_gettime(np.intc(_CLOCK_MONOTONIC), clock.ctypes.data + 16)
    _clock_gettime(np.intc(_CLOCK_REALTIME), clock.ctypes.data)
    arrival = np.float64(clock[0] * 1_000_000_000 + clock[1]) / 1e9  # as time.time() computes it
    fctl[F_ARRIVAL] = arrival
    fctl[F_T0] = np.float64(clock[2] * 1_000_000_000 + clock[3]) / 1e9  # and time.perf_counter()
    m = _receive(ictl, msgs, nfr, sizes, spare)
    if m == 0:
        return EMPTY
    if fctl[F_OLDEST] < arrival - fctl[F_TTL]:
        return EXPIRY_DUE
    if ictl[I_SLOTS] != 2 * m:  # (a message of one frame)
        return HANDED
    total = 0
    for e in range(m):
        n = sizes[2 * e + 1]
        if nfr[e] != 2 or n > MAX_MESSAGE:
            return HANDED
        total += n
    if total > b.shape[0]:
        return HANDED
    base = msgs.ctypes.data
    dest = b.ctypes.data
    at = 0
    for e in range(m):  # the bodies end to end (by the C library's memcpy, where numba's loop
        starts[e] = at  # copied a byte at a time)
        n = sizes[2 * e + 1]
        _memcpy(dest + at, _msg_data(base + MSG_BYTES * (2 * e + 1)), n)
        at += n
    starts[m] = at
    status = _journal_and_learn(
        b, starts[: m + 1], key, values, ys, ids, nkeys, keypos, ictl[I_FD], heads, iov, done, slots, prm, sc, sl, fl,
        cl, wq, dt, rz, ry, rll, chunks, dirty, history, ms, arrival, out, ends, z,
    )  # fmt: skip
    if status != READ:
        return status
    _close(msgs, ictl[I_SLOTS])
    ictl[I_SLOTS] = 0
    sout = np.uintp(ictl[I_SOUT])
    topic = _TOPIC.ctypes.data
    data = out.ctypes.data
    p = 0
    errors = 0
    for e in range(m):  # sent back to back: ZeroMQ's I/O thread is woken once for several
        if _send(sout, topic, 6, _SNDMORE) < 0:
            errors += 1
        if _send(sout, data + p, ends[e] - p, 0) < 0:
            errors += 1
        p = ends[e]
    ictl[I_SENT_ERR] = errors
    return READ


class Intake:
    """The arrays `_serve` works in, kept from wake-up to wake-up, for one ingest socket and one
    scores socket, with room for `most` messages a block."""

    def __init__(self, ingest: zmq.Socket[Any], pub: zmq.Socket[Any], most: int, most_bytes: int) -> None:
        self.ictl = np.zeros(N_ICTL, dtype=np.int64)
        self.fctl = np.zeros(N_FCTL)
        self.ictl[I_SIN], self.ictl[I_SOUT] = ingest.underlying, pub.underlying
        self.ictl[I_MOST], self.ictl[I_MOST_BYTES] = most, most_bytes
        self.msgs = np.zeros(2 * most * MSG_BYTES // 8, dtype=np.int64)
        self.spare = np.zeros(MSG_BYTES // 8, dtype=np.int64)
        self.nfr = np.zeros(most, dtype=np.int64)
        self.sizes = np.zeros(2 * most, dtype=np.int64)
        self.pollitem = np.zeros(2, dtype=np.int64)  # zmq_pollitem_t: socket, fd, events, revents
        self.clock = np.zeros(4, dtype=np.int64)  # two struct timespec: the wall clock's, the monotonic
        self.b = np.empty(max(most_bytes, 1 << 16), dtype=np.uint8)  # the bodies a quick block may have
        self.starts = np.zeros(most + 1, dtype=np.int64)
        self.most = most

    def serve(
        self,
        wait_ms: int,
        known: Known,
        fd: int,
        arrays: tuple[np.ndarray, ...],
        metrics: tuple[np.ndarray, ...],
        ms: np.ndarray,
        oldest: float,
        ttl: float,
    ) -> int:
        """`_serve` with the names `known` holds (room made for a whole block), the journal's
        descriptor, the learner's arrays and the metrics'; `oldest`: the arrival of the oldest
        pending request (inf without one)."""
        k = known.slots.shape[0]
        known.room(self.most, self.most * k)
        ictl, fctl = self.ictl, self.fctl
        ictl[I_WAIT_MS], ictl[I_FD] = wait_ms, fd
        fctl[F_OLDEST], fctl[F_TTL] = oldest, ttl
        prm, sc, sl, fl, cl, wq, dt = arrays
        rz, ry, rll, chunks, dirty, history = metrics
        status: int = _serve(
            ictl, fctl, self.msgs, self.nfr, self.sizes, self.spare, self.pollitem, self.clock, self.b, self.starts,
            known.key, known._values, known._ys, known._ids, known._nkeys, known._keypos, known._heads, known._iov,
            known._done, known.slots, prm, sc, sl, fl, cl, wq, dt, rz, ry, rll, chunks, dirty, history, ms,
            known._out, known._ends, known._z,
        )  # fmt: skip
        if status == READ:
            known.took(self.b, int(ictl[I_M]))
            if ictl[I_SENT_ERR]:
                raise zmq.ZMQError(_lib.zmq_errno() if _lib is not None else 0)
        return status

    @property
    def arrival(self) -> float:
        """When the last block came (as time.time() would have said)."""
        return float(self.fctl[F_ARRIVAL])

    @property
    def woke(self) -> float:
        """When the last block came (as time.perf_counter() would have said)."""
        return float(self.fctl[F_T0])

    @property
    def count(self) -> int:
        """The messages of the last block."""
        return int(self.ictl[I_M])

    @property
    def poll_errno(self) -> int:
        """After EMPTY: 0, or the errno of a zmq_poll that failed (EINTR: a signal came)."""
        return int(self.ictl[I_POLL_ERR])

    def bodies(self) -> list[bytes]:
        """The bodies of the last block, after READ (for the writer's records not yet on disk)."""
        return pieces(self.b, self.starts[: self.count + 1].tolist())

    def handed(self) -> list[list[bytes]]:
        """The last block's messages as they came (frames past a message's second: empty), its
        frames let go of; after any status but READ and EMPTY."""
        m, used = self.count, int(self.ictl[I_SLOTS])
        sizes = self.sizes[:used]
        dest = np.empty(int(sizes.sum()), dtype=np.uint8)
        _copy_out(self.msgs, used, sizes, dest)
        self.ictl[I_SLOTS] = 0
        frames = pieces(dest, [0, *np.cumsum(sizes).tolist()]) if used else []
        out: list[list[bytes]] = []
        at = 0
        for n in self.nfr[:m].tolist():
            kept = min(n, 2)
            out.append(frames[at : at + kept] + [b""] * (n - kept))
            at += kept
        return out

    def close(self) -> None:
        """Let go of frames still held (a block never handed back)."""
        used = int(self.ictl[I_SLOTS])
        if used:
            _close(self.msgs, used)
            self.ictl[I_SLOTS] = 0


def warm_up() -> None:
    """Load `_serve`, `_copy_out` and `_close` from numba's cache (a wake-up on a socket nothing
    is sent to, and a handed block of nothing)."""
    if not AVAILABLE:
        return
    ctx: zmq.Context[Any] = zmq.Context()
    try:
        with ctx.socket(zmq.PULL) as a, ctx.socket(zmq.PUB) as p:
            a.bind(f"inproc://intake-warm-up-{os.getpid()}")
            intake = Intake(a, p, 2, 1 << 10)
            known = Known()
            known.remember(None, b"\xa4warm", (0,))
            from .learner import Learner
            from .progressive import ProgressiveMetrics
            from .settings import LearnerSettings

            scratch = Learner(LearnerSettings())
            metrics = ProgressiveMetrics(window=2)
            intake.serve(0, known, -1, scratch.arrays(1), metrics.arrays(), metrics.scalars(), np.inf, 1.0)
            intake.handed()
            intake.close()
    finally:
        ctx.term()


__all__ = ["AVAILABLE", "EMPTY", "EXPIRY_DUE", "HANDED", "NOT_SUCH", "READ", "WRITE_FAILED", "Intake", "warm_up"]
