"""The vocabulary: feature names in slot order, append-only and capped, kept in arrays.

A million names as Python objects (a str each, an int each for its slot, a dict entry and a list
entry) took about 175 bytes a name, more than the learner's whole state a slot. Here the names are
one run of UTF-8 bytes (`_blob`, name j between `_starts[j]` and `_starts[j + 1]`, int32 until
the bytes pass 2 GiB) and an open-addressing hash table of int32 slots (`_table`, linear probing,
FNV-1a over the bytes, the place the hash modulo the table's size), searched in compiled code. The
table grows by half when it would be more than three quarters full (MAX_LOAD), so it costs 5.3 to
8 bytes a name (8 to 16 when it doubled and was kept at most half full), for about 8.5 probes to
find that a name is new when it is fullest (2.5 at half full). In all 30 to 33 bytes of arrays a
name of 20 characters (scripts/memory_per_slot.py). Recently used names
also stay in `index`, a bounded dict from name to slot, so that an event whose names are known
costs a dict lookup a name, as before; only names not in it go to the table, all of an event's in
one call.

Names are encoded with "surrogatepass", so any str (a lone surrogate from a JSON escape included)
keeps its exact identity.

>>> v = Vocabulary(max_features=3)
>>> v.slots(["route_km", "depot=harbour", "route_km"], grow=True)
[0, 1, 0]
>>> v.slot("fragile", grow=False), v.slot("fragile", grow=True), v.slot("late", grow=True)
(-1, 2, -1)
>>> v.names, v.ignored
(['route_km', 'depot=harbour', 'fragile'], 1)
"""

from __future__ import annotations

from itertools import accumulate
from typing import Any

import numpy as np
from numba import njit

CACHE_NAMES = 1 << 16  # names kept in `index` (cleared when full)
INITIAL_NAMES = 1024
MAX_LOAD = (3, 4)  # the table is grown (by half) when more than three quarters of it would be used
NARROW_LIMIT = 2**31 - 1  # where each name begins is kept in int32 while the bytes fit, then int64
_CODEC = ("utf-8", "surrogatepass")
_FNV_OFFSET = np.uint64(14695981039346656037)
_FNV_PRIME = np.uint64(1099511628211)


@njit(cache=True, inline="always")
def _hash(buf, lo, hi):  # type: ignore[no-untyped-def]
    """FNV-1a, 64 bits, of buf[lo:hi]."""
    h = _FNV_OFFSET
    for i in range(lo, hi):
        h = (h ^ np.uint64(buf[i])) * _FNV_PRIME
    return h


@njit(cache=True, inline="always")
def same_bytes(x, xi, y, yi, n):  # type: ignore[no-untyped-def]
    """Whether x[xi : xi + n] and y[yi : yi + n] hold the same bytes (both long enough)."""
    for k in range(n):
        if x[xi + k] != y[yi + k]:
            return False
    return True


@njit(cache=True, inline="always")
def _probe(table, starts, blob, q, lo, hi):  # type: ignore[no-untyped-def]
    """The slot of the name q[lo:hi], or -1 - (the free place of the table where it would go)."""
    size_t = np.uint64(table.shape[0])
    i = _hash(q, lo, hi) % size_t
    size = hi - lo
    while True:
        s = np.int64(table[np.int64(i)])
        if s < 0:
            return -1 - np.int64(i)
        a = starts[s]
        if starts[s + 1] - a == size and same_bytes(blob, a, q, lo, size):
            return s
        i = i + np.uint64(1)
        if i == size_t:
            i = np.uint64(0)


