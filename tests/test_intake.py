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
from oddsmill.engine import ColumnScores, Engine, Score
from oddsmill.fastpath import NOT_SUCH, OTHER_NAMES, READ, STR_ID
from oddsmill.learner import Learner
from oddsmill.protocol import decode_body
from oddsmill.settings import LearnerSettings
from oddsmill.storage import list_journal, read_journal

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
    """What each wake-up in one call (`Engine.take_in`, `Engine.take_in_cols`) found, EMPTY
    included, appended as it returns, while `mp` holds."""
    found: list[int] = []

    def counting(take_in: Any) -> Any:
        def counted(self: Engine, *a: Any) -> int:
            found.append(take_in(self, *a))
            return found[-1]

        return counted

    mp.setattr(Engine, "take_in", counting(Engine.take_in))
    mp.setattr(Engine, "take_in_cols", counting(Engine.take_in_cols))
    return found


def until_taken_in(client: Client, rng: np.random.Generator, found: list[int], cols: bool = False) -> int:
    """Send training messages one at a time (each after the answer before) until a wake-up's one
    call has taken one (the names are known after a few, then `_quick` takes them, then the one
    call; columnar ones with `cols`); how many were sent."""
    for i in range(40):
        if cols:
            client.push.send_multipart(columnar(rng, 3))
        else:
            client.send(training(rng, i))
        client.receive(1)
        if READ in found:
            return i + 1
    raise AssertionError(f"no wake-up was taken in one call: {found}")


def run(state: Path, taking: bool, messages: list[tuple[list[bytes], str | None]]) -> tuple[Any, list[Any], list[int]]:
    """Serve the messages (lone ones each after the answer before; the burst at once) with the
    one-call wake-ups on or off; the server, the answers, and what each one-call wake-up found."""
    found: list[int] = []
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(intake, "AVAILABLE", taking)
        take_in, take_in_cols = Engine.take_in, Engine.take_in_cols

        def counted(self: Engine, box: Any, *a: Any) -> int:
            status = take_in(self, box, *a)
            if status != intake.EMPTY:
                found.append(status if status != READ else 100 + box.count)  # (READ: 100 + messages)
            return status

        def counted_cols(self: Engine, box: Any, *a: Any) -> int:
            status = take_in_cols(self, box, *a)
            if status != intake.EMPTY:
                found.append(status if status != READ else 1000 + box.count)  # (READ: 1000 + messages)
            return status

        mp.setattr(Engine, "take_in", counted)
        mp.setattr(Engine, "take_in_cols", counted_cols)
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
    return running.server, answers, found


def test_wake_ups_in_one_call_answer_journal_and_learn_as_the_usual_path_does(tmp_path: Path) -> None:
    messages = stream(3)
    on, on_answers, found = run(tmp_path / "on", True, messages)
    off, off_answers, not_found = run(tmp_path / "off", False, messages)
    assert not not_found
    # the one call took lone messages and blocks of up to block_max, and handed back the others
    reads = [f - 100 for f in found if 100 < f < 1000]
    assert len(reads) >= 100 and max(reads) > 1 and max(reads) <= 5, found
    assert sum(f in (intake.HANDED, NOT_SUCH, OTHER_NAMES, STR_ID) for f in found) >= 10, found

    def without_ts(answers: list[Any]) -> list[Any]:
        return [(t, {k: v for k, v in a.items() if k != "ts"}) for t, a in answers]

    assert len(on_answers) > 250 and without_ts(on_answers) == without_ts(off_answers)
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


def columnar(rng: np.random.Generator, m: int, names: list[str] = NAMES, **extra: Any) -> list[bytes]:
    """A plain columnar message of m labelled rows."""
    body = {
        "cols": names,
        "rows": (rng.normal(size=(m, len(names))) * 3).tobytes(),
        "y": bytes(rng.integers(0, 2, m).tolist()),
    }
    return [b"events", msgpack.packb({**body, **extra})]


