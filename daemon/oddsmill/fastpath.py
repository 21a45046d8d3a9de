"""A compiled reading of the commonest ingest bodies, straight from msgpack bytes to columnar blocks.

Most traffic is training events of numeric features: `{"x": {name: float, ...}, "y": 0 or 1}`, with
an `id` (an integer or a str) or without, alone or in a batch. Decoding such a body into Python dicts
and encoding each event again costs about 15 us an event; `numeric_training` reads the bytes in
compiled code instead and turns each run of consecutive events whose feature names are byte for
byte the same, in the same order, into one `Columns` block, which the engine learns as it learns the
rows of a columnar block: the same slots, values, order and counts as the events one by one
(tests/test_columns.py holds the engine to that). A training event's id is only echoed in its score.

Anything else returns None and takes the full path (`unpack`, `decode_body`), which decides: other
keys (w, ts, src, seq), an id that is neither an integer nor a str, a value that is not a float64, a
label that is not 0, 1, true or false, a NaN, an infinity or a value out of range, a name twice,
names or an id not valid UTF-8, an empty map, extra bytes, or a length beyond the decoder's limits.
So the fast path never accepts what the full path refuses, and never refuses anything: a refusal is
always the full path's own.

>>> import msgpack
>>> body = msgpack.packb({"batch": [{"x": {"route_km": 12.5}, "y": 1}, {"y": 0, "x": {"route_km": 3.0}}]})
>>> [(c.cols, c.rows.tolist(), c.y.tolist()) for c in numeric_training(body)]
[(('route_km',), [[12.5], [3.0]], [1.0, 0.0])]
>>> numeric_training(msgpack.packb({"x": {"route_km": 12.5}, "y": 1, "id": "P1"}))[0].ids
('P1',)
>>> numeric_training(msgpack.packb({"x": {"route_km": 12.5}, "y": 1, "w": 2.0})) is None
True
"""

from __future__ import annotations

from itertools import accumulate

import numpy as np
from numba import njit

from .protocol import MAX_ITEMS, MAX_MESSAGE, MAX_STR, VALUE_MAX, VALUE_MIN, Columns

OK = 0
FALLBACK = 1
NAMES_KEPT = 4096  # name sequences remembered (bytes to names)
_names: dict[bytes, tuple[str, ...] | None] = {}  # None: not usable here (a name twice, bad UTF-8)


@njit(cache=True, error_model="numpy", inline="always")
def _map_len(b, pos, n):  # type: ignore[no-untyped-def]
    """(entries, position after the header) of a map header at pos, reading no byte at or past n;
    (-1, pos) if not a map."""
    if pos >= n:
        return -1, pos
    c = np.int64(b[pos])
    if 0x80 <= c <= 0x8F:
        return c - 0x80, pos + 1
    if c == 0xDE and pos + 3 <= n:
        return (np.int64(b[pos + 1]) << 8) | np.int64(b[pos + 2]), pos + 3
    if c == 0xDF and pos + 5 <= n:
        return (np.int64(b[pos + 1]) << 24) | (np.int64(b[pos + 2]) << 16) | (np.int64(b[pos + 3]) << 8) | np.int64(
            b[pos + 4]
        ), pos + 5
    return -1, pos


@njit(cache=True, error_model="numpy", inline="always")
def _str(b, pos, n):  # type: ignore[no-untyped-def]
    """(start, length) of the bytes of a str at pos, and the position after it, reading no byte at
    or past n; length -1 if not a str."""
    if pos >= n:
        return pos, -1, pos
    c = np.int64(b[pos])
    if 0xA0 <= c <= 0xBF:
        start, length = pos + 1, c - 0xA0
    elif c == 0xD9 and pos + 2 <= n:
        start, length = pos + 2, np.int64(b[pos + 1])
    elif c == 0xDA and pos + 3 <= n:
        start, length = pos + 3, (np.int64(b[pos + 1]) << 8) | np.int64(b[pos + 2])
    else:
        return pos, -1, pos
    if start + length > n:
        return pos, -1, pos
    return start, length, start + length


@njit(cache=True, error_model="numpy", inline="always")
def _is(b, start, length, c0, c1):  # type: ignore[no-untyped-def]
    """Whether the str at start is the one- or two-letter key c0 (c1 = 0 for one letter)."""
    if c1 == 0:
        return length == 1 and b[start] == c0
    return length == 2 and b[start] == c0 and b[start + 1] == c1