@njit(cache=True)
def _find_or_add(table, starts, blob, n, cap, q, qstarts, out):  # type: ignore[no-untyped-def]
    """out[i] = the slot of name i of q (its bytes q[qstarts[i]:qstarts[i + 1]]); a name not there
    gets slot n, n + 1, ... in order while n < cap, else -1. The caller made room for every name
    in `starts`, `blob` and `table` (kept at most MAX_LOAD full). Returns the new count of names."""
    for i in range(out.shape[0]):
        lo, hi = qstarts[i], qstarts[i + 1]
        r = _probe(table, starts, blob, q, lo, hi)
        if r >= 0:
            out[i] = r
            continue
        if n >= cap:
            out[i] = -1
            continue
        a = starts[n]
        for k in range(hi - lo):
            blob[a + k] = q[lo + k]
        starts[n + 1] = a + hi - lo
        table[-1 - r] = n
        out[i] = n
        n += 1
    return n


@njit(cache=True)
def _rehash(table, starts, blob, n):  # type: ignore[no-untyped-def]
    """Put names 0 .. n-1 into an empty table."""
    table[:] = -1
    size_t = np.uint64(table.shape[0])
    for s in range(n):
        i = _hash(blob, starts[s], starts[s + 1]) % size_t
        while table[np.int64(i)] >= 0:
            i = i + np.uint64(1)
            if i == size_t:
                i = np.uint64(0)
        table[np.int64(i)] = s


