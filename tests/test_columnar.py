"""The compiled reading of columnar messages (oddsmill.columnar) against the full path's decoder,
and its score bodies against msgpack's packing of the full path's dict. The reader may decline
anything; what it reads must be exactly what the decoder makes of the message."""

from __future__ import annotations

import copy
import struct
from typing import Any

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from oddsmill import columnar
from oddsmill.columnar import ColumnReader
from oddsmill.engine import ColumnScores, Engine
from oddsmill.protocol import Columns, ProtocolError, decode_body, unpack
from oddsmill.server import _p, _score_body
from oddsmill.settings import LearnerSettings
from scipy.special import expit

NAMES = ["route_km", "weight_g", "stops"]
SLOTS = {tuple(NAMES): (4, 7, 9), tuple(NAMES[::-1]): (9, 7, 4), ("route_km",): (4,)}


def body(m: int = 3, names: list[str] = NAMES, seed: int = 0, **extra: Any) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    rows = rng.normal(size=(m, len(names))) * 5
    return {"cols": names, "rows": rows.astype("<f8").tobytes(), "y": bytes(rng.integers(0, 2, m).tolist()), **extra}


def decoded(raw: bytes) -> Columns | None:
    """What the full path makes of a message, when it is a plain columnar block of known names
    the reader may take: every row labelled, no id, no ts."""
    try:
        items = decode_body(unpack(raw))
    except ProtocolError:
        return None
    item = items[0] if len(items) == 1 else None
    if type(item) is not Columns or item.ids is not None or item.ts is not None or np.isnan(item.y).any():
        return None
    return item if item.cols in SLOTS and item.rows.shape[0] else None


def check(raws: list[bytes], reader: ColumnReader | None = None) -> bool:
    """The reader on a block against the decoder on each message; whether it read the block."""
    reader = reader or ColumnReader()
    got = reader.read(raws, SLOTS)
    want = [decoded(raw) for raw in raws]
    if got is None:
        return False
    assert all(w is not None for w in want), "read a message the full path refuses or plans otherwise"
    runs, numbers = got
    assert numbers == [(w.src, w.seq) for w in want if w is not None]
    rows = [w for w in want if w is not None]
    # each message's slots are its run's
    assert [SLOTS[w.cols] for w in rows] == [tuple(run.slots.tolist()) for run in runs for _ in run.counts]
    flat = np.concatenate([run.rows.reshape(-1) for run in runs])
    assert flat.tobytes() == np.concatenate([w.rows.reshape(-1) for w in rows]).tobytes()
    assert np.concatenate([run.y for run in runs]).tolist() == np.concatenate([w.y for w in rows]).tolist()
    assert [m for run in runs for m in run.counts] == [w.rows.shape[0] for w in rows]
    return True


def test_it_reads_plain_blocks_and_their_runs() -> None:
    plain = msgpack.packb(body())
    assert check([plain])
    numbered = msgpack.packb(body(src="depot-feed", seq=41, seed=1))
    assert check([numbered, plain])
    block = [plain, msgpack.packb(body(5, seed=2)), msgpack.packb(body(4, NAMES[::-1], seed=3)), plain]
    reader = ColumnReader()
    assert check(block, reader)
    runs, _ = reader.read(block, SLOTS)  # type: ignore[misc]
    assert [r.counts for r in runs] == [[3, 5], [4], [3]]  # three runs: the names changed twice
    assert [tuple(r.slots.tolist()) for r in runs] == [(4, 7, 9), (9, 7, 4), (4, 7, 9)]
    # runs of different widths, one after another in the reader's arrays
    narrow = msgpack.packb(body(7, ["route_km"], seed=5))
    block = [plain, plain, narrow, narrow, plain, narrow]
    assert check(block, reader)
    runs, _ = reader.read(block, SLOTS)  # type: ignore[misc]
    assert [r.counts for r in runs] == [[3, 3], [7, 7], [3], [7]]
    wide = msgpack.packb(body(2000, seed=4))  # (the reader's arrays grow)
    assert check([wide, wide], reader)
    huge = msgpack.packb(body(400_000, seed=6))  # 9.6 MB of rows: more than KEPT_VALUES
    assert check([huge], reader) and reader._values.shape[0] >= 1_200_000
    assert check([plain], reader) and reader._values.shape[0] < 1_000  # let go of, once not needed
    assert check([wide], reader)
    # keys in another order, a map16 header, str8 names: msgpack decodes them all alike
    reordered = msgpack.packb({k: body()[k] for k in ("y", "rows", "cols")})
    assert check([reordered])
    raw = msgpack.packb(body())
    assert check([b"\xde\x00\x03" + raw[1:]])


