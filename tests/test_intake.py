"""A wake-up in one compiled call (intake.py), on real sockets: it answers, journals and learns what
the loop's usual path does, hands back every other block as it came, lets the usual path drop
requests past their time-to-live first, and holds a block whose journal write fails."""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
import zmq
from oddsmill import intake, storage
from oddsmill.engine import Engine
from oddsmill.fastpath import NOT_SUCH, OTHER_NAMES, READ, STR_ID
from oddsmill.learner import Learner
from oddsmill.protocol import decode_body
from oddsmill.settings import LearnerSettings
from oddsmill.storage import list_journal, read_journal
from prometheus_client import generate_latest

from tests.conftest import Client, RunningServer, loopback
from tests.test_fastpath import same_state
from tests.test_server import replay_journal

NAMES = [f"route_km_{j}" for j in range(20)]
LEARNER = LearnerSettings(scale_warmup=50)

pytestmark = pytest.mark.skipif(not intake.AVAILABLE, reason="pyzmq's ZeroMQ library was not found")


def training(rng: np.random.Generator, ident: object = None) -> dict[str, Any]:
    body: dict[str, Any] = {"x": dict(zip(NAMES, (rng.normal(size=20) * 3).tolist(), strict=True))}
    body["y"] = int(rng.random() < 0.4)
    if ident is not None:
        body["id"] = ident
    return body


