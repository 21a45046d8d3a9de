"""The daemon's commonest block under load, in one compiled call: messages of one numeric training
event each, or one scoring request with an id, every one with the set of names the block before
had (in the same order), with an integer id or none. The requests are scored, not learned, and the
engine holds them after the call (`Engine._hold_known`, as `Engine.one` holds them).

`fastpath._parse_run` reads the block and checks it against the names remembered; nothing is
changed until the block is known to be such. `_write_records` then appends its journal records to
the segment (writev and zlib-ng's CRC-32, called from compiled code; the bytes
`storage.JournalWriter.write_all` writes), and `_learn_known` learns the events as the rows of one
columnar block (`kernel._shared_rows`, as `kernel.learn_rows` does), keeps the progressive metrics
(`progressive._record`, as `ProgressiveMetrics.update` does) and packs each score body (PROTOCOL 3)
byte for byte as `msgpack.packb` packs the dict the full path builds. `_journal_and_learn` is the
three in one call (the pending store's expiry, which the full path does first, done in Python just
before it); with fsync = "block", or while the journal writer holds appended bytes not yet
written, the server reads in one call, journals in Python and learns in a second (`Known.read`,
`Known.learn`). The same arithmetic as `Server._quick` on the same block, so the same state and
the same bytes (tests/test_lone.py holds every path to the full one), and no Python object an
event but its score's bytes.

>>> import msgpack, numpy as np
>>> body = np.zeros(80, dtype=np.uint8)
>>> n = _pack_score(body, 0, True, 7, np.uint64(0), 0.0, 0.5, 3, 1.5)
>>> msgpack.unpackb(body[:n].tobytes())
{'id': 7, 'p': 0.5, 'logit': 0.0, 'step': 3, 'ts': 1.5}
"""

from __future__ import annotations

import ctypes
import errno
import math
import os
from typing import Any

import msgpack
import numpy as np
import zlib_ng.zlib_ng
from llvmlite import binding as llvm
from numba import njit, types
from numba.np.numpy_support import carray

from . import kernel as K
from .fastpath import NOT_SUCH, READ, EventArrays, _parse_run
from .progressive import _record
from .protocol import MAX_ITEMS, MAX_STR

WRITE_FAILED = -9  # `_journal_and_learn`: the journal's write failed, and nothing was learned
SCORE_BYTES = 72  # at most, a score body: 5 keys, 4 numbers of 9 bytes and an id of 9
_ID = np.frombuffer(b"\x85\xa2id", dtype=np.uint8)  # the body's map header and its first key
_P = np.frombuffer(b"\xa1p", dtype=np.uint8)
_LOGIT = np.frombuffer(b"\xa5logit", dtype=np.uint8)
_STEP = np.frombuffer(b"\xa4step", dtype=np.uint8)
_TS = np.frombuffer(b"\xa2ts", dtype=np.uint8)


# The C functions the journal's write takes in compiled code, called by name, so that numba's cache
# keeps the code (the address of a function differs from process to process): the C library's
# writev and errno, and zlib-ng's CRC-32 (the one storage.py computes; its module is loaded with its
# names private, so its address is given to LLVM here).
llvm.add_symbol("zng_crc32", ctypes.cast(ctypes.CDLL(zlib_ng.zlib_ng.__file__).zng_crc32, ctypes.c_void_p).value)
_crc32: Any = types.ExternalFunction("zng_crc32", types.uint32(types.uint32, types.uintp, types.uint32))
_writev: Any = types.ExternalFunction("writev", types.intp(types.intc, types.uintp, types.intc))
_errno_location: Any = types.ExternalFunction("__errno_location", types.CPointer(types.intc)())  # type: ignore[no-untyped-call]
_IOV_MAX = os.sysconf("SC_IOV_MAX")
_EINTR = errno.EINTR
_EIO = errno.EIO
HEAD_BYTES = 16  # `_write_records`' scratch: the payload head, then a record head a message


