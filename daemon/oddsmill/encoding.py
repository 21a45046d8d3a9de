"""Feature encoding (PROTOCOL 2): names to slots, and blocks of events to index/value arrays.

A number v under name k is the numeric feature k with value v; a string s is the one-hot feature
"k=s" with value 1; true/false are numeric 1/0; nil or a missing key is absent. A non-finite number
is an error, and so is one out of the learner's range (`protocol.in_range`). The vocabulary
(vocabulary.py) is append-only: a name keeps its slot for the life of the state. When it holds
`max_features` names, names not seen before are ignored (they add nothing to the logit and are not
learned) and counted in `Vocabulary.ignored`, so a runaway producer cannot exhaust memory. A new
name longer than NAME_MAX_BYTES of UTF-8 rejects its event (too_large): a name is kept for the
life of the state, and one that long is a document or a free text sent as a category, each value
of which would be a name of its own.

>>> v = Vocabulary(max_features=10)
>>> encode_features({"route_km": 12.5, "depot": "harbour", "fragile": True, "note": None}, v)
([0, 1, 2], [12.5, 1.0, 1.0], [0, 2])
>>> v.names
['route_km', 'depot=harbour', 'fragile']
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from itertools import accumulate

import numpy as np

from .errors import ProtocolError
from .protocol import OUT_OF_RANGE, VALUE_MAX, VALUE_MIN, in_range
from .vocabulary import Vocabulary

SHAPES_KEPT = 4096  # sets of feature names whose slots are remembered
NAME_MAX_BYTES = 1024  # of a new name, "key" or "key=value", in UTF-8 (a character is at most 4)
FLOATS = {float}


def encode_features(
    x: object, vocab: Vocabulary, grow: bool = True, event_id: object = None
) -> tuple[Sequence[int], list[float], list[int]]:
    """Slots and values of the features of `x` (a map of str to number, str, bool or nil), and the
    slots this call created for numeric features. Raises ProtocolError (bad_features, non_finite or
    too_large) and then adds no name: new names get their slots only once the whole event has been
    read. One pass, exact-type fast paths: this is the per-event Python work of the daemon."""
    if type(x) is dict:
        keys = tuple(x)
        known = vocab.shapes.get(keys)
        if known is not None:
            present = list(x.values())
            # only for floats, all finite (a NaN or an infinity makes the sum one) and none 0 or
            # out of range; otherwise the full path below decides
            if set(map(type, present)) == FLOATS:
                total = sum(present)
                if total - total == 0.0:
                    sizes = list(map(abs, present))  # (zeros are dropped by filter: they are in range)
                    if max(sizes) <= VALUE_MAX and min(filter(None, sizes), default=VALUE_MIN) >= VALUE_MIN:
                        return known, present, []  # (shared: callers only read it)
    if not isinstance(x, Mapping):
        raise ProtocolError("bad_features", f"x must be a map, got {type(x).__name__}", event_id)
    index = vocab.index
    slots: list[int] = []
    values: list[float] = []
    new: list[tuple[int, str, bool]] = []  # (position, name, numeric) of names not in the vocabulary yet
    ambiguous = False  # an "=" inside a one-hot's key or value: two keys could give one name
    for key, value in x.items():
        if type(key) is not str:
            raise ProtocolError("bad_features", f"feature names must be strings, got {key!r}", event_id)
        kind = type(value)
        if kind is float:
            v = value
            if v - v != 0.0:  # NaN or an infinity
                raise ProtocolError("non_finite", f"feature {key!r} is {value!r}", event_id)
            if not in_range(v):
                raise ProtocolError("bad_features", f"feature {key!r} is {value!r}: {OUT_OF_RANGE}", event_id)
            name, is_num = key, True
        elif kind is int:
            try:
                v = float(value)
            except OverflowError:  # JSON integers have no bound
                raise ProtocolError("non_finite", f"feature {key!r} is too large for a float", event_id) from None
            if abs(v) > VALUE_MAX:
                raise ProtocolError("bad_features", f"feature {key!r} is {value!r}: {OUT_OF_RANGE}", event_id)
            name, is_num = key, True
        elif kind is str:
            name, v, is_num = f"{key}={value}", 1.0, False
            if name in x:
                raise ProtocolError("bad_features", f"{name!r} is both a feature and the one-hot of {key!r}", event_id)
            ambiguous = ambiguous or "=" in key or "=" in value
        elif kind is bool:
            name, v, is_num = key, (1.0 if value else 0.0), True
        elif value is None:
            continue
        elif isinstance(value, int | float) and not isinstance(value, bool):  # numpy scalars and such
            try:
                v = float(value)
            except OverflowError:
                raise ProtocolError("non_finite", f"feature {key!r} is too large for a float", event_id) from None
            if v - v != 0.0:
                raise ProtocolError("non_finite", f"feature {key!r} is {value!r}", event_id)
            if not in_range(v):
                raise ProtocolError("bad_features", f"feature {key!r} is {value!r}: {OUT_OF_RANGE}", event_id)
            name, is_num = key, True
        else:
            raise ProtocolError(
                "bad_features",
                f"feature {key!r} must be a number, string, bool or nil, got {type(value).__name__}",
                event_id,
            )
        j = index.get(name)
        if j is None:
            new.append((len(slots), name, is_num))
            j = -1
        slots.append(j)
        values.append(v)
    if ambiguous:
        names = [f"{k}={v}" if type(v) is str else k for k, v in x.items() if v is not None]
        if len(set(names)) != len(names):
            raise ProtocolError("bad_features", "two features encode to the same name", event_id)
    created: list[int] = []
    if new and grow:
        _refuse_long_names(new, vocab, event_id)
    if new:  # names not among the recently used: looked up (and added, in order) together
        before = len(vocab)
        for (pos, _, is_num), j in zip(new, vocab.slots([name for _, name, _ in new], grow), strict=True):
            slots[pos] = j
            if j >= before and is_num:
                created.append(j)
        if min(slots) < 0:  # names the vocabulary could not take are left out
            keep = [k for k, j in enumerate(slots) if j >= 0]
            slots = [slots[k] for k in keep]
            values = [values[k] for k in keep]
    elif type(x) is dict and len(slots) == len(x) and all(type(v) is float for v in x.values()):
        # every name known, every value sent as a float: this set of names encodes the same way
        # from now on. (The values sent, not the values encoded: a one-hot's value is 1.0 too, but
        # its slot is the one of "key=value", not of the key.)
        if len(vocab.shapes) >= SHAPES_KEPT:
            vocab.shapes.clear()
        vocab.shapes[tuple(x)] = tuple(slots)
    return slots, values, created


def too_long(name: str) -> bool:
    """Whether `name` is longer than NAME_MAX_BYTES in UTF-8."""
    return len(name) > NAME_MAX_BYTES // 4 and len(name.encode()) > NAME_MAX_BYTES


def _refuse_long_names(new: list[tuple[int, str, bool]], vocab: Vocabulary, event_id: object) -> None:
    """ProtocolError (too_large) when a name the vocabulary does not know is too long to add."""
    long = [name for _, name, _ in new if too_long(name)]
    if not long:
        return
    unknown = [name for name, j in zip(long, vocab.slots(long, grow=False), strict=True) if j < 0]
    if unknown:
        name = unknown[0]
        raise ProtocolError(
            "too_large",
            f"the feature name {name[:40]!r}... is {len(name.encode()):,} bytes of UTF-8; a new name may have "
            f"at most {NAME_MAX_BYTES:,} (a name is kept for the model's life: send a long text as a shorter "
            "category or as numbers)",
            event_id,
        )


@dataclass
class Block:
    """Events in CSR form for the kernel: event e has slots idx[ptr[e]:ptr[e+1]]."""

    ptr: np.ndarray  # int64, n + 1
    idx: np.ndarray  # int64
    val: np.ndarray  # float64, raw values
    op: np.ndarray  # int8, kernel.OP_*
    y: np.ndarray  # float64
    w: np.ndarray  # float64

    def __len__(self) -> int:
        return int(self.ptr.shape[0] - 1)


@dataclass
class Rows:
    """Events that share their slots, as the rows of a columnar block: row r has the values rows[r]
    at `slots`, weight 1. The kernel runs them as they are (kernel.learn_rows)."""

    slots: np.ndarray  # int64, k
    rows: np.ndarray  # float64, C order, m x k
    op: np.ndarray  # int8, m
    y: np.ndarray  # float64, m

    def __len__(self) -> int:
        return int(self.rows.shape[0])

    def as_block(self) -> Block:
        m, k = self.rows.shape
        return Block(
            ptr=np.arange(0, (m + 1) * k, k, dtype=np.int64),
            idx=np.tile(self.slots, m),
            val=self.rows.ravel(),
            op=self.op,
            y=self.y,
            w=np.ones(m),
        )


class BlockBuilder:
    """Collects encoded events, then hands the kernel one block. Events come one at a time (`add`,
    into Python lists) or many at once as arrays (`add_rows`, for a columnar block); `segments`
    gives them in the order they came as CSR blocks and runs of rows, `build` as one CSR block."""

    def __init__(self) -> None:
        self.n: list[int] = []  # features of each event
        self.idx: list[int] = []
        self.val: list[float] = []
        self.op: list[int] = []
        self.y: list[float] = []
        self.w: list[float] = []
        self._chunks: list[Block | Rows] = []  # in order
        self._events = 0

    def __len__(self) -> int:
        return self._events

    def add(self, slots: Sequence[int], values: Sequence[float], op: int, y: float, w: float) -> None:
        self.idx.extend(slots)
        self.val.extend(values)
        self.n.append(len(slots))
        self.op.append(op)
        self.y.append(y)
        self.w.append(w)
        self._events += 1

    def add_rows(self, slots: np.ndarray, rows: np.ndarray, op: np.ndarray, y: np.ndarray) -> None:
        """Events that share their slots: row r has the values rows[r] at `slots`; weight 1."""
        self._flush()
        self._chunks.append(
            Rows(
                np.ascontiguousarray(slots, dtype=np.int64),
                np.ascontiguousarray(rows, dtype=np.float64),
                op.astype(np.int8),
                y.astype(np.float64),
            )
        )
        self._events += rows.shape[0]

    def _flush(self) -> None:
        if self.n:
            self._chunks.append(
                Block(
                    ptr=np.array(list(accumulate(self.n, initial=0)), dtype=np.int64),
                    idx=np.asarray(self.idx, dtype=np.int64),
                    val=np.asarray(self.val, dtype=np.float64),
                    op=np.asarray(self.op, dtype=np.int8),
                    y=np.asarray(self.y, dtype=np.float64),
                    w=np.asarray(self.w, dtype=np.float64),
                )
            )
            self.n, self.idx, self.val, self.op, self.y, self.w = [], [], [], [], [], []

    def segments(self) -> list[Block | Rows]:
        """The events in order, as CSR blocks and runs of rows."""
        self._flush()
        return list(self._chunks)

    def build(self) -> Block:
        """The events in order as one CSR block."""
        parts = [c.as_block() if isinstance(c, Rows) else c for c in self.segments()]
        if len(parts) == 1:
            return parts[0]
        if not parts:
            return Block(
                np.zeros(1, np.int64),
                np.zeros(0, np.int64),
                np.zeros(0),
                np.zeros(0, np.int8),
                np.zeros(0),
                np.zeros(0),
            )
        counts = np.concatenate([np.diff(p.ptr) for p in parts])
        ptr = np.zeros(counts.shape[0] + 1, dtype=np.int64)
        np.cumsum(counts, out=ptr[1:])
        return Block(
            ptr=ptr,
            idx=np.concatenate([p.idx for p in parts]),
            val=np.concatenate([p.val for p in parts]),
            op=np.concatenate([p.op for p in parts]),
            y=np.concatenate([p.y for p in parts]),
            w=np.concatenate([p.w for p in parts]),
        )
