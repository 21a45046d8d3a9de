"""Loss made visible: a producer that overruns the daemon over PUB/SUB loses messages to ZeroMQ's
high-water marks; numbered with src/seq, every one lost is counted, and what was learned plus what
was lost is exactly what was sent."""

from __future__ import annotations

import json
import time
import urllib.request
from pathlib import Path
from typing import Any

import msgpack
import zmq
from oddsmill.settings import LearnerSettings

from tests.conftest import RunningServer, loopback, sparse_stream


def status(http: str) -> dict[str, Any]:
    with urllib.request.urlopen(f"http://{http}/api/status", timeout=5) as r:
        doc: dict[str, Any] = json.load(r)
    return doc


def test_an_overrun_shows_as_lost_events(tmp_path: Path) -> None:
    settings = loopback(
        tmp_path,
        ingest_kind="sub",  # PUB/SUB: ZeroMQ drops what overruns the queues
        http="127.0.0.1:0",
        ingest_hwm=20,  # a short queue, so that a burst overruns it
        fsync="block",  # and a slow daemon: every block synced
    )
    running = RunningServer(settings, LearnerSettings(scale_warmup=100))
    http = running.server.bound["http"]
    ctx: zmq.Context[Any] = running.ctx
    pub = ctx.socket(zmq.XPUB)  # a producer as the protocol allows, with raw pyzmq
    pub.setsockopt(zmq.LINGER, 0)
    pub.setsockopt(zmq.SNDHWM, 20)
    pub.connect(running.server.bound["ingest"])
    assert pub.poll(10_000), "the daemon did not subscribe"
    assert pub.recv() == b"\x01events"
    events = [{"x": x, "y": y} for x, y in sparse_stream(2000, seed=14)]
    n = 40_000
    packed = [msgpack.packb(dict(events[i % len(events)], src="burst", seq=i)) for i in range(n)]
    for body in packed:  # as fast as Python sends: faster than the daemon learns
        pub.send_multipart([b"events", body])

    # once the daemon has drained the burst, one more message closes any gap at the end
    last = -1
    deadline = time.monotonic() + 30
    while True:
        seen = status(http)["events"]["train"]
        if seen == last:
            break
        assert time.monotonic() < deadline, "the daemon never went quiet"
        last = seen
        time.sleep(0.5)  # (each request's figures are taken after it asked): 0.5 s without a change
    pub.send_multipart([b"events", msgpack.packb(dict(events[0], src="burst", seq=n))])
    deadline = time.monotonic() + 10
    while True:
        doc = status(http)
        if doc["events"]["train"] + doc["lost"] == n + 1 or time.monotonic() > deadline:
            break
        time.sleep(0.05)
    pub.close()
    running.close()
    learned, lost = doc["events"]["train"], doc["lost"]
    print(f"sent {n + 1:,}; learned {learned:,}; counted lost {lost:,}")
    assert lost > 0, "the burst did not overrun the daemon: nothing to show"
    assert learned + lost == n + 1
    assert running.server.engine.learner.step == learned


def test_producers_kept_are_bounded_and_the_longest_silent_forgotten(monkeypatch, caplog) -> None:  # type: ignore[no-untyped-def]
    """The last number of every producer ever heard was kept, in memory and in every checkpoint: a
    producer that named itself anew for each message grew both without bound. At most
    `PRODUCERS_KEPT` are kept; the longest silent is forgotten (its next number starts it afresh,
    a gap not counted), the log says so once, and a checkpoint keeps the order."""
    from oddsmill import engine as engine_module
    from oddsmill.engine import Engine
    from oddsmill.learner import Learner

    monkeypatch.setattr(engine_module, "PRODUCERS_KEPT", 3)
    e = Engine(Learner(LearnerSettings()))
    with caplog.at_level("WARNING", logger="oddsmill"):
        for src, seq in (("van-1", 0), ("van-2", 0), ("van-3", 0), ("van-1", 1), ("van-4", 0), ("van-5", 0)):
            assert e.numbered(src, seq)
    assert list(e.last_seq) == ["van-1", "van-4", "van-5"]  # van-2, then van-3, the longest silent
    assert len([m for m in caplog.messages if "producers (src)" in m]) == 1
    assert e.numbered("van-2", 7) and e.counters.lost == 0  # forgotten: a fresh start, no gap counted
    assert e.numbered("van-4", 3) and e.counters.lost == 2  # kept: its gap is counted
    from oddsmill.storage import decode_checkpoint, encode_checkpoint

    again = Engine.from_state_dict(decode_checkpoint(encode_checkpoint({"engine": e.state_dict()}))["engine"])
    assert list(again.last_seq) == list(e.last_seq) == ["van-5", "van-2", "van-4"]