@njit(cache=True, error_model="numpy", inline="always")
def _put(out, p, src):  # type: ignore[no-untyped-def]
    for i in range(src.shape[0]):
        out[p + i] = src[i]
    return p + src.shape[0]


@njit(cache=True, error_model="numpy", inline="always")
def _put_be(out, p, bits, size):  # type: ignore[no-untyped-def]
    """The low `size` bytes of bits, big-endian."""
    for i in range(size):
        out[p + i] = np.uint8((bits >> np.uint64(8 * (size - 1 - i))) & np.uint64(0xFF))
    return p + size


@njit(cache=True, error_model="numpy", inline="always")
def _put_float(out, p, v, scratch, as_float):  # type: ignore[no-untyped-def]
    as_float[0] = v
    out[p] = 0xCB
    return _put_be(out, p + 1, scratch[0], 8)


@njit(cache=True, error_model="numpy", inline="always")
def _put_int(out, p, v):  # type: ignore[no-untyped-def]
    """An int64 as msgpack.packb packs it: the shortest form, unsigned ones for v >= 0."""
    u = np.uint64(v)
    if v >= 0:
        if v < 128:
            out[p] = np.uint8(v)
            return p + 1
        if v <= 0xFF:
            out[p] = 0xCC
            return _put_be(out, p + 1, u, 1)
        if v <= 0xFFFF:
            out[p] = 0xCD
            return _put_be(out, p + 1, u, 2)
        if v <= 0xFFFFFFFF:
            out[p] = 0xCE
            return _put_be(out, p + 1, u, 4)
        out[p] = 0xCF
        return _put_be(out, p + 1, u, 8)
    if v >= -32:
        out[p] = np.uint8(u & np.uint64(0xFF))
        return p + 1
    if v >= -128:
        out[p] = 0xD0
        return _put_be(out, p + 1, u, 1)
    if v >= -32768:
        out[p] = 0xD1
        return _put_be(out, p + 1, u, 2)
    if v >= -2147483648:
        out[p] = 0xD2
        return _put_be(out, p + 1, u, 4)
    out[p] = 0xD3
    return _put_be(out, p + 1, u, 8)


@njit(cache=True, error_model="numpy", inline="always")
def _read_int(b, pos):  # type: ignore[no-untyped-def]
    """(fits in int64, value, raw bits) of the msgpack integer at pos (checked by the reader); a
    uint64 past int64's range comes back as its bits, to be packed as it came (0xCF)."""
    c = np.int64(b[pos])
    if c <= 0x7F:
        return True, c, np.uint64(0)
    if c >= 0xE0:
        return True, c - 256, np.uint64(0)
    size = 1 << ((c - 0xCC) & 3)
    bits = np.uint64(0)
    for i in range(size):
        bits = (bits << np.uint64(8)) | np.uint64(b[pos + 1 + i])
    if c <= 0xCF:  # unsigned
        if c == 0xCF and bits >> np.uint64(63):
            return False, np.int64(0), bits
        return True, np.int64(bits), bits
    shift = np.uint64(64 - 8 * size)  # signed: extend the sign of the top byte
    return True, np.int64(bits << shift) >> np.int64(shift), bits


@njit(cache=True, error_model="numpy", inline="always")
def _p(z):  # type: ignore[no-untyped-def]
    """server._p, with the same libm exp."""
    if z >= 0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@njit(cache=True, error_model="numpy")
