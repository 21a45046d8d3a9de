"""The wire protocol (PROTOCOL 2): ingest bodies to frozen messages. Pure: no sockets, no state.

`decode_body` takes an already unpacked body (from msgpack or a JSON line) and returns a list of
items, one per event, each an `Event`, a `Columns` block or the `ProtocolError` that rejects it (a
batch's bodies stand or fall one by one, exactly as if sent one by one).

>>> decode_body({"id": "P-1", "x": {"route_km": 3.5}})
[Event(id='P-1', x={'route_km': 3.5}, y=None, w=1.0, ts=None, src=None, seq=None)]
>>> decode_body({"id": "P-1", "y": 2})[0].reason
'bad_label'
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, NamedTuple

import msgpack
import numpy as np
from numba import njit

from .errors import ProtocolError

EVENT_KEYS = frozenset({"id", "x", "y", "w", "ts", "src", "seq"})
COLUMN_KEYS = frozenset({"cols", "rows", "y", "id", "src", "seq", "ts"})
NO_LABEL = 255  # the uint8 that means "no label" in a columnar block's y bin
# explicit msgpack limits: no string, bytes, array or map in a body may be larger
MAX_STR = 1 << 16
MAX_BIN = 1 << 24
MAX_ITEMS = 1 << 20
MAX_DEPTH = 1024  # fixed in msgpack's C decoder (measured: 1,024 nested arrays decode, 1,025 do not)
MAX_MESSAGE = 16 << 20  # bytes of one body; a longer one is refused as too_large, undecoded
# ZeroMQ's maximum message size on the ingest socket: a peer that sends more is disconnected by
# ZeroMQ itself (the daemon never sees it, so cannot count it); between MAX_MESSAGE and this, the
# daemon sees the message and counts it as too_large
TRANSPORT_LIMIT = 4 * MAX_MESSAGE
# The numbers the learner takes. A feature value is 0 or between VALUE_MIN and VALUE_MAX in
# magnitude, and a weight at most WEIGHT_MAX: the scaling divides by a feature's early values and
# the update multiplies by the weight, so a subnormal first value or a value near the float limit
# would overflow the state to infinity and then NaN, for good. Within these bounds every product
# the kernel forms stays finite (DEVELOPERS.md, "Numbers the learner takes").
VALUE_MIN = 1e-30
VALUE_MAX = 1e30
WEIGHT_MAX = 1e6
OUT_OF_RANGE = f"numbers must be 0 or between {VALUE_MIN:g} and {VALUE_MAX:g} in magnitude"


def in_range(v: float) -> bool:
    """Whether a finite feature value is one the learner takes.

    >>> in_range(0.0), in_range(-2.5e12), in_range(1e-300), in_range(1e40)
    (True, True, False, False)
    """
    a = abs(v)
    return a == 0.0 or VALUE_MIN <= a <= VALUE_MAX


class Event(NamedTuple):
    """One event: a training event (x and y), a scoring request (x) or an outcome (id and y).

    Immutable like the frozen dataclasses of this module, but a named tuple: it is built once per
    message, and a frozen dataclass took 2.3 us to build against 0.8 us (measured)."""

    id: str | int | None
    x: Mapping[str, Any] | None
    y: int | None
    w: float = 1.0
    ts: float | None = None
    src: str | None = None
    seq: int | None = None


@dataclass(frozen=True)
class Columns:
    """A columnar block of numeric features: n rows by len(cols)."""

    cols: tuple[str, ...]
    rows: np.ndarray  # float64, n x len(cols)
    y: np.ndarray  # float64, NaN where there is no label
    ids: tuple[Any, ...] | None
    ts: float | None = None
    src: str | None = None
    seq: int | None = None


Item = Event | Columns | ProtocolError


# A message refused before it could be decoded (not msgpack, too large, not two frames) changes
# nothing but its counter; the journal keeps a record of it all the same, so that a restart counts
# it again. The record's body is a msgpack extension of this type holding the reason: no ingest body
# can be one (`unpack` refuses every extension), so it only ever comes from the journal.
REFUSED_EXT = 1


def refused_record(reason: str) -> bytes:
    """The journal body of a message refused before decoding: an ext 8 of type REFUSED_EXT."""
    data = reason.encode()
    return b"\xc7" + bytes((len(data), REFUSED_EXT)) + data


def is_refused_record(raw: bytes) -> bool:
    return raw[:1] == b"\xc7" and raw[2:3] == bytes((REFUSED_EXT,))


def decode_body(body: object) -> list[Item]:
    """The events of one ingest body, in order; a bad body is a one-item list of its error."""
    if isinstance(body, msgpack.ExtType) and body.code == REFUSED_EXT:  # (a journal's record)
        return [ProtocolError(body.data.decode(), "refused before decoding (counted again from the journal)")]
    if not isinstance(body, Mapping):
        return [ProtocolError("not_a_map", f"a body must be a map, got {type(body).__name__}")]
    if "batch" in body:
        items = body["batch"]
        if len(body) != 1 or not isinstance(items, list):
            return [ProtocolError("not_a_map", "a batch is a map with the one key 'batch' holding a list")]
        out: list[Item] = []
        for item in items:
            if type(item) is dict and "batch" not in item and "cols" not in item:  # an event: the usual case
                try:
                    out.append(_event(item))
                except ProtocolError as e:
                    out.append(e)
            elif isinstance(item, Mapping) and "batch" in item:
                out.append(ProtocolError("not_a_map", "a batch may not hold another batch"))
            else:
                out.extend(decode_body(item))
        return out
    try:
        if "cols" in body:
            return [_columns(body)]
        return [_event(body)]
    except ProtocolError as e:
        return [e]


# a message's body as received: large ones are read-only memoryviews of ZeroMQ's frames, not copied
# (`server.Receiver`); what reads a body takes either
Body = bytes | memoryview


def unpack(raw: Body) -> object:
    """msgpack bytes to a body, with limits; ProtocolError("undecodable") when it is not msgpack,
    ("too_large") when it or a part of it is beyond a limit."""
    if len(raw) > MAX_MESSAGE:
        raise ProtocolError("too_large", f"the body is {len(raw):,} bytes; at most {MAX_MESSAGE:,} are accepted")
    try:
        return msgpack.unpackb(
            raw,
            raw=False,
            strict_map_key=False,
            max_str_len=MAX_STR,
            max_bin_len=MAX_BIN,
            max_array_len=MAX_ITEMS,
            max_map_len=MAX_ITEMS,
            max_ext_len=0,
        )
    except msgpack.StackError:
        raise ProtocolError(
            "too_large", f"the body nests deeper than msgpack's decoder allows ({MAX_DEPTH} levels)"
        ) from None
    except Exception as e:  # msgpack raises several types for bad bytes
        if "exceeds max_" in str(e) and "max_ext_len" not in str(e):  # "70000 exceeds max_str_len(65536)"
            raise ProtocolError("too_large", f"a part of the body is too large: {e}") from None
        raise ProtocolError("undecodable", f"the body is not valid msgpack ({e or type(e).__name__})") from None


def _read_id(body: Mapping[str, Any]) -> Any:
    ident = body.get("id")
    if ident is not None and (isinstance(ident, bool) or not isinstance(ident, str | int)):
        raise ProtocolError("not_a_map", f"id must be a string or an integer, got {ident!r}")
    return ident


def _event(body: Mapping[str, Any]) -> Event:
    # Exact-type fast paths first: this runs once per message in the daemon.
    get = body.get
    ident = get("id")
    if ident is not None and type(ident) is not str and type(ident) is not int:
        ident = _read_id(body)
    if not EVENT_KEYS.issuperset(body):
        unknown = sorted(str(k) for k in body if k not in EVENT_KEYS)
        raise ProtocolError("not_a_map", f"unknown key {unknown[0]!r}; an event has id, x, y, w, ts, src, seq", ident)
    x = get("x")
    if x is not None and not isinstance(x, Mapping):
        raise ProtocolError("bad_features", f"x must be a map, got {type(x).__name__}", ident)
    y = None
    if "y" in body:
        raw_y = body["y"]
        y = raw_y if type(raw_y) is int and (raw_y == 0 or raw_y == 1) else _label(raw_y, ident)
    w = get("w")
    w = 1.0 if w is None else _weight(w, ident)
    if "ts" in body or "src" in body or "seq" in body:
        ts, src, seq = _envelope(body, ident)
    else:
        ts = src = seq = None
    if x is None and (y is None or ident is None):
        raise ProtocolError("bad_features", "an event needs x (features), or id and y (an outcome)", ident)
    return Event(ident, x, y, w, ts, src, seq)


def _label(y: Any, ident: Any) -> int:
    if isinstance(y, bool):
        return int(y)
    if isinstance(y, int | float) and not isinstance(y, bool) and y in (0, 1):
        return int(y)
    raise ProtocolError("bad_label", f"y must be 0, 1, true or false, got {y!r}", ident)


def as_float(value: int | float, what: str, ident: Any) -> float:
    """A number as a float; an integer beyond the float range is non_finite (JSON allows them)."""
    try:
        v = float(value)
    except OverflowError:
        raise ProtocolError("non_finite", f"{what} is too large for a float", ident) from None
    if not math.isfinite(v):
        raise ProtocolError("non_finite", f"{what} is {value!r}", ident)
    return v


def _weight(w: Any, ident: Any) -> float:
    if isinstance(w, bool) or not isinstance(w, int | float):
        raise ProtocolError("bad_weight", f"w must be a number > 0, got {w!r}", ident)
    w = as_float(w, "w", ident)
    if not math.isfinite(w):
        raise ProtocolError("non_finite", f"w is {w!r}", ident)
    if w <= 0 or w > WEIGHT_MAX:
        raise ProtocolError("bad_weight", f"w must be > 0 and at most {WEIGHT_MAX:g}, got {w!r}", ident)
    return float(w)


def _envelope(body: Mapping[str, Any], ident: Any) -> tuple[float | None, str | None, int | None]:
    ts = body.get("ts")
    if ts is not None:
        if isinstance(ts, bool) or not isinstance(ts, int | float):
            raise ProtocolError("not_a_map", f"ts must be a number of seconds, got {ts!r}", ident)
        ts = as_float(ts, "ts", ident)
    src = body.get("src")
    if src is not None and not isinstance(src, str):
        raise ProtocolError("not_a_map", f"src must be a string, got {src!r}", ident)
    seq = body.get("seq")
    if seq is not None and (isinstance(seq, bool) or not isinstance(seq, int) or seq < 0):
        raise ProtocolError("not_a_map", f"seq must be an integer >= 0, got {seq!r}", ident)
    return (None if ts is None else float(ts)), src, seq


@njit(cache=True)
def _first_bad(values: np.ndarray) -> tuple[int, int]:
    """(1, 0) when a value is NaN or infinite; else (2, i) for the first value out of range, in
    order; else (0, 0). Compiled: numpy's five passes took 20 us for 500 x 20 values, this one
    (a vectorised count, then a search only when it finds something) 2 us."""
    bad = 0
    for i in range(values.shape[0]):
        a = abs(values[i])
        bad += not ((a == 0.0) | ((a >= VALUE_MIN) & (a <= VALUE_MAX)))  # NaN fails every comparison
    if bad == 0:
        return 0, 0
    for i in range(values.shape[0]):
        if not np.isfinite(values[i]):
            return 1, 0
    for i in range(values.shape[0]):
        a = abs(values[i])
        if a != 0.0 and not (VALUE_MIN <= a <= VALUE_MAX):
            return 2, i
    return 0, 0  # not reached


def _columns(body: Mapping[str, Any]) -> Columns:
    unknown = sorted(str(k) for k in body if k not in COLUMN_KEYS)
    if unknown:
        raise ProtocolError("not_a_map", f"unknown key {unknown[0]!r} in a columnar block")
    cols = body["cols"]
    if not isinstance(cols, list) or not cols or not all(isinstance(c, str) for c in cols):
        raise ProtocolError("bad_features", "cols must be a non-empty list of feature names")
    if len(set(cols)) != len(cols):
        raise ProtocolError("bad_features", "cols names a feature twice")
    rows = body.get("rows")
    d = len(cols)
    if isinstance(rows, bytes | bytearray):
        if len(rows) % (8 * d):
            raise ProtocolError("bad_features", f"rows holds {len(rows)} bytes, not a multiple of 8 x {d} columns")
        matrix = np.frombuffer(bytes(rows), dtype="<f8").reshape(-1, d).astype(np.float64)
    elif isinstance(rows, list) and all(isinstance(r, list) and len(r) == d for r in rows):
        # JSON Lines cannot carry bytes: there a block's rows are a list of lists.
        try:
            matrix = np.array(rows, dtype=np.float64).reshape(-1, d)
        except (TypeError, ValueError):
            raise ProtocolError("bad_features", "rows must hold numbers only") from None
    else:
        raise ProtocolError("bad_features", f"rows must be float64 bytes, n x {d}")
    n = matrix.shape[0]
    kind, at = _first_bad(matrix.reshape(-1))
    if kind == 1:
        raise ProtocolError("non_finite", "rows holds a NaN or an infinity")
    if kind == 2:
        r, c = divmod(at, d)
        raise ProtocolError("bad_features", f"rows[{r}] holds {cols[c]}={matrix[r, c]!r}: {OUT_OF_RANGE}")
    y = np.full(n, np.nan)
    if "y" in body and body["y"] is not None:
        yb = body["y"]
        if isinstance(yb, bytes | bytearray):
            u = np.frombuffer(bytes(yb), dtype=np.uint8)
            if u.shape[0] != n or not ((u <= 1) | (u == NO_LABEL)).all():
                raise ProtocolError("bad_label", f"y must be {n} bytes of 0, 1 or 255")
            y = np.where(u == NO_LABEL, np.nan, u.astype(np.float64))
        elif isinstance(yb, list) and len(yb) == n:
            y = np.array([np.nan if v is None else _label(v, None) for v in yb], dtype=np.float64)
        else:
            raise ProtocolError("bad_label", f"y must be a list or bytes of {n} labels")
    ids = body.get("id")
    if ids is not None:
        if not isinstance(ids, list) or len(ids) != n:
            raise ProtocolError("not_a_map", f"id must be a list of {n} ids")
        for ident in ids:
            _read_id({"id": ident})
        ids = tuple(ids)
    ts, src, seq = _envelope(body, None)
    return Columns(tuple(cols), matrix, y, ids, ts, src, seq)