@njit(cache=True, error_model="numpy", inline="always")
def _same_keys(b, p, q, k):  # type: ignore[no-untyped-def]
    """Whether the x maps of k numeric features whose first keys are at p and q have the same key
    bytes (headers and names) in the same order; the values between them are skipped."""
    for _ in range(k):
        s1, l1, a1 = _str(b, p, len(b))
        s2, l2, a2 = _str(b, q, len(b))
        if l1 != l2 or s1 - p != s2 - q:
            return False
        for i in range(p, a1):
            if b[i] != b[q + i - p]:
                return False
        p = a1 + 9
        q = a2 + 9
    return True


@njit(cache=True, error_model="numpy", inline="always")
def _event_at(  # type: ignore[no-untyped-def]
    b, pos, n, e, used, values, ys, ids, nkeys, keypos, scratch, as_float, max_str, max_items, requests=False
):  # fmt: skip
    """Read the event map at pos (the keys x and y, and id or not), as event e, reading no byte at
    or past n; ids[e] gets the position of its id's msgpack bytes (an int, or a str of at most
    max_str bytes), -1 without one. With `requests`, a map of x and id without y is read too, as a
    scoring request (ys[e] NaN). Returns (read, position after it, values used)."""
    entries, pos = _map_len(b, pos, n)
    if entries != 2 and entries != 3:
        return False, pos, used
    seen_x = False
    seen_y = False
    ids[e] = -1
    for _ in range(entries):
        ks, kl, pos = _str(b, pos, n)
        if kl < 0:
            return False, pos, used
        if _is(b, ks, kl, 105, 100) and ids[e] < 0:  # "id": skipped here, read by `_ids` later
            ids[e] = pos
            pos = _int_or_str(b, pos, n, max_str)
            if pos < 0:
                return False, ids[e], used
        elif _is(b, ks, kl, 120, 0) and not seen_x:  # "x"
            seen_x = True
            k, pos = _map_len(b, pos, n)
            if k < 1 or k > max_items:
                return False, pos, used
            keypos[e] = pos
            nkeys[e] = k
            for _j in range(k):
                ks, kl, pos = _str(b, pos, n)
                if kl < 0 or kl > max_str:
                    return False, pos, used
                if pos + 9 > n or b[pos] != 0xCB or used >= values.shape[0]:
                    return False, pos, used
                bits = np.uint64(0)
                for q in range(8):  # big-endian float64
                    bits = (bits << np.uint64(8)) | np.uint64(b[pos + 1 + q])
                scratch[0] = bits
                v = as_float[0]
                a = abs(v)  # a NaN, an infinity or a number out of range: the full path rejects it
                if not (a == 0.0 or (a >= VALUE_MIN and a <= VALUE_MAX)):
                    return False, pos, used
                values[used] = v
                used += 1
                pos += 9
        elif _is(b, ks, kl, 121, 0) and not seen_y:  # "y"
            seen_y = True
            if pos >= n:
                return False, pos, used
            c = np.int64(b[pos])
            if c == 0x00 or c == 0xC2:
                ys[e] = 0.0
            elif c == 0x01 or c == 0xC3:
                ys[e] = 1.0
            else:
                return False, pos, used
            pos += 1
        else:
            return False, pos, used
    if requests and seen_x and not seen_y and entries == 2:  # (x and id: a request)
        ys[e] = np.nan
        return True, pos, used
    return seen_x and seen_y, pos, used


@njit(cache=True, error_model="numpy", inline="always")
def _int_or_str(b, pos, n, max_str):  # type: ignore[no-untyped-def]
    """The position after an integer or a str of at most max_str bytes at pos; -1 for anything
    else or when it would run past n."""
    if pos >= n:
        return -1
    c = np.int64(b[pos])
    if c <= 0x7F or c >= 0xE0:  # positive and negative fixint
        end = pos + 1
    elif 0xCC <= c <= 0xD3:  # uint8..uint64, int8..int64
        end = pos + 1 + (1 << ((c - 0xCC) & 3))
    else:
        s, length, end = _str(b, pos, n)
        if length < 0 or length > max_str:
            return -1
    return end if end <= n else -1


