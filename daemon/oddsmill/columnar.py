"""The daemon's columnar blocks under load, read in compiled code and learned as one run of rows.

A producer streaming numeric features sends columnar messages (PROTOCOL 2): `{"cols": [names],
"rows": float64 bytes, "y": label bytes}`, with `src` and `seq` when it numbers them. Under load a
block holds tens of them (up to the loop's 4 MiB), and the full path decoded each with msgpack (a
copy of its rows into a bytes object, then another into an array), checked it in Python, planned
it, and built its score body as a dict for msgpack to pack. Here each message is read by one
compiled call (`_read`) straight from its bytes into arrays kept from block to block: its rows
copied once, its values and labels checked as the full path checks them. Consecutive messages with
the same names are learned by one `Engine.train_rows` call, as the rows of one columnar block
(the kernel learns rows one after another, so it is the same arithmetic as message by message),
and each score body is put together from its bytes, byte for byte what msgpack packs for the full
path's dict.

It takes a block only when every message is such a block: a map of cols, rows and y (and src and
seq, or either), every row labelled 0 or 1, every value 0 or within the protocol's range, names the
vocabulary knows, numbers in sequence. Anything else (an id, a ts, a row without a label, a NaN, a
new name, a duplicate, extra bytes, a length beyond the decoder's limits) returns None with nothing
changed, and the full path decides: this path never refuses anything. tests/test_columnar.py holds
the reading to msgpack's decoder and the protocol, tests/test_lone.py the daemon's answers, journal
and state to the full path's, byte for byte and bit for bit.

>>> import msgpack, numpy as np
>>> rows = np.array([[1.5, 2.0], [3.0, 0.0]])
>>> raw = msgpack.packb({"cols": ["route_km", "stops"], "rows": rows.tobytes(), "y": bytes([1, 0])})
>>> b = np.frombuffer(raw, dtype=np.uint8)
>>> values, ys = np.empty(8), np.empty(4)
>>> status, m, cols_at, cols_end, src_at, src_end, seq = _read(b, np.empty(0, dtype=np.uint8), 2, values, 0, ys, 0)
>>> status == NAMES, msgpack.unpackb(raw[cols_at:cols_end])
(True, ['route_km', 'stops'])
>>> _read(b, b[cols_at:cols_end].copy(), 2, values, 0, ys, 0)[:2], values[:4].tolist(), ys[:2].tolist()
((0, 2), [1.5, 2.0, 3.0, 0.0], [1.0, 0.0])
"""

from __future__ import annotations

import threading
from collections.abc import Mapping, Sequence

import numpy as np
from numba import njit

from .errors import ProtocolError
from .fastpath import _map_len, _str
from .protocol import MAX_BIN, MAX_ITEMS, MAX_MESSAGE, MAX_STR, VALUE_MAX, VALUE_MIN, Body, unpack
from .quick import _ID, _LOGIT, _P, _STEP, _TS, _p, _put, _put_be, _put_float, _put_int
from .vocabulary import same_bytes

READ, OTHER, NAMES = 0, 1, 2  # read; anything else (the full path decides); names other than the key's
# Values the reader's arrays keep room for at most (8 MB each) once a block needs an eighth of that
# or less: a block of one 16 MiB message would otherwise leave 64 MB held for good.
KEPT_VALUES = 1 << 20
# the keys a message may have, as bits
_COLS, _ROWS, _Y, _SRC, _SEQ = 1, 2, 4, 8, 16
_WORDS = np.frombuffer(b"colsrowsysrcseq", dtype=np.uint8)  # their names end to end
_AT = np.array([0, 4, 8, 9, 12, 15])  # where each begins (and the last ends) in _WORDS


@njit(cache=True, error_model="numpy", inline="always")
def _key(b, start, length):  # type: ignore[no-untyped-def]
    """The bit of the key whose bytes are at start, 0 for any other."""
    for w in range(5):
        lo, hi = _AT[w], _AT[w + 1]
        if hi - lo == length and same_bytes(b, start, _WORDS, lo, length):
            return 1 << w
    return 0


