"""A bounded soak: a minute at a steady rate, with scoring requests whose outcomes never arrive among
the events. The daemon's memory stays flat, the pending store stays within its bound, and every
request never answered is accounted for: expired, evicted, or still held."""

from __future__ import annotations

import json
import time
import urllib.request
from pathlib import Path
from typing import Any

import msgpack
import zmq

from tests.conftest import Client, sparse_stream
from tests.test_server import free_port, start

SECONDS = 55.0
RATE = 2000  # messages a second


def rss_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise AssertionError("no VmRSS")


def test_a_minute_at_a_steady_rate_with_outcomes_that_never_arrive(tmp_path: Path) -> None:
    ingest, scores, http = f"tcp://127.0.0.1:{free_port()}", f"tcp://127.0.0.1:{free_port()}", free_port()
    limit, ttl = 400, 0.5  # 500 unanswered a second expire; bursts of 2,000 a second are evicted
    proc = start(
        tmp_path,
        ingest,
        scores,
        "--http",
        f"127.0.0.1:{http}",
        "--pending-limit",
        str(limit),
        "--pending-ttl",
        str(ttl),
        "--checkpoint-seconds",
        "10",
    )
    ctx: zmq.Context[Any] = zmq.Context()
    client = Client(ctx, ingest, scores)
    client.sub.close()  # nobody reads the scores: the PUB drops them, which costs the daemon nothing

    def status() -> dict[str, Any]:
        with urllib.request.urlopen(f"http://127.0.0.1:{http}/api/status", timeout=5) as r:
            doc: dict[str, Any] = json.load(r)
        return doc

    stream = sparse_stream(5000, seed=15)
    never = 0
    sent = [0, 0, 0, 0]  # messages of each kind
    burst = False
    samples: list[tuple[float, int, int]] = []  # (seconds in, RSS KiB, pending)
    t0 = time.monotonic()
    i = 0
    try:
        while (now := time.monotonic() - t0) < SECONDS:
            due = int(now * RATE)
            while i < due or i % 4:  # whole groups of four: a request is never left without its outcome
                x, y = stream[i % len(stream)]
                if i % 4 == 0:  # one second in ten, whole groups of four are unanswered requests: a burst
                    burst = int(now) % 10 == 5
                kind = 0 if burst else i % 4
                if kind == 0:
                    body: dict[str, Any] = {"id": f"Q{i}", "x": x}  # its outcome never comes
                    never += 1
                elif kind == 1:
                    body = {"id": f"R{i}", "x": x}  # answered by the next message
                elif kind == 2:
                    body = {"id": f"R{i - 1}", "y": y}
                else:
                    body = {"x": x, "y": y}
                client.push.send_multipart([b"events", msgpack.packb(body)])
                sent[kind] += 1
                i += 1
            if not samples or now - samples[-1][0] >= 5:
                samples.append((now, rss_kib(proc.pid), status()["pending_outcomes"]))
            time.sleep(0.005)
        deadline = time.monotonic() + 10
        x, y = stream[0]
        client.push.send_multipart([b"events", msgpack.packb({"x": x, "y": y})])  # the last, learned in order
        while (doc := status())["events"]["train"] < sent[3] + 1 and time.monotonic() < deadline:
            time.sleep(0.1)
        samples.append((time.monotonic() - t0, rss_kib(proc.pid), doc["pending_outcomes"]))
    finally:
        client.close()
        ctx.term()
        proc.terminate()
        proc.wait(20)
    print("seconds, RSS MiB, pending: " + "; ".join(f"{t:.0f}, {r / 1024:.1f}, {p}" for t, r, p in samples))
    assert doc["events"]["train"] == sent[3] + 1  # all arrived
    assert doc["events"]["score"] >= sent[0] + sent[1]  # (and the handshake's probes)
    assert doc["events"]["outcome"] == sent[2]
    assert max(p for _, _, p in samples) <= limit
    dropped = doc["pending_dropped"]
    assert dropped["expired"] > 0 and dropped["evicted"] > 0
    # every request never answered has expired, been evicted, or is still held; so has every answered
    # one whose outcome came too late (behind a stall of the daemon), which was then an unknown_outcome
    late = doc["rejected"].get("unknown_outcome", 0)
    assert never + late == dropped["expired"] + dropped["evicted"] + doc["pending_outcomes"]
    # memory is flat once warm: the last sample within 5% (and 8 MiB) of the one at about 15 s
    warm = next(r for t, r, _ in samples if t >= 15)
    last = samples[-1][1]
    assert last - warm < max(0.05 * warm, 8 * 1024), f"RSS grew from {warm} KiB to {last} KiB"
