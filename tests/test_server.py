"""The daemon end to end, on random loopback ports, with raw pyzmq and msgpack as a producer would."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
import zmq
from oddsmill.engine import Engine, Score
from oddsmill.learner import Learner
from oddsmill.protocol import decode_body
from oddsmill.settings import LearnerSettings
from oddsmill.storage import list_journal, load_newest, read_journal

from tests.conftest import STARTED, Client, RunningServer, loopback, sparse_stream
from tests.tools import full_rows


def bodies(n: int, seed: int) -> list[dict[str, Any]]:
    """Training events, scoring requests with ids and their outcomes a few messages later."""
    out: list[dict[str, Any]] = []
    for i, (x, y) in enumerate(sparse_stream(n, seed)):
        if i % 3 == 0:
            out.append({"id": f"P{seed}-{i}", "x": x})
            if i % 2:  # half the requests get their outcome (the message right after)
                out.append({"id": f"P{seed}-{i}", "y": y})
        else:
            out.append({"x": x, "y": y})
    return out


def replay_journal(state: Path, settings: LearnerSettings) -> tuple[Engine, list[Score]]:
    engine = Engine(Learner(settings))
    scores: list[Score] = []
    for seg in list_journal(state):
        for _, arrival, body in read_journal(seg):
            scores.extend(
                r for _, r in engine.process([(arrival, it) for it in decode_body(body)]) if isinstance(r, Score)
            )
    return engine, scores


def test_scores_are_published_in_order_and_equal_an_offline_replay(tmp_path: Path) -> None:
    settings = loopback(tmp_path, checkpoint_events=500)
    learner = LearnerSettings(scale_warmup=200)
    running = RunningServer(settings, learner)
    server, ctx = running.server, running.ctx
    client = Client(ctx, server.bound["ingest"], server.bound["scores"])
    sent = bodies(900, seed=1)
    for body in sent:
        client.send(body)
    client.send({"id": "never-seen", "y": 1})
    client.send({"x": {"route_km": "far"}, "y": 7})
    expected = sum(1 for b in sent if "x" in b)
    answers = client.receive(expected + 2)
    client.close()
    running.close()
    scores = [a for t, a in answers if t == b"scores"]
    rejects = [a for t, a in answers if t == b"rejects"]
    assert [s["id"] for s in scores] == [b.get("id") for b in sent if "x" in b]
    assert sorted(r["reason"] for r in rejects) == ["bad_label", "unknown_outcome"]
    # the journal holds every message; replaying it offline gives the same scores, bit for bit
    engine, offline = replay_journal(tmp_path, learner)
    live = [s["logit"] for s in scores]
    assert [s.logit for s in offline][-len(live) :] == live  # the probes come first
    for s in scores:
        assert s["p"] == pytest.approx(1 / (1 + np.exp(-s["logit"])), rel=1e-12)
    state, _ = load_newest(tmp_path)  # type: ignore[misc]
    assert full_rows(state["engine"]["learner"])["slots"].tobytes() == engine.learner.state_dict()["slots"].tobytes()


def test_large_batches_with_ids_are_answered_whether_received_copied_or_not(tmp_path: Path) -> None:
    """Batches of 300 events with string ids (over 16 KiB: received uncopied after the first, as
    server.Receiver takes large bodies) through a live daemon, with lone events: every event
    is answered with its own id, in order, as an offline replay of the journal scores it. The
    full path reads a batch's ids as bytes; it is given bytes only (a memoryview has no decode)."""
    from oddsmill.server import LARGE_BODY

    running = RunningServer(loopback(tmp_path), LearnerSettings(scale_warmup=200))
    server = running.server
    client = Client(running.ctx, server.bound["ingest"], server.bound["scores"])
    rng = np.random.default_rng(5)
    names = [f"leg_{j}_km" for j in range(12)]
    sent: list[dict[str, Any]] = []
    for k in range(6):
        xs = [dict(zip(names, rng.normal(size=12).tolist(), strict=True)) for _ in range(300)]
        events = [{"id": f"P{k}-{i:04d}", "x": x, "y": int(i % 3 == 0)} for i, x in enumerate(xs)]
        sent.append({"batch": events})
        if k % 3 == 2:  # (after a small body, the next large one is copied again)
            sent.append({"id": f"L{k}", "x": {"leg_0_km": 1.5}, "y": 1})
    assert all(len(msgpack.packb(b)) >= LARGE_BODY for b in sent if "batch" in b)
    for b in sent:
        client.send(b)
    answers = client.receive(len(sent))
    got = [[e["id"] for e in body["batch"]] if "batch" in body else [body["id"]] for _, body in answers]
    assert got == [[e["id"] for e in b["batch"]] if "batch" in b else [b["id"]] for b in sent]
    client.close()
    running.close()
    _, scores = replay_journal(tmp_path, LearnerSettings(scale_warmup=200))
    mine = [e["logit"] for _, body in answers for e in (body["batch"] if "batch" in body else [body])]
    assert mine == [s.logit for s in scores][-len(mine) :]


