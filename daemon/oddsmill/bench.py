"""`oddsmill bench`: throughput and latency, side by side in one run, on loopback.

Three servers, each a process of its own, measured in turn under the same load:

- the floor: receives, decodes and publishes a constant score; the cost of the I/O alone;
- the journaled floor: the floor, writing each message to a journal first (records as oddsmill's,
  CRC-32 and all, with an fsync in the background every second, as oddsmill's default): the I/O
  and the durability every daemon that keeps its messages pays, without the learning;
- the peer: the daemon a user would write by hand, with river's LogisticRegression, pyzmq, msgpack;
- oddsmill itself, on the defaults.

Throughput, in three shapes of traffic (one event a message with 20 named numeric features, batches
of 500, columnar blocks of 500 rows): a producer process of its own pushes N events as fast as the
server takes them (PUSH/PULL: back-pressure, nothing dropped), and this process counts the scores;
events/s is the events over the time from the producer's start to the last score. Latency: one event
a message at a fixed offered load, sent by a producer process of its own, from each send to its
score at this process's subscriber (the floors and oddsmill in turn, in rounds so drift falls on all),
with the server's CPU time a message over that load (from /proc: every thread). Peak memory is each
server's VmHWM. The ratios are what to read: absolute figures drift on a shared machine.

    oddsmill bench [--events N] [--rate R] [--seconds S] [--json]
    python -m oddsmill.bench ...     (from a checkout: PYTHONPATH=daemon:clients)
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import zmq

BLOCK = 500  # events a batch or columnar block
SILENCE_MS = 60_000  # a run fails when no score comes for this long (the first call may compile)
# Rounds of throughput runs behind each ratio, which is the median of the rounds' own: the floor's
# columnar rate moved from 4.1 M to 7.2 M events/s between six runs of the bench (2026-12-03), and
# one pair of runs said more about the minute than about the code. The first round runs every
# kind; the others the floor, the peer and oddsmill (and for columnar blocks the auto race).
ROUNDS = 3
# Rounds of latency runs (the floor, then oddsmill), pooled. The median of one round moves by a
# third from round to round on this shared machine (0.25 to 0.33 ms for the floor in one run);
# two rounds left the ratio moving from 1.15 to 1.44 between runs of the same code.
LATENCY_ROUNDS = 4
FEATURES = [f"f{j:02d}" for j in range(20)]
# The events of a throughput run, as multiples of --events, so that each server's run lasts a
# quarter of a second or more at the default: a columnar run of 100,000 events took the floor 20 to
# 30 ms, and its rate then said more about the run's start than about the floor (3.0 to 4.9 M
# events/s in three runs; 4.4 to 6.0 M with a million events). The peer, fifty times slower on
# columnar blocks, gets fewer.
EVENTS_SCALE = {"one": 1, "batch": 5, "cols": 50}
PEER_SCALE = {"one": 1, "batch": 1, "cols": 5}

FLOOR = r"""
import sys, msgpack, numpy as np, zmq
ctx = zmq.Context()
sub, pub = ctx.socket(zmq.PULL), ctx.socket(zmq.PUB)
pub.setsockopt(zmq.SNDHWM, 0)
sub.bind(sys.argv[1]); pub.bind(sys.argv[2])
print("serving:", flush=True)
while True:
    topic, raw = sub.recv_multipart()
    body = msgpack.unpackb(raw)
    if "batch" in body:
        out = {"batch": [{"id": e.get("id"), "p": 0.5, "logit": 0.0, "step": 0, "ts": 0.0} for e in body["batch"]]}
    elif "cols" in body:
        n = len(body["rows"]) // (8 * len(body["cols"]))
        z = np.zeros(n)
        out = {"id": body.get("id"), "p": (z + 0.5).tobytes(), "logit": z.tobytes(), "step": 0, "ts": 0.0}
    else:
        out = {"id": body.get("id"), "p": 0.5, "logit": 0.0, "step": 0, "ts": 0.0}
    pub.send_multipart([b"scores", msgpack.packb(out)])
