"""The client library against a live daemon: no first-message loss, numbering, batches, columns."""

from __future__ import annotations

import re
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
import zmq
from oddsmill.server import Server, ServerSettings
from oddsmill.settings import LearnerSettings
from oddsmill_client import Producer, ScoreSubscriber
from oddsmill_client.subscriber import decode_columns

from tests.conftest import RunningServer, sparse_stream


@pytest.fixture
def daemon(tmp_path: Path) -> Iterator[tuple[Server, zmq.Context[Any]]]:
    settings = ServerSettings(state_dir=tmp_path, ingest="tcp://127.0.0.1:*", scores="tcp://127.0.0.1:*", http="off")
    running = RunningServer(settings, LearnerSettings())
    server, ctx = running.server, running.ctx
    yield server, ctx
    running.close()


def ready_subscriber(server: Server, ctx: zmq.Context[Any]) -> ScoreSubscriber:
    """A subscriber whose subscription has reached the daemon."""
    sub = ScoreSubscriber(server.bound["scores"], context=ctx)
    with Producer(server.bound["ingest"], context=ctx) as probe:
        sub.await_daemon(probe)
    return sub


def test_a_pub_producer_loses_none_of_its_first_messages(daemon) -> None:  # type: ignore[no-untyped-def]
    server, ctx = daemon
    sub = ready_subscriber(server, ctx)
    events = sparse_stream(300, seed=4)
    # the producer is new: without waiting for the daemon's subscription its first sends would drop
    with Producer(server.bound["ingest"], src="depot-7", context=ctx) as out:
        for i, (x, y) in enumerate(events):
            out.send({"id": i, "x": x, "y": y})
    got = [sub.receive(timeout=10)[1]["id"] for _ in events]
    assert got == list(range(300))
    assert server.engine.counters.lost == 0
    sub.close()


def test_numbering_drops_repeats_and_counts_gaps(daemon) -> None:  # type: ignore[no-untyped-def]
    server, ctx = daemon
    sub = ready_subscriber(server, ctx)
    with Producer(server.bound["ingest"], context=ctx) as out:
        for seq in (0, 1, 1, 4):  # a repeat of 1, then 2 and 3 never arrive
            out._send(msgpack.packb({"x": {"a": 1.0}, "y": 1, "src": "scanner-2", "seq": seq}))
    answers = [sub.receive(timeout=10) for _ in range(4)]
    rejects = [b for t, b in answers if t == "rejects"]
    assert [r["reason"] for r in rejects] == ["duplicate"]
    assert server.engine.counters.lost == 2
    sub.close()


def test_batches_and_columnar_blocks(daemon) -> None:  # type: ignore[no-untyped-def]
    server, ctx = daemon
    sub = ready_subscriber(server, ctx)
    with Producer(server.bound["ingest"], batch=10, context=ctx) as out:
        for i in range(25):
            out.send({"id": f"b{i}", "x": {"route_km": float(i)}})
    sizes = [len(sub.receive(timeout=10)[1]["batch"]) for _ in range(3)]
    assert sizes == [10, 10, 5]
    rows = np.arange(12.0).reshape(4, 3)
    with Producer(server.bound["ingest"], context=ctx) as out:
        out.send_columns(["route_km", "stops", "weight_kg"], rows, y=[1, None, 0, 1], ids=[1, 2, 3, 4])
    topic, body = sub.receive(timeout=10)
    block = decode_columns(body)
    assert topic == "scores" and block["id"] == [1, 2, 3, 4] and len(block["p"]) == 4
    assert all(0.0 < p < 1.0 for p in block["p"])
    sub.close()