@njit(cache=True, error_model="numpy", inline="always")
def _follows(b, e, nkeys, keypos):  # type: ignore[no-untyped-def]
    """Whether event e has the names of event e - 1, in the same order."""
    return nkeys[e] == nkeys[e - 1] and _same_keys(b, keypos[e], keypos[e - 1], nkeys[e])


@njit(cache=True, error_model="numpy")
def _parse(b, values, ys, ids, nkeys, keypos, newrun, max_str, max_items):  # type: ignore[no-untyped-def]
    """Read a body of numeric training events. Fills, per event, its label, number of features,
    the position of its x map's first key and whether its names differ from the event before, and
    the values in order; returns (status, events). FALLBACK for anything the full path must see."""
    n = len(b)
    scratch = np.zeros(1, dtype=np.uint64)
    as_float = scratch.view(np.float64)
    entries, pos = _map_len(b, 0, n)
    if entries < 1:
        return FALLBACK, 0
    count = np.int64(1)
    ks, kl, after = _str(b, pos, n)
    if entries == 1 and kl == 5 and b[ks] == 98 and b[ks + 1] == 97 and b[ks + 2] == 116 and b[ks + 3] == 99:
        if b[ks + 4] != 104:  # "batch"
            return FALLBACK, 0
        pos = after
        if pos >= n:
            return FALLBACK, 0
        c = np.int64(b[pos])
        if 0x90 <= c <= 0x9F:
            count, pos = c - 0x90, pos + 1
        elif c == 0xDC and pos + 3 <= n:
            count, pos = (np.int64(b[pos + 1]) << 8) | np.int64(b[pos + 2]), pos + 3
        elif c == 0xDD and pos + 5 <= n:
            count = (
                (np.int64(b[pos + 1]) << 24)
                | (np.int64(b[pos + 2]) << 16)
                | (np.int64(b[pos + 3]) << 8)
                | np.int64(b[pos + 4])
            )
            pos += 5
        else:
            return FALLBACK, 0
        if count < 1 or count > max_items or count > ys.shape[0]:
            return FALLBACK, 0
    else:
        pos = 0  # the body is the event
    used = 0
    for e in range(count):
        read, pos, used = _event_at(
            b, pos, n, e, used, values, ys, ids, nkeys, keypos, scratch, as_float, max_str, max_items
        )
        if not read:
            return FALLBACK, 0
        newrun[e] = 0 if e > 0 and _follows(b, e, nkeys, keypos) else 1
    if pos != n:
        return FALLBACK, 0
    return OK, count


@njit(cache=True, error_model="numpy")
def _parse_each(b, starts, values, ys, ids, nkeys, keypos, newrun, read, max_str, max_items):  # type: ignore[no-untyped-def]
    """Read messages of one numeric training event each, laid end to end in b (message i from
    starts[i] to starts[i + 1]): read[i] tells whether message i was; the events read are numbered
    in order, and a run ends at a message not read as well as at a change of names."""
    scratch = np.zeros(1, dtype=np.uint64)
    as_float = scratch.view(np.float64)
    e = 0
    used = 0
    before = False  # whether the message before was read
    for i in range(starts.shape[0] - 1):
        start, end = starts[i], starts[i + 1]
        ok, pos, used_after = _event_at(
            b, start, end, e, used, values, ys, ids, nkeys, keypos, scratch, as_float, max_str, max_items
        )
        read[i] = 1 if ok and pos == end else 0
        if read[i]:
            used = used_after
            newrun[e] = 0 if before and _follows(b, e, nkeys, keypos) else 1
            e += 1
        before = read[i] == 1
    return e


READ, NOT_SUCH, OTHER_NAMES, STR_ID = 0, -1, -2, -3  # what `_parse_run` found