"""

# The floor with a journal: each message's record (the same bytes as oddsmill's: length and CRC-32,
# then [arrival, body]) reaches the operating system before the message is decoded and answered,
# and a thread fsyncs the file every second. As oddsmill's journal does (storage.CLEAN_BYTES), it
# advises the system to drop the file's cached pages after each fsync and every 8 MiB written.
# Its state directory is argv[3].
JOURNALED_FLOOR = FLOOR.replace(
    "import sys, msgpack, numpy as np, zmq",
    """import os, struct, sys, threading, time, msgpack, numpy as np, zmq
from zlib_ng.zlib_ng import crc32
fd = os.open(os.path.join(sys.argv[3], "journal"), os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
record, arrival = struct.Struct("<II"), struct.Struct(">d")

def sync():
    while True:
        time.sleep(1.0)
        os.fsync(fd)
        os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)

threading.Thread(target=sync, daemon=True).start()
written = 0""",
).replace(
    "    body = msgpack.unpackb(raw)\n",
    """    head = b"\\x92\\xcb" + arrival.pack(time.time())
    written += os.writev(fd, [record.pack(len(head) + len(raw), crc32(raw, crc32(head))), head, raw])
    if written >= 8 << 20:
        os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
        written = 0
    body = msgpack.unpackb(raw)
""",
)

PEER = r"""
import math, sys, msgpack, numpy as np, zmq
from river import linear_model
model = linear_model.LogisticRegression()
ctx = zmq.Context()
sub, pub = ctx.socket(zmq.PULL), ctx.socket(zmq.PUB)
pub.setsockopt(zmq.SNDHWM, 0)
sub.bind(sys.argv[1]); pub.bind(sys.argv[2])
step = 0

def one(ident, x, y):
    global step
    p = model.predict_proba_one(x).get(True, 0.5)
    if y is not None:
        model.learn_one(x, bool(y))
        step += 1
    return {"id": ident, "p": p, "logit": math.log(p / (1 - p)) if 0 < p < 1 else 0.0, "step": step, "ts": 0.0}

print("serving:", flush=True)
while True:
    topic, raw = sub.recv_multipart()
    body = msgpack.unpackb(raw)
    if "batch" in body:
        out = {"batch": [one(e.get("id"), e["x"], e.get("y")) for e in body["batch"]]}
    elif "cols" in body:
        cols = body["cols"]
        rows = np.frombuffer(body["rows"], dtype="<f8").reshape(-1, len(cols))
        ys = body.get("y") or bytes([255]) * len(rows)
        scored = [one(None, dict(zip(cols, r.tolist())), None if ys[k] == 255 else ys[k]) for k, r in enumerate(rows)]
        p = np.array([s["p"] for s in scored])
        out = {"id": body.get("id"), "p": p.tobytes(), "logit": np.log(p / (1 - p)).tobytes(), "step": step, "ts": 0.0}
    else:
        out = one(body.get("id"), body["x"], body.get("y"))
    pub.send_multipart([b"scores", msgpack.packb(out)])
"""

SCRIPTS = {"floor": FLOOR, "journaled_floor": JOURNALED_FLOOR, "peer": PEER}
KINDS = ("floor", "journaled_floor", "peer", "oddsmill")  # in the order each shape's first round runs them
AGAIN = ("floor", "peer", "oddsmill")  # and the other rounds
LATENCY_KINDS = ("floor", "journaled_floor", "oddsmill")

PRODUCER = r"""
import sys, msgpack, numpy as np, zmq
address, shape, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
names = [f"f{j:02d}" for j in range(20)]
rng = np.random.default_rng(1)
X = rng.normal(size=(n, 20))
y = (rng.random(n) < 1 / (1 + np.exp(-X[:, :5].sum(axis=1) * 0.5))).astype(int)
if shape == "one":
    bodies = [msgpack.packb({"x": dict(zip(names, X[i].tolist())), "y": int(y[i])}) for i in range(n)]