def cols_stream(seed: int) -> list[tuple[list[bytes], str | None]]:
    """Columnar messages of 1 to 40 rows, in three parts: sent each after the answer before, every
    seventh followed by one the one call does not take (numbered, other names, a bad value, a
    row without a label, one event, an extra frame, ids); then a burst of 60 sent together
    (blocks of up to block_max); then one at a time again."""
    rng = np.random.default_rng(seed)
    others: list[tuple[list[bytes], str | None]] = [
        (columnar(rng, 5, src="depot-3", seq=1), "scores"),  # numbered
        (columnar(rng, 4, NAMES[:7]), "scores"),  # other names
        (columnar(rng, 3, NAMES + ["parcel_kg"]), "scores"),  # a new name
        (
            [b"events", msgpack.packb({"cols": NAMES, "rows": np.full((2, 20), np.nan).tobytes(), "y": b"\x01\x00"})],
            "rejects",
        ),
        ([b"events", msgpack.packb({"cols": NAMES, "rows": np.ones((2, 20)).tobytes(), "y": b"\x01\xff"})], "scores"),
        ([b"events", msgpack.packb(training(rng, "lone"))], "scores"),
        (columnar(rng, 3) + [b"extra"], "rejects"),
        (columnar(rng, 3, ids=[1, 2, 3]), "scores"),
        (columnar(rng, 6, src="depot-3", seq=2), "scores"),
    ]
    out: list[tuple[list[bytes], str | None]] = []
    for i in range(90):
        out.append((columnar(rng, int(rng.integers(1, 41))), "scores"))
        if i % 7 == 6:
            out.append(others[(i // 7) % len(others)])
    burst = [(columnar(rng, int(rng.integers(1, 41))), "burst") for _ in range(60)]
    return out[:60] + burst + out[60:]


def test_columnar_wake_ups_in_one_call_answer_journal_and_learn_as_the_usual_path_does(tmp_path: Path) -> None:
    """Plain columnar blocks of the names of the block before are taken in one compiled call
    (`_serve_cols`): the same answers, state and journal as the usual path, which takes every
    other block (handed back as it came)."""
    messages = cols_stream(4)
    on, on_answers, found = run(tmp_path / "on", True, messages)
    off, off_answers, not_found = run(tmp_path / "off", False, messages)
    assert not not_found
    reads = [f - 1000 for f in found if f > 1000]
    assert len(reads) >= 60 and max(reads) > 1 and max(reads) <= 5, found
    assert found.count(intake.HANDED) >= 10, found

    def without_ts(answers: list[Any]) -> list[Any]:
        return [(t, {k: v for k, v in a.items() if k != "ts"}) for t, a in answers]

    assert len(on_answers) > 150 and without_ts(on_answers) == without_ts(off_answers)
    assert sum(t == b"rejects" for t, _ in on_answers) >= 2
    same_state(on.engine, off.engine)
    assert on.engine.counters.train > 2000
    replayed = Engine(Learner(LEARNER))  # the journal replayed: the same state, and the same logits
    logits: list[float] = []
    for segment in list_journal(tmp_path / "on"):
        for _, arrival, body in read_journal(segment):
            for _, r in replayed.process([(arrival, item) for item in decode_body(body)]):
                logits += (
                    r.logits.tolist() if isinstance(r, ColumnScores) else [r.logit] if isinstance(r, Score) else []
                )
    same_state(replayed, on.engine)
    live: list[float] = []
    for t, a in on_answers:
        if t == b"scores":
            live += [a["logit"]] if type(a["logit"]) is float else np.frombuffer(a["logit"], "<f8").tolist()
    assert len(live) > 2000 and logits[-len(live) :] == live  # (the client's probe came first)


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


@pytest.mark.parametrize("cols", [False, True], ids=["events", "columnar"])
def test_a_failed_journal_write_in_one_call_holds_the_block_until_writes_succeed(tmp_path: Path, cols: bool) -> None:
    """The one call's write fails (a descriptor whose writes all fail, ENOSPC): nothing of the block
    is learned, its score is still published (the model as it stands), the daemon holds it; when
    writes succeed again the records not yet synced are written again from the bodies kept
    (`Intake.bodies`), the held block is journaled and learned, and the journal replays to the
    same state."""
    rng = np.random.default_rng(6)
    dev_full = os.open("/dev/full", os.O_WRONLY)
    real_fileno = storage.JournalWriter.fileno
    try:
        with pytest.MonkeyPatch.context() as mp:
            found = wake_ups(mp)
            running = RunningServer(loopback(tmp_path), LEARNER)
            server = running.server
            client = Client(running.ctx, server.bound["ingest"], server.bound["scores"])
            sent = until_taken_in(client, rng, found, cols)
            step = server.engine.learner.step
            assert server.unsaved  # (bodies kept by the one call, to be written again)
            mp.setattr(storage.JournalWriter, "fileno", lambda self: dev_full)
            calls = len(found)
            while len(found) == calls:  # (a wait that began before has ended: the next has that descriptor)
                time.sleep(0.01)
            if cols:
                client.push.send_multipart(columnar(rng, 4))
            else:
                client.send(training(rng, sent))
            ((topic, answer),) = client.receive(1)
            assert topic == b"scores" and answer["step"] == step and (cols or answer["id"] == sent)
            assert intake.WRITE_FAILED in found and server.outage is not None
            assert server.engine.learner.step == step and len(server.held) == 1
            mp.setattr(storage.JournalWriter, "fileno", real_fileno)
            deadline = time.monotonic() + 10
            while server.outage is not None and time.monotonic() < deadline:  # (retried every second)
                time.sleep(0.05)
            assert server.outage is None and server.engine.learner.step == step + (4 if cols else 1)
            if cols:
                client.push.send_multipart(columnar(rng, 2))
            else:
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