@njit(cache=True, error_model="numpy")
def _parse_run(  # type: ignore[no-untyped-def]
    b, starts, key, ints_only, values, ys, ids, nkeys, keypos, max_str, max_items, requests=False
):  # fmt: skip
    """`_parse_each` for a block that must be one run: read messages end to end in b (message e
    from starts[e] to starts[e + 1]) into values, ys and ids (where each id's msgpack bytes begin,
    -1 without one). READ when every message is one numeric training event (with `requests`, or
    a scoring request with an id: y NaN) with the names of the first in the same order; and, when
    `key` is not empty, those names are `key` (their key bytes, as `_key_bytes` copies them), and
    with `ints_only` every id is an integer. Otherwise NOT_SUCH, OTHER_NAMES (not the names of
    `key`) or STR_ID."""
    scratch = np.zeros(1, dtype=np.uint64)
    as_float = scratch.view(np.float64)
    used = 0
    for e in range(starts.shape[0] - 1):
        start, end = starts[e], starts[e + 1]
        ok, pos, used = _event_at(
            b, start, end, e, used, values, ys, ids, nkeys, keypos, scratch, as_float, max_str, max_items, requests
        )
        if not ok or pos != end:
            return NOT_SUCH
        if e > 0:
            if not _follows(b, e, nkeys, keypos):
                return NOT_SUCH
        elif key.shape[0] > 0:  # the first event's names against the key
            p = keypos[0]
            q = 0
            for _ in range(nkeys[0]):
                s, length, after = _str(b, p, end)
                if q + after - p > key.shape[0]:
                    return OTHER_NAMES
                for i in range(p, after):
                    if b[i] != key[q]:
                        return OTHER_NAMES
                    q += 1
                p = after + 9
            if q != key.shape[0]:
                return OTHER_NAMES
        if ints_only and ids[e] >= 0:
            c = b[ids[e]]
            if not (c <= 0x7F or c >= 0xE0 or 0xCC <= c <= 0xD3):
                return STR_ID
    return READ


@njit(cache=True, error_model="numpy")
def _key_bytes(b, pos, k, out):  # type: ignore[no-untyped-def]
    """Copy the key bytes (str headers and names; the values skipped) of an x map of k numeric
    features whose first key is at pos into out; returns how many."""
    n = 0
    for _ in range(k):
        start, length, after = _str(b, pos, len(b))
        for i in range(pos, after):
            out[n] = b[i]
            n += 1
        pos = after + 9
    return n


def _names_at(b: np.ndarray, pos: int, k: int, out: np.ndarray) -> tuple[str, ...] | None:
    """The names of an x map of k numeric features whose first key is at pos of the body b (None
    when a name is twice or not UTF-8), remembered by their bytes (headers and names; the values
    skipped), which are copied into out (as long as b: the key bytes are some of the body's)."""
    key = out[: _key_bytes(b, pos, k, out)].tobytes()
    if key in _names:
        return _names[key]
    names: tuple[str, ...] | None
    try:
        names = tuple(_split(key))
    except UnicodeDecodeError:
        names = None
    if names is not None and len(set(names)) != len(names):
        names = None
    if len(_names) >= NAMES_KEPT:
        _names.clear()
    _names[key] = names
    return names


def _span(buf: bytes, pos: int) -> tuple[int, int]:
    """(start, length) of a str the compiled reader has checked (fixstr, str8 or str16) at pos."""
    c = buf[pos]
    if 0xA0 <= c <= 0xBF:
        return pos + 1, c - 0xA0
    if c == 0xD9:
        return pos + 2, buf[pos + 1]
    return pos + 3, (buf[pos + 1] << 8) | buf[pos + 2]


def _split(key: bytes) -> list[str]:
    """The names of key bytes (str headers and names, end to end)."""
    out, pos = [], 0
    while pos < len(key):
        start, length = _span(key, pos)
        out.append(key[start : start + length].decode("utf-8"))
        pos = start + length
    return out


def numeric_training(raw: bytes) -> list[Columns] | None:
    """The body's events as columnar blocks (runs of events with the same names in the same
    order), or None when the body is anything but numeric training events."""
    if len(raw) > MAX_MESSAGE or len(raw) < 8:
        return None
    b = np.frombuffer(raw, dtype=np.uint8)
    most = len(raw) // 9 + 1  # a value takes 9 bytes; an event at least 8
    values = np.empty(most)
    ys = np.empty(most)
    ids = np.empty(most, dtype=np.int64)
    nkeys = np.zeros(most, dtype=np.int64)
    keypos = np.zeros(most, dtype=np.int64)
    newrun = np.zeros(most, dtype=np.uint8)
    status, count = _parse(b, values, ys, ids, nkeys, keypos, newrun, MAX_STR, MAX_ITEMS)
    if status != OK:
        return None
    blocks = _runs(raw, count, values, ys, ids, nkeys, keypos, newrun)
    return None if any(c is None for c in blocks) else blocks  # type: ignore[return-value]