def test_numpy_values_go_and_an_event_that_cannot_go_leaves_no_trace(daemon) -> None:  # type: ignore[no-untyped-def]
    """numpy's integers and booleans (what a pandas row holds) raised msgpack's "can not serialize
    'numpy.int64' object" from `send`, and `send_columns` with numpy ids did the same. Worse, in a
    batch the event that could not be packed stayed waiting: every later flush, and the close,
    raised again, so one bad value stopped the producer for good; and a numbering producer had
    given it a number the daemon never saw, a gap it would count as lost. Now numpy's values go as
    the numbers they hold, and an event that cannot go raises TypeError at its own `send`, naming
    the value, with nothing held and no number taken."""
    from decimal import Decimal

    server, ctx = daemon
    sub = ready_subscriber(server, ctx)
    try:
        with Producer(server.bound["ingest"], src="depot-3", batch=3, context=ctx) as out:
            x = {"route_km": np.float32(2.5), "stops": np.int64(3), "express": np.bool_(True)}
            out.send({"id": np.int64(1), "x": x, "y": np.int64(1)})
            with pytest.raises(TypeError, match=r"a value of type Decimal \(Decimal\('2.5'\)\) is not a number"):
                out.send({"id": 2, "x": {"route_km": Decimal("2.5")}, "y": 1})
            out.send({"id": 3, "x": {"route_km": 1.0}, "y": 0})
            out.send({"id": 4, "x": {"route_km": 4.0}, "y": 1})  # the third of the batch: it goes
            out.send_columns(["route_km"], np.array([[1.0], [2.0]]), y=np.array([1, 0]), ids=np.array([7, 8]))
        topic, batch = sub.receive(timeout=10)
        assert topic == "scores" and [s["id"] for s in batch["batch"]] == [1, 3, 4]
        topic, block = sub.receive(timeout=10)
        assert topic == "scores" and decode_columns(block)["id"] == [7, 8]
    finally:
        sub.close()
    assert server.engine.learner.step == 5 and server.engine.counters.lost == 0
    assert {"route_km", "stops", "express"} <= set(server.engine.learner.vocab.names)


def test_a_batch_goes_as_the_one_map_the_protocol_names(daemon) -> None:  # type: ignore[no-untyped-def]
    """Each event of a batch is packed when it is sent (by one packer), and the batch assembled
    from them when it goes: the bytes are those msgpack packs for {"batch": [...]} whole
    (PROTOCOL 2), an event that could not go between them or not."""
    server, ctx = daemon
    pull = ctx.socket(zmq.PULL)
    address = f"tcp://127.0.0.1:{pull.bind_to_random_port('tcp://127.0.0.1')}"
    events = [{"id": k, "x": {"route_km": float(k), "depot": "Harbourside"}, "y": k % 2} for k in range(20)]
    with Producer(address, kind="push", src="van-9", batch=16, context=ctx) as out:
        for k, event in enumerate(events):
            out.send(event)
            if k == 5:  # an event that cannot go, failing inside a list: the packer keeps nothing of it
                with pytest.raises(TypeError, match="type object"):
                    out.send({"x": {"route_km": 1.0}, "y": 1, "id": [1, 2, object()]})
    numbered = [{**e, "src": "van-9", "seq": k} for k, e in enumerate(events)]
    got = [pull.recv_multipart() for _ in range(2)]
    assert got == [
        [b"events", msgpack.packb({"batch": numbered[:16]}, use_bin_type=True)],
        [b"events", msgpack.packb({"batch": numbered[16:]}, use_bin_type=True)],
    ]
    pull.close(0)


