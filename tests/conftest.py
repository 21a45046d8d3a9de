from __future__ import annotations

import random
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import msgpack
import pytest
import zmq

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "replay_data" / "parcels.jsonl.gz"
TIMEOUT_MS = 10_000
# The handshake's scoring request: no features, answered from the intercept, as the product's own
# (ScoreSubscriber.await_daemon). A feature in it would be a name in every model a test leaves.
PROBE: dict[str, Any] = {"x": {}}


def phishing() -> list[tuple[dict[str, float], int]]:
    """river's bundled Phishing dataset (1,250 events, 9 numeric features)."""
    from river import datasets

    return [({k: float(v) for k, v in x.items()}, int(y)) for x, y in datasets.Phishing()]


def sparse_stream(n: int, seed: int) -> list[tuple[dict[str, object], int]]:
    """Invented events whose features come and go: numeric at different scales, one-hot strings,
    booleans, a feature that appears late and one that vanishes."""
    rnd = random.Random(seed)
    out = []
    for i in range(n):
        x: dict[str, object] = {"route_km": rnd.gammavariate(3, 14)}
        if rnd.random() < 0.7:
            x["weight_g"] = rnd.lognormvariate(7, 1)
        if rnd.random() < 0.5:
            x["depot"] = rnd.choice(["Harbourside", "Millbrook", "Eastgate"])
        if i < n // 2:
            x["old_scanner"] = rnd.random() < 0.3
        if i > n // 3:
            x["stops_before"] = float(rnd.randint(0, 20))
        z = -1 + 0.02 * x["route_km"] + (0.5 if x.get("depot") == "Millbrook" else 0.0)  # type: ignore[operator]
        y = int(rnd.random() < 1 / (1 + 2.718281828 ** (-z)))
        out.append((x, y))
    return out


# Daemon processes a test started (tests/test_server.py's `start`): any still running when the test
# ends is killed. A test that failed before stopping its daemon left it running, and it held its
# HTTP port (and CPU) through the tests that followed.
STARTED: list[subprocess.Popen[str]] = []


@pytest.fixture(autouse=True)
def no_daemon_left_running() -> Iterator[None]:
    yield
    while STARTED:
        proc = STARTED.pop()
        if proc.poll() is None:
            proc.kill()
            proc.wait(30)


@pytest.fixture(scope="session")
def phishing_data() -> list[tuple[dict[str, float], int]]:
    return phishing()


def loopback(state_dir: Path, **settings: Any) -> Any:
    """ServerSettings on random loopback ports, PULL ingest (nothing dropped) and no HTTP, unless
    `settings` say otherwise."""
    from oddsmill.server import ServerSettings

    defaults: dict[str, Any] = {
        "ingest": "tcp://127.0.0.1:*",
        "ingest_kind": "pull",
        "scores": "tcp://127.0.0.1:*",
        "http": "off",
    }
    return ServerSettings(state_dir=state_dir, **{**defaults, **settings})


def handled_once(state_dir: Path, bodies: list[dict[str, Any]], learner: Any = None, **settings: Any) -> Any:
    """A daemon's `Server` on a fresh state directory (no sockets bound, no HTTP; `learner`, its
    LearnerSettings; `settings`, more of its ServerSettings) that has handled the bodies as one
    block, published into an inproc PUB, its journal closed; returned."""
    from oddsmill.server import Server, ServerSettings

    ctx: zmq.Context[Any] = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind(f"inproc://handled-once-{id(bodies)}")
    server = Server(ServerSettings(state_dir=state_dir, http="off", **settings), learner)
    try:
        server.handle([[b"events", msgpack.packb(b)] for b in bodies], pub)
    finally:
        server.journal.close()
        pub.close(0)
        ctx.term()
    return server


class RunningServer:
    """A daemon serving in a thread of this process, on the ports its settings name."""

    def __init__(self, settings, learner) -> None:  # type: ignore[no-untyped-def]
        import threading

        import zmq
        from oddsmill.server import Server

        self.server = Server(settings, learner)
        self.stop = threading.Event()
        self.ctx = zmq.Context()
        self.thread = threading.Thread(target=self.server.serve, args=(self.stop, self.ctx), daemon=True)
        self.thread.start()
        assert self.server.ready.wait(10), "the daemon did not start"

    def close(self) -> None:
        """Stop (with its final checkpoint) and wait; close the test's own sockets first."""
        self.stop.set()
        self.thread.join(10)
        self.ctx.term()