elif shape == "batch":
    bodies = [msgpack.packb({"batch": [{"x": dict(zip(names, X[i].tolist())), "y": int(y[i])}
                                       for i in range(lo, min(n, lo + 500))]}) for lo in range(0, n, 500)]
else:
    bodies = [msgpack.packb({"cols": names, "rows": np.ascontiguousarray(X[lo:lo + 500], dtype="<f8").tobytes(),
                             "y": bytes(y[lo:lo + 500].tolist())}) for lo in range(0, n, 500)]
ctx = zmq.Context()
push = ctx.socket(zmq.PUSH)
push.connect(address)
print("ready", flush=True)
sys.stdin.readline()
for b in bodies:
    push.send_multipart([b"events", b])
push.close(linger=-1)
ctx.term()
"""

# The latency's producer: a process of its own (in the measuring process, its sending and packing
# competed for the interpreter with the receiving thread, and added half a millisecond to the
# floor's median). It probes until told to start, sends n events at a fixed rate, and writes each
# send time (time.perf_counter: CLOCK_MONOTONIC, one clock for every process of the machine).
LATENCY_PRODUCER = r"""
import sys, time, msgpack, numpy as np, zmq
address, rate, n, out = sys.argv[1], float(sys.argv[2]), int(sys.argv[3]), sys.argv[4]
names = [f"f{j:02d}" for j in range(20)]
rng = np.random.default_rng(0)
bodies = [msgpack.packb({"id": i, "x": dict(zip(names, rng.normal(size=20).tolist())), "y": i % 3 == 0})
          for i in range(n)]
ctx = zmq.Context()
pub = ctx.socket(zmq.XPUB)
pub.setsockopt(zmq.SNDHWM, 0)
pub.connect(address)
pub.recv()  # the server's subscription has arrived
probe = msgpack.packb({"id": -1, "x": {"probe": 1.0}})
while True:  # probes until the measuring process has seen one scored
    pub.send_multipart([b"events", probe])
    if zmq.select([sys.stdin], [], [], 0.1)[0]:
        sys.stdin.readline()
        break
sent = np.zeros(n)
t0 = time.perf_counter()
for i in range(n):
    delay = t0 + i / rate - time.perf_counter()
    if delay > 0:
        time.sleep(delay)
    sent[i] = time.perf_counter()
    pub.send_multipart([b"events", bodies[i]])
np.save(out, sent)
print("done", flush=True)
pub.close(linger=-1)
ctx.term()
"""


def raced() -> int:
    """The auto race's count of candidates (nine before run 48, twelve since its averaging axis)."""
    from .race import auto_candidates
    from .settings import LearnerSettings

    return len(auto_candidates(LearnerSettings()))


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def peak_memory_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1])
    return 0


# How oddsmill's server is started; `Running(serve=...)` starts another command with the same flags
# (scripts/journal_cost.py: a copy of the daemon whose journal stays in memory).
SERVE = [sys.executable, "-m", "oddsmill.cli", "serve"]