def test_columnar_blocks_under_load_are_read_in_compiled_code_and_equal_an_offline_replay(tmp_path: Path) -> None:
    """Numbered columnar blocks that wait several to a wake-up, with names the daemon knows, in two
    orders: `Server._columnar` takes the blocks; every message is answered once, in order, and
    each row's logit and p equal those of an offline replay of the journal through the full path
    (`Engine.process` on the decoded bodies), bit for bit, as does the final checkpoint."""
    from oddsmill.engine import ColumnScores
    from oddsmill.server import _p

    running = RunningServer(loopback(tmp_path), LearnerSettings(scale_warmup=200))
    server = running.server
    client = Client(running.ctx, server.bound["ingest"], server.bound["scores"])
    rng = np.random.default_rng(11)
    names = ["route_km", "weight_kg", "stops", "hour"]

    def block(i: int, order: list[str]) -> dict[str, Any]:
        m = int(rng.integers(1, 300))
        rows = rng.normal(size=(m, 4)) * [30.0, 5.0, 10.0, 6.0]
        y = (rng.random(m) < 0.3).astype(int)
        return {"cols": order, "rows": rows.tobytes(), "y": bytes(y.tolist()), "src": "depot-feed", "seq": i}

    # the full path learns the names in both orders first (twice each: the vocabulary then knows them)
    sent = [block(i, names if i % 2 else names[::-1]) for i in range(4)]
    for body in sent:
        client.send(body)
    client.receive(4)
    taken: list[int] = []  # the messages of each block Server._columnar took
    columnar, handle = server._columnar, server.handle
    held = threading.Event()

    def counted(messages: Any, pub: Any, arrival: float) -> bool:
        done = columnar(messages, pub, arrival)
        if done:
            taken.append(len(messages))
        return done

    def hold(messages: Any, pub: Any, **how: Any) -> None:  # the first wake-up waits until all 80 are sent
        held.wait(30)
        handle(messages, pub, **how)

    server._columnar = counted  # type: ignore[method-assign]
    server.handle = hold  # type: ignore[method-assign]
    more = [block(i, names[::-1] if i % 9 == 0 else names) for i in range(4, 84)]
    for body in more:
        client.send(body)
    held.set()
    answers = client.receive(80)
    client.close()
    running.close()
    sent += more
    scores = [a for t, a in answers if t == b"scores"]
    assert [len(s["logit"]) // 8 for s in scores] == [len(b["y"]) for b in more]  # once each, in order
    assert sum(taken) >= 70 and max(taken) > 1, taken
    live = np.concatenate([np.frombuffer(s["logit"], dtype="<f8") for s in scores])
    p = np.concatenate([np.frombuffer(s["p"], dtype="<f8") for s in scores])
    engine = Engine(Learner(LearnerSettings(scale_warmup=200)))
    offline = []
    for seg in list_journal(tmp_path):
        for _, arrival, body in read_journal(seg):
            results = engine.process([(arrival, it) for it in decode_body(body)])
            offline += [r.logits for _, r in results if isinstance(r, ColumnScores)]
    replayed = np.concatenate(offline)[-live.shape[0] :]
    assert replayed.tobytes() == live.tobytes()
    assert p.tolist() == [_p(z) for z in live.tolist()]
    first = engine.learner.step - live.shape[0]  # each body's step: events learned before its first row
    assert [s["step"] for s in scores] == [first + sum(len(b["y"]) for b in more[:i]) for i in range(len(more))]
    state, _ = load_newest(tmp_path)  # type: ignore[misc]
    assert full_rows(state["engine"]["learner"])["slots"].tobytes() == engine.learner.state_dict()["slots"].tobytes()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start(state: Path, ingest: str, scores: str, *extra: str) -> subprocess.Popen[str]:
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "oddsmill.cli",
            "serve",
            "--state",
            str(state),
            "--ingest",
            ingest,
            "--ingest-kind",
            "pull",
            "--scores",
            scores,
            "--scale-warmup",
            "200",
            *extra,
        ],
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    STARTED.append(proc)  # (killed when the test ends, should it fail before stopping it)
    assert proc.stderr is not None
    serving = threading.Event()
    lines: list[str] = []

    def read(stream: Any) -> None:  # drains the pipe for the daemon's whole life, so it never blocks
        for line in stream:
            lines.append(line)
            if "serving:" in line:
                serving.set()

    threading.Thread(target=read, args=(proc.stderr,), daemon=True).start()
    # (a first start after any edit of the package compiles all of it: about a minute here)
    deadline = time.monotonic() + 240
    while not serving.wait(0.1):
        if proc.poll() is not None:
            raise AssertionError(f"the daemon exited with {proc.returncode}: {''.join(lines)}")
        assert time.monotonic() < deadline, f"the daemon did not start: {''.join(lines)}"
    return proc


