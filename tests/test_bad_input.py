"""Thousands of malformed messages of every kind, interleaved with valid events, sent to a live
daemon: it stays up, counts each under its reason (PROTOCOL 4), publishes each on `rejects`, and ends
with a model bit-identical to an offline run on the valid events alone."""

from __future__ import annotations

import random
import time
import urllib.request
from collections import Counter
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
from oddsmill.encoding import NAME_MAX_BYTES
from oddsmill.engine import ColumnScores, Engine, Rejection, Score
from oddsmill.learner import Learner
from oddsmill.metrics import REASONS
from oddsmill.protocol import MAX_MESSAGE, MAX_STR, decode_body
from oddsmill.settings import LearnerSettings

from tests.conftest import PROBE, Client, RunningServer, loopback, sparse_stream
from tests.tools import names_in


def malformed(reason: str, rnd: random.Random, k: int) -> list[bytes]:
    """The frames of one message that must be rejected for `reason`."""
    x = {"route_km": 10.0 + k, "depot": "Harbourside"}

    def one(body: Any) -> list[bytes]:
        return [b"events", msgpack.packb(body)]

    if reason == "undecodable":
        return rnd.choice(
            [
                [b"events", b"\xc1" + rnd.randbytes(rnd.randint(0, 40))],  # 0xc1 is never valid msgpack
                [b"events", msgpack.packb({"x": x, "y": 1})[:-3]],  # cut short
                [b"events", msgpack.packb({"x": x}), b"a third frame"],
            ]
        )
    if reason == "not_a_map":
        return one(rnd.choice([[1, 2, 3], 42, "an event", None, {"x": x, "y": 1, "colour": "red"}]))
    if reason == "bad_features":
        return one(
            rnd.choice(
                [
                    {"x": [1.0, 2.0], "y": 1},
                    {"x": {"route_km": [1, 2]}, "y": 0},
                    {"x": "far"},
                    {"x": dict(x, route_km=rnd.choice([1e40, -2.2e-309, 1e-31])), "y": 1},  # out of range
                ]
            )
        )
    if reason == "bad_label":
        return one({"x": x, "y": rnd.choice([2, -1, "yes", 0.5, [1]])})
    if reason == "bad_weight":
        return one({"x": x, "y": 1, "w": rnd.choice([-1.0, "heavy", [2], 1e7])})
    if reason == "non_finite":
        return one({"x": dict(x, route_km=rnd.choice([float("nan"), float("inf"), -float("inf")])), "y": 1})
    if reason == "unknown_outcome":
        return one({"id": f"never-scored-{k}", "y": 1})
    if reason == "too_large":
        if k < 2:  # a body beyond the message limit, refused before decoding
            return [b"events", msgpack.packb({"x": {"note": "z" * 10}, "pad": b"\0" * (MAX_MESSAGE + 10)})]
        if k % 2:  # a new feature name beyond its limit (a free text sent as a category)
            return one({"x": dict(x, note=f"left at door {k} " + "z" * NAME_MAX_BYTES), "y": 1})
        return one({"x": {"note": "z" * (MAX_STR + 1)}, "y": 1})  # a string beyond its limit
    if reason == "duplicate":
        return one(
            {"x": x, "y": 1, "src": "depot-7", "seq": rnd.randint(1, 99)}
        )  # seen already (0 would mean a restart)
    raise AssertionError(reason)


