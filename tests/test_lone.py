"""The daemon's paths for small blocks against its full path: `Server._quick` (a block of numeric
training events with the same known names, read in compiled code and learned as rows) and
`Server._lone` (a few messages of one event each, through `Engine.one`). Whatever the messages and
however they fall into blocks, the daemon must publish the same bytes, journal the same bytes and
end in the same state, bit for bit, as with both paths turned off."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
import zmq
from hypothesis import given, settings
from hypothesis import strategies as st
from oddsmill.engine import Engine, Rejection, Score
from oddsmill.fastpath import READ, RunReader, read_each
from oddsmill.learner import Learner
from oddsmill.protocol import Event, decode_body, unpack
from oddsmill.settings import LearnerSettings

from tests.test_fastpath import same_state
from tests.tools import one_call_statuses

NAMES = ["route_km", "weight_g", "stops"]


class Recorder:
    """Stands for the scores socket: keeps every frame sent, in order."""

    def __init__(self) -> None:
        self.frames: list[bytes] = []

    def send(self, data: bytes, flags: int = 0) -> None:
        self.frames.append(bytes(data))


def uncopied(blocks: list[list[list[bytes]]]) -> list[list[list[Any]]]:
    """The blocks with each body as `server.Receiver` hands a large one: a read-only memoryview of
    a ZeroMQ frame, not a bytes object."""
    return [[[m[0], *(zmq.Frame(f).buffer.toreadonly() for f in m[1:])] for m in block] for block in blocks]


def run_server(
    state: Path, blocks: list[list[list[Any]]], small_paths: bool, monkeypatch: Any, fsync: str = "interval"
) -> Any:
    """Handle the blocks in a Server (no sockets), each at its own fixed arrival time; returns
    (server, frames published, journal bytes)."""
    from oddsmill.server import Server, ServerSettings

    settings = ServerSettings(state_dir=state, pending_limit=5, pending_ttl=30.0, fsync=fsync)
    server = Server(settings, LearnerSettings(scale_warmup=4))
    if not small_paths:
        monkeypatch.setattr(server, "_quick", lambda *a: False)
        monkeypatch.setattr(server, "_columnar", lambda *a: False)
        monkeypatch.setattr(server, "_lone", lambda *a: [None])
    pub = Recorder()
    for k, block in enumerate(blocks):
        monkeypatch.setattr(time, "time", lambda k=k: 1_000.0 + 7.0 * k)  # the arrival of block k
        server.handle(block, pub)  # type: ignore[arg-type]
    monkeypatch.undo()
    server.journal.close()
    journal = b"".join(p.read_bytes() for p in sorted(state.glob("journal-*")))
    return server, pub.frames, journal


def training(rng: np.random.Generator, names: list[str], ident: object = None) -> dict[str, Any]:
    body: dict[str, Any] = {"x": {n: float(rng.normal() * 10) for n in names}, "y": int(rng.random() < 0.4)}
    if ident is not None:
        body["id"] = ident
    return body


BIG_IDS = [127, 128, 255, 256, 65535, 65536, 2**32 - 1, 2**32, 2**63 - 1, 2**63, 2**64 - 1]
BIG_IDS += [-1, -32, -33, -128, -129, -32768, -32769, -(2**31), -(2**31) - 1, -(2**63)]
KINDS = [
    "train",  # numeric, the usual names: the quick path once the names are known
    "train_big_id",  # every width of msgpack integer (the compiled packing of its score)
    "train_id",
    "train_str_id",
    "train_other_order",  # the same names in another order: another run
    "train_new_name",
    "request",  # a scoring request with an id: held
    "request_int_id",  # with an integer id: quick.py scores and the engine holds it, once the names are known
    "outcome",  # the outcome of an earlier request (or of none: unknown_outcome)
    "outcome_int_id",
    "one_hot",
    "weighted",
    "numbered",  # src and seq (one repeated: a duplicate)
    "bad_label",
    "not_msgpack",
    "three_frames",
    "batch",
    "cols",  # a columnar block with a scoring request (held): the full path
    "cols_plain",  # every row labelled: Server._columnar once its names are known (with ids: _columns)
    "cols_long",  # 40 rows (the score body's longer msgpack headers)
    "cols_other_order",  # the names in another order: another run of the block
    "cols_numbered",  # src and seq (one repeated: a duplicate)
    "cols_nan",  # a NaN among the rows: refused by the full path
    "cols_narrow",  # two of the names: runs of another width in one block
]
messages = st.sampled_from(KINDS)


def build(kinds: list[str], seed: int) -> list[list[bytes]]:
    rng = np.random.default_rng(seed)
    out: list[list[bytes]] = []
    for i, kind in enumerate(kinds):
        body: Any
        if kind == "train":
            body = training(rng, NAMES)
        elif kind == "train_id":
            body = training(rng, NAMES, ident=i)
        elif kind == "train_big_id":
            body = training(rng, NAMES, ident=BIG_IDS[i % len(BIG_IDS)])
        elif kind == "train_str_id":
            body = training(rng, NAMES, ident=f"P{i:05d}")
        elif kind == "train_other_order":
            body = training(rng, NAMES[::-1], ident=i * 1000)
        elif kind == "train_new_name":
            body = training(rng, [*NAMES, f"extra_{i % 3}"])
        elif kind == "request":
            body = {"id": f"R{i % 7}", "x": {n: float(rng.normal()) for n in NAMES}}
        elif kind == "outcome":
            body = {"id": f"R{int(rng.integers(0, 9))}", "y": int(rng.random() < 0.5)}
        elif kind == "request_int_id":
            body = {"id": 500 + i % 7, "x": {n: float(rng.normal()) for n in NAMES}}
        elif kind == "outcome_int_id":
            body = {"id": 500 + int(rng.integers(0, 9)), "y": int(rng.random() < 0.5)}
        elif kind == "one_hot":
            body = {"x": {"route_km": 3.0, "depot": "Harbourside"}, "y": 1, "id": i}
        elif kind == "weighted":
            body = {**training(rng, NAMES), "w": 2.5}
        elif kind == "numbered":
            body = {**training(rng, NAMES), "src": "courier-app", "seq": i // 2}
        elif kind == "bad_label":
            body = {"x": {"route_km": 1.0}, "y": 3}
        elif kind == "not_msgpack":
            out.append([b"events", b"\xc1\xc1"])
            continue
        elif kind == "three_frames":
            out.append([b"events", msgpack.packb(training(rng, NAMES)), b"extra"])
            continue
        elif kind == "batch":
            body = {"batch": [training(rng, NAMES) for _ in range(3)]}
        elif kind == "cols_plain":
            rows = rng.normal(size=(4, 3)) * 3
            body = {"cols": NAMES, "rows": rows.astype("<f8").tobytes(), "y": bytes([1, 0, 0, 1])}
            if i % 2:
                body["id"] = [f"C{i}-{r}" for r in range(4)]
        elif kind in ("cols_long", "cols_other_order", "cols_numbered", "cols_nan", "cols_narrow"):
            m = 40 if kind == "cols_long" else 3
            names = NAMES[::-1] if kind == "cols_other_order" else NAMES[:2] if kind == "cols_narrow" else NAMES
            rows = rng.normal(size=(m, len(names))) * 3
            if kind == "cols_nan":
                rows[1, 2] = np.nan
            body = {"cols": names, "rows": rows.astype("<f8").tobytes(), "y": bytes(rng.integers(0, 2, m).tolist())}
            if kind == "cols_numbered":
                body.update(src="depot-feed", seq=i // 2)
        else:
            rows = rng.normal(size=(3, 3))
            body = {"cols": NAMES, "rows": rows.astype("<f8").tobytes(), "y": bytes([1, 0, 255]), "id": [1, 2, 3]}
        out.append([b"events", msgpack.packb(body)])
    return out


@settings(max_examples=40, deadline=None)
@given(
    st.lists(st.sampled_from(["train", "train_id", "train_big_id"]) | messages, min_size=1, max_size=40),
    st.lists(st.integers(1, 6), min_size=1, max_size=40),
    st.integers(0, 2**32 - 1),
)
def test_small_blocks_publish_journal_and_learn_what_the_full_path_does(
    tmp_path_factory: Any, kinds: list[str], sizes: list[int], seed: int
) -> None:
    msgs = build(kinds, seed)
    blocks, at, k = [], 0, 0
    while at < len(msgs):
        blocks.append(msgs[at : at + sizes[k % len(sizes)]])
        at += sizes[k % len(sizes)]
        k += 1
    with pytest.MonkeyPatch.context() as mp:
        fast, fast_frames, fast_journal = run_server(tmp_path_factory.mktemp("fast"), blocks, True, mp)
    with pytest.MonkeyPatch.context() as mp:
        full, full_frames, full_journal = run_server(tmp_path_factory.mktemp("full"), blocks, False, mp)
    assert fast_frames == full_frames
    assert fast_journal == full_journal
    same_state(fast.engine, full.engine)
    assert fast.engine.state_dict()["pending"] == full.engine.state_dict()["pending"]
    assert fast.engine.metrics.history == full.engine.metrics.history


def test_a_long_mixed_stream_takes_every_path_and_ends_the_same(tmp_path: Path) -> None:
    """600 messages of every kind in blocks of 1 to 8, with both small paths counted: each takes
    blocks, and the daemon publishes, journals and learns what it does with both turned off."""
    from oddsmill.server import Server

    rng = np.random.default_rng(77)
    choices = ["train", "train_id", "train_big_id", "request", "outcome", "request_int_id", "outcome_int_id"]
    kinds = [str(k) for k in rng.choice(choices, size=600)]
    for at in rng.integers(0, 600, size=60).tolist():
        kinds[at] = str(rng.choice(KINDS))
    msgs = build(kinds, 3)
    lone_columns = build(["cols_plain"] * 12, 4)  # (those with ids, at odd positions: Server._columns)
    columns = build(["cols_plain", "cols_long", "cols_narrow", "cols_numbered", "cols_other_order"] * 9, 5)
    blocks, at = [], 0
    while at < len(msgs):
        n = int(rng.integers(1, 9))
        blocks.append(msgs[at : at + n])
        at += n
        if lone_columns and len(blocks) % 8 == 0:
            blocks.append([lone_columns.pop()])  # a columnar block alone
        if columns and len(blocks) % 8 == 4:
            blocks.append(columns[-3:])  # columnar blocks together
            del columns[-3:]
    taken = {"_quick": 0, "_lone": 0, "_columns": 0, "_columnar": 0}
    originals = {name: getattr(Server, name) for name in ("_quick", "_lone", "_columns", "_columnar")}
    one_call = Engine.journal_and_train_known
    held: list[tuple[int, int, int]] = []  # one call's (status, requests held before, dropped by it)
    hold_known = Engine._hold_known
    scored: list[int] = []  # the scoring requests of each block quick.py learned

    def hold_counted(self: Any, known: Any, arrival: float) -> None:
        scored.append(len(known.requests()))
        hold_known(self, known, arrival)

    def one_call_counted(self: Any, *a: Any) -> Any:
        before, expired = len(self.pending), self.counters.pending_expired
        found, bodies = one_call(self, *a)
        held.append((found, before, self.counters.pending_expired - expired))
        return found, bodies

    def counting(name: str) -> Any:
        def counted(self: Any, *a: Any) -> Any:
            done = originals[name](self, *a)
            taken[name] += done is True or done == []  # (True: _quick's, _columnar's and _columns' "done", []: _lone's)
            return done

        return counted

    try:
        Engine.journal_and_train_known = one_call_counted  # type: ignore[method-assign]
        Engine._hold_known = hold_counted  # type: ignore[method-assign]
        for name in originals:
            setattr(Server, name, counting(name))
        with pytest.MonkeyPatch.context() as mp:
            fast, fast_frames, fast_journal = run_server(tmp_path / "fast", blocks, True, mp)
    finally:
        Engine.journal_and_train_known = one_call  # type: ignore[method-assign]
        Engine._hold_known = hold_known  # type: ignore[method-assign]
        for name, f in originals.items():
            setattr(Server, name, f)
    assert taken["_quick"] >= 10 and taken["_lone"] >= 10 and taken["_columns"] >= 4, taken
    assert taken["_columnar"] >= 8, taken
    # the one call takes blocks while requests are held, and drops those past their time-to-live
    assert sum(f == READ and n > 0 for f, n, _ in held) >= 10 and sum(e for f, _, e in held if f == READ) > 0, held
    assert sum(scored) >= 10, scored  # and scoring requests with integer ids, held by the engine
    with pytest.MonkeyPatch.context() as mp:
        full, full_frames, full_journal = run_server(tmp_path / "full", blocks, False, mp)
    assert len(fast_frames) > 1000 and fast_frames == full_frames
    assert fast_journal == full_journal
    same_state(fast.engine, full.engine)
    assert fast.engine.state_dict()["pending"] == full.engine.state_dict()["pending"]
    # every body received uncopied (as large ones are): the columnar path reads the memoryviews,
    # the other paths take bytes (as annotated), and nothing published, journaled or learned differs
    columnar_views = quick_views = 0
    columnar, quick, lone, block = Server._columnar, Server._quick, Server._lone, Server._block
    given: set[type] = set()  # the types of the bodies the other paths were given

    def columnar_counted(self: Any, messages: Any, *a: Any) -> Any:
        nonlocal columnar_views
        done = columnar(self, messages, *a)
        columnar_views += done and all(type(m[1]) is memoryview for m in messages)
        return done

    def quick_counted(self: Any, messages: Any, *a: Any) -> Any:  # (it reads a copy of each)
        nonlocal quick_views
        done = quick(self, messages, *a)
        quick_views += done and all(type(m[1]) is memoryview for m in messages)
        return done

    def lone_seen(self: Any, messages: Any, *a: Any) -> Any:
        given.update(type(f) for m in messages for f in m)
        return lone(self, messages, *a)

    def block_seen(self: Any, messages: Any, *a: Any) -> Any:
        given.update(type(f) for m in messages for f in m)
        return block(self, messages, *a)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(Server, "_columnar", columnar_counted)
        mp.setattr(Server, "_quick", quick_counted)
        mp.setattr(Server, "_lone", lone_seen)
        mp.setattr(Server, "_block", block_seen)
        views, views_frames, views_journal = run_server(tmp_path / "views", uncopied(blocks), True, mp)
    assert columnar_views >= 8 and quick_views >= 10, (columnar_views, quick_views)
    assert given == {bytes}, given
    assert views_frames == full_frames
    assert views_journal == full_journal
    same_state(views.engine, full.engine)
    assert views.engine.state_dict()["pending"] == full.engine.state_dict()["pending"]


@pytest.mark.parametrize("fsync", ["interval", "block"])
def test_training_streams_take_the_one_call_path_and_end_the_same(tmp_path: Path, fsync: str) -> None:
    """`_quick` reads a block of known names, writes its journal records and learns it in one
    compiled call (`Known.journal_and_learn`); with fsync = "block" it reads in one, journals in
    Python (and syncs) and learns in a second (`Known.learn`). 900 training messages of every kind
    of id and name, in blocks of 1 to 8: the quick path takes many blocks, and the daemon
    publishes, journals and learns what it does with the small paths turned off."""
    from oddsmill.quick import Known

    rng = np.random.default_rng(31)
    choices = ["train", "train_id", "train_big_id", "train_str_id", "train_other_order", "train_new_name"]
    kinds = [str(k) for k in rng.choice(choices, p=[0.35, 0.25, 0.2, 0.08, 0.08, 0.04], size=900)]
    msgs = build(kinds, 9)
    blocks, at = [], 0
    while at < len(msgs):
        n = int(rng.integers(1, 9))
        blocks.append(msgs[at : at + n])
        at += n
    learned: list[float] = []  # the arrival of each block the second call of two learned
    learn = Known.learn

    def learn_counted(self: Any, *a: Any) -> Any:
        if a[-1] > 0.0:  # (not the server's warm-up, at arrival 0)
            learned.append(a[-1])
        return learn(self, *a)

    with pytest.MonkeyPatch.context() as mp:
        found = one_call_statuses(mp)
        mp.setattr(Known, "learn", learn_counted)
        fast, fast_frames, fast_journal = run_server(tmp_path / "fast", blocks, True, mp, fsync)
    if fsync == "interval":
        # (declined: other names, str ids)
        assert found.count(READ) >= 40 and len(set(found)) > 1 and not learned, found
    else:
        assert found == [READ] and len(learned) >= 40, found  # (one call: the server's warm-up, on /dev/null)
    with pytest.MonkeyPatch.context() as mp:
        full, full_frames, full_journal = run_server(tmp_path / "full", blocks, False, mp, fsync)
    assert len(fast_frames) == 2 * len(msgs) and fast_frames == full_frames
    assert fast_journal == full_journal
    same_state(fast.engine, full.engine)
    assert fast.engine.metrics.history == full.engine.metrics.history
    assert fast.engine.counters.train == full.engine.counters.train == len(msgs)


def test_records_written_in_compiled_code_are_the_journal_writers_bytes(tmp_path: Path) -> None:
    """`quick._write_records` writes what `storage.journal_record` makes of each body (record head,
    CRC-32, arrival, body), for blocks of one to five bodies of any length; a write that fails
    reports its errno and how far it got."""
    import errno
    import os

    from oddsmill.quick import HEAD_BYTES, _write_records
    from oddsmill.storage import journal_record

    rng = np.random.default_rng(4)
    for m, arrival in [(1, 1_764_000_000.123456), (2, 0.0), (5, -2.5e-300)]:
        raws = [bytes(rng.integers(0, 256, int(rng.integers(1, 3000))).tolist()) for _ in range(m)]
        joined = b"".join(raws)
        starts = np.cumsum([0, *map(len, raws)]).astype(np.int64)
        path = tmp_path / f"records-{m}"
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND)
        done = np.zeros(2, dtype=np.int64)
        heads, iov = np.empty(HEAD_BYTES + 8 * m, dtype=np.uint8), np.empty(6 * m, dtype=np.int64)
        _write_records(np.frombuffer(joined, dtype=np.uint8), starts, m, arrival, fd, heads, iov, done)
        os.close(fd)
        expected = b"".join(journal_record(arrival, raw) for raw in raws)
        assert path.read_bytes() == expected and done.tolist() == [len(expected), 0]
    full = os.open("/dev/full", os.O_WRONLY)  # (every write: ENOSPC)
    try:
        _write_records(np.frombuffer(joined, dtype=np.uint8), starts, m, 1.0, full, heads, iov, done)
    finally:
        os.close(full)
    assert done.tolist() == [0, errno.ENOSPC]
    _write_records(np.frombuffer(joined, dtype=np.uint8), starts, m, 1.0, full, heads, iov, done)  # closed
    assert done.tolist() == [0, errno.EBADF]


def test_the_quick_path_takes_known_names_and_declines_the_rest(tmp_path: Path) -> None:
    """Which blocks each path takes (the equality test above would pass if neither took any)."""
    from oddsmill.server import Server, ServerSettings

    server = Server(ServerSettings(state_dir=tmp_path))
    pub = Recorder()
    rng = np.random.default_rng(5)
    first = [[b"events", msgpack.packb(training(rng, NAMES, ident=i))] for i in range(3)]
    assert not server._quick(first, pub, 1.0)  # type: ignore[arg-type]  # names not known yet
    server.handle(first, pub)  # type: ignore[arg-type]  # the full path learns them
    assert server.engine.learner.step == 3
    again = [[b"events", msgpack.packb(training(rng, NAMES, ident=i))] for i in range(3, 8)]
    assert server._quick(again, pub, 2.0)  # type: ignore[arg-type]
    assert server.engine.learner.step == 8 and server.engine.counters.train == 8
    answers = [msgpack.unpackb(f) for f in pub.frames[1::2]]
    assert [a["id"] for a in answers] == list(range(8)) and [a["step"] for a in answers] == list(range(8))
    mixed = [again[0], [b"events", msgpack.packb(training(rng, NAMES[::-1]))]]
    assert not server._quick(mixed, pub, 3.0)  # type: ignore[arg-type]  # two runs of names
    request = [[b"events", msgpack.packb({"id": "R1", "x": {"route_km": 1.0}})]]
    assert not server._quick(request, pub, 3.0)  # type: ignore[arg-type]
    assert server._lone(request, pub, 3.0) == []  # type: ignore[arg-type]  # done: held
    assert "R1" in server.engine.pending
    assert server._lone([[b"events", msgpack.packb({"batch": []})]], pub, 3.0) != []  # type: ignore[arg-type]
    server.journal.close()


def test_run_reader_reads_one_run_or_declines() -> None:
    """RunReader.read against read_each: it reads a block exactly when read_each makes the whole
    block one run, with the same names, rows, labels and ids (the arrays it keeps grow as needed)."""
    reader = RunReader()
    rng = np.random.default_rng(9)
    cases: list[list[bytes]] = [
        [msgpack.packb(training(rng, NAMES, ident=i)) for i in range(5)],
        [msgpack.packb(training(rng, NAMES)) for _ in range(2)],
        [msgpack.packb(training(rng, [f"n{j}" for j in range(300)], ident="x" * 300)) for _ in range(40)],
        [msgpack.packb(training(rng, NAMES)), msgpack.packb(training(rng, NAMES[::-1]))],
        [msgpack.packb(training(rng, NAMES)), msgpack.packb({**training(rng, NAMES), "w": 2.0})],
        [msgpack.packb({"x": {"a": 1.0}})],
        [msgpack.packb(training(rng, NAMES)) + b"\x00"],
        [b"\x83\xa1x"],
    ]
    for raws in cases:
        got = reader.read(raws)
        which, blocks = read_each(list(raws))
        one_run = len(blocks) == 1 and which == [0] * len(raws)
        assert (got is not None) == one_run
        if got is not None:
            names, rows, y, ids = got
            assert blocks[0] is not None
            assert names == blocks[0].cols and rows.tolist() == blocks[0].rows.tolist()
            assert y.tolist() == blocks[0].y.tolist() and ids == blocks[0].ids
    # one byte changed anywhere in a block of three: read as read_each reads it, or declined
    body = [msgpack.packb(training(rng, NAMES, ident=i)) for i in range(3)]
    for _ in range(1500):
        k = int(rng.integers(0, 3))
        raw = bytearray(body[k])
        raw[int(rng.integers(0, len(raw)))] = int(rng.integers(0, 256))
        raws = [*body[:k], bytes(raw), *body[k + 1 :]]
        got = reader.read(raws)
        which, blocks = read_each(list(raws))
        if got is not None:
            assert len(blocks) == 1 and which == [0, 0, 0] and blocks[0] is not None
            assert got[1].tolist() == blocks[0].rows.tolist() and got[3] == blocks[0].ids


@pytest.mark.parametrize(
    "learner",
    [
        LearnerSettings(scale_warmup=4),
        LearnerSettings(schedule="adagrad", scale_warmup=4),
        LearnerSettings(average=False, l2=1e-3, scale_warmup=4),
        LearnerSettings(average_start=30, scaling="none", eta0=0.05),
    ],
    ids=["defaults", "adagrad", "plain", "raw-values"],
)
def test_engine_one_and_train_rows_equal_process(learner: LearnerSettings) -> None:
    """Engine.one event by event and Engine.train_rows on runs, against Engine.process on the same
    items: the same answers, state, pending store, counters and metrics, bit for bit."""
    rng = np.random.default_rng(21)
    items: list[Any] = []
    for i in range(1500):
        u = rng.random()
        if u < 0.5:
            items.append(decode_body(training(rng, NAMES, ident=i))[0])
        elif u < 0.65:
            items.append(Event(f"R{i % 11}", {n: float(rng.normal()) for n in NAMES}, None, 1.0, None))
        elif u < 0.8:
            items.append(Event(f"R{int(rng.integers(0, 13))}", None, int(rng.random() < 0.5), 1.0, None))
        elif u < 0.9:
            items.append(decode_body({"x": {"depot": str(rng.choice(["a", "b"])), "route_km": 1.0}, "y": 1})[0])
        else:
            items.append(decode_body({"x": {"route_km": float("nan")}, "y": 1})[0])  # refused: non_finite
    one, full = Engine(Learner(learner), 100, 7, 400.0), Engine(Learner(learner), 100, 7, 400.0)
    for i, item in enumerate(items):
        arrival = 10.0 * i
        want = full.process([(arrival, item)])
        if isinstance(item, Event):
            got = one.one(arrival, item)
            assert [r for _, r in want] == ([] if got is None else [got])
        else:
            assert isinstance(want[0][1], Rejection)
            one.process([(arrival, item)])
    same_state(one, full)
    assert one.state_dict()["pending"] == full.state_dict()["pending"]
    # rows of known names: train_rows against process on the same columnar block
    from oddsmill.protocol import Columns

    assert one.pending  # held requests, all past their time-to-live at the first block below
    for lo in range(0, 400, 40):
        rows = rng.normal(size=(40, 3)) * 5
        y = (rng.random(40) < 0.3).astype(float)
        slots = one.learner.vocab.shapes.get(tuple(NAMES))
        assert slots is not None
        logits, step = one.train_rows(20_000.0 + lo, slots, rows, y)
        want = full.process([(20_000.0 + lo, Columns(tuple(NAMES), rows, y, None))])
        ((_, scores),) = want
        assert not isinstance(scores, Rejection | Score)
        assert logits.tobytes() == scores.logits.tobytes() and step == scores.step
    assert not one.pending and one.counters.pending_expired > 0
    same_state(one, full)


def test_unpacked_bodies_are_not_read_twice(tmp_path: Path) -> None:
    """A block the small paths decline after unpacking hands its bodies to the full path, which
    answers as it would have (a columnar block after a lone event)."""
    from oddsmill.server import Server, ServerSettings

    server = Server(ServerSettings(state_dir=tmp_path))
    pub = Recorder()
    body = {"id": "A", "x": {"route_km": 2.0}, "y": 1}
    block = [[b"events", msgpack.packb(body)], [b"events", msgpack.packb({"cols": ["a"], "rows": b"\x00" * 8})]]
    bodies = server._lone(block, pub, 1.0)  # type: ignore[arg-type]
    assert bodies == [unpack(block[0][1]), unpack(block[1][1])] and pub.frames == []
    server.handle(block, pub)  # type: ignore[arg-type]
    assert [msgpack.unpackb(f)["id"] for f in pub.frames[1::2]] == ["A", [None]]
    server.journal.close()


@pytest.mark.parametrize("fail_at", [3, 4, 12], ids=["quick-block", "lone-block", "columnar-block"])
def test_a_write_failure_in_a_small_block_holds_it_as_the_full_path_does(tmp_path: Path, fail_at: int) -> None:
    """The journal's write fails at a block the quick path (3), the lone path (4) or the columnar
    path (12) would take:
    the block is scored with the model as it stands and held, the next one too; once writes
    succeed again the held blocks are journaled and learned. Published frames, journal and state
    equal those of the full path under the same failure."""
    import errno
    import os

    from oddsmill import storage

    kinds = [["train"] * 3, ["train_id"] * 2, ["request"], ["train", "train"], ["request", "train_id"]]
    kinds += [["train"] * 2, ["outcome"], ["train_id"] * 3, ["request"], ["train"] * 4]
    kinds += [["cols_long"], ["cols_long"], ["cols_long", "cols_numbered"], ["cols_numbered"] * 2, ["cols_long"]]
    msgs = build([k for block in kinds for k in block], 8)
    blocks, at = [], 0
    for block in kinds:
        blocks.append(msgs[at : at + len(block)])
        at += len(block)
    real_writev = storage.os.writev
    real_fileno = storage.JournalWriter.fileno

    def run(state: Path, small_paths: bool, views: bool = False) -> tuple[Any, list[bytes], bytes]:
        from oddsmill.server import Server, ServerSettings

        with pytest.MonkeyPatch.context() as mp:
            server = Server(ServerSettings(state_dir=state), LearnerSettings(scale_warmup=4))
            if not small_paths:
                mp.setattr(server, "_quick", lambda *a: False)
                mp.setattr(server, "_lone", lambda *a: [None])
                mp.setattr(server, "_columnar", lambda *a: False)
            taken = {"quick": 0, "lone": 0, "columnar": 0}
            for name in ("_quick", "_lone", "_columnar"):
                inner = getattr(server, name)

                def counted(*a: Any, _inner: Any = inner, _name: str = name) -> Any:
                    done = _inner(*a)
                    taken[_name[1:]] += done is True or done == []
                    return done

                mp.setattr(server, name, counted)
            pub = Recorder()
            for k, block in enumerate(uncopied(blocks) if views else blocks):
                mp.setattr(time, "time", lambda k=k: 2_000.0 + 3.0 * k)
                if k in (fail_at, fail_at + 1):

                    def full_disk(fd: int, parts: Any) -> int:
                        raise OSError(errno.ENOSPC, "No space left on device (injected)")

                    mp.setattr(storage.os, "writev", full_disk)
                    # and the quick path's compiled writev gets a descriptor whose writes all fail
                    mp.setattr(storage.JournalWriter, "fileno", lambda self: dev_full)
                else:
                    mp.setattr(storage.os, "writev", real_writev)
                    mp.setattr(storage.JournalWriter, "fileno", real_fileno)
                if k == fail_at + 2:
                    assert server.outage is not None
                    assert len(server.held) == len(blocks[fail_at]) + len(blocks[fail_at + 1])
                    server._recover()
                    assert server.outage is None and not server.held
                server.handle(block, pub)  # type: ignore[arg-type]
        if small_paths:  # the failing block went through the path under test
            assert taken[{3: "quick", 4: "lone", 12: "columnar"}[fail_at]] >= 2, taken
        server.journal.close()
        journal = b"".join(p.read_bytes() for p in sorted(state.glob("journal-*")))
        return server, pub.frames, journal

    dev_full = os.open("/dev/full", os.O_WRONLY)  # (every write: ENOSPC)
    try:
        fast, fast_frames, fast_journal = run(tmp_path / "fast", True)
        full, full_frames, full_journal = run(tmp_path / "full", False)
        if fail_at == 12:  # the columnar blocks' bodies received uncopied (memoryviews) are held too
            views, views_frames, views_journal = run(tmp_path / "views", True, views=True)
            assert views_frames == full_frames and views_journal == full_journal
            same_state(views.engine, full.engine)
    finally:
        os.close(dev_full)
    assert fast_frames == full_frames and len(fast_frames) > 20
    assert fast_journal == full_journal
    same_state(fast.engine, full.engine)
    # 17 training events (the held ones too) and an outcome joined, then 4 columnar blocks of 40
    # rows and 2 of 3 (seq 12, 12 again: a duplicate, refused, and 13)
    assert fast.engine.learner.step == 18 + 4 * 40 + 2 * 3