def test_a_state_directory_in_use_is_refused_and_left_as_it_was(tmp_path: Path) -> None:
    """A second daemon on a directory a daemon serves, and a replay that would write its checkpoint
    there, are refused (exit 2, naming the holder's pid) before they read or cut anything: two
    daemons on one journal would interleave two streams in it, and each could cut the other's
    unfinished record as a torn tail. Once the first has stopped, the directory is free."""
    state = tmp_path / "state"
    first = start(state, f"tcp://127.0.0.1:{free_port()}", f"tcp://127.0.0.1:{free_port()}", "--http", "off")
    before = {p.name: p.read_bytes() for p in state.iterdir()}
    assert (state / "lock").read_text().strip() == str(first.pid)
    log = tmp_path / "log.jsonl"
    log.write_text('{"x": {"f": 1.0}, "y": 1}\n{"x": {"f": -1.0}, "y": 0}\n')
    refused = f"the state directory {state} is in use by another oddsmill process (pid {first.pid})"
    try:
        for cmd in (
            ["serve", "--state", str(state), "--ingest", f"tcp://127.0.0.1:{free_port()}", "--http", "off"],
            ["replay", str(log), "--state", str(state)],
            ["replay", str(log), "--state", str(state), "--candidates", "auto"],
        ):
            done = subprocess.run(
                [sys.executable, "-m", "oddsmill.cli", *cmd], capture_output=True, text=True, timeout=120
            )
            assert done.returncode == 2 and refused in done.stderr, (cmd, done.returncode, done.stderr)
            assert {p.name: p.read_bytes() for p in state.iterdir()} == before
    finally:
        first.terminate()
        assert first.wait(30) == 0
    # free: a replay is refused now for the state the directory holds (a replay begins a state),
    # not for a holder
    done = subprocess.run(
        [sys.executable, "-m", "oddsmill.cli", "replay", str(log), "--state", str(state)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 2 and f"{state} holds a state already" in done.stderr, done.stderr


@pytest.mark.parametrize("damage", ["middle", "tail"])
def test_a_segment_damaged_in_its_middle_is_kept_whole_before_it_is_cut(  # type: ignore[no-untyped-def]
    tmp_path: Path, damage: str, caplog
) -> None:
    """A restart cuts the last segment at its first bad record (PROTOCOL 6). A tail torn by a crash
    is cut and forgotten; a record damaged in the middle, with good records after it, is cut too,
    but the segment's bytes are kept whole beside it, and the log says so as an error."""
    import logging

    import msgpack
    from oddsmill.server import Server, ServerSettings

    class Quiet:
        def send(self, *a: Any, **k: Any) -> None:
            pass

    settings = ServerSettings(state_dir=tmp_path, http="off", fsync="block")
    server = Server(settings)
    for b in bodies(40, seed=3):
        server.handle([[b"events", msgpack.packb(b)]], Quiet())  # type: ignore[arg-type]
    server.close()  # (no checkpoint: the restart replays the whole segment)
    (seg,) = list_journal(tmp_path)
    ends = [end for end, _, _ in read_journal(seg)]
    original = seg.read_bytes()
    if damage == "middle":
        bad_at = ends[19]  # the 21st record: a byte of its payload flipped
        damaged = bytearray(original)
        damaged[bad_at + 20] ^= 0xFF
        seg.write_bytes(bytes(damaged))
    else:
        bad_at = len(original)
        seg.write_bytes(original + original[ends[0] : ends[1]][:-5])  # a record cut short
    before = seg.read_bytes()
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        restarted = Server(settings)
    restarted.close()
    assert seg.read_bytes() == before[:bad_at]
    kept = sorted(tmp_path.glob(f"{seg.name}.damaged-*"))
    if damage == "middle":
        assert len(kept) == 1 and kept[0].read_bytes() == before
        errors = [r.getMessage() for r in caplog.records if r.levelno == logging.ERROR]
        assert len(errors) == 2, errors  # the replay's reading, then the cut
        assert "the rest of the segment is not read" in errors[0]
        assert f"a damaged record at byte {bad_at}, and good records after it" in errors[1]
        assert f"keeping it whole as {kept[0].name}" in errors[1]
    else:
        assert kept == []
        assert any("cutting a torn tail" in r.getMessage() for r in caplog.records)


def test_a_state_directory_that_cannot_be_made_is_a_clear_error(tmp_path: Path) -> None:
    """`serve --state` under a path that is a file: exit 2 and one line that says why (it was a
    traceback from the directory's creation before the state directory had a holder)."""
    (tmp_path / "a-file").write_text("")
    done = subprocess.run(
        [sys.executable, "-m", "oddsmill.cli", "serve", "--state", str(tmp_path / "a-file" / "s"), "--http", "off"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 2
    assert done.stderr == f"oddsmill: cannot use the state directory {tmp_path / 'a-file' / 's'}: Not a directory\n"


def terminate(proc: subprocess.Popen[str]) -> None:
    """SIGTERM: the daemon checkpoints and exits 0 within seconds."""
    t0 = time.monotonic()
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(10) == 0
    assert time.monotonic() - t0 < 5


def checkpoint_and_replay(state_dir: Path) -> tuple[dict[str, Any], dict[str, Any], Engine]:
    """The newest checkpoint, its learner's full rows, and the engine replaying the journal gives
    (the daemons of these tests learn with scale_warmup 200)."""
    state, _ = load_newest(state_dir)  # type: ignore[misc]
    engine, _ = replay_journal(state_dir, LearnerSettings(scale_warmup=200))
    return state, full_rows(state["engine"]["learner"]), engine


def test_sigterm_checkpoints_and_restarts_after_kill_resume_exactly(tmp_path: Path) -> None:
    ingest, scores = f"tcp://127.0.0.1:{free_port()}", f"tcp://127.0.0.1:{free_port()}"
    ctx: zmq.Context[Any] = zmq.Context()
    sent = bodies(1500, seed=2)
    parts = [sent[:500], sent[500:1000], sent[1000:]]
    for k, part in enumerate(parts):
        proc = start(tmp_path, ingest, scores)
        client = Client(ctx, ingest, scores)
        for body in part:
            client.send(body)
        client.receive(sum(1 for b in part if "x" in b))
        client.close()
        if k == 1:
            proc.kill()  # kill -9: no checkpoint; the journal has it all
            assert proc.wait(10) == -signal.SIGKILL
        else:
            terminate(proc)
    ctx.term()
    state, mine, engine = checkpoint_and_replay(tmp_path)
    theirs = engine.learner.state_dict()
    assert mine["scalars"].tobytes() == theirs["scalars"].tobytes()
    assert mine["slots"].tobytes() == theirs["slots"].tobytes()
    assert state["engine"]["metrics"]["sum"] == engine.metrics.sum
    assert engine.learner.step == sum(1 for b in sent if "y" in b)  # training events and joined outcomes


def test_http_metrics_status_and_health(tmp_path: Path) -> None:
    import json
    import urllib.request

    from prometheus_client.parser import text_string_to_metric_families
    from sklearn.metrics import log_loss  # Source: scikit-learn's log_loss on the published scores

    settings = loopback(tmp_path, http="127.0.0.1:0")
    running = RunningServer(settings, LearnerSettings(scale_warmup=200))
    server, ctx = running.server, running.ctx
    base = f"http://{server.bound['http']}"
    client = Client(ctx, server.bound["ingest"], server.bound["scores"])
    sent = bodies(600, seed=3)
    for body in sent:
        client.send(body)
    answers = client.receive(sum(1 for b in sent if "x" in b))
    learned = sum(1 for b in sent if "y" in b)
    # The loop took no snapshot while nobody asked (one at its start, and none of the 600
    # messages'), and the first request gets one taken after it asked: every answer received
    # before it is in its figures.
    taken = server.board._generation
    assert taken <= 2
    doc = json.loads(urllib.request.urlopen(f"{base}/api/status", timeout=5).read())
    assert doc["step"] == learned and server.board._generation > taken
    assert {"step", "features", "log_loss", "log_loss_window", "pending_outcomes"} <= set(doc)
    text = urllib.request.urlopen(f"{base}/metrics", timeout=5).read().decode()
    samples = {
        (s.name, tuple(sorted(s.labels.items()))): s.value
        for fam in text_string_to_metric_families(text)
        for s in fam.samples
    }
    assert samples[("oddsmill_updates_total", ())] == learned
    assert samples[("oddsmill_events_total", (("kind", "train"),))] == sum(1 for b in sent if "x" in b and "y" in b)
    assert samples[("oddsmill_pending_outcomes", ())] == doc["pending_outcomes"]
    # the progressive log-loss is computed on the scores that were published
    labels = {}
    for b in sent:
        if "y" in b and "id" in b:
            labels[b["id"]] = b["y"]
    scores = [a for t, a in answers if t == b"scores"]
    ps, ys = [], []
    train = [b for b in sent if "x" in b]
    for body, s in zip(train, scores, strict=True):
        y = body.get("y", labels.get(body.get("id")))
        if y is not None:
            ps.append(s["p"])
            ys.append(y)
    assert samples[("oddsmill_log_loss", ())] == pytest.approx(log_loss(ys, ps, labels=[0, 1]), rel=1e-9)
    assert doc["log_loss"] == samples[("oddsmill_log_loss", ())]
    assert urllib.request.urlopen(f"{base}/healthz", timeout=5).status == 200
    for path in ("/healthz", "/metrics", "/api/status", "/"):  # HEAD: GET's status and headers, no body
        with urllib.request.urlopen(urllib.request.Request(f"{base}{path}", method="HEAD"), timeout=5) as r:
            assert r.status == 200 and r.read() == b"" and int(r.headers["Content-Length"]) > 0, path
            assert r.headers["Server"] == "oddsmill", r.headers["Server"]  # (not Python's version)
    client.close()
    running.close()


def test_metric_exposition_of_a_fixed_snapshot() -> None:
    from oddsmill.metrics import Board, Snapshot
    from prometheus_client import CollectorRegistry, generate_latest

    board = Board(CollectorRegistry())
    board.snapshot = Snapshot(
        step=42,
        features=7,
        log_loss=0.5,
        log_loss_sum=21.0,
        log_loss_count=42,
        log_loss_window=0.25,
        events={"train": 40, "score": 5, "outcome": 2},
        rejected={"bad_label": 3},
        lost=1,
        learning_rate=0.125,
    )
    lines = generate_latest(board.registry).decode().splitlines()
    for expected in [
        "# TYPE oddsmill_events_total counter",
        'oddsmill_events_total{kind="train"} 40.0',
        'oddsmill_events_total{kind="outcome"} 2.0',
        'oddsmill_events_rejected_total{reason="bad_label"} 3.0',
        'oddsmill_events_rejected_total{reason="duplicate"} 0.0',
        "oddsmill_events_lost_total 1.0",
        "oddsmill_updates_total 42.0",
        "oddsmill_log_loss_sum_total 21.0",
        "oddsmill_log_loss_count_total 42.0",
        "# TYPE oddsmill_log_loss gauge",
        "oddsmill_log_loss 0.5",
        "oddsmill_log_loss_window 0.25",
        "oddsmill_learning_rate 0.125",
        "oddsmill_features 7.0",
        'oddsmill_pending_dropped_total{why="expired"} 0.0',
        "# TYPE oddsmill_score_latency_seconds histogram",
        "# TYPE oddsmill_batch_seconds histogram",
    ]:
        assert expected in lines, expected


def test_timings_expose_what_prometheus_clients_histogram_would() -> None:
    """The loop's histograms (metrics.Timings, filled in bulk) against prometheus_client's own
    Histogram fed the same values one observe at a time: the same exposition, line for line, but
    for the creation time. The values include every bucket bound (le counts a value on it) and
    values past the last; the fold runs in parts, as the loop's snapshots do."""
    from oddsmill.metrics import LATENCY_BUCKETS, Timings
    from prometheus_client import CollectorRegistry, Histogram, generate_latest

    rng = np.random.default_rng(5)
    values = [*LATENCY_BUCKETS, *rng.lognormal(-7, 2, size=500).tolist(), 3.0, 0.0]
    ours_registry, theirs_registry = CollectorRegistry(), CollectorRegistry()
    ours = Timings("t_seconds", "Timings.", LATENCY_BUCKETS, ours_registry)
    theirs = Histogram("t_seconds", "Timings.", buckets=LATENCY_BUCKETS, registry=theirs_registry)

    def lines(registry: CollectorRegistry) -> list[str]:
        return [x for x in generate_latest(registry).decode().splitlines() if not x.startswith("t_seconds_created")]

    for lo in range(0, len(values), 128):
        for v in values[lo : lo + 128]:
            ours.observe(v)
            theirs.observe(v)
        assert lines(ours_registry) != lines(theirs_registry)  # not folded yet: a scrape sees the last fold
        ours.fold()
        ours_lines, theirs_lines = lines(ours_registry), lines(theirs_registry)
        sums = (
            [x for x in ours_lines if x.startswith("t_seconds_sum")],
            [x for x in theirs_lines if x.startswith("t_seconds_sum")],
        )
        # the sum is added in another order (numpy's pairwise sum of each fold): equal to rounding
        assert float(sums[0][0].split()[1]) == pytest.approx(float(sums[1][0].split()[1]), rel=1e-12)
        assert [x for x in ours_lines if "_sum" not in x] == [x for x in theirs_lines if "_sum" not in x]
    assert f"t_seconds_count {float(len(values))}" in lines(ours_registry)
    # a block's answers, observed at once (`observe_many`): as many observes of the same value
    for v, n in zip(values[::37], range(1, 500, 29), strict=False):
        ours.observe_many(v, n)
        for _ in range(n):
            theirs.observe(v)
        ours.observe(v / 3)
        theirs.observe(v / 3)
    ours.fold()
    ours_lines, theirs_lines = lines(ours_registry), lines(theirs_registry)
    assert [x for x in ours_lines if "_sum" not in x] == [x for x in theirs_lines if "_sum" not in x]
    sums = [float(x.split()[1]) for got in (ours_lines, theirs_lines) for x in got if x.startswith("t_seconds_sum")]
    assert len(sums) == 2 and sums[0] == pytest.approx(sums[1], rel=1e-12)


def test_the_score_latency_counts_each_message_a_block_answers(tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """A block on the full path (`Server._block`: a fresh daemon's first block, names it does not
    know yet) answers each training message and request with a score, and refuses an outcome
    for an id it never held. The histogram "from a message's arrival to its score being
    published" (PROTOCOL 8) counted such a block once."""
    from oddsmill.server import Server
    from prometheus_client import generate_latest

    from tests.conftest import handled_once

    blocks: list[int] = []
    full_path = Server._block

    def counted(self: Server, messages: list[list[bytes]], *a: Any) -> None:
        blocks.append(len(messages))
        full_path(self, messages, *a)

    monkeypatch.setattr(Server, "_block", counted)
    rng = np.random.default_rng(2)
    bodies = [{"x": {"route_km": float(rng.normal(20, 5)), "express": bool(i % 2)}, "y": i % 3 == 0} for i in range(10)]
    bodies += [{"id": "P-1", "x": {"route_km": 4.0}}, {"id": "P-404", "y": 1}]
    server = handled_once(tmp_path / "s", bodies)
    assert blocks == [12]
    assert server.engine.counters.rejected == {"unknown_outcome": 1}
    server.board.score_latency.fold()
    assert "oddsmill_score_latency_seconds_count 11.0" in generate_latest(server.board.registry).decode().splitlines()


def test_a_full_vocabulary_is_counted_logged_once_and_shown(tmp_path: Path, caplog) -> None:  # type: ignore[no-untyped-def]
    """Names past max_features get no slot and are not learned. That was counted only in
    `inspect --json`: no metric, no log line, nothing on the dashboard, so a stream that outgrew
    its vocabulary lost its new features in silence."""
    import logging

    from oddsmill.metrics import status_document
    from prometheus_client import generate_latest

    from tests.conftest import handled_once

    bodies = [{"x": {f"f{j}": float(i + j) for j in range(5)}, "y": i % 2} for i in range(4)]
    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        server = handled_once(tmp_path / "s", bodies, LearnerSettings(max_features=3))
        server._refresh()
        server._refresh()
    assert server.engine.learner.n_features == 3
    exposed = generate_latest(server.board.registry).decode().splitlines()
    assert "oddsmill_features_ignored_total 8.0" in exposed  # f3 and f4 of four events
    assert status_document(server.board.snapshot, time.time())["features_ignored"] == 8
    said = [r.getMessage() for r in caplog.records if "vocabulary is full" in r.getMessage()]
    assert said == [
        "the vocabulary is full (max_features 3): feature names not seen before are ignored from now on"
        " (8 values so far, oddsmill_features_ignored_total); raise --max-features, or send fewer names"
    ]


def test_the_journals_bytes_and_the_free_disk_are_exposed(tmp_path: Path) -> None:
    """Every journal segment is kept unless --journal-keep says otherwise, and a full disk stops
    the learning: the daemon now exposes both figures. Sources of the checks: the files' sizes
    from os.path.getsize, and the free bytes from the standard library's shutil.disk_usage (the
    same statvfs figure; other writers on this disk may move it a little between the two reads)."""
    import shutil

    from prometheus_client import generate_latest

    from tests.conftest import handled_once

    state = tmp_path / "s"
    # a block larger than a segment: the segment it went to, and the next one begun after it
    server = handled_once(state, [{"x": {"route_km": float(i)}, "y": i % 2} for i in range(50)], segment_bytes=512)
    server._refresh()
    exposed = dict(
        line.split(" ", 1) for line in generate_latest(server.board.registry).decode().splitlines() if line[:1] != "#"
    )
    sizes = sorted(os.path.getsize(p) for p in state.iterdir() if p.name.startswith("journal-"))
    assert len(sizes) == 2 and sizes[0] < sizes[1]  # (so neither alone is the sum)
    assert float(exposed["oddsmill_journal_bytes"]) == sum(sizes)
    assert float(exposed["oddsmill_state_free_bytes"]) == pytest.approx(shutil.disk_usage(state).free, abs=64 << 20)


def test_the_block_time_histogram_tells_the_demos_blocks_apart(tmp_path: Path) -> None:
    """The demo's events through a live daemon, a block at a time (each message sent after the
    answer before): batches of 50, and lone events. Their times fall in several buckets of
    oddsmill_batch_seconds; with prometheus_client's default buckets (5 ms and up) every block
    of the demo fell in the first."""
    from oddsmill.logs import read_bodies
    from oddsmill.metrics import BLOCK_BUCKETS, LATENCY_BUCKETS
    from oddsmill.settings import LearnerSettings
    from prometheus_client import generate_latest

    from tests.conftest import DEMO

    for bounds in (BLOCK_BUCKETS, LATENCY_BUCKETS):
        assert bounds[0] <= 0.000025 and all(b / a <= 2.5 + 1e-9 for a, b in zip(bounds, bounds[1:], strict=False))
    events = [body for _, body, _ in read_bodies([str(DEMO)]) if "x" in body][:2000]
    running = RunningServer(loopback(tmp_path / "s"), LearnerSettings())
    client = Client(running.ctx, running.server.bound["ingest"], running.server.bound["scores"])
    try:
        for lo in range(0, 1500, 50):
            client.send({"batch": events[lo : lo + 50]})
            client.receive(1)
        for body in events[1500:1530]:
            client.send(body)
            client.receive(1)
    finally:
        client.close()
        running.close()
    board = running.server.board
    board.batch_seconds.fold()
    lines = generate_latest(board.registry).decode().splitlines()
    cumulative = [float(x.split()[1]) for x in lines if x.startswith("oddsmill_batch_seconds_bucket")]
    counts = [b - a for a, b in zip([0.0, *cumulative], cumulative, strict=False)]
    assert cumulative[-1] >= 60 and sum(c > 0 for c in counts) >= 2, counts


WARM_CHECK = r"""
import sys
from pathlib import Path
import msgpack, numpy as np, zmq
from numba.core.registry import CPUDispatcher
from oddsmill.server import Receiver, Server, ServerSettings

def compiled():
    return {f"{name}.{attr}": len(obj.signatures) for name, mod in list(sys.modules.items())
            if name.startswith("oddsmill") for attr, obj in vars(mod).items() if isinstance(obj, CPUDispatcher)}

server = Server(ServerSettings(state_dir=Path(sys.argv[1])))  # loads the state, warms up
before = compiled()
ctx = zmq.Context()
pub = ctx.socket(zmq.PUB)
pub.bind("inproc://warm")
rng = np.random.default_rng(0)
names = [f"route_km_{j}" for j in range(20)]
def one(i, y=True, ident=True):
    body = {"x": dict(zip(names, rng.normal(size=20).tolist()))}
    if y:
        body["y"] = int(rng.random() < 0.3)
    if ident:
        body["id"] = i
    return [b"events", msgpack.packb(body)]
rows = rng.normal(size=(500, 20))
labels = (rng.random(500) < 0.3).astype(np.uint8).tobytes()
work = [
    [one(0)],  # a block of one: the full path
    [one(i) for i in range(1, 12)],  # one-event messages read together
    [[b"events", msgpack.packb({"cols": names, "rows": rows.tobytes(), "y": labels})]],
    [[b"events", msgpack.packb({"batch": [{"x": dict(zip(names, r.tolist())), "y": 1} for r in rows[:50]]})]],
    [one(100, y=False)],  # a scoring request held...
    [[b"events", msgpack.packb({"id": 100, "y": 1})]],  # ...and its outcome
    [one(i, ident=False) for i in range(20)],
    [one(i) for i in range(20, 23)],  # the names of the last block: learned in compiled code (quick.py)
    [[b"events", msgpack.packb({"x": {"depot": "Eastgate", "stops_before": 2.0}, "y": 0})]],
]
# columnar blocks as the loop receives them (server.Receiver): the second and third uncopied
pull, push = ctx.socket(zmq.PULL), ctx.socket(zmq.PUSH)
pull.bind("inproc://warm-ingest")
push.connect("inproc://warm-ingest")
for k in range(3):
    body = {"cols": names, "rows": rows.tobytes(), "y": labels, "src": "depot-2", "seq": k + 1}
    push.send_multipart([b"events", msgpack.packb(body)])
receive = Receiver(pull)
work.append([receive() for _ in range(3)])
assert sum(type(m[1]) is memoryview for m in work[-1]) == 2
for block in work:
    server.handle(block, pub)
grew = sorted(k for k, v in compiled().items() if v != before.get(k, 0))
print(" ".join(grew) if grew else "nothing")
"""


def test_warm_up_leaves_nothing_to_compile_or_load_for_the_loop(tmp_path: Path) -> None:
    """In a fresh process, the daemon's start-up loads every compiled function the loop calls:
    one-event messages alone and read together, batches, a columnar block, a held request and its
    outcome, one-hot features then compile or load nothing more (a function first loaded in the
    loop held its block up by 3 to 4 ms; the first compiled call of a process, by half a second).
    Its state is in this test's directory (in one of its own, each run left 65 MB in /tmp)."""
    out = subprocess.run(
        [sys.executable, "-c", WARM_CHECK, str(tmp_path)], capture_output=True, text=True, timeout=300, check=True
    )
    assert out.stdout.strip() == "nothing", out.stdout + out.stderr


def test_large_bodies_are_received_uncopied_while_they_come() -> None:
    """server.Receiver over a real socket: each frame as sent, a bytes object except a large body
    (LARGE_BODY bytes or more) after a large one, which is a memoryview of the frame ZeroMQ holds;
    the first small body after them is copied again. Every frame of the block comes in order."""
    from oddsmill.server import LARGE_BODY, Receiver, _as_bytes

    ctx: zmq.Context[Any] = zmq.Context()
    pull, push = ctx.socket(zmq.PULL), ctx.socket(zmq.PUSH)
    try:
        pull.bind("inproc://receiver")
        push.connect("inproc://receiver")
        big, small = LARGE_BODY, 200
        sizes = [small, big, big + 1, 80_000, small, big - 1, big, small, 3 * big, big]
        sent = [[b"events", bytes([k]) * n] for k, n in enumerate(sizes)]
        sent.append([b"events", bytes(big), b"a third frame"])
        for message in sent:
            push.send_multipart(message)
        receive = Receiver(pull)
        got = [receive() for _ in sent]
        kinds = [[type(f).__name__ for f in frames] for frames in got]
        assert [k[1] for k in kinds] == [
            "bytes",  # small
            "bytes",  # the first large one: copied, and the next is taken uncopied
            "memoryview",
            "memoryview",
            "bytes",  # small: copied, and copies from here on
            "bytes",
            "bytes",  # large after a small one
            "bytes",
            "bytes",
            "memoryview",
            "memoryview",  # (the body of a message of three frames)
        ]
        assert all(k[0] == "bytes" for k in kinds) and kinds[-1][2] == "bytes"
        # read-only, as bytes are: numpy's view of a writable buffer is another type to numba
        assert all(f.readonly for m in got for f in m if type(f) is memoryview)
        assert _as_bytes(got) == sent and all(type(f) is bytes for m in _as_bytes(got) for f in m)
        assert [[bytes(f) for f in m] for m in got] == sent
        plain = [list(m) for m in sent]
        assert _as_bytes(plain) is plain  # (nothing to copy: the block itself)
    finally:
        pull.close(0)
        push.close(0)
        ctx.term()


@pytest.mark.parametrize("most,most_bytes", [(4096, 5000), (7, 1 << 20), (3, 2000), (1, 10)])
def test_a_wake_up_takes_at_most_block_max_messages_and_block_bytes(most: int, most_bytes: int) -> None:
    """The loop's drain (server._drain) over a backlog of messages of mixed sizes (lone events to
    columnar blocks): the blocks take the queue in order, none has more than `most` messages, each
    stops taking messages once it holds `most_bytes` (its last may cross it), and a block ends
    early only when the queue is empty."""
    from oddsmill import server as server_module

    rng = np.random.default_rng(3)
    queue = [
        [b"events", bytes(int(n))] for n in rng.choice([40, 400, 1500, 82_000], size=300, p=[0.4, 0.4, 0.15, 0.05])
    ]
    waiting_now = list(queue)

    def recv(flags: int = 0) -> list[bytes]:
        assert flags == zmq.NOBLOCK
        return waiting_now.pop(0)

    def waiting() -> int:
        return int(zmq.POLLIN) if waiting_now else 0

    blocks = []
    while waiting_now:
        blocks.append(server_module._drain(waiting_now.pop(0), recv, waiting, most, most_bytes))
    assert [m for b in blocks for m in b] == queue
    for k, block in enumerate(blocks):
        sizes = [sum(map(len, m)) for m in block]
        assert len(block) <= most and sum(sizes[:-1]) < most_bytes
        if k < len(blocks) - 1:  # it ended at a bound, not for want of messages
            assert len(block) == most or sum(sizes) >= most_bytes
    assert len(blocks) > 1 and (most == 1 or max(map(len, blocks)) > 1)


def test_the_strongest_features_show_at_once_and_follow_the_serving_engine(tmp_path: Path) -> None:
    """The ranking of coefficients is kept for RANKING_SECONDS; a fresh daemon's first ranking
    (no features yet) was kept too, so its dashboard said "no features learned yet" beside a count
    of features, and after a race's switch it ranked the candidate that served before."""
    from oddsmill.metrics import TOP_COEFFICIENTS

    from tests.conftest import handled_once

    def names(top: list[dict[str, Any]]) -> list[str]:
        return [c["feature"] for c in top]

    bodies = [{"x": {"route_km": float(i % 7), "stops_before": float(i % 3)}, "y": i % 2} for i in range(40)]
    server = handled_once(tmp_path / "s", bodies)
    server._refresh()
    shown = server.board.snapshot
    intercept, top = server.engine.learner.top_coefficients(TOP_COEFFICIENTS)
    assert set(names(top)) == {"route_km", "stops_before"}
    assert names(shown.coefficients) == names(top) and shown.intercept == intercept
    # another engine serves, as `_serve` makes the race's serving candidate the server's engine
    other = Engine(Learner())
    other.process(
        [(0.0, it) for b in bodies for it in decode_body({"x": {"weight_kg": b["x"]["route_km"]}, "y": b["y"]})]
    )
    server.engine = other
    server._refresh()
    assert names(server.board.snapshot.coefficients) == ["weight_kg"]