class Running:
    """One server process on fresh loopback ports."""

    def __init__(self, kind: str, ingest_kind: str, serve: list[str] | None = None) -> None:
        # oddsmill's state directory (journal and checkpoints, up to 770 MB a server here, which
        # were left behind after every run until it was a TemporaryDirectory): removed when the
        # server stops or fails to start, and at exit if a run raised before stopping it
        self.state: tempfile.TemporaryDirectory[str] | None = None
        self.peak = 0  # KiB, read as the server stops
        self.ingest = f"tcp://127.0.0.1:{free_port()}"
        self.scores = f"tcp://127.0.0.1:{free_port()}"
        self.journal_bytes = 0  # what the journaled floor had written when it stopped
        if kind in SCRIPTS:
            code = SCRIPTS[kind]
            if ingest_kind == "sub":
                code = code.replace("zmq.PULL", "zmq.SUB").replace(
                    "sub.bind(sys.argv[1]);", "sub.bind(sys.argv[1]); sub.setsockopt(zmq.SUBSCRIBE, b'events');"
                )
            cmd = [sys.executable, "-c", code, self.ingest, self.scores]
            if kind == "journaled_floor":
                self.state = tempfile.TemporaryDirectory(prefix="oddsmill-bench-")
                cmd.append(self.state.name)
            stream = "stdout"
        else:
            self.state = tempfile.TemporaryDirectory(prefix="oddsmill-bench-")
            cmd = [*(serve or SERVE), "--state", self.state.name, "--ingest", self.ingest]
            cmd += ["--ingest-kind", ingest_kind, "--scores", self.scores, "--http", "off"]
            cmd += ["--scores-hwm", "100000000"]
            if kind == "race":  # the auto grid's candidates on the same stream, one serving
                cmd += ["--candidates", "auto"]
            stream = "stderr"
        self.proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        lines = []
        for line in getattr(self.proc, stream):
            lines.append(line)
            if "serving:" in line:
                break
        else:
            self.proc.kill()
            self.proc.wait(20)
            self._remove_state()
            raise RuntimeError(f"the {kind} server did not start: {''.join(lines)}")
        for pipe in (self.proc.stdout, self.proc.stderr):  # drained for the server's life: it never blocks
            if pipe is not None:
                threading.Thread(target=pipe.read, daemon=True).start()

    def stop(self) -> int:
        """Stop the server (killed if it does not stop within 20 s) and remove its state directory;
        its peak memory, KiB. Again after it stopped: nothing more."""
        if self.proc.poll() is None:
            self.peak = peak_memory_kib(self.proc.pid)
            self.proc.terminate()
            try:
                self.proc.wait(20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(20)
        self._remove_state()
        return self.peak

    def _remove_state(self) -> None:
        if self.state is not None:
            self.journal_bytes = sum(f.stat().st_size for f in Path(self.state.name).iterdir())
            self.state.cleanup()
            self.state = None


def _tidy(server: Running, producer: subprocess.Popen[str] | None, ctx: zmq.Context[Any]) -> None:
    """After a run, and when one fails (a server silent, a producer stuck): no process of it left
    running, no socket open, no state directory left. (A failed run once left its servers running
    after the bench had exited.)"""
    if producer is not None and producer.poll() is None:
        producer.kill()
        producer.wait(20)
    ctx.destroy(linger=0)
    server.stop()


def throughput(
    kind: str,
    shape: str,
    n: int,
    before_stop: Callable[[Running], dict[str, float]] | None = None,
    serve: list[str] | None = None,
) -> dict[str, float]:
    """Events/s of one server over n events of a shape, and its peak memory; `before_stop` (a
    script's) looks at the server after its last answer, and what it returns joins the figures;
    `serve`, another command for oddsmill's server (see SERVE)."""
    server = Running(kind, "pull", serve)
    seen: dict[str, float] = {}
    ctx: zmq.Context[Any] = zmq.Context()
    producer: subprocess.Popen[str] | None = None
    try:
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.RCVHWM, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"scores")
        sub.connect(server.scores)
        probe = ctx.socket(zmq.PUSH)
        probe.connect(server.ingest)
        x = dict(zip(FEATURES, [0.0] * 20, strict=True))
        while True:  # the subscription is in place once a probe's score comes back
            probe.send_multipart([b"events", msgpack.packb({"x": x})])
            if sub.poll(100):
                break
            if server.proc.poll() is not None:
                raise RuntimeError(f"{kind}, {shape}: the server exited ({server.proc.returncode})")
        while sub.poll(300):
            sub.recv_multipart()
        probe.close(0)
        producer = subprocess.Popen(
            [sys.executable, "-c", PRODUCER, server.ingest, shape, str(n)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
        )
        assert producer.stdout is not None and producer.stdin is not None
        producer.stdout.readline()  # "ready": its messages are packed
        per_message = 1 if shape == "one" else BLOCK
        messages = (n + per_message - 1) // per_message
        got = 0
        first = time.perf_counter()
        producer.stdin.write("go\n")
        producer.stdin.flush()
        while got < messages:
            if not sub.poll(SILENCE_MS):
                raise RuntimeError(f"{kind}, {shape}: {got} of {messages} answers, then silence")
            sub.recv_multipart()
            got += 1
        last = time.perf_counter()
        producer.wait(60)
        if before_stop is not None:
            seen = before_stop(server)
    finally:
        _tidy(server, producer, ctx)
    out = {"events_per_s": n / (last - first), "peak_memory_mib": server.peak / 1024, **seen}
    if kind == "journaled_floor":
        out["journal_bytes"] = server.journal_bytes
    return out


def cpu_seconds(pid: int) -> float:
    """User and system CPU time of a process so far, all its threads (ZeroMQ's I/O thread too)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def latency(kind: str, rate: float, seconds: float) -> tuple[np.ndarray, float]:
    """Send-to-score times of one-event messages at `rate`, over PUB/SUB: a producer process sends,
    this process receives the scores. Also the server's CPU time over the load, a message."""
    server = Running(kind, "sub")
    ctx: zmq.Context[Any] = zmq.Context()
    producer: subprocess.Popen[str] | None = None
    n = int(rate * seconds)
    try:
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.RCVHWM, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"scores")
        sub.connect(server.scores)
        with tempfile.TemporaryDirectory(prefix="oddsmill-bench-") as tmp:
            times = Path(tmp) / "sent.npy"
            producer = subprocess.Popen(
                [sys.executable, "-c", LATENCY_PRODUCER, server.ingest, str(rate), str(n), str(times)],
                stdin=subprocess.PIPE,
                stdout=subprocess.PIPE,
                text=True,
            )
            assert producer.stdin is not None and producer.stdout is not None
            if not sub.poll(SILENCE_MS):  # a probe's score: the whole path is up
                raise RuntimeError(f"{kind}: no score for the latency producer's probes")
            cpu_before = cpu_seconds(server.proc.pid)
            producer.stdin.write("go\n")  # (the probes' scores still in flight are skipped by their id)
            producer.stdin.flush()
            arrived = np.full(n, np.nan)
            got = 0
            while got < n and sub.poll(5000):
                _, raw = sub.recv_multipart()
                now = time.perf_counter()
                ident = msgpack.unpackb(raw)["id"]
                if isinstance(ident, int) and 0 <= ident < n:
                    arrived[ident] = now
                    got += 1
            cpu = cpu_seconds(server.proc.pid) - cpu_before
            producer.stdout.readline()  # "done": the send times are written
            producer.wait(30)
            sent = np.load(times)
    finally:
        _tidy(server, producer, ctx)
    done = ~np.isnan(arrived)
    return np.asarray(arrived[done] - sent[done]), cpu / n