class Client:
    """A PUSH producer and a SUB on the scores, with a ready handshake (never a sleep)."""

    def __init__(self, ctx: zmq.Context[Any], ingest: str, scores: str) -> None:
        self.push = ctx.socket(zmq.PUSH)
        self.sub = ctx.socket(zmq.SUB)
        for s in (self.push, self.sub):
            s.setsockopt(zmq.LINGER, 0)
        self.sub.setsockopt(zmq.SUBSCRIBE, b"")
        self.sub.connect(scores)
        self.push.connect(ingest)
        # the subscription is in place once a probe's score comes back
        deadline = time.monotonic() + TIMEOUT_MS / 1000
        self.probes_answered = 0  # scores the daemon published for probes (and counted as such)
        while time.monotonic() < deadline:
            self.send(PROBE)
            if self.sub.poll(100):
                self.sub.recv_multipart()
                self.probes_answered += 1
                break
        else:
            raise AssertionError("no score for a probe: the daemon is not answering")
        while self.sub.poll(200):  # drain the answers to extra probes
            self.sub.recv_multipart()
            self.probes_answered += 1

    def send(self, body: dict[str, Any]) -> None:
        self.push.send_multipart([b"events", msgpack.packb(body)])

    def receive(self, n: int) -> list[tuple[bytes, dict[str, Any]]]:
        got = []
        while len(got) < n:
            assert self.sub.poll(TIMEOUT_MS), f"got {len(got)} of {n} answers"
            topic, raw = self.sub.recv_multipart()
            got.append((topic, msgpack.unpackb(raw)))
        return got

    def close(self) -> None:
        self.push.close()
        self.sub.close()


class FedDaemon:
    """A daemon on random loopback ports with HTTP, to be fed the parcel demo log."""

    def __init__(self, state_dir: Path) -> None:
        from oddsmill.settings import LearnerSettings

        settings = loopback(state_dir, http="127.0.0.1:0")
        self.running = RunningServer(settings, LearnerSettings())
        self.server = self.running.server
        self.http = f"http://{self.server.bound['http']}"
        self.client = Client(self.running.ctx, self.server.bound["ingest"], self.server.bound["scores"])

    def feed(self, n: int, batch: int = 50) -> None:
        """Send the first `n` messages of the demo log, in batches; return once every answer is in
        and the figures that /api/status reads have caught up."""
        from oddsmill.logs import read_bodies

        sent = [body for _, body, _ in read_bodies([str(DEMO)])][:n]
        batches = [sent[lo : lo + batch] for lo in range(0, len(sent), batch)]
        for b in batches:
            self.client.send({"batch": b})
        # then a scoring request (scored, not learned): its answer comes after every batch is processed,
        # including batches of outcomes only, which get no answer of their own
        self.client.send({"x": {"route_km": 10.0}})
        answers = self.client.receive(sum(1 for b in batches if any("x" in e for e in b)) + 1)
        assert all(topic == b"scores" for topic, _ in answers)
        self.learned = self.server.engine.learner.step
        # events/s needs two samples a second apart, and the top coefficients are ranked every 2 s
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            doc = self.status()
            if doc["step"] == self.learned and doc["rates"] and len(doc["coefficients"]) == min(12, doc["features"]):
                break
            time.sleep(0.05)  # polling the daemon's own figures, not waiting for a guess of time
        else:
            raise AssertionError(
                f"the daemon's figures did not catch up: step {doc['step']} of {self.learned}, "
                f"{len(doc['rates'])} rates, {len(doc['coefficients'])} coefficients of {doc['features']} features"
            )

    def status(self) -> dict[str, Any]:
        import json
        import urllib.request

        with urllib.request.urlopen(self.http + "/api/status", timeout=10) as r:
            doc: dict[str, Any] = json.load(r)
        return doc

    def close(self) -> None:
        self.client.close()
        self.running.close()