def _pack_score(out, p, has_id, ident, big_id, z, prob, step, ts):  # type: ignore[no-untyped-def]
    """One score body, {"id", "p", "logit", "step", "ts"} in that order, at out[p:]; returns its
    end. The id: nil (not has_id), the int64 ident, or (ident 0, big_id set) a uint64 past int64;
    prob: the score's p, `_p(z)` (the metrics compute it with the loss, `_record`)."""
    scratch = np.zeros(1, dtype=np.uint64)
    as_float = scratch.view(np.float64)
    p = _put(out, p, _ID)
    if not has_id:
        out[p] = 0xC0
        p += 1
    elif big_id != np.uint64(0):
        out[p] = 0xCF
        p = _put_be(out, p + 1, big_id, 8)
    else:
        p = _put_int(out, p, ident)
    p = _put(out, p, _P)
    p = _put_float(out, p, prob, scratch, as_float)
    p = _put(out, p, _LOGIT)
    p = _put_float(out, p, z, scratch, as_float)
    p = _put(out, p, _STEP)
    p = _put_int(out, p, step)
    p = _put(out, p, _TS)
    return _put_float(out, p, ts, scratch, as_float)


@njit(cache=True, error_model="numpy")
def _learn_known(  # type: ignore[no-untyped-def]
    b, m, values, ys, ids, slots, prm, sc, sl, fl, cl, wq, dt, rz, ry, rll, chunks, dirty, history, ms, arrival,
    out, ends, z
):  # fmt: skip
    """Learn the m events `read` read (rows of values at `slots`, labels ys; a scoring request's
    label NaN: scored, not learned) as kernel.learn_rows does, record the training events in the
    metrics as ProgressiveMetrics.update does (ms: its sum, count, head, filled, stride and
    points, updated in place), and pack each one's score body into out (body r ends at ends[r];
    its id from b at ids[r]; its step the learner's before it, as `Engine.one` publishes it). z
    gets each event's logit (for the requests the caller holds). Returns how many were requests."""
    k = slots.shape[0]
    step = np.int64(sc[K.S_T])
    rows = values[: m * k].reshape((m, k))
    op = np.full(m, K.OP_TRAIN, dtype=np.int8)
    y = ys[:m].copy()
    trained = 0
    for r in range(m):
        if math.isnan(y[r]):
            op[r] = K.OP_SCORE
            y[r] = 0.0
        else:
            trained += 1
    dx = np.zeros(max(1, int(prm[K.P_MAX_CENTRED])))
    xs = np.empty(int(prm[K.P_MAX_CENTRED]) + k + 1)
    ada = prm[K.P_SCHED] == K.SCH_ADAGRAD
    K._shared_rows(prm, sc, sl, fl, dt, cl, wq, slots, rows, op, y, np.ones(m), z, dx, xs, ada)
    ps = np.empty(m)  # each score's p, taken with its loss from the same exp (a request's: _p)
    if trained == m:
        zt, yt, pt = z[:m], y, ps
    else:
        zt, yt, pt = np.empty(trained), np.empty(trained), np.empty(trained)
        t = 0
        for r in range(m):
            if op[r] == K.OP_TRAIN:
                zt[t], yt[t] = z[r], y[r]
                t += 1
    if trained > 0:
        total, count, head, filled, stride, points = _record(
            zt, yt, rz, ry, rll, chunks, dirty, history, ms[0], int(ms[1]), int(ms[2]), int(ms[3]),
            int(ms[4]), int(ms[5]), pt,
        )  # fmt: skip
        ms[0], ms[1], ms[2], ms[3], ms[4], ms[5] = total, count, head, filled, stride, points
    if trained != m:
        t = 0
        for r in range(m):
            if op[r] == K.OP_TRAIN:
                ps[r] = pt[t]
                t += 1
            else:
                ps[r] = _p(z[r])
    p = 0
    for r in range(m):
        if ids[r] < 0:
            p = _pack_score(out, p, False, 0, np.uint64(0), z[r], ps[r], step, arrival)
        else:
            fits, ident, bits = _read_int(b, ids[r])
            p = _pack_score(out, p, True, ident, np.uint64(0) if fits else bits, z[r], ps[r], step, arrival)
        ends[r] = p
        if op[r] == K.OP_TRAIN:
            step += 1
    return m - trained