CASES = {
    "an id": body(id=[1, 2, 3]),
    "a ts": body(ts=1.5),
    "a row without a label": {**body(), "y": bytes([1, 255, 0])},
    "a label of 2": {**body(), "y": bytes([1, 2, 0])},
    "labels as a list": {**body(), "y": [1, 0, 1]},
    "too few labels": {**body(), "y": bytes([1, 0])},
    "no labels": {k: v for k, v in body().items() if k != "y"},
    "rows not a multiple": {**body(), "rows": body()["rows"][:-8]},
    "no rows": {**body(), "rows": b"", "y": b""},
    "rows as lists": {**body(), "rows": [[1.0, 2.0, 3.0]] * 3},
    "a name twice": {**body(), "cols": ["route_km", "route_km", "stops"]},
    "no names": {**body(), "cols": []},
    "a name not a str": {**body(), "cols": ["route_km", 7, "stops"]},
    "names not known": body(names=["route_km", "weight_g", "depot_lat"]),
    "an unknown key": body(colour="red"),
    "a negative seq": body(src="a", seq=-1),
    "a seq past int64": body(src="a", seq=2**63),
    "a bool seq": body(src="a", seq=True),
    "a src not a str": body(src=7, seq=1),
    "y nil": {**body(), "y": None},
}
BAD_VALUES = [float("nan"), float("inf"), -float("inf"), 1e31, -1e-31, 5e-324]


@pytest.mark.parametrize("case", sorted(CASES))
def test_it_declines_what_the_full_path_must_decide(case: str) -> None:
    raw = msgpack.packb(CASES[case])
    assert not check([raw])
    assert not check([msgpack.packb(body()), raw])  # (and so the whole block)


@pytest.mark.parametrize("value", BAD_VALUES)
def test_it_declines_values_the_protocol_refuses(value: float) -> None:
    rows = np.frombuffer(body()["rows"], dtype="<f8").copy()
    rows[4] = value
    assert not check([msgpack.packb({**body(), "rows": rows.tobytes()})])
    rows[4] = 0.0  # 0 is taken
    assert check([msgpack.packb({**body(), "rows": rows.tobytes()})])


def test_it_declines_malformed_bytes_without_reading_past_them() -> None:
    raw = msgpack.packb(body(src="depot-feed", seq=300))
    for end in range(len(raw)):  # every truncation
        assert not check([raw[:end]])
    assert not check([raw + b"\x00"])  # extra bytes
    twice = raw.replace(b"\x85", b"\x86", 1) + b"\xa1y\xc4\x03\x01\x00\x01"  # the key y twice
    assert not check([twice])
    not_utf8 = msgpack.packb(body(src="depot-feed", seq=1)).replace(b"depot", b"d\xffpot")
    assert not check([not_utf8])


@settings(max_examples=300, deadline=None)
@given(st.integers(0, 10**6), st.integers(0, 255), st.integers(0, 2**32 - 1))
def test_a_flipped_byte_is_read_only_as_the_decoder_reads_it(at: int, byte: int, seed: int) -> None:
    """Any one byte of a message changed: the reader never crashes and reads only what the full
    path decodes to the same rows and labels."""
    raw = bytearray(msgpack.packb(body(4, seed=seed % 1000, src="s", seq=seed)))
    raw[at % len(raw)] = byte
    check([bytes(raw)])


@pytest.mark.parametrize("m", [1, 15, 16, 31, 32, 33, 8191, 8192, 65535, 65536])
def test_score_bodies_are_the_bytes_msgpack_packs_for_the_full_path(m: int) -> None:
    rng = np.random.default_rng(m)
    z = rng.normal(size=m) * 8
    z[: min(m, 4)] = [0.0, -800.0, 800.0, -0.0][: min(m, 4)]
    for step in (0, 127, 128, 2**16, 2**32, 2**40):
        for ts in (0.0, 1_764_000_000.123, -1.5):
            want = msgpack.packb(_score_body(ColumnScores(None, z, np.arange(step, step + m), ts), "cols"))
            assert columnar.score_body(z, step, ts) == want
    p = np.frombuffer(msgpack.unpackb(columnar.score_body(z, 0, 0.0))["p"], dtype="<f8")
    assert p.tolist() == [_p(v) for v in z.tolist()]  # a row's p is its lone event's, bit for bit
    # and the probability itself, against scipy's logistic function (an outside reference)
    np.testing.assert_allclose(p, expit(z), rtol=1e-15, atol=1e-300)
    assert struct.unpack(">d", columnar.score_body(z, 0, 2.5)[-8:]) == (2.5,)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["a", "b", None]), st.one_of(st.none(), st.integers(0, 6))), max_size=12))
def test_in_sequence_says_whether_numbered_would_take_every_message(numbers: list[tuple[Any, Any]]) -> None:
    engine = Engine(LearnerSettings())
    engine.numbered("a", 3)  # a producer the engine has seen
    before = copy.deepcopy(engine.last_seq), engine.counters.lost
    verdict = engine.in_sequence(numbers)
    assert (copy.deepcopy(engine.last_seq), engine.counters.lost) == before  # changed nothing
    assert verdict == all([engine.numbered(src, seq) for src, seq in numbers])