def stream(seed: int) -> list[tuple[list[bytes], str | None]]:
    """Messages, each with the topic of its answer (None: none), in three parts: lone training
    messages with ids and scoring requests with integer ids (some with their outcomes), every ninth
    followed by one the one call does not take; then a burst of 120 training messages sent
    together; then the lone ones again."""
    rng = np.random.default_rng(seed)
    others: list[tuple[list[bytes], str | None]] = [
        ([b"events", msgpack.packb({"id": "R1", "x": {"route_km_0": 1.0}})], "scores"),  # a request: held
        ([b"events", msgpack.packb({"id": "R1", "y": 1})], None),  # its outcome: joined
        ([b"events", msgpack.packb(training(rng)), b"extra"], "rejects"),  # three frames
        ([b"events"], "rejects"),  # one frame
        ([b"events", msgpack.packb({"x": {"route_km_0": 1.0, "depot": "Eastgate"}, "y": 1})], "scores"),
        ([b"events", msgpack.packb(training(rng, "P-7"))], "scores"),  # a str id
        (
            [
                b"events",
                msgpack.packb({"cols": NAMES, "rows": rng.normal(size=(3, 20)).tobytes(), "y": b"\x01\x00\x01"}),
            ],
            "scores",
        ),
        ([b"events", msgpack.packb({"x": {"route_km_0": "far"}, "y": 1})], "rejects"),
        ([b"events", b"\xc1"], "rejects"),  # not msgpack
    ]
    out: list[tuple[list[bytes], str | None]] = []
    for i in range(150):
        if i % 4 == 3:  # a scoring request with an integer id (held), every fifth then its outcome
            out.append(([b"events", msgpack.packb({"id": 900 + i, "x": training(rng)["x"]})], "scores"))
            if i % 5 == 0:
                out.append(([b"events", msgpack.packb({"id": 900 + i, "y": 1})], None))
        else:
            out.append(([b"events", msgpack.packb(training(rng, i))], "scores"))
        if i % 9 == 8:
            out.append(others[(i // 9) % len(others)])
    burst = [([b"events", msgpack.packb(training(rng, 1000 + i))], "scores") for i in range(120)]
    return out[:100] + [(frames, "burst") for frames, _ in burst] + out[100:]


def wake_ups(mp: pytest.MonkeyPatch) -> list[int]:
    """What each wake-up in one call (`Engine.take_in`) found, EMPTY included, appended as it
    returns, while `mp` holds."""
    found: list[int] = []
    take_in = Engine.take_in

    def counted(self: Engine, *a: Any) -> int:
        found.append(take_in(self, *a))
        return found[-1]

    mp.setattr(Engine, "take_in", counted)
    return found


def until_taken_in(client: Client, rng: np.random.Generator, found: list[int]) -> int:
    """Send training messages one at a time (each after the answer before) until a wake-up's one
    call has taken one (the names are known after a few, then `_quick` takes them, then the one
    call); how many were sent."""
    for i in range(40):
        client.send(training(rng, i))
        client.receive(1)
        if READ in found:
            return i + 1
    raise AssertionError(f"no wake-up was taken in one call: {found}")


def run(
    state: Path, taking: bool, messages: list[tuple[list[bytes], str | None]]
) -> tuple[Any, list[Any], list[int], int]:
    """Serve the messages (lone ones each after the answer before; the burst at once) with the
    one-call wake-ups on or off; the server, the answers, what each one-call wake-up found, and
    how many of the client's probes were answered before the messages."""
    found: list[int] = []
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(intake, "AVAILABLE", taking)
        take_in = Engine.take_in

        def counted(self: Engine, box: Any, *a: Any) -> int:
            status = take_in(self, box, *a)
            if status != intake.EMPTY:
                found.append(status if status != READ else 100 + box.count)  # (READ: 100 + messages)
            return status

        mp.setattr(Engine, "take_in", counted)
        running = RunningServer(loopback(state, block_max=5), LEARNER)
        client = Client(running.ctx, running.server.bound["ingest"], running.server.bound["scores"])
        answers: list[Any] = []
        burst: list[list[bytes]] = []
        for frames, topic in messages:
            if topic == "burst":
                burst.append(frames)
                continue
            if burst:
                for f in burst:
                    client.push.send_multipart(f)
                answers += client.receive(len(burst))
                burst = []
            client.push.send_multipart(frames)
            if topic is not None:
                answers += client.receive(1)
        client.close()
        running.close()
    return running.server, answers, found, client.probes_answered


def test_wake_ups_in_one_call_answer_journal_and_learn_as_the_usual_path_does(tmp_path: Path) -> None:
    messages = stream(3)
    on, on_answers, found, on_probes = run(tmp_path / "on", True, messages)
    off, off_answers, not_found, off_probes = run(tmp_path / "off", False, messages)
    assert not not_found
    # the one call took lone messages and blocks of up to block_max, and handed back the others
    reads = [f - 100 for f in found if f > 100]
    assert len(reads) >= 100 and max(reads) > 1 and max(reads) <= 5, found
    assert sum(f in (intake.HANDED, NOT_SUCH, OTHER_NAMES, STR_ID) for f in found) >= 10, found

    def without_ts(answers: list[Any]) -> list[Any]:
        return [(t, {k: v for k, v in a.items() if k != "ts"}) for t, a in answers]

    assert len(on_answers) > 250 and without_ts(on_answers) == without_ts(off_answers)
    # the score latency's histogram counts each message answered, on every path (it counted a
    # block once, however many messages it answered: 15,822 for the demo's 28,000 scores)
    answered = sum(t == b"scores" for t, _ in on_answers)
    for server, probes in ((on, on_probes), (off, off_probes)):
        server.board.score_latency.fold()
        exposed = generate_latest(server.board.registry).decode().splitlines()
        assert f"oddsmill_score_latency_seconds_count {float(answered + probes)}" in exposed
    details = [a["detail"] for t, a in on_answers if t == b"rejects"]
    assert "a message has 2 frames, got 3" in details and "a message has 2 frames, got 1" in details
    same_state(on.engine, off.engine)
    held = on.engine.state_dict()["pending"]  # (their arrival times are each run's own)
    assert len(held) > 20 and [e[:-1] for e in held] == [e[:-1] for e in off.engine.state_dict()["pending"]]
    # the journal holds every message the one call took: replayed, the same state, requests and scores
    replayed, scores = replay_journal(tmp_path / "on", LEARNER)
    same_state(replayed, on.engine)
    assert replayed.state_dict()["pending"] == held
    live = [a["logit"] for t, a in on_answers if t == b"scores" and type(a["logit"]) is float]  # (not columnar)
    assert [s.logit for s in scores][-len(live) :] == live


def test_a_request_past_its_time_to_live_is_dropped_before_the_block(tmp_path: Path) -> None:
    """The block that comes after a request's time-to-live goes to the usual path (EXPIRY_DUE),
    which drops the request first: its outcome is then refused, as an uninterrupted replay says."""
    rng = np.random.default_rng(5)
    with pytest.MonkeyPatch.context() as mp:
        found = wake_ups(mp)
        running = RunningServer(loopback(tmp_path, pending_ttl=0.5), LEARNER)
        client = Client(running.ctx, running.server.bound["ingest"], running.server.bound["scores"])
        client.send({"id": "R1", "x": {"route_km_0": 1.0}})
        client.receive(1)
        sent = until_taken_in(client, rng, found)
        assert running.server.engine.pending
        time.sleep(0.6)  # (the request's time-to-live passes)
        client.send(training(rng, sent))
        client.receive(1)
        client.send({"id": "R1", "y": 1})
        ((topic, answer),) = client.receive(1)
        client.close()
        running.close()
    assert intake.EXPIRY_DUE in found
    assert topic == b"rejects" and answer["reason"] == "unknown_outcome"
    engine = running.server.engine
    assert engine.counters.pending_expired == 1 and not engine.pending
    replayed = Engine(Learner(LEARNER), pending_ttl=0.5)  # the journal, replayed with the same time-to-live
    for segment in list_journal(tmp_path):
        for _, arrival, body in read_journal(segment):
            replayed.process([(arrival, item) for item in decode_body(body)])
    same_state(replayed, engine)


def test_a_failed_journal_write_in_one_call_holds_the_block_until_writes_succeed(tmp_path: Path) -> None:
    """The one call's write fails (a descriptor whose writes all fail, ENOSPC): nothing of the block
    is learned, its score is still published (the model as it stands), the daemon holds it; when
    writes succeed again it is journaled and learned, and the journal replays to the same state."""
    rng = np.random.default_rng(6)
    dev_full = os.open("/dev/full", os.O_WRONLY)
    real_fileno = storage.JournalWriter.fileno
    try:
        with pytest.MonkeyPatch.context() as mp:
            found = wake_ups(mp)
            running = RunningServer(loopback(tmp_path), LEARNER)
            server = running.server
            client = Client(running.ctx, server.bound["ingest"], server.bound["scores"])
            sent = until_taken_in(client, rng, found)
            step = server.engine.learner.step
            mp.setattr(storage.JournalWriter, "fileno", lambda self: dev_full)
            calls = len(found)
            while len(found) == calls:  # (a wait that began before has ended: the next has that descriptor)
                time.sleep(0.01)
            client.send(training(rng, sent))
            ((topic, answer),) = client.receive(1)
            assert topic == b"scores" and answer["id"] == sent and answer["step"] == step
            assert intake.WRITE_FAILED in found and server.outage is not None
            assert server.engine.learner.step == step and len(server.held) == 1
            mp.setattr(storage.JournalWriter, "fileno", real_fileno)
            deadline = time.monotonic() + 10
            while server.outage is not None and time.monotonic() < deadline:  # (retried every second)
                time.sleep(0.05)
            assert server.outage is None and server.engine.learner.step == step + 1
            client.send(training(rng, sent + 1))
            client.receive(1)
            client.close()
            running.close()
    finally:
        os.close(dev_full)
    replayed, _ = replay_journal(tmp_path, LEARNER)
    same_state(replayed, server.engine)


def test_the_intake_hands_back_frames_as_they_came() -> None:
    """`Intake.handed` after a block the one call does not take: every message's frames, bytes
    for bytes (frames past the second: empty), in order, at most `most` messages a block."""
    from oddsmill.quick import Known

    ctx: zmq.Context[Any] = zmq.Context()
    try:
        with ctx.socket(zmq.PULL) as pull, ctx.socket(zmq.PUSH) as push, ctx.socket(zmq.PUB) as pub:
            pull.bind("inproc://intake-test")
            push.connect("inproc://intake-test")
            rng = np.random.default_rng(9)
            sent = [[b"events", bytes(rng.integers(0, 256, int(n)).tolist())] for n in rng.integers(0, 3000, 7)]
            sent[2] = [b"only"]
            sent[4] = [b"events", b"body", b"third", b"fourth"]
            for frames in sent:
                push.send_multipart(frames)
            box = intake.Intake(pull, pub, 4, 1 << 20)
            known = Known()
            known.remember(None, b"\xa4warm", (0,))
            from oddsmill.learner import Learner
            from oddsmill.progressive import ProgressiveMetrics

            scratch, metrics = Learner(LEARNER), ProgressiveMetrics(window=2)
            got: list[list[bytes]] = []
            while len(got) < len(sent):
                status = box.serve(1000, known, -1, scratch.arrays(1), metrics.arrays(), metrics.scalars(), np.inf, 1.0)
                assert status not in (READ, intake.EMPTY) and 1 <= box.count <= 4
                got += box.handed()
            assert (
                box.serve(0, known, -1, scratch.arrays(1), metrics.arrays(), metrics.scalars(), np.inf, 1.0)
                == intake.EMPTY
            )
    finally:
        ctx.term()
    want = [f[:2] + [b""] * (len(f) - 2) for f in sent]
    assert got == want and scratch.step == 0


def test_sigterm_while_a_wake_up_waits_in_one_call_checkpoints_and_exits(tmp_path: Path) -> None:
    """A daemon whose loop waits in `_serve`'s zmq_poll (the GIL released) when SIGTERM comes:
    the poll returns (EINTR), the loop stops, checkpoints and exits 0 within seconds, and the
    checkpoint holds what the journal replays to. (Sixty lone training messages of known names
    first: the wake-ups are taken in one call after a few, as test_a_request_past_its_time_to_live
    shows in process.)"""
    from tests.test_server import checkpoint_and_replay, free_port, start, terminate

    ingest, scores = f"tcp://127.0.0.1:{free_port()}", f"tcp://127.0.0.1:{free_port()}"
    ctx: zmq.Context[Any] = zmq.Context()
    proc = start(tmp_path, ingest, scores)
    client = Client(ctx, ingest, scores)
    rng = np.random.default_rng(8)
    for i in range(60):
        client.send(training(rng, i))
        assert client.receive(1)[0][1]["id"] == i
    client.close()
    time.sleep(0.3)  # (idle: the loop is in its wait)
    terminate(proc)
    ctx.term()
    _, mine, replayed = checkpoint_and_replay(tmp_path)
    theirs = replayed.learner.state_dict()
    assert mine["scalars"].tobytes() == theirs["scalars"].tobytes() and replayed.learner.step == 60
    assert mine["slots"].tobytes() == theirs["slots"].tobytes()


def test_compiled_functions_are_cached_under_the_stamp_of_all_the_sources() -> None:
    """numba keys a cached function by its own file's text; `_serve` holds quick.py's code and was
    once loaded stale after quick.py changed. Every compiled function of the package is cached
    under the hash of all its sources (oddsmill.PACKAGE_STAMP), so a change to any compiles all."""
    import hashlib
    from pathlib import Path

    import oddsmill
    from oddsmill import columnar, kernel, quick

    sources = sorted(Path(oddsmill.__file__).parent.glob("*.py"))
    want = hashlib.sha256(b"".join(p.name.encode() + p.read_bytes() for p in sources)).hexdigest()
    assert oddsmill.PACKAGE_STAMP == want and len(sources) > 20
    for f in (intake._serve, quick._journal_and_learn, kernel.learn_block, columnar._pack_body):
        locator = f._cache._impl.locator  # (numba's: where and under what a function is cached)
        assert locator.get_source_stamp() == want, f


def test_pieces_cut_a_buffer_at_its_bounds_whole_or_piece_by_piece() -> None:
    """`quick.pieces` (the bodies a one call kept, its score bodies): the bytes between each bound
    and the next, as Python's slicing gives them, under JOIN_MOST bytes (one copy, then slices)
    and past it (each piece copied on its own)."""
    from oddsmill.quick import JOIN_MOST, pieces

    rng = np.random.default_rng(11)
    data = rng.integers(0, 256, 3 * JOIN_MOST, dtype=np.uint8)
    raw = data.tobytes()
    for total in (1000, JOIN_MOST // 2, 3 * JOIN_MOST):
        bounds = sorted({0, total, *rng.integers(0, total, 9).tolist()})
        assert pieces(data, bounds) == [raw[a:e] for a, e in zip(bounds[:-1], bounds[1:], strict=True)]