@njit(cache=True, error_model="numpy", inline="always")
def _bin(b, pos, n):  # type: ignore[no-untyped-def]
    """(start, length) of the bytes of a bin at pos, reading no byte at or past n; length -1 if not
    a bin, or if it runs past n."""
    if pos >= n:
        return pos, -1
    c = np.int64(b[pos])
    size = 1 if c == 0xC4 else 2 if c == 0xC5 else 4 if c == 0xC6 else 0
    if size == 0 or pos + 1 + size > n:
        return pos, -1
    length = np.int64(0)
    for i in range(size):
        length = (length << 8) | np.int64(b[pos + 1 + i])
    start = pos + 1 + size
    if start + length > n:
        return pos, -1
    return start, length


@njit(cache=True, error_model="numpy")
def _read(b, key, k, values, used, ys, at):  # type: ignore[no-untyped-def]
    """Read the columnar message b: its rows into values from values[used] on (k values a row,
    copied from the little-endian bytes), its labels into ys from ys[at] on. Returns (status, rows,
    where the cols array starts and ends, where the src str's bytes start and end (-1 without one),
    seq (-1 without one)). NAMES when the cols array's bytes are not `key` (rows not read); OTHER
    for anything the full path must decide."""
    n = b.shape[0]
    other = (OTHER, 0, 0, 0, -1, -1, -1)
    entries, pos = _map_len(b, 0, n)
    if entries < 3 or entries > 5:
        return other
    seen = 0
    cols_at = cols_end = rows_at = rows_len = y_at = y_len = src_at = src_end = -1
    seq = np.int64(-1)
    for _ in range(entries):
        ks, kl, pos = _str(b, pos, n)
        if kl < 1:
            return other
        which = _key(b, ks, kl)
        if which == 0 or seen & which:
            return other
        seen |= which
        if which == _COLS:
            cols_at = pos
            if pos >= n:
                return other
            c = np.int64(b[pos])
            if 0x91 <= c <= 0x9F:
                count, pos = c - 0x90, pos + 1
            elif c == 0xDC and pos + 3 <= n:
                count, pos = (np.int64(b[pos + 1]) << 8) | np.int64(b[pos + 2]), pos + 3
            else:
                return other
            if count > MAX_ITEMS:
                return other
            for _j in range(count):
                s, length, pos = _str(b, pos, n)
                if length < 0 or length > MAX_STR:
                    return other
            cols_end = pos
        elif which == _ROWS:
            rows_at, rows_len = _bin(b, pos, n)
            if rows_len < 0 or rows_len > MAX_BIN:
                return other
            pos = rows_at + rows_len
        elif which == _Y:
            y_at, y_len = _bin(b, pos, n)
            if y_len < 0 or y_len > MAX_BIN:
                return other
            pos = y_at + y_len
        elif which == _SRC:
            s, length, pos = _str(b, pos, n)
            if length < 0 or length > MAX_STR:
                return other
            src_at, src_end = s, s + length
        else:  # seq: an integer >= 0 that fits in int64
            if pos >= n:
                return other
            c = np.int64(b[pos])
            if c <= 0x7F:
                seq, pos = c, pos + 1
            elif 0xCC <= c <= 0xCF:
                size = 1 << (c - 0xCC)
                if pos + 1 + size > n or (size == 8 and b[pos + 1] >= 0x80):
                    return other
                seq = np.int64(0)
                for i in range(size):
                    seq = (seq << 8) | np.int64(b[pos + 1 + i])
                pos += 1 + size
            else:
                return other
    if pos != n or not (seen & _COLS and seen & _ROWS and seen & _Y):
        return other
    if cols_end - cols_at != key.shape[0] or not same_bytes(b, cols_at, key, 0, key.shape[0]):
        return NAMES, 0, cols_at, cols_end, src_at, src_end, seq
    if rows_len == 0 or rows_len % (8 * k) or y_len != rows_len // (8 * k):
        return other
    m = y_len
    if used + m * k > values.shape[0] or at + m > ys.shape[0]:
        return other
    # The labels first (a block of scoring requests is declined before its rows are copied). Each
    # check is a count and each copy a loop over indices from range() alone, which numba knows are
    # >= 0: compiled to vector instructions, 3.6 us for 500 x 20 values, where a check returning
    # at the first bad value, an assigned slice and offset indices took 13 (timeit).
    labels = b[y_at : y_at + m]
    bad = 0
    for r in range(m):
        bad += labels[r] > 1
    if bad:
        return other
    out = ys[at : at + m]
    for r in range(m):
        out[r] = np.float64(labels[r])
    src = b[rows_at : rows_at + rows_len].view(np.float64)
    dst = values[used : used + m * k]
    for i in range(m * k):
        dst[i] = src[i]
    for i in range(m * k):
        a = abs(dst[i])
        bad += not ((a == 0.0) | ((a >= VALUE_MIN) & (a <= VALUE_MAX)))  # NaN fails every comparison
    if bad:
        return other
    return READ, m, cols_at, cols_end, src_at, src_end, seq


