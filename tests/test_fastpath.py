"""The compiled reading of numeric training events (fastpath.py) against the full path (msgpack,
decode_body, the engine event by event): whatever the body, either the fast path declines it, or
learning its blocks gives the same scores, steps, state, counters and metrics, bit for bit."""

from __future__ import annotations

import math
from typing import Any

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from oddsmill.engine import Engine, Rejection, each_score
from oddsmill.errors import ProtocolError
from oddsmill.fastpath import numeric_training
from oddsmill.learner import Learner
from oddsmill.protocol import decode_body, in_range, unpack
from oddsmill.settings import LearnerSettings

from tests.tools import names_in

NAMES = ["route_km", "weight_g", "stops", "é_depot", "a"]
values = st.floats(width=64) | st.floats(min_value=-1e6, max_value=1e6) | st.integers(-5, 5) | st.none() | st.just("x")
# ids of every msgpack width, and ones the full path refuses (a bool, nil, a float, a list)
idents = (
    st.integers(-(2**63), 2**64 - 1)
    | st.integers(-40, 200)
    | st.text(max_size=40)
    | st.sampled_from([True, None, 1.5, [1], "P-1"])
)
labels = st.sampled_from([0, 1, True, False]) | st.sampled_from([2, -1, 0.5, None, "1"])
features = st.dictionaries(st.sampled_from(NAMES), st.floats(min_value=-1e6, max_value=1e6), min_size=1) | (
    st.dictionaries(st.sampled_from(NAMES), values)
)
events = st.fixed_dictionaries({"x": features, "y": labels}) | st.fixed_dictionaries(
    {"x": features, "y": labels}, optional={"id": idents, "w": st.just(2.0)}
)
bodies = events | st.builds(lambda evs: {"batch": evs}, st.lists(events, min_size=1, max_size=8))


def _f(z: float) -> Any:
    assert math.isfinite(z)  # values out of the learner's range are refused (test_ranges.py)
    return z


def outcome(engine: Engine, items: list[Any]) -> list[Any]:
    results = engine.process([(5.0, it) for it in items])
    rejected = [(r.reason, r.detail) for _, r in results if isinstance(r, Rejection)]
    return [(s.id, _f(s.logit), s.step, s.ts) for s in each_score(results)] + rejected


def same_state(a: Engine, b: Engine) -> None:
    x, y = a.state_dict(), b.state_dict()
    for key in ("scalars", "slots", "flags", "centred_list", "warmup_queue"):
        assert x["learner"][key].tobytes() == y["learner"][key].tobytes(), key
    assert names_in(x["learner"]) == names_in(y["learner"])
    assert x["counters"] == y["counters"] and _f(x["metrics"]["sum"]) == _f(y["metrics"]["sum"])


@settings(max_examples=150, deadline=None)
@given(st.lists(bodies, min_size=1, max_size=6))
def test_the_fast_path_learns_what_the_full_path_learns(stream: list[Any]) -> None:
    settings_ = LearnerSettings(scale_warmup=5)
    fast, full = Engine(Learner(settings_)), Engine(Learner(settings_))
    for body in stream:
        raw = msgpack.packb(body)
        blocks = numeric_training(raw)
        want = outcome(full, decode_body(unpack(raw)))
        if blocks is None:
            got = outcome(fast, decode_body(unpack(raw)))
        else:
            got = outcome(fast, blocks)
            assert not any(isinstance(w, tuple) and len(w) == 2 for w in want), (
                "the fast path took a body with a refusal"
            )
        assert got == want
    same_state(fast, full)


clean = st.fixed_dictionaries(
    {
        "x": st.dictionaries(
            st.sampled_from(NAMES), st.floats(min_value=-1e3, max_value=1e3).filter(in_range), min_size=1
        ),
        "y": st.sampled_from([0, 1, True, False]),
    },
    optional={"id": st.integers(-(2**63), 2**64 - 1) | st.text(max_size=300)},
)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.lists(clean, min_size=1, max_size=10), min_size=1, max_size=5))
def test_batches_of_clean_events_take_the_fast_path_and_learn_the_same(batches: list[list[Any]]) -> None:
    """Every one of these is numeric training events: the fast path takes each body, splits it into
    runs of the same names in the same order, and learns what the full path learns."""
    fast, full = Engine(Learner(LearnerSettings(scale_warmup=5))), Engine(Learner(LearnerSettings(scale_warmup=5)))
    for batch in batches:
        raw = msgpack.packb({"batch": batch})
        blocks = numeric_training(raw)
        assert blocks is not None
        assert sum(c.rows.shape[0] for c in blocks) == len(batch)
        assert outcome(fast, blocks) == outcome(full, decode_body(unpack(raw)))
    same_state(fast, full)