def _median_ratio(rounds: list[dict[str, float]], top: str, bottom: str) -> float:
    """The median over rounds of top's events/s over bottom's in the same round."""
    return float(np.median([r[top] / r[bottom] for r in rounds]))


def run(events: int, rate: float, seconds: float, shapes: list[str], out: Any) -> dict[str, Any]:
    result: dict[str, Any] = {"throughput": {}, "latency": {}}
    for shape in shapes:
        n = events * EVENTS_SCALE[shape]
        row: dict[str, Any] = {}
        rounds: list[dict[str, float]] = []
        for k in range(ROUNDS):
            rates: dict[str, float] = {}
            for kind in KINDS if k == 0 else AGAIN:
                done = throughput(kind, shape, events * PEER_SCALE[shape] if kind == "peer" else n)
                row.setdefault(kind, done)  # (the first round's runs, with their peak memory)
                rates[kind] = done["events_per_s"]
                label = kind.replace("_", " ") + (f", round {k + 1}" if k else "")
                print(f"  {shape:<6} {label:<18} {rates[kind]:>12,.0f} events/s", file=out, flush=True)
            if shape == "cols":  # the auto race: the I/O and encoding shared, the kernel run once a candidate
                race = throughput("race", shape, n)
                row.setdefault("race", race)
                rates["race"] = race["events_per_s"]
                print(
                    f"  {shape:<6} {f'race of {raced()}':<18} {rates['race']:>12,.0f} events/s"
                    f" ({rates['race'] / rates['oddsmill']:.2f}x the single learner's beside it)",
                    file=out,
                    flush=True,
                )
            rounds.append(rates)
        row["rounds"] = rounds
        row["oddsmill_to_floor"] = _median_ratio(rounds, "oddsmill", "floor")
        row["oddsmill_to_peer"] = _median_ratio(rounds, "oddsmill", "peer")
        row["journaled_floor_to_floor"] = _median_ratio(rounds[:1], "journaled_floor", "floor")
        row["oddsmill_to_journaled_floor"] = _median_ratio(rounds[:1], "oddsmill", "journaled_floor")
        if shape == "cols":
            row["race_to_oddsmill"] = _median_ratio(rounds, "race", "oddsmill")
        result["throughput"][shape] = row
    runs: dict[str, list[np.ndarray]] = {kind: [] for kind in LATENCY_KINDS}
    cpus: dict[str, list[float]] = {kind: [] for kind in LATENCY_KINDS}
    for _ in range(LATENCY_ROUNDS):
        for kind in LATENCY_KINDS:
            lat, cpu = latency(kind, rate, seconds)
            runs[kind].append(lat)
            cpus[kind].append(cpu)
    for kind, parts in runs.items():
        lat = np.concatenate(parts)
        result["latency"][kind] = {
            "received": int(lat.size),
            "median_ms": float(np.median(lat) * 1e3),
            "p99_ms": float(np.percentile(lat, 99) * 1e3),
            "cpu_us_per_message": float(np.mean(cpus[kind]) * 1e6),
            "rounds_median_ms": [float(np.median(part) * 1e3) for part in parts],
        }
    lat_r = result["latency"]
    lat_r["median_ratio"] = lat_r["oddsmill"]["median_ms"] / lat_r["floor"]["median_ms"]
    # each round's ratio (oddsmill's median over the floor's run just before it): their spread is
    # what one pooled ratio can be trusted to (0.86x to 1.94x for the same two codes, 2026-12-02)
    lat_r["median_ratio_rounds"] = [
        o / f for o, f in zip(lat_r["oddsmill"]["rounds_median_ms"], lat_r["floor"]["rounds_median_ms"], strict=True)
    ]
    lat_r["p99_ratio"] = lat_r["oddsmill"]["p99_ms"] / lat_r["floor"]["p99_ms"]
    lat_r["cpu_ratio"] = lat_r["oddsmill"]["cpu_us_per_message"] / lat_r["floor"]["cpu_us_per_message"]
    lat_r["journaled_floor_median_ratio"] = lat_r["journaled_floor"]["median_ms"] / lat_r["floor"]["median_ms"]
    lat_r["journaled_floor_p99_ratio"] = lat_r["journaled_floor"]["p99_ms"] / lat_r["floor"]["p99_ms"]
    lat_r["offered_events_per_s"] = rate
    return result