def test_malformed_messages_are_counted_and_change_nothing(tmp_path: Path) -> None:
    rnd = random.Random(11)
    settings = loopback(tmp_path, http="127.0.0.1:0")
    learner = LearnerSettings(scale_warmup=100)
    running = RunningServer(settings, learner)
    server = running.server
    client = Client(running.ctx, server.bound["ingest"], server.bound["scores"])
    probes = server.engine.learner.step, len(server.engine.learner.vocab)  # the handshake's probes

    valid: list[dict[str, Any]] = []
    for i, (x, y) in enumerate(sparse_stream(3000, seed=12)):
        valid.append({"x": x, "y": y, "src": "depot-7", "seq": 100 + i})  # numbered: repeats are duplicates
    per_reason = 330
    plan: list[tuple[str | None, list[bytes]]] = [(None, [b"events", msgpack.packb(b)]) for b in valid]
    for reason in REASONS:
        for k in range(per_reason):
            plan.insert(rnd.randint(60, len(plan)), (reason, malformed(reason, rnd, k)))
    answers = []
    for lo in range(0, len(plan), 200):  # in steps, reading the answers: PUB drops what a slow reader misses
        for _, frames in plan[lo : lo + 200]:
            client.push.send_multipart(frames)
        answers.extend(client.receive(len(plan[lo : lo + 200])))

    rejects = [a for topic, a in answers if topic == b"rejects"]
    assert Counter(r["reason"] for r in rejects) == {reason: per_reason for reason in REASONS}
    assert all(isinstance(r["detail"], str) and len(r["detail"]) > 10 for r in rejects)
    assert sum(1 for topic, _ in answers if topic == b"scores") == len(valid)
    # the metrics count each under its reason (a scrape's figures are taken after it asked)
    wanted = [f'oddsmill_events_rejected_total{{reason="{reason}"}} {per_reason}.0' for reason in REASONS]
    deadline = time.monotonic() + 10
    while True:
        with urllib.request.urlopen(f"http://{server.bound['http']}/metrics", timeout=5) as r:
            exposition = r.read().decode()
        if all(w in exposition for w in wanted) or time.monotonic() > deadline:
            break
        time.sleep(0.05)
    assert [w for w in wanted if w not in exposition] == []
    assert running.thread.is_alive()
    client.close()
    running.close()

    # the model equals an offline run on the probes and the valid events alone, bit for bit
    offline = Engine(Learner(learner))
    offline.process([(0.0, item) for item in decode_body(PROBE)] * probes[1])
    for body in valid:
        offline.process([(0.0, item) for item in decode_body(body)])
    mine, theirs = server.engine.learner.state_dict(), offline.learner.state_dict()
    assert names_in(mine) == names_in(theirs)
    assert mine["scalars"].tobytes() == theirs["scalars"].tobytes()
    assert mine["slots"].tobytes() == theirs["slots"].tobytes()
    assert server.engine.metrics.sum == offline.metrics.sum


def test_a_new_feature_name_past_its_limit_is_refused_and_adds_no_name() -> None:
    """A string feature made a name of its own a value, however long: a free text sent as a
    category (a delivery note, a document) kept every value for the model's life. A new name of
    more than NAME_MAX_BYTES of UTF-8 now refuses its event (too_large), with no name of it added;
    one at the limit is taken, and so is a long name the vocabulary has already (a state from before
    the limit), on every path: single events and columnar blocks."""
    engine = Engine(Learner(LearnerSettings()))

    def send(body: dict[str, Any]) -> list[Any]:
        return [r for _, r in engine.process([(0.0, item) for item in decode_body(body)])]

    at_limit = "é" * ((NAME_MAX_BYTES - len("note=")) // 2)  # two bytes a character
    over = at_limit + "é"
    assert len(f"note={at_limit}".encode()) <= NAME_MAX_BYTES < len(f"note={over}".encode())
    (refused,) = send({"id": "P1", "x": {"route_km": 3.0, "note": over}, "y": 1})
    assert isinstance(refused, Rejection) and refused.reason == "too_large" and refused.id == "P1"
    assert f"is {len(f'note={over}'.encode()):,} bytes of UTF-8; a new name may have at most {NAME_MAX_BYTES:,}" in (
        refused.detail
    )
    assert len(engine.learner.vocab) == 0 and engine.learner.step == 0  # not route_km either
    (taken,) = send({"x": {"route_km": 3.0, "note": at_limit}, "y": 1})
    assert isinstance(taken, Score) and engine.learner.vocab.names == ["route_km", f"note={at_limit}"]

    # a columnar block whose new column name is too long: each row refused, as sent one by one
    long_col = "depot_" + "x" * NAME_MAX_BYTES
    rows = np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]])
    block = {"cols": ["route_km", long_col], "rows": rows.tobytes(), "y": [0, 1, 1]}
    answers = send(block)
    assert [(type(r), r.reason) for r in answers] == [(Rejection, "too_large")] * 3
    assert engine.learner.step == 1 and len(engine.learner.vocab) == 2

    # known already (a state from before the limit): taken, by both paths
    engine.learner.vocab.slots([long_col, f"note={over}"], grow=True)
    assert isinstance(send({"x": {"route_km": 1.0, "note": over}, "y": 0})[0], Score)
    (learned,) = send(block)
    assert isinstance(learned, ColumnScores) and engine.learner.step == 5