@settings(max_examples=150, deadline=None)
@given(st.lists(clean | events | bodies, min_size=1, max_size=24))
def test_messages_read_together_learn_what_the_full_path_learns(messages: list[Any]) -> None:
    """read_each over one-event messages (and others, which it leaves to the full path): the items
    in message order, each run once, learn exactly what the messages one by one through the full
    path learn."""
    from oddsmill.fastpath import read_each

    raws = [msgpack.packb(m) for m in messages]
    which, runs = read_each(list(raws))
    items: list[Any] = []
    placed: set[int] = set()
    for raw, run in zip(raws, which, strict=True):
        if run < 0:
            items.extend(decode_body(unpack(raw)))
        elif run not in placed:
            placed.add(run)
            items.append(runs[run])
    assert sum(runs[r].rows.shape[0] for r in placed) == sum(1 for r in which if r >= 0)
    fast, full = Engine(Learner(LearnerSettings(scale_warmup=5))), Engine(Learner(LearnerSettings(scale_warmup=5)))
    assert outcome(fast, items) == outcome(full, [it for raw in raws for it in decode_body(unpack(raw))])
    same_state(fast, full)


def test_runs_of_names_become_blocks_and_the_rest_is_declined() -> None:
    a = {"x": {"route_km": 1.5, "stops": 2.0}, "y": 1}
    b = {"x": {"stops": 4.0, "route_km": 0.5}, "y": 0}  # the same names in another order: a new run
    blocks = numeric_training(msgpack.packb({"batch": [a, a, b, a]}))
    assert blocks is not None
    assert [(c.cols, c.rows.shape[0]) for c in blocks] == [
        (("route_km", "stops"), 2),
        (("stops", "route_km"), 1),
        (("route_km", "stops"), 1),
    ]
    assert blocks[1].rows.tolist() == [[4.0, 0.5]] and blocks[0].y.tolist() == [1.0, 1.0]
    # a name twice in one map (msgpack allows it; a Python dict keeps the last): declined
    packer = msgpack.Packer()
    twice = packer.pack_map_header(2) + packer.pack("x") + packer.pack_map_pairs([("a", 1.0), ("a", 2.0)])
    twice += packer.pack("y") + packer.pack(1)
    assert numeric_training(twice) is None
    # names that are not UTF-8: declined (the full path refuses the body as undecodable)
    bad = packer.pack_map_header(2) + packer.pack("x") + b"\x81\xa2\xff\xfe" + packer.pack(1.0)
    bad += packer.pack("y") + packer.pack(1)
    assert numeric_training(bad) is None
    # an id that is a str but not UTF-8: declined (msgpack refuses it: undecodable)
    bad_id = packer.pack_map_header(3) + packer.pack("id") + b"\xa2\xff\xfe" + packer.pack("x")
    bad_id += packer.pack({"a": 1.0}) + packer.pack("y") + packer.pack(1)
    assert numeric_training(bad_id) is None
    with pytest.raises(ProtocolError) as refused:
        unpack(bad_id)
    assert refused.value.reason == "undecodable"
    # ids of every width, and events with and without one in a run
    with_ids = [dict(a, id=i) for i in (0, 127, -1, -32, -33, 255, 65536, -(2**63), 2**64 - 1, "", "P" * 300)]
    blocks = numeric_training(msgpack.packb({"batch": [*with_ids, a]}))
    assert blocks is not None and blocks[0].ids == (*[e["id"] for e in with_ids], None)
    # extra bytes after the body, a float32, an integer feature, a scoring request: declined
    good = msgpack.packb(a)
    assert numeric_training(good) is not None
    assert numeric_training(good + b"\x00") is None
    assert numeric_training(msgpack.packb(a, use_single_float=True)) is None
    assert numeric_training(msgpack.packb({"x": {"route_km": 2}, "y": 1})) is None
    assert numeric_training(msgpack.packb({"x": {"route_km": 2.0}})) is None
    assert numeric_training(msgpack.packb({"batch": []})) is None


def test_long_names_and_wide_maps_take_the_fast_path() -> None:
    """str8/str16 names and map16 headers are read; the engine learns them as the full path does."""
    names = [f"feature_{'n' * 40}_{j}" for j in range(40)]  # 40 entries: a map16; names over 31 bytes: str8
    names.append("z" * 300)  # a str16
    rng = np.random.default_rng(3)
    batch = [{"y": int(rng.random() < 0.4), "x": dict(zip(names, rng.normal(size=41).tolist(), strict=True))}]
    raw = msgpack.packb({"batch": batch * 3})
    blocks = numeric_training(raw)
    assert blocks is not None and blocks[0].cols == tuple(names) and blocks[0].rows.shape == (3, 41)
    fast, full = Engine(Learner()), Engine(Learner())
    assert outcome(fast, blocks) == outcome(full, decode_body(unpack(raw)))
    same_state(fast, full)