def report(result: dict[str, Any], out: Any) -> None:
    print("\nthroughput (events/s; side by side in this run)", file=out)
    print(
        f"  {'shape':<8}{'floor':>12}{'journaled':>12}{'peer':>12}{'oddsmill':>12}"
        f"{'/floor':>9}{'/journaled':>11}{'/peer':>9}  peak MiB (oddsmill)",
        file=out,
    )
    names = {"one": "one", "batch": "batch500", "cols": "cols500"}
    for shape, row in result["throughput"].items():
        rates = "".join(f"{row[kind]['events_per_s']:>12,.0f}" for kind in KINDS)
        print(
            f"  {names[shape]:<8}{rates}{row['oddsmill_to_floor']:>8.2f}x"
            f"{row['oddsmill_to_journaled_floor']:>10.2f}x{row['oddsmill_to_peer']:>8.1f}x"
            f"  {row['oddsmill']['peak_memory_mib']:.0f}",
            file=out,
        )
    print("  (journaled: the floor writing each message to a journal first, as oddsmill does)", file=out)
    print(
        "  (events/s: the first round; /floor and /peer: the median of each round's ratio, the runs of a"
        " round side by side)",
        file=out,
    )
    for shape, row in result["throughput"].items():
        each = "; ".join(f"{r['oddsmill'] / r['floor']:.2f}x, {r['oddsmill'] / r['peer']:.1f}x" for r in row["rounds"])
        print(f"  {names[shape]:<8} round by round, /floor and /peer: {each}", file=out)
    cols = result["throughput"].get("cols")
    if cols is not None:
        print(
            f"  race of {raced()} candidates (--candidates auto), columnar: {cols['race_to_oddsmill']:.2f}x a single"
            f" learner (median of {len(cols['rounds'])} rounds:"
            f" {', '.join(format(r['race'] / r['oddsmill'], '.2f') for r in cols['rounds'])})",
            file=out,
        )
    lat = result["latency"]
    print(f"\nscore latency at {lat['offered_events_per_s']:,.0f} events/s offered, one event a message:", file=out)
    for kind in LATENCY_KINDS:
        r = lat[kind]
        print(
            f"  {kind.replace('_', ' '):<16} received {r['received']:>7,}  median {r['median_ms']:.3f} ms"
            f"  p99 {r['p99_ms']:.3f} ms  server CPU {r['cpu_us_per_message']:.0f} us a message",
            file=out,
        )
    print(
        f"  oddsmill / floor: median {lat['median_ratio']:.2f}x, p99 {lat['p99_ratio']:.2f}x,"
        f" CPU a message {lat['cpu_ratio']:.2f}x",
        file=out,
    )
    rounds = ", ".join(f"{r:.2f}x" for r in lat["median_ratio_rounds"])
    print(f"  (the median's ratio round by round: {rounds})", file=out)
    print(
        f"  journaled floor / floor: median {lat['journaled_floor_median_ratio']:.2f}x,"
        f" p99 {lat['journaled_floor_p99_ratio']:.2f}x",
        file=out,
    )