class Run:
    """Consecutive messages of a block with the same names: their slots, their rows (a view of the
    reader's arrays) and labels, and how many rows each message has. (Runs of different widths
    follow each other in the reader's values array.)"""

    __slots__ = ("slots", "rows", "y", "counts")

    def __init__(self, slots: np.ndarray, rows: np.ndarray, y: np.ndarray, counts: list[int]) -> None:
        self.slots = slots
        self.rows = rows
        self.y = y
        self.counts = counts


class ColumnReader:
    """Reads blocks of plain columnar messages into arrays it keeps from block to block, and
    remembers the names of the last one (their cols bytes and slots, in one vocabulary). The runs
    it returns are views of its arrays: learn them before the next `read`."""

    def __init__(self) -> None:
        self.shapes: object = None  # the vocabulary's shapes the remembered slots are of
        self.key = np.empty(0, dtype=np.uint8)
        self.slots = np.empty(0, dtype=np.int64)
        self._values = np.empty(0)
        self._ys = np.empty(0)

    def read(
        self, raws: Sequence[Body], shapes: Mapping[tuple[str, ...], tuple[int, ...]]
    ) -> tuple[list[Run], list[tuple[str | None, int | None]]] | None:
        """The block's runs and each message's (src, seq), or None when the full path must take
        it. `shapes`: a vocabulary's slots of tuples of names it knows (`Vocabulary.shapes`)."""
        total = 0
        for raw in raws:
            if len(raw) > MAX_MESSAGE:
                return None
            total += len(raw)
        need = total // 8  # (a value takes 8 bytes of a body, a row one label at least)
        have = self._values.shape[0]
        if have < need or have > max(8 * need, KEPT_VALUES):  # grown as needed, let go after a spike
            self._values = np.empty(2 * need)
            self._ys = np.empty(2 * need)
        if self.shapes is not shapes:  # (another vocabulary: its slots are not those remembered)
            self.shapes, self.key = shapes, np.empty(0, dtype=np.uint8)
        values, ys = self._values, self._ys
        runs: list[Run] = []
        numbers: list[tuple[str | None, int | None]] = []
        at = start = 0  # rows read, and the first of the current run
        used = first = 0  # values read, and the first of the current run
        counts: list[int] = []
        for raw in raws:
            b = np.frombuffer(raw, dtype=np.uint8)
            k = self.slots.shape[0]
            status, m, cols_at, cols_end, src_at, src_end, seq = _read(b, self.key, k, values, used, ys, at)
            if status == NAMES:
                slots = _slots_of(raw[cols_at:cols_end], shapes)
                if slots is None:
                    return None
                if counts:  # the run so far, with the names before
                    runs.append(self._run(first, start, at, counts))
                    first, start, counts = used, at, []
                self.key = b[cols_at:cols_end].copy()
                self.slots = np.array(slots, dtype=np.int64)
                k = self.slots.shape[0]
                status, m, cols_at, cols_end, src_at, src_end, seq = _read(b, self.key, k, values, used, ys, at)
            if status != READ:
                return None
            src = None
            if src_at >= 0:
                try:
                    src = str(raw[src_at:src_end], "utf-8")  # (a memoryview has no decode)
                except UnicodeDecodeError:  # msgpack refuses it: the full path decides
                    return None
            numbers.append((src, None if seq < 0 else int(seq)))
            counts.append(m)
            at += m
            used += m * k
        runs.append(self._run(first, start, at, counts))
        return runs, numbers

    def _run(self, first: int, start: int, end: int, counts: list[int]) -> Run:
        """The run of rows start to end, whose values begin at first, with the current names."""
        k = self.slots.shape[0]
        rows = self._values[first : first + (end - start) * k].reshape(end - start, k)
        return Run(self.slots, rows, self._ys[start:end], counts)