def test_send_command_streams_a_log(daemon, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    import json
    import time

    from oddsmill.cli import main

    server, ctx = daemon
    log = tmp_path / "dispatches.jsonl"
    events = sparse_stream(400, seed=6)
    with open(log, "w") as f:
        for x, y in events:
            f.write(json.dumps({"x": x, "y": y}) + "\n")
    assert main(["send", str(log), "--to", server.bound["ingest"], "--src", "backfill", "--batch", "50"]) == 0
    deadline = time.monotonic() + 10
    while server.engine.learner.step < len(events) and time.monotonic() < deadline:
        time.sleep(0.05)  # waiting on another thread's progress, with a hard deadline
    assert server.engine.learner.step == len(events)
    assert server.engine.counters.lost == 0


def test_send_reads_a_file_whole_before_it_sends_any_of_it(daemon, tmp_path: Path, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """`send` of a file with a bad line sent the lines before it, then stopped (exit 2): sent again
    once mended, those were learned twice (one of two lines learned, by hand). A file is now read
    whole first, and a line that is not JSON, or that the daemon would refuse (a label of 2: sent, it
    was refused there and the lines around it learned), stops it with nothing sent. stdin is sent
    as it comes, so there the lines before are sent, and the error says how many."""
    import io
    import json
    import time

    from oddsmill.cli import main

    server, ctx = daemon
    good = [json.dumps({"x": x, "y": y}) for x, y in sparse_stream(30, seed=8)]

    def learned(n: int) -> None:
        deadline = time.monotonic() + 10
        while server.engine.learner.step < n and time.monotonic() < deadline:
            time.sleep(0.05)  # waiting on another thread's progress, with a hard deadline
        time.sleep(0.3)  # (room for any more to arrive)
        assert server.engine.learner.step == n

    for bad, says in (
        ('{"x": ', "not JSON (Expecting value at column 7)"),
        ("[1, 2]", "not_a_map: a body must be a map, got list"),
        ('{"x": {"route_km": 3.5}, "y": 2}', "bad_label: y must be 0, 1, true or false, got 2"),
        ('{"x": {"route_km": NaN}, "y": 1}', "non_finite: feature 'route_km' is nan"),
    ):
        log = tmp_path / "dispatches.jsonl"
        log.write_text("\n".join([*good, bad, *good]) + "\n")
        assert main(["send", str(log), "--to", server.bound["ingest"]]) == 2
        assert capsys.readouterr().err.strip() == f"oddsmill: {log}:31: {says}"
    log.write_text("\n".join(good[:5]) + "\n")
    assert main(["send", str(log), "--to", server.bound["ingest"]]) == 0
    assert capsys.readouterr().err.startswith("sent 5 events")
    learned(5)  # the mended file's five, and none of the refused files'
    monkeypatch.setattr("sys.stdin", io.StringIO("\n".join([*good[:3], "{", *good]) + "\n"))
    assert main(["send", "-", "--to", server.bound["ingest"]]) == 2
    assert capsys.readouterr().err.strip() == (
        "oddsmill: stdin:4: not JSON (Expecting property name enclosed in double quotes at column 2); "
        "the 3 messages before it were sent"
    )
    learned(8)
    monkeypatch.setattr("sys.stdin", io.StringIO("\n".join([*good[:2], '{"x": {"a": 1}, "y": 2}', *good]) + "\n"))
    assert main(["send", "-", "--to", server.bound["ingest"]]) == 2
    assert capsys.readouterr().err.strip() == (
        "oddsmill: stdin:3: bad_label: y must be 0, 1, true or false, got 2; the 2 messages before it were sent"
    )
    learned(10)


def test_listen_command_prints_scores_as_json(daemon, capsys) -> None:  # type: ignore[no-untyped-def]
    import json

    from oddsmill.cli import main

    server, ctx = daemon
    result: list[int] = []
    listener = threading.Thread(
        target=lambda: result.append(
            main(["listen", "--from", server.bound["scores"], "--json", "--count", "3", "--timeout", "20"])
        )
    )
    listener.start()
    with Producer(server.bound["ingest"], context=ctx) as out:
        while listener.is_alive():  # until the listener's subscription has caught three answers
            out.send({"id": "probe", "x": {"route_km": 3.0}})
            listener.join(0.05)
    assert result == [0]
    lines = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert len(lines) == 3
    assert all(d["topic"] == "scores" and d["id"] == "probe" and 0.0 < d["p"] < 1.0 for d in lines)


def test_a_bad_address_is_a_value_error_naming_it() -> None:
    """pyzmq's own error says only "Invalid argument"; the client names the address, and leaves no
    socket open (the context terminates at once)."""
    ctx: zmq.Context[Any] = zmq.Context()
    with pytest.raises(ValueError, match="cannot connect to 'route-7'"):
        Producer("route-7", context=ctx)
    with pytest.raises(ValueError, match="cannot connect to 'depot:7572'"):
        ScoreSubscriber("depot:7572", context=ctx)
    ctx.term()


@pytest.mark.parametrize(
    ("y", "ids", "says"),
    [
        ([1, 0], None, "y must have one label a row (3), got 2"),
        ([1, 0, 7], None, "a label must be 0, 1 or None, got 7"),
        ([1, None, -1], None, "a label must be 0, 1 or None, got -1"),
        (None, ["p-1"], "ids must have one id a row (3), got 1"),
    ],
)
def test_a_columnar_block_of_the_wrong_shape_is_refused_before_sending(y: Any, ids: Any, says: str) -> None:
    """The daemon would refuse these (rejects topic, asynchronously); the client says so at once and
    sends nothing."""
    ctx: zmq.Context[Any] = zmq.Context()
    pull = ctx.socket(zmq.PULL)
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    with Producer(f"tcp://127.0.0.1:{port}", kind="push", context=ctx) as out:
        with pytest.raises(ValueError, match=re.escape(says)):
            out.send_columns(["route_km", "stops"], np.zeros((3, 2)), y=y, ids=ids)
        assert out.sent == 0
        out.send_columns(["route_km", "stops"], np.zeros((3, 2)), y=[1, None, 0], ids=["a", "b", "c"])
        assert out.sent == 1
    assert pull.poll(5000)
    assert msgpack.unpackb(pull.recv_multipart()[1])["y"] == bytes([1, 255, 0])
    assert not pull.poll(200)  # the refused ones never left
    pull.close(0)
    ctx.term()


def test_an_event_that_is_not_a_mapping_and_a_timeout_below_zero() -> None:
    """send([...]) said "cannot convert dictionary update sequence element #0"; receive(timeout=-1)
    waited for ever (ZeroMQ's poll takes a negative timeout as no limit)."""
    ctx: zmq.Context[Any] = zmq.Context()
    daemon, address = a_pull(ctx)
    with Producer(address, kind="push", context=ctx) as out:
        with pytest.raises(TypeError, match="an event is a mapping .PROTOCOL 2., got list"):
            out.send([("x", {"stops": 1.0})])  # type: ignore[arg-type]
        assert out.sent == 0
    daemon.close()
    sub = ScoreSubscriber("tcp://127.0.0.1:9", context=ctx)
    for timeout in (-1.0, 0.0):
        with pytest.raises(TimeoutError):
            sub.receive(timeout=timeout)
    sub.close()
    ctx.term()


def a_pull(ctx: zmq.Context[Any]) -> tuple[zmq.Socket[Any], str]:
    """A PULL bound on loopback that takes nothing unless asked: a daemon with `--ingest-kind
    pull` that has fallen behind."""
    sock = ctx.socket(zmq.PULL)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVHWM, 10)
    sock.bind("tcp://127.0.0.1:*")
    return sock, sock.getsockopt(zmq.LAST_ENDPOINT).decode()


def test_a_push_producer_with_a_send_timeout_says_when_no_daemon_takes_its_messages() -> None:
    """A PUSH to a daemon that takes nothing queues up to its high-water marks, then waits for
    ever; with `send_timeout` that wait ends in TimeoutError, the batch still waiting, and leaving
    the block does not wait again. (With nothing listening at all, the producer is refused when
    made: test_curve.)"""
    import time

    ctx: zmq.Context[Any] = zmq.Context()
    daemon, address = a_pull(ctx)
    out = Producer(address, kind="push", batch=10, send_timeout=0.2, context=ctx)
    t0 = time.monotonic()
    with pytest.raises(TimeoutError, match="the daemon took no message within 0.2 s"):
        with out:
            for i in range(100_000):  # (100 MB: more than loopback's TCP buffers take)
                out.send({"id": i, "x": {"stops": 1.0, "route": "R" * 1000}})
    assert time.monotonic() - t0 < 10
    assert 0 < out.sent < 10_000  # (the queues took some messages before they were full)
    assert len(out._pending) == 10  # the batch that timed out was not dropped from the producer
    daemon.close()
    ctx.term()  # (the sockets are closed: term returns at once)


@pytest.mark.parametrize("wait", [True, False], ids=["waits when behind", "ZeroMQ's own: drops"])
def test_a_pub_producer_that_waits_when_behind_loses_nothing(wait: bool) -> None:
    """A subscriber that reads nothing for half a second while 100 MB are published to it (10,000
    bodies of 10 KB: more than the two high-water marks of 1,000 messages and the sockets' buffers
    hold). ZeroMQ's PUB drops what does not fit; with `wait_when_behind` (XPUB_NODROP) the sends
    wait for room and every message arrives, in order. `oddsmill send` lost up to 7,500 of the
    demo log's 56,000 events so, printing "sent 56,000" (five runs: 4,617, 11, 125, 7,500, 109)."""
    import time

    ctx: zmq.Context[Any] = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"events")
    port = sub.bind_to_random_port("tcp://127.0.0.1")
    got: list[int] = []
    sent = threading.Event()

    def read() -> None:
        if wait:
            time.sleep(0.5)  # behind from the start: the sends wait for room
        else:  # behind for the whole stream (reading after half a second, it kept up on a fast
            # host and got all 10,000 once, under CI): PUB drops what does not fit. The socket is
            # asked for its events meanwhile, which reads nothing: ZeroMQ attaches a new connection
            # (and sends the subscription the producer waits for) only when the socket is used.
            while not sent.wait(0.01):
                sub.getsockopt(zmq.EVENTS)
        while sub.poll(1000):
            got.append(msgpack.unpackb(sub.recv_multipart()[1])["id"])

    reader = threading.Thread(target=read)
    reader.start()
    pad = "." * 10_000
    with Producer(f"tcp://127.0.0.1:{port}", wait_when_behind=wait, send_timeout=20, context=ctx) as out:
        for i in range(10_000):
            out.send({"id": i, "x": {"pad": pad}})
        sent.set()
    reader.join(60)
    sub.close(0)
    ctx.term()
    if wait:
        assert got == list(range(10_000))
    else:
        assert len(got) < 10_000 and got == sorted(got)  # what arrived, in order, with gaps