def _pack(names: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """The names' bytes end to end, and where each begins (one more entry: where the last ends)."""
    joined = "".join(names)
    if joined.isascii():  # (most names: one encoding, and a name's bytes are its characters)
        data, sizes = joined.encode("ascii"), map(len, names)
    else:
        parts = [s.encode(*_CODEC) for s in names]
        data, sizes = b"".join(parts), map(len, parts)
    starts = np.fromiter(accumulate(sizes, initial=0), dtype=np.int64, count=len(names) + 1)
    return np.frombuffer(data, dtype=np.uint8), starts


class Vocabulary:
    """Feature names in slot order; append-only, capped. When it holds `max_features` names, names
    not seen before get no slot (-1) and are counted in `ignored`."""

    def __init__(self, max_features: int, names: list[str] | None = None) -> None:
        self.max_features = max_features
        self.ignored = 0
        # The slots of a set of numeric feature names seen before, in the order they came (see
        # encoding.encode_features): names keep their slots for ever, so an entry never goes stale.
        self.shapes: dict[tuple[str, ...], tuple[int, ...]] = {}
        self.index: dict[str, int] = {}  # recently used names (a cache, not the whole vocabulary)
        self._n = 0
        self._starts = np.zeros(INITIAL_NAMES + 1, dtype=np.int32)
        self._blob = np.empty(INITIAL_NAMES * 16, dtype=np.uint8)
        self._dtype = np.int32 if max_features < 2**31 - 1 else np.int64
        self._table = np.full(2 * INITIAL_NAMES, -1, dtype=self._dtype)
        if names:
            self.slots(list(names), grow=True)

    def __len__(self) -> int:
        return self._n

    def _reserve(self, names: int, size: int) -> None:
        """Room for `names` more names of `size` bytes in all."""
        need = self._n + names
        end = int(self._starts[self._n])
        wide = self._starts.dtype == np.int32 and end + size > NARROW_LIMIT
        if need + 1 > self._starts.shape[0] or wide:
            dtype = np.int64 if wide else self._starts.dtype
            starts = np.empty(max(need + 1, 2 * self._starts.shape[0]), dtype=dtype)
            starts[: self._n + 1] = self._starts[: self._n + 1]
            self._starts = starts
        if end + size > self._blob.shape[0]:
            blob = np.empty(max(end + size, 2 * self._blob.shape[0]), dtype=np.uint8)
            blob[:end] = self._blob[:end]
            self._blob = blob
        used, of = MAX_LOAD
        if of * need > used * self._table.shape[0]:
            size_t = self._table.shape[0]
            while of * need > used * size_t:
                size_t += size_t // 2
            self._table = np.empty(size_t, dtype=self._dtype)
            _rehash(self._table, self._starts, self._blob, self._n)

    def slots(self, names: list[str], grow: bool) -> list[int]:
        """The slot of each name, in order; a name not there gets a new slot if `grow` and there is
        room, else -1 (counted in `ignored` when `grow`)."""
        q, qstarts = _pack(names)
        before = self._n
        cap = self.max_features if grow else before
        if grow:
            self._reserve(len(names), q.shape[0])
        out = np.empty(len(names), dtype=np.int64)
        self._n = _find_or_add(self._table, self._starts, self._blob, before, cap, q, qstarts, out)
        found = out.tolist()
        if grow and -1 in found:
            self.ignored += found.count(-1)
        # Names seen before join the recently used ones; a new name joins them when it comes
        # again (most names of a large vocabulary are ids that come once or rarely).
        again = [(name, j) for name, j in zip(names, found, strict=True) if 0 <= j < before]
        if again and len(again) <= CACHE_NAMES:
            if len(self.index) + len(again) > CACHE_NAMES:
                self.index.clear()
            self.index.update(again)
        return found

    def slot(self, name: str, grow: bool) -> int:
        """The slot of `name`; a new slot if `grow` and there is room; -1 otherwise."""
        j = self.index.get(name)
        return j if j is not None else self.slots([name], grow)[0]

    def count_new(self, names: list[str]) -> int:
        """How many of `names` have no slot yet."""
        unknown = [n for n in names if n not in self.index]
        return sum(1 for j in self.slots(unknown, grow=False) if j < 0) if unknown else 0

    @property
    def nbytes(self) -> int:
        """Bytes of the arrays in use: the names' bytes, where each begins, and the table."""
        return int(self._starts[self._n]) + self._starts.itemsize * (self._n + 1) + self._table.nbytes

    def name(self, j: int) -> str:
        a, b = int(self._starts[j]), int(self._starts[j + 1])
        return self._blob[a:b].tobytes().decode(*_CODEC)

    @property
    def names(self) -> list[str]:
        """Every name, in slot order (a list built on each call)."""
        data = self._blob[: int(self._starts[self._n])].tobytes()
        at = self._starts[: self._n + 1].tolist()
        return [data[at[j] : at[j + 1]].decode(*_CODEC) for j in range(self._n)]

    def same_names(self, other: Vocabulary) -> bool:
        n = self._n
        return (
            n == other._n
            and np.array_equal(self._starts[: n + 1], other._starts[: n + 1])
            and self._blob[: int(self._starts[n])].tobytes() == other._blob[: int(other._starts[n])].tobytes()
        )

    def full_note(self) -> str:
        """A line saying how many feature values found the vocabulary full, or "" when none did
        (`replay`, `inspect` and `fit` print it)."""
        if not self.ignored:
            return ""
        return (
            f"the vocabulary is full (max_features {self.max_features:,}): {self.ignored:,} values of names not"
            " seen before were ignored (not learned); raise --max-features"
        )

    def state(self) -> dict[str, Any]:
        """The names for a checkpoint: their UTF-8 bytes end to end, and where each ends."""
        n = self._n
        ends = self._starts[1 : n + 1].astype(np.int64)  # (checkpoints store int64, not int32)
        return {"name_bytes": self._blob[: int(self._starts[n])].tobytes(), "name_ends": ends}

    @classmethod
    def from_state(cls, max_features: int, d: dict[str, Any]) -> Vocabulary:
        """From `state()`, or from a list of names under "names" (checkpoints before the arrays)."""
        if "names" in d:
            return cls(max_features, [str(n) for n in d["names"]])
        v = cls(max_features)
        data = bytes(d["name_bytes"])
        ends = np.asarray(d["name_ends"], dtype=np.int64)
        n = ends.shape[0]
        if n and (ends[-1] != len(data) or np.any(np.diff(ends) < 0) or ends[0] < 0):
            raise ValueError("the vocabulary's name_ends do not fit its name_bytes")
        v._reserve(n, len(data))
        v._blob[: len(data)] = np.frombuffer(data, dtype=np.uint8)
        v._starts[1 : n + 1] = ends
        v._n = n
        _rehash(v._table, v._starts, v._blob, n)
        return v