@njit(cache=True, error_model="numpy")
def _write_records(b, starts, m, arrival, fd, heads, iov, done):  # type: ignore[no-untyped-def]
    """Append the journal records of m messages (message e: b[starts[e]:starts[e + 1]]) that
    arrived at `arrival` to the file fd, as `storage.JournalWriter.write_all` writes them: record
    head (u32 LE payload length, u32 LE CRC-32), payload head ([arrival, as msgpack), the body as
    it came; with writev, the bodies never copied. heads: scratch of HEAD_BYTES + 8 m bytes, iov:
    of 6 m int64. done[0]: the bytes that reached the file; done[1]: 0, or the errno of the write
    that failed (a write is tried again after EINTR, as Python's os.writev does)."""
    scratch = np.zeros(1, dtype=np.uint64)
    scratch.view(np.float64)[0] = arrival
    heads[0] = 0x92
    heads[1] = 0xCB
    _put_be(heads, 2, scratch[0], 8)
    base = heads.ctypes.data
    data = b.ctypes.data
    crc_head = _crc32(np.uint32(0), base, np.uint32(10))
    for e in range(m):
        start = starts[e]
        n = starts[e + 1] - start
        crc = _crc32(crc_head, data + start, np.uint32(n))
        h = HEAD_BYTES + 8 * e
        length = np.uint64(10 + n)
        for i in range(4):
            heads[h + i] = np.uint8((length >> np.uint64(8 * i)) & np.uint64(0xFF))
            heads[h + 4 + i] = np.uint8((np.uint64(crc) >> np.uint64(8 * i)) & np.uint64(0xFF))
        iov[6 * e] = base + h
        iov[6 * e + 1] = 8
        iov[6 * e + 2] = base
        iov[6 * e + 3] = 10
        iov[6 * e + 4] = data + start
        iov[6 * e + 5] = n
    pieces = 3 * m
    at = 0
    written = 0
    while at < pieces:
        r = _writev(np.intc(fd), iov.ctypes.data + 16 * at, np.intc(min(pieces - at, _IOV_MAX)))
        if r <= 0:
            code = carray(_errno_location(), 1)[0] if r < 0 else _EIO
            if code == _EINTR:
                continue
            done[0] = written
            done[1] = code
            return
        written += r
        while at < pieces and r >= iov[2 * at + 1]:  # the pieces written whole
            r -= iov[2 * at + 1]
            at += 1
        if r > 0:  # and the start of one (a short write)
            iov[2 * at] += r
            iov[2 * at + 1] -= r
    done[0] = written
    done[1] = 0


@njit(cache=True, error_model="numpy")
def _journal_and_learn(  # type: ignore[no-untyped-def]
    b, starts, key, values, ys, ids, nkeys, keypos, fd, heads, iov, done, slots, prm, sc, sl, fl, cl, wq, dt, rz,
    ry, rll, chunks, dirty, history, ms, arrival, out, ends, z
):  # fmt: skip
    """`_parse_run` (with the key, integer ids only), then, for a block it READ, the journal's
    records (`_write_records`), then `_learn_known`: a block of the quick path in one call. What
    `_parse_run` found when it was not READ, with nothing written; WRITE_FAILED, with nothing
    learned, when the write failed (done says how far it got); after READ, done[2] says how many
    of the block were scoring requests."""
    m = starts.shape[0] - 1
    k = slots.shape[0]
    status = _parse_run(b, starts, key, True, values[: m * k], ys, ids, nkeys, keypos, MAX_STR, MAX_ITEMS, True)
    if status != READ:
        return status
    _write_records(b, starts, m, arrival, fd, heads, iov, done)
    if done[1] != 0:
        return WRITE_FAILED
    done[2] = _learn_known(
        b, m, values, ys, ids, slots, prm, sc, sl, fl, cl, wq, dt, rz, ry, rll, chunks, dirty, history, ms, arrival,
        out, ends, z,
    )  # fmt: skip
    return READ