def read_batch(raw: bytes) -> list[Columns] | None:
    """`numeric_training` for a batch (a body that is a map of one entry); None for anything else.
    A body of one event takes the full path: read alone, the fast path's fixed cost (its arrays,
    a block of one row) is more than decoding it (80 against 40 us a message, measured);
    `read_each` reads such messages together instead."""
    return numeric_training(raw) if raw[:1] == b"\x81" else None


def _runs(
    buf: bytes,
    count: int,
    values: np.ndarray,
    ys: np.ndarray,
    ids: np.ndarray,
    nkeys: np.ndarray,
    keypos: np.ndarray,
    newrun: np.ndarray,
) -> list[Columns | None]:
    """The `count` events read into these arrays as blocks, one a run of the same names (None for
    a run whose names are not usable, a name twice or not UTF-8, or with an id that is not UTF-8)."""
    firsts = np.flatnonzero(newrun[:count]).tolist()
    blocks: list[Columns | None] = []
    body = np.frombuffer(buf, dtype=np.uint8)
    key = np.empty(len(buf), dtype=np.uint8)  # one buffer for every run's key bytes
    at = 0  # the first value of the run
    for e, end in zip(firsts, firsts[1:] + [count], strict=True):
        k = int(nkeys[e])
        names = _names_at(body, int(keypos[e]), k, key)
        rows = end - e
        block = values[at : at + rows * k].reshape(rows, k).copy()
        at += rows * k
        try:
            idents = _ids(buf, ids[e:end].tolist())
        except UnicodeDecodeError:  # msgpack refuses such an id: the full path decides
            names = None
        blocks.append(None if names is None else Columns(names, block, ys[e:end].copy(), idents))
    return blocks


def _ids(buf: bytes, starts: list[int]) -> tuple[object, ...] | None:
    """The ids of a run's events (None for a run without any; an event without one has None),
    from where the compiled reader found them (an integer, or a str). UnicodeDecodeError for a str
    that is not UTF-8."""
    if max(starts) < 0:
        return None
    out: list[object] = []
    for s in starts:
        if s < 0:
            out.append(None)
            continue
        c = buf[s]
        if c <= 0x7F:  # positive fixint
            out.append(c)
        elif c >= 0xE0:  # negative fixint
            out.append(c - 0x100)
        elif 0xCC <= c <= 0xD3:  # uint8..uint64, int8..int64
            size = 1 << ((c - 0xCC) & 3)
            out.append(int.from_bytes(buf[s + 1 : s + 1 + size], "big", signed=c >= 0xD0))
        else:
            start, length = _span(buf, s)
            out.append(buf[start : start + length].decode("utf-8"))
    return tuple(out)


