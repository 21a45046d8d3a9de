"""Score latency at a fixed offered load, oddsmill against the floor, side by side in one run.

The floor is a minimal process that receives, decodes and publishes a constant score: the cost of
the I/O alone. Both run as processes of their own on loopback; this process sends 20-feature
events at `--rate` events/s and measures, at its own subscriber, the time from each send to the
score for it. The two are measured in alternation (floor, oddsmill, floor, oddsmill) so that drift
on a shared machine falls on both. Ratios are what to read; absolute figures drift.

    python scripts/bench_latency.py [--rate 10000] [--seconds 5] [--json]
"""

from __future__ import annotations

import argparse
import json
import socket
import subprocess
import sys
import tempfile
import threading
import time
from typing import Any

import msgpack
import numpy as np
import zmq

FLOOR = """
import sys, msgpack, zmq
ctx = zmq.Context()
sub, pub = ctx.socket(zmq.SUB), ctx.socket(zmq.PUB)
sub.bind(sys.argv[1]); sub.setsockopt(zmq.SUBSCRIBE, b"events"); pub.bind(sys.argv[2])
print("serving:", flush=True)
while True:
    topic, raw = sub.recv_multipart()
    body = msgpack.unpackb(raw)
    pub.send_multipart([b"scores", msgpack.packb({"id": body.get("id"), "p": 0.5, "logit": 0.0, "step": 0, "ts": 0.0})])
"""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start(kind: str) -> tuple[subprocess.Popen[str], str, str]:
    ingest, scores = f"tcp://127.0.0.1:{free_port()}", f"tcp://127.0.0.1:{free_port()}"
    if kind == "floor":
        cmd = [sys.executable, "-c", FLOOR, ingest, scores]
        stream = "stdout"
    else:
        state = tempfile.mkdtemp(prefix="oddsmill-bench-")
        cmd = [
            sys.executable,
            "-m",
            "oddsmill.cli",
            "serve",
            "--state",
            state,
            "--ingest",
            ingest,
            "--scores",
            scores,
            "--http",
            "off",
        ]
        stream = "stderr"
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    for line in getattr(proc, stream):
        if "serving:" in line:
            return proc, ingest, scores
    raise RuntimeError(f"{kind} did not start")


def measure(kind: str, rate: float, seconds: float) -> np.ndarray:
    proc, ingest, scores = start(kind)
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"scores")
    sub.connect(scores)
    pub = ctx.socket(zmq.XPUB)
    pub.connect(ingest)
    pub.recv()  # the server's subscription has arrived
    rng = np.random.default_rng(0)
    names = [f"f{j}" for j in range(20)]
    sent: dict[int, float] = {}
    latencies: list[float] = []
    # the subscription of `sub` is in place once a probe comes back
    while True:
        pub.send_multipart([b"events", msgpack.packb({"id": -1, "x": {"probe": 1.0}})])
        if sub.poll(100):
            sub.recv_multipart()
            break
    while sub.poll(300):
        sub.recv_multipart()
    n = int(rate * seconds)
    done = threading.Event()

    def receive() -> None:
        while len(latencies) < n and sub.poll(5000):
            _, raw = sub.recv_multipart()
            now = time.perf_counter()
            ident = msgpack.unpackb(raw)["id"]
            if ident in sent:
                latencies.append(now - sent[ident])
        done.set()

    t = threading.Thread(target=receive)
    t.start()
    t0 = time.perf_counter()
    for i in range(n):
        delay = t0 + i / rate - time.perf_counter()
        if delay > 0:
            time.sleep(delay)  # sleeping, not spinning: the receiving thread needs the interpreter too
        x = dict(zip(names, rng.normal(size=20).tolist(), strict=True))
        body = msgpack.packb({"id": i, "x": x, "y": int(rng.random() < 0.3)})
        sent[i] = time.perf_counter()
        pub.send_multipart([b"events", body])
    done.wait(30)
    t.join(5)
    proc.terminate()
    proc.wait(10)
    sub.close(0)
    pub.close(0)
    ctx.term()
    return np.array(latencies)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rate", type=float, default=10_000)
    ap.add_argument("--seconds", type=float, default=5.0)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    runs: dict[str, list[np.ndarray]] = {"floor": [], "oddsmill": []}
    for _ in range(2):
        for kind in ("floor", "oddsmill"):
            runs[kind].append(measure(kind, args.rate, args.seconds))
    result: dict[str, Any] = {}
    for kind, parts in runs.items():
        lat = np.concatenate(parts)
        result[kind] = {
            "received": int(lat.size),
            "median_ms": float(np.median(lat) * 1e3),
            "p99_ms": float(np.percentile(lat, 99) * 1e3),
        }
    result["median_ratio"] = result["oddsmill"]["median_ms"] / result["floor"]["median_ms"]
    result["p99_ratio"] = result["oddsmill"]["p99_ms"] / result["floor"]["p99_ms"]
    if args.json:
        print(json.dumps(result, indent=2))
        return
    print(f"score latency at {args.rate:,.0f} events/s offered, {args.seconds:g} s x 2 each, side by side:")
    for kind in ("floor", "oddsmill"):
        r = result[kind]
        print(f"  {kind:<9} received {r['received']:>7,}  median {r['median_ms']:.3f} ms  p99 {r['p99_ms']:.3f} ms")
    print(f"  oddsmill / floor: median {result['median_ratio']:.2f}x, p99 {result['p99_ratio']:.2f}x")


if __name__ == "__main__":
    main()