def test_the_send_command_waits_rather_than_drop(monkeypatch, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    """`oddsmill send` asks its producer to wait when the daemon is behind, with --wait as the
    longest wait (the test above is what that does; the producer is a stand-in here)."""
    import oddsmill_client
    from oddsmill.cli import main

    made: list[dict[str, Any]] = []
    sent: list[dict[str, Any]] = []

    class StandIn:
        def __init__(self, address: str, **kw: Any) -> None:
            made.append(kw)

        def __enter__(self) -> StandIn:
            return self

        def __exit__(self, *exc: object) -> None:
            pass

        def send(self, body: dict[str, Any]) -> None:
            sent.append(body)

    monkeypatch.setattr(oddsmill_client, "Producer", StandIn)
    log = tmp_path / "two.jsonl"
    log.write_text('{"x": {"a": 1.0}, "y": 1}\n{"x": {"a": 2.0}, "y": 0}\n')
    assert main(["send", str(log), "--to", "tcp://127.0.0.1:1", "--wait", "3"]) == 0
    assert made[0]["wait_when_behind"] is True and made[0]["send_timeout"] == 3
    assert [b["x"]["a"] for b in sent] == [1.0, 2.0]


NO_NUMPY = r"""
import sys
sys.modules["numpy"] = None  # (an import of numpy now fails)
import msgpack
from oddsmill_client import Producer, ScoreSubscriber
import zmq
daemon = zmq.Context.instance().socket(zmq.PULL)
daemon.bind("tcp://127.0.0.1:*")
out = Producer(daemon.getsockopt(zmq.LAST_ENDPOINT).decode(), kind="push")
packed = out._packed({"id": 7, "x": {"route_km": 25.5, "depot": "Harbourside", "express": False}})
print(msgpack.unpackb(packed)["x"]["route_km"])
try:
    out._packed({"x": {"when": object()}})
except TypeError as e:
    print("TypeError")
out._sock.close(0)
daemon.close(0)
ScoreSubscriber("tcp://127.0.0.1:9").close()
"""


def test_the_client_needs_only_pyzmq_and_msgpack() -> None:
    """The README and the package say so, and the producer imported numpy at its top: an
    application without numpy could not import the client. numpy is needed only by send_columns,
    whose rows are numpy's (here numpy cannot be imported at all)."""
    import subprocess
    import sys

    run = subprocess.run([sys.executable, "-c", NO_NUMPY], capture_output=True, text=True, timeout=60)
    assert run.returncode == 0, run.stderr
    assert run.stdout.split() == ["25.5", "TypeError"]