def _slots_of(cols: Body, shapes: Mapping[tuple[str, ...], tuple[int, ...]]) -> tuple[int, ...] | None:
    """The slots of a cols array's names (its msgpack bytes), when they are distinct and all known."""
    try:
        names = unpack(cols)
    except ProtocolError:
        return None
    if type(names) is not list or not all(type(c) is str for c in names) or len(set(names)) != len(names):
        return None
    return shapes.get(tuple(names))


@njit(cache=True, error_model="numpy")
def _probabilities(z):  # type: ignore[no-untyped-def]
    out = np.empty(z.shape[0])
    for i in range(z.shape[0]):
        out[i] = _p(z[i])
    return out


def probabilities(z: np.ndarray) -> bytes:
    """A columnar score body's p (little-endian float64 bytes): each row's p bit for bit what its
    logit gives a score of one event (`quick._p`, the same C library exp as `server._p`)."""
    out: np.ndarray = _probabilities(z)
    return out.astype("<f8", copy=False).tobytes()


def score_body(z: np.ndarray, step: int, ts: float, p: np.ndarray | None = None) -> bytes:
    """The score body of a columnar block without ids (PROTOCOL 3): the bytes msgpack.packb gives
    for the full path's dict {"id": [None] * m, "p": ..., "logit": ..., "step": step, "ts": ts},
    put together in one compiled pass (`_pack_body`) and copied out once. (Built from numpy's
    bytes and joined, a body of 500 rows took 15 us here, most of it copies: a tenth of the
    block's whole handling.) `p`: the rows' p when the caller has them (`Engine.train_rows`
    computes them with the metrics' losses, saving an exp a row), each `_p` of its logit."""
    m = z.shape[0]
    need = 64 + 17 * m  # (53 bytes of keys and headers at most)
    buf: np.ndarray | None = getattr(_local, "body", None)
    if buf is None or buf.shape[0] < need or (buf.shape[0] > KEPT_BODY and need <= KEPT_BODY):
        buf = _local.body = np.empty(max(need, 64 + 17 * 512), dtype=np.uint8)  # (a spike's let go)
    n = _pack_body(z, _probabilities(z) if p is None else p, step, ts, buf)
    body: bytes = buf[:n].tobytes()
    return body


KEPT_BODY = 1 << 20  # the body buffer's bytes kept at most after a block that needed more
_local = threading.local()  # each thread's buffer where score_body packs (a process may serve on several)


@njit(cache=True, error_model="numpy", inline="always")
def _put_length(out, p, n, tag16):  # type: ignore[no-untyped-def]
    """A msgpack length of 16 bits (tag16) or, past 0xFFFF, of 32 (the next tag: dc, dd for an
    array; c5, c6 for a bin)."""
    if n <= 0xFFFF:
        out[p] = tag16
        return _put_be(out, p + 1, np.uint64(n), 2)
    out[p] = tag16 + 1
    return _put_be(out, p + 1, np.uint64(n), 4)


@njit(cache=True, error_model="numpy")
def _pack_body(z, ps, step, ts, out):  # type: ignore[no-untyped-def]
    """`score_body`'s bytes into out (room for 53 + 17 m); returns their length."""
    m = z.shape[0]
    scratch = np.zeros(1, dtype=np.uint64)
    as_float = scratch.view(np.float64)
    p = _put(out, 0, _ID)
    if m <= 15:  # the ids: an array of m nils
        out[p] = np.uint8(0x90 | m)
        p += 1
    else:
        p = _put_length(out, p, m, 0xDC)
    for i in range(m):
        out[p + i] = 0xC0
    p += m
    for key in range(2):  # "p", then "logit": bin 8 m of little-endian float64s
        p = _put(out, p, _P if key == 0 else _LOGIT)
        size = 8 * m
        if size <= 0xFF:
            out[p] = 0xC4
            out[p + 1] = np.uint8(size)
            p += 2
        else:
            p = _put_length(out, p, size, 0xC5)
        # the floats stored where they go (at any offset: the processor takes unaligned stores; and
        # in its own order, little-endian, as the x86 and ARM machines numba serves are). A copy
        # from an array instead took 1.7 us a 500 rows' 4,000 bytes: numba copies byte by byte.
        dst = out[p : p + size].view(np.float64)
        if key == 0:
            for i in range(m):
                dst[i] = ps[i]
        else:
            for i in range(m):
                dst[i] = z[i]
        p += size
    p = _put(out, p, _STEP)
    p = _put_int(out, p, step)
    p = _put(out, p, _TS)
    return _put_float(out, p, ts, scratch, as_float)