class Known(EventArrays):
    """The set of names the quick path learned last (its key bytes and slots, in one vocabulary)
    and the arrays it reads blocks into, kept from block to block."""

    def __init__(self) -> None:
        super().__init__()
        self.vocab: object = None  # the vocabulary the slots are of
        self.key = np.empty(0, dtype=np.uint8)
        self.slots = np.empty(0, dtype=np.int64)
        self._out = np.empty(0, dtype=np.uint8)
        self._ends = np.empty(0, dtype=np.int64)
        self._b = np.empty(0, dtype=np.uint8)
        self._m = 0
        self._heads = np.empty(HEAD_BYTES, dtype=np.uint8)
        self._iov = np.empty(0, dtype=np.int64)
        self._done = np.zeros(3, dtype=np.int64)  # bytes written, errno, requests of the block
        self._z = np.empty(0)
        self._requests = 0  # of the block last learned
        self._slot_tuple: tuple[int, ...] = ()

    def _grown(self, messages: int) -> None:
        self._z = np.empty(messages)
        self._ends = np.empty(messages, dtype=np.int64)
        self._out = np.empty(messages * SCORE_BYTES, dtype=np.uint8)
        self._heads = np.empty(HEAD_BYTES + 8 * messages, dtype=np.uint8)
        self._iov = np.empty(6 * messages, dtype=np.int64)

    def remember(self, vocab: object, key: bytes, slots: tuple[int, ...]) -> None:
        """Names every one of which has a slot in `vocab`: their key bytes and slots."""
        self.vocab = vocab
        self.key = np.frombuffer(key, dtype=np.uint8)
        self.slots = np.array(slots, dtype=np.int64)
        self._slot_tuple = tuple(slots)

    def read(self, raws: list[bytes]) -> int:
        """`fastpath._parse_run` over the messages (READ, NOT_SUCH, OTHER_NAMES or STR_ID); after READ,
        `learn` learns them."""
        m = len(raws)
        k = self.slots.shape[0]
        fitted = self._fit(raws, m * k)
        if fitted is None:
            return NOT_SUCH
        joined, starts = fitted
        b = np.frombuffer(joined, dtype=np.uint8)
        # (values has room for m x k: an event with more features than the key's fails the read)
        status: int = _parse_run(
            b, starts, self.key, True, self._values[: m * k], self._ys, self._ids, self._nkeys, self._keypos, MAX_STR,
            MAX_ITEMS, True,
        )  # fmt: skip
        self._b, self._m = b, m
        return status

    def journal_and_learn(
        self,
        raws: list[bytes],
        fd: int,
        arrival: float,
        arrays: tuple[np.ndarray, ...],
        metrics: tuple[np.ndarray, ...],
        ms: np.ndarray,
    ) -> tuple[int, list[bytes]]:
        """`read`, then for a block it READ, its journal records appended to the file fd, then
        `learn`, in one compiled call (`_journal_and_learn`): (READ, the score bodies), or what the
        reading found, nothing written; or (WRITE_FAILED, []) with `written` and `errno` saying
        how far the write got, and nothing learned. The learner's arrays with room for a block of
        these slots, as for `learn`."""
        m = len(raws)
        k = self.slots.shape[0]
        fitted = self._fit(raws, m * k)
        if fitted is None:
            return NOT_SUCH, []
        joined, starts = fitted
        b = np.frombuffer(joined, dtype=np.uint8)
        prm, sc, sl, fl, cl, wq, dt = arrays
        rz, ry, rll, chunks, dirty, history = metrics
        done = self._done
        status: int = _journal_and_learn(
            b, starts, self.key, self._values, self._ys, self._ids, self._nkeys, self._keypos, fd, self._heads,
            self._iov, done, self.slots, prm, sc, sl, fl, cl, wq, dt, rz, ry, rll, chunks, dirty, history, ms, arrival,
            self._out, self._ends, self._z,
        )  # fmt: skip
        if status != READ:
            return status, []
        self._b, self._m, self._requests = b, m, int(done[2])
        return READ, self._bodies()

    @property
    def written(self) -> int:
        """The bytes of records the last `journal_and_learn` wrote."""
        return int(self._done[0])

    @property
    def errno(self) -> int:
        """After WRITE_FAILED: the errno of the write that failed."""
        return int(self._done[1])

    def learn(
        self, arrays: tuple[np.ndarray, ...], metrics: tuple[np.ndarray, ...], ms: np.ndarray, arrival: float
    ) -> list[bytes]:
        """Learn the block `read` read, with the learner's arrays (Learner.arrays, with room for
        this block's slots) and the metrics' (ms: their
        scalars, updated in place); the score bodies, in order."""
        m = self._m
        prm, sc, sl, fl, cl, wq, dt = arrays
        rz, ry, rll, chunks, dirty, history = metrics
        self._requests = _learn_known(
            self._b, m, self._values, self._ys, self._ids, self.slots, prm, sc, sl, fl, cl, wq, dt,
            rz, ry, rll, chunks, dirty, history, ms, arrival, self._out, self._ends, self._z,
        )  # fmt: skip
        return self._bodies()

    def requests(self) -> list[tuple[int, object]]:
        """The scoring requests of the block last learned, in order: (row, id), the id None for a
        request without one (scored, not held). `row_values` and `logit` give the rest."""
        if not self._requests:
            return []
        m = self._m
        rows = np.flatnonzero(np.isnan(self._ys[:m])).tolist()
        data = self._b
        out: list[tuple[int, object]] = []
        for r in rows:
            at = int(self._ids[r])
            if at < 0:
                out.append((r, None))
                continue
            c = int(data[at])  # an integer id (the reading took no other): its length from its first byte
            size = 1 if c <= 0x7F or c >= 0xE0 else 1 + (1 << ((c - 0xCC) & 3))
            out.append((r, msgpack.unpackb(data[at : at + size].tobytes())))
        return out

    def took(self, b: np.ndarray, m: int) -> None:
        """A block of m events read from b and learned in another compiled call (intake.py)."""
        self._b, self._m, self._requests = b, m, int(self._done[2])

    @property
    def slot_tuple(self) -> tuple[int, ...]:
        """The slots, as the tuple a held request keeps."""
        return self._slot_tuple

    @property
    def request_count(self) -> int:
        """The scoring requests of the block last learned."""
        return self._requests

    def row_values(self, r: int) -> bytes:
        """Event r's values, as the bytes of native doubles (as `engine.pending_entry` keeps them)."""
        k = self.slots.shape[0]
        return self._values[r * k : (r + 1) * k].tobytes()

    def logit(self, r: int) -> float:
        """Event r's published logit."""
        return float(self._z[r])

    @property
    def count(self) -> int:
        """The events of the block last learned."""
        return self._m

    def _bodies(self) -> list[bytes]:
        """The score bodies the last block's learning packed, in order."""
        return pieces(self._out, [0, *self._ends[: self._m].tolist()])


JOIN_MOST = 1 << 18  # bytes: `pieces` copies out at most this much at once, then slices


def pieces(buffer: np.ndarray, bounds: list[int]) -> list[bytes]:
    """The bytes of buffer between each bound and the next: one copy, then slices; or, past
    JOIN_MOST bytes, each piece copied on its own (a large block copied whole is an allocation
    glibc maps fresh, past its threshold of 1 MiB here, and faults in a page at a time)."""
    if len(bounds) == 2 or bounds[-1] - bounds[0] > JOIN_MOST:
        return [buffer[a:e].tobytes() for a, e in zip(bounds[:-1], bounds[1:], strict=True)]
    data = buffer[: bounds[-1]].tobytes()
    return [data[a:e] for a, e in zip(bounds[:-1], bounds[1:], strict=True)]