def read_each(raws: list[bytes | None]) -> tuple[list[int], list[Columns | None]]:
    """Messages of one numeric training event each, read together (None, or any other body, is
    not read): per message the index of the block holding its event, or -1; and the blocks. A
    block is a run of consecutive messages read, with the same names in the same order, so that
    learning the blocks in order learns the events in the order of the messages."""
    m = len(raws)
    lengths = [len(r) if r is not None and len(r) <= MAX_MESSAGE else 0 for r in raws]
    starts = np.array(list(accumulate(lengths, initial=0)), dtype=np.int64)  # (np.cumsum: 6 against 2.7 us)
    joined = b"".join(r for r, n in zip(raws, lengths, strict=True) if n and r is not None)
    b = np.frombuffer(joined, dtype=np.uint8)
    values = np.empty(len(joined) // 9 + 1)
    ys = np.empty(m)
    ids = np.empty(m, dtype=np.int64)
    nkeys = np.zeros(m, dtype=np.int64)
    keypos = np.zeros(m, dtype=np.int64)
    newrun = np.zeros(m, dtype=np.uint8)
    read = np.zeros(m, dtype=np.uint8)
    count = _parse_each(b, starts, values, ys, ids, nkeys, keypos, newrun, read, MAX_STR, MAX_ITEMS)
    if count == 0:
        return [-1] * m, []
    blocks = _runs(joined, count, values, ys, ids, nkeys, keypos, newrun)
    which: list[int] = []
    e = 0
    run = -1
    for i in range(m):
        if not read[i]:
            which.append(-1)
            continue
        if newrun[e]:
            run += 1
        which.append(run if blocks[run] is not None else -1)
        e += 1
    return which, blocks


_ANY_NAMES = np.empty(0, dtype=np.uint8)  # (the key `_parse_run` checks no names against)


class EventArrays:
    """The arrays a block of one-event messages is read into (values, labels, where each id begins,
    how many features, where the x map's keys begin), kept from block to block and grown as needed:
    for RunReader and quick.Known."""

    def __init__(self) -> None:
        self._values = np.empty(0)
        self._ys = np.empty(0)
        self._ids = np.empty(0, dtype=np.int64)
        self._nkeys = np.empty(0, dtype=np.int64)
        self._keypos = np.empty(0, dtype=np.int64)
        self._one = np.zeros(2, dtype=np.int64)  # the starts of a block of one message

    def _fit(self, raws: list[bytes], values: int) -> tuple[bytes, np.ndarray] | None:
        """The messages end to end and where each starts, with room for their events and `values`
        values; None when one is longer than the decoder takes."""
        m = len(raws)
        if max(map(len, raws)) > MAX_MESSAGE:
            return None
        self.room(m, values)
        joined = b"".join(raws)
        if m == 1:  # (a lone message: the commonest block at a modest load)
            starts = self._one
            starts[1] = len(joined)
        else:
            starts = np.array(list(accumulate(map(len, raws), initial=0)), dtype=np.int64)
        return joined, starts

    def room(self, messages: int, values: int) -> None:
        """Room for a block of this many messages and values (twice what was asked, when the
        arrays grow)."""
        if self._ys.shape[0] < messages:
            self._ys = np.empty(2 * messages)
            self._ids = np.empty(2 * messages, dtype=np.int64)
            self._nkeys = np.zeros(2 * messages, dtype=np.int64)
            self._keypos = np.zeros(2 * messages, dtype=np.int64)
            self._grown(2 * messages)
        if self._values.shape[0] < values:
            self._values = np.empty(2 * values)

    def _grown(self, messages: int) -> None:
        """Room for this many messages now (for a subclass's own arrays)."""


class RunReader(EventArrays):
    """Reads a block of messages of one numeric training event each, all with the same names in the
    same order, in one compiled call (`_parse_run`) into arrays it keeps from block to block: the
    daemon's commonest block under load, where `read_each`'s arrays and blocks cost more than the
    reading (31 against about 10 us for a block of one message of 20 features, measured). The
    arrays it returns are views of its own: read them before the next `read`."""

    def __init__(self) -> None:
        super().__init__()
        self._key = np.empty(0, dtype=np.uint8)
        self._first: tuple[np.ndarray, int, int] = (np.empty(0, dtype=np.uint8), 0, 0)

    def key_bytes(self) -> bytes:
        """The key bytes (str headers and names) of the first event of the last block read."""
        b, pos, k = self._first
        return bytes(self._key[: _key_bytes(b, pos, k, self._key)])

    def read(
        self, raws: list[bytes], requests: bool = False
    ) -> tuple[tuple[str, ...], np.ndarray, np.ndarray, tuple[object, ...] | None] | None:
        """(names, rows m x k, labels, ids or None) of the block, or None when it is anything else
        (then `read_each` and the full path decide). With `requests`, scoring requests with ids
        are read too (their labels NaN)."""
        m = len(raws)
        fitted = self._fit(raws, sum(map(len, raws)) // 9 + 1)  # (a value takes 9 bytes)
        if fitted is None:
            return None
        joined, starts = fitted
        if self._key.shape[0] < len(raws[0]):  # (the first event's key bytes are some of its body's)
            self._key = np.empty(2 * len(raws[0]), dtype=np.uint8)
        b = np.frombuffer(joined, dtype=np.uint8)
        found = _parse_run(
            b, starts, _ANY_NAMES, False, self._values, self._ys, self._ids, self._nkeys, self._keypos, MAX_STR,
            MAX_ITEMS, requests,
        )  # fmt: skip
        if found != READ:
            return None
        k = self._nkeys[0]
        self._first = (b, int(self._keypos[0]), int(k))
        names = _names_at(b, int(self._keypos[0]), int(k), self._key)
        if names is None:
            return None
        try:
            idents = _ids(joined, self._ids[:m].tolist())
        except UnicodeDecodeError:  # msgpack refuses such an id: the full path decides
            return None
        return names, self._values[: m * k].reshape(m, k), self._ys[:m], idents