def main(argv: list[str] | None = None) -> int:
    """`python -m oddsmill.bench ...`: the same as `oddsmill bench ...`."""
    from .cli import main as cli

    return cli(["bench", *(sys.argv[1:] if argv is None else argv)])


def bench(args: argparse.Namespace) -> int:
    shapes = [s for s in args.shapes.split(",") if s]
    bad = [s for s in shapes if s not in ("one", "batch", "cols")]
    for wrong, problem in (
        (bad or not shapes, f"--shapes takes one, batch and cols, comma-separated; got {args.shapes!r}"),
        (args.events < 2 * BLOCK, f"--events must be at least {2 * BLOCK}, got {args.events}"),
        (not args.rate > 0, f"--rate must be > 0, got {args.rate}"),
        (not args.seconds > 0, f"--seconds must be > 0, got {args.seconds}"),
    ):
        if wrong:
            print(f"oddsmill bench: {problem}", file=sys.stderr)
            return 2
    try:
        import river  # noqa: F401
    except ImportError:
        print("oddsmill bench: the peer needs river: pip install 'oddsmill[bench]'", file=sys.stderr)
        return 2
    progress = sys.stderr
    print("oddsmill bench: throughput by shape of traffic ...", file=progress, flush=True)
    result = run(args.events, args.rate, args.seconds, shapes, progress)
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        report(result, sys.stdout)
    return 0


if __name__ == "__main__":
    sys.exit(main())