def test_the_daemon_answers_fast_path_traffic_as_the_full_path_would(tmp_path: Any) -> None:
    """Numeric training events, alone and in batches (the names in two orders, and one batch the
    fast path declines), through a live daemon: each message answered in its own shape, every
    score equal to an offline replay of the journal through the full path, and a restart (which
    replays the journal through the fast path) ends where that replay ends, bit for bit."""
    from oddsmill.server import Server

    from tests.conftest import Client, RunningServer, loopback
    from tests.test_server import replay_journal

    settings = loopback(tmp_path, checkpoint_events=10**9)
    learner = LearnerSettings(scale_warmup=50)
    running = RunningServer(settings, learner)
    client = Client(running.ctx, running.server.bound["ingest"], running.server.bound["scores"])
    rng = np.random.default_rng(11)
    sent: list[dict[str, Any]] = []
    for k in range(60):

        def event() -> dict[str, Any]:
            x = {"route_km": float(rng.gamma(3, 14)), "stops": float(rng.integers(0, 20))}
            if rng.random() < 0.5:
                x = {"stops": x["stops"], "route_km": x["route_km"]}
            return {"x": x, "y": int(rng.random() < 0.3)}

        if k % 3 == 0:
            sent.append(event())
        elif k == 31:
            sent.append({"batch": [event(), {**event(), "w": 2.0}]})  # a weight: the full path
        else:
            sent.append({"batch": [event() for _ in range(int(rng.integers(1, 30)))]})
    assert sum(numeric_training(msgpack.packb(b)) is not None for b in sent) == len(sent) - 1
    for k in range(400):  # a burst of one-event messages: the daemon reads them together
        body = event()
        if k % 37 == 5:
            body["w"] = 0.5  # declined: the full path
        sent.append(body)
    for body in sent:
        client.send(body)
    answers = [a for _, a in client.receive(len(sent))]
    client.close()
    running.close()
    for body, answer in zip(sent, answers, strict=True):
        if "batch" in body:
            assert len(answer["batch"]) == len(body["batch"])
        else:
            assert set(answer) == {"id", "p", "logit", "step", "ts"}
    live = [s["logit"] for a in answers for s in (a["batch"] if "batch" in a else [a])]
    steps = [s["step"] for a in answers for s in (a["batch"] if "batch" in a else [a])]
    engine, offline = replay_journal(tmp_path, learner)
    assert [s.logit for s in offline][-len(live) :] == live  # the probes come first
    assert [s.step for s in offline][-len(live) :] == steps
    restarted = Server(settings, learner)
    a, b = restarted.engine.learner.state_dict(), engine.learner.state_dict()
    assert a["slots"].tobytes() == b["slots"].tobytes() and a["scalars"].tobytes() == b["scalars"].tobytes()
    assert restarted.engine.metrics.sum == engine.metrics.sum
    assert restarted.engine.counters == engine.counters
    restarted.journal.close()


def _as_events(blocks: list[Any]) -> list[tuple[dict[str, float], float]]:
    out = []
    for c in blocks:
        for row, y in zip(c.rows.tolist(), c.y.tolist(), strict=True):
            out.append((dict(zip(c.cols, row, strict=True)), float(y)))
    return out


def test_cut_or_flipped_bytes_are_declined_or_read_as_msgpack_reads_them() -> None:
    """Every prefix of a valid batch, and 2,000 bodies with one byte changed: the compiled reader
    declines each, or reads exactly the events msgpack decodes from the same bytes (it reads no
    byte past a body, nor past one message of several)."""
    from oddsmill.fastpath import read_each

    body = msgpack.packb(
        {"batch": [{"x": {"route_km": 12.5, "stops": 3.0}, "y": 1}, {"y": False, "x": {"stops": 1.0, "é": -2.0}}]}
    )
    one = msgpack.packb({"x": {"route_km": 4.0}, "y": 0})
    rng = np.random.default_rng(5)
    cases = [body[:k] for k in range(len(body))]
    for _ in range(2000):
        changed = bytearray(body)
        changed[int(rng.integers(len(body)))] = int(rng.integers(256))
        cases.append(bytes(changed))
    read = 0
    for raw in cases:
        got = numeric_training(raw)
        if got is None:
            continue
        read += 1
        want = msgpack.unpackb(raw)
        events = want["batch"] if "batch" in want else [want]
        assert _as_events(got) == [(e["x"], float(e["y"])) for e in events]
    assert read > 0  # some flips (a value's bits, a name's letter) leave a readable body
    # cut messages laid end to end with whole ones: each is read alone or not at all
    for k in range(len(one)):
        which, blocks = read_each([one, one[:k], one, one])
        assert which[1] == -1 and all(w >= 0 for w in (which[0], which[2], which[3]))
        assert sum(b.rows.shape[0] for b in blocks) == 3
