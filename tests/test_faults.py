"""Write failures: a failed fsync (injected) and a full disk (a real, small tmpfs). The daemon keeps
scoring, stops learning and journaling, answers 503 on /healthz, logs once, and resumes on its own
when writes succeed again, losing nothing it accepted: afterwards the journal holds every message
exactly once and the state equals an offline replay of it, bit for bit."""

from __future__ import annotations

import errno
import logging
import os
import subprocess
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
from oddsmill import storage
from oddsmill.server import ServerSettings
from oddsmill.settings import LearnerSettings
from oddsmill.storage import list_journal, load_newest, read_journal

from tests.conftest import PROBE, Client, RunningServer, loopback
from tests.test_server import bodies, replay_journal
from tests.tools import full_rows, one_call_statuses


def health(http: str) -> int:
    try:
        with urllib.request.urlopen(f"http://{http}/healthz", timeout=5) as r:
            return int(r.status)
    except urllib.error.HTTPError as e:
        return int(e.code)


def metric(http: str, name: str) -> float:
    with urllib.request.urlopen(f"http://{http}/metrics", timeout=5) as r:
        for line in r.read().decode().splitlines():
            if line.startswith(name + " "):
                return float(line.split()[1])
    raise AssertionError(f"{name} is not exposed")


def wait_for(what: str, check: Any, timeout: float = 20.0) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.05)


def journaled(state: Path) -> list[bytes]:
    return [raw for seg in list_journal(state) for _, _, raw in _raw_records(seg)]


def _raw_records(seg: Path) -> Iterator[tuple[int, float, bytes]]:
    import msgpack

    for end, arrival, body in read_journal(seg):
        yield end, arrival, msgpack.packb(body)


def assert_state_is_the_replay_of_the_journal(state: Path, learner: LearnerSettings) -> None:
    saved, _ = load_newest(state)  # type: ignore[misc]
    engine, _ = replay_journal(state, learner)
    mine, theirs = full_rows(saved["engine"]["learner"]), engine.learner.state_dict()
    assert mine["scalars"].tobytes() == theirs["scalars"].tobytes()
    assert mine["slots"].tobytes() == theirs["slots"].tobytes()
    assert saved["engine"]["metrics"]["sum"] == engine.metrics.sum


def serving(settings: ServerSettings, learner: LearnerSettings) -> tuple[RunningServer, str, Client]:
    """A daemon in a thread, its HTTP address, and a client connected to it."""
    running = RunningServer(settings, learner)
    server = running.server
    return running, server.bound["http"], Client(running.ctx, server.bound["ingest"], server.bound["scores"])


def failing_fsync(monkeypatch: pytest.MonkeyPatch, delay: float = 0.0) -> dict[str, bool]:
    """os.fsync fails (EIO, after `delay` s: a slow disk) while the returned switch is on."""
    real_fsync = os.fsync
    failing = {"on": True}

    def fsync(fd: int) -> None:
        if failing["on"]:
            time.sleep(delay)
            raise OSError(errno.EIO, "Input/output error (injected)")
        real_fsync(fd)

    monkeypatch.setattr(storage.os, "fsync", fsync)
    return failing


def send_through_an_outage(client: Client, http: str, during: list[dict[str, Any]]) -> None:
    """Send while fsync fails: every message is still scored, and the outage shows (503, counted)."""
    for b in during:
        client.send(b)
    answers = client.receive(len(during))  # scoring goes on
    assert all(topic == b"scores" for topic, _ in answers)
    wait_for("the 503", lambda: health(http) == 503)
    assert metric(http, "oddsmill_state_writable") == 0.0
    assert metric(http, "oddsmill_write_failures_total") == 1.0


def finish_and_check_the_journal(
    running: RunningServer,
    client: Client,
    after: list[dict[str, Any]],
    sent: list[dict[str, Any]],
    learner: LearnerSettings,
) -> list[bytes]:
    """Send what follows the outage and stop; every accepted message is in the journal exactly
    once, in order, and the checkpoint is the replay of the journal. Returns the journal's bodies."""
    import msgpack

    for b in after:
        client.send(b)
    client.receive(len(after))
    client.close()
    running.close()
    state = running.server.settings.state_dir
    records = journaled(state)
    assert records[-len(sent) :] == [msgpack.packb(b) for b in sent]
    assert_state_is_the_replay_of_the_journal(state, learner)
    return records


def test_a_failed_fsync_pauses_learning_and_nothing_accepted_is_lost(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    settings = loopback(tmp_path, http="127.0.0.1:0", fsync="block")
    learner = LearnerSettings(scale_warmup=100)
    running, http, client = serving(settings, learner)
    server = running.server
    sent = [b for b in bodies(900, seed=7) if "x" in b and "y" in b]  # training events: one score each
    first, during, after = sent[:300], sent[300:600], sent[600:]

    for b in first:
        client.send(b)
    client.receive(len(first))
    step_before = server.engine.learner.step

    failing = failing_fsync(monkeypatch)
    with caplog.at_level(logging.ERROR, logger="oddsmill"):
        send_through_an_outage(client, http, during)
        assert server.engine.learner.step == step_before  # learning paused
        wait_for(f"the held count {len(server.held)}", lambda: metric(http, "oddsmill_outage_held") == len(during))
        failing["on"] = False  # the disk answers again: the daemon notices by itself
        wait_for("recovery", lambda: health(http) == 200)
    outage_logs = [r for r in caplog.records if "cannot write the state directory" in r.getMessage()]
    assert len(outage_logs) == 1, "an outage is logged once, not once per retry"
    assert metric(http, "oddsmill_state_writable") == 1.0
    import msgpack

    records = finish_and_check_the_journal(running, client, after, sent, learner)
    assert all(msgpack.unpackb(r) == PROBE for r in records[: -len(sent)])  # the handshake's
    assert server.engine.learner.step == step_before + len(during) + len(after)


def test_a_failed_background_fsync_is_noticed_and_nothing_accepted_is_lost(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    """With fsync = "interval" the fsync runs beside the loop. When one fails, the records since the
    last good one are not taken as safe: the outage begins, they are written again on recovery, and
    the journal and the state come out as if nothing had happened."""
    settings = loopback(tmp_path, http="127.0.0.1:0", fsync="interval", fsync_ms=1.0)
    learner = LearnerSettings(scale_warmup=100)
    running, http, client = serving(settings, learner)
    server = running.server
    sent = [b for b in bodies(900, seed=8) if "x" in b and "y" in b]
    first, during, after = sent[:300], sent[300:600], sent[600:]
    for lo in range(0, len(first), 20):
        for b in first[lo : lo + 20]:
            client.send(b)
        client.receive(len(first[lo : lo + 20]))
    failing = failing_fsync(monkeypatch, delay=0.01)  # a slow disk, then the error: the loop goes on
    with caplog.at_level(logging.ERROR, logger="oddsmill"):
        send_through_an_outage(client, http, during)
        failing["on"] = False
        wait_for("recovery", lambda: health(http) == 200)
    assert len([r for r in caplog.records if "cannot write the state directory" in r.getMessage()]) == 1
    finish_and_check_the_journal(running, client, after, sent, learner)
    assert server.engine.learner.step == len(sent)


def test_large_columnar_blocks_received_uncopied_survive_a_failed_fsync(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Columnar blocks of 3,000 rows (192 KB: received as memoryviews of ZeroMQ's frames, not
    copied; server.Receiver), numbered, some with a row to score, between lone events (received
    as bytes again). Their bodies are kept until an fsync covers them; one fails, and the recovery
    writes them again. The journal holds every message once, byte for byte, and the state is its
    replay."""
    from oddsmill import server as server_module

    settings = loopback(tmp_path, http="127.0.0.1:0", fsync="interval", fsync_ms=1.0)
    learner = LearnerSettings(scale_warmup=100)
    running, http, client = serving(settings, learner)
    rng = np.random.default_rng(11)
    names = ["route_km", "stops", "parcel_kg", "van_age", "driver_shift", "depot_load", "rain_mm", "hour"]
    sent: list[dict[str, Any]] = []
    for k in range(24):
        rows = rng.normal(size=(3000, len(names))) * 4
        y = (rng.random(3000) < 0.3).astype(np.uint8)
        sent.append({"cols": names, "rows": rows.tobytes(), "y": y.tobytes(), "src": "depot-7", "seq": k + 1})
        if k % 4 == 3:
            sent.append({"x": dict(zip(names, rows[0].tolist(), strict=True)), "y": 1})
    assert all(len(msgpack.packb(b)) >= server_module.LARGE_BODY for b in sent if "cols" in b)
    uncopied = 0
    columnar = server_module.Server._columnar

    def counted(self: Any, messages: Any, *a: Any) -> Any:
        nonlocal uncopied
        uncopied += sum(type(m[1]) is memoryview for m in messages)
        return columnar(self, messages, *a)

    monkeypatch.setattr(server_module.Server, "_columnar", counted)
    first, during, after = sent[:10], sent[10:20], sent[20:]
    for b in first:
        client.send(b)
    client.receive(len(first))
    failing = failing_fsync(monkeypatch, delay=0.01)
    send_through_an_outage(client, http, during)
    failing["on"] = False
    wait_for("recovery", lambda: health(http) == 200)
    finish_and_check_the_journal(running, client, after, sent, learner)
    assert uncopied >= 6, uncopied
    assert running.server.engine.learner.step == sum(3000 if "cols" in b else 1 for b in sent)


def test_records_are_synced_when_traffic_stops(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """With fsync = "interval", a block journaled while the last background fsync is still running
    starts none of its own. When no block follows (traffic stops), the loop's chores start the due
    fsync: the records become safe without waiting for the next message or the next checkpoint (a
    minute by default). Found when the failing-fsync test above waited 20 s in vain for its outage
    under CI's load: its last blocks had come while a slow fsync ran, and nothing synced them."""
    real_fsync = os.fsync

    def slow_fsync(fd: int) -> None:  # a slow disk: the first block's fsync outlasts the second block
        time.sleep(0.3)
        real_fsync(fd)

    settings = loopback(tmp_path, http="127.0.0.1:0", fsync="interval", fsync_ms=1.0)
    running, _, client = serving(settings, LearnerSettings(scale_warmup=100))
    server = running.server
    monkeypatch.setattr(storage.os, "fsync", slow_fsync)
    a, b = [x for x in bodies(50, seed=3) if "x" in x and "y" in x][:2]
    client.send(a)
    client.receive(1)  # its block started a background fsync, which takes 0.3 s
    client.send(b)
    client.receive(1)  # its block found that fsync in flight, and started none
    assert server.base_records < server.records
    wait_for("the records synced", lambda: server.base_records == server.records, timeout=5.0)
    client.close()
    running.close()


@pytest.fixture
def small_disk(tmp_path: Path) -> Iterator[Path]:
    """A 600 KiB tmpfs: a disk that fills. Mounting needs root (CI runs as root here)."""
    mnt = tmp_path / "disk"
    mnt.mkdir()
    mount = ["mount", "-t", "tmpfs", "-o", "size=600k", "tmpfs", str(mnt)]
    done = subprocess.run(mount, capture_output=True, text=True)
    if done.returncode != 0:
        message = f"cannot mount a tmpfs here: {done.stderr.strip()}"
        if os.environ.get("CI") == "true" and os.geteuid() == 0:
            pytest.fail(message)
        pytest.skip(message)
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def test_a_full_disk_pauses_learning_and_resumes_when_space_returns(small_disk: Path) -> None:
    state = small_disk / "state"
    settings = loopback(state, http="127.0.0.1:0", fsync="interval", fsync_ms=50.0, checkpoint_events=2000)
    learner = LearnerSettings(scale_warmup=100)
    running, http, client = serving(settings, learner)
    server = running.server
    sent = [b for b in bodies(12_000, seed=8) if "x" in b and "y" in b]
    batches = [sent[lo : lo + 100] for lo in range(0, len(sent), 100)]
    full_at = None
    for k, batch in enumerate(batches):
        client.send({"batch": batch})
        topic, answer = client.receive(1)[0]
        assert topic == b"scores" and len(answer["batch"]) == len(batch)  # every event scored
        if full_at is None and health(http) == 503:
            full_at = k
    assert full_at is not None and full_at < len(batches) - 10, f"the disk filled at batch {full_at}: resize the tmpfs"
    assert metric(http, "oddsmill_state_writable") == 0.0
    wait_for("the held count", lambda: metric(http, "oddsmill_outage_held") >= len(batches) - full_at - 1)
    held = metric(http, "oddsmill_outage_held")
    step_during = server.engine.learner.step
    subprocess.run(["mount", "-o", "remount,size=32m", str(small_disk)], check=True)
    wait_for("recovery", lambda: health(http) == 200)
    assert server.engine.learner.step > step_during
    client.close()
    running.close()
    import msgpack

    records = journaled(state)
    batches_journaled = [r for r in records if b"batch" in r[:8]]
    assert batches_journaled == [msgpack.packb({"batch": b}) for b in batches]
    assert server.engine.learner.step == len(sent)  # every training event learned once (probes have no label)
    assert_state_is_the_replay_of_the_journal(state, learner)
    print(f"disk full at batch {full_at} of {len(batches)}; {held:.0f} messages held, all journaled and learned")


def test_a_disk_that_fills_under_lone_messages_holds_them_and_loses_nothing(
    small_disk: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Lone training messages of known names take the quick path's one compiled call, which writes
    their journal records itself (quick.py), and soon a wake-up in one call (intake.py). When that
    write fails (the disk fills), nothing of the message is learned and the daemon holds it, as the
    full path does; once space returns, every message is in the journal once, in order, learned
    once, and the state is its replay."""
    from oddsmill.quick import WRITE_FAILED

    state = small_disk / "state"
    settings = loopback(state, http="127.0.0.1:0", fsync="interval", fsync_ms=50.0, checkpoint_events=10**6)
    learner = LearnerSettings(scale_warmup=100)
    found = one_call_statuses(monkeypatch)
    running, http, client = serving(settings, learner)
    server = running.server
    rng = np.random.default_rng(12)
    names = [f"leg_{j}_km" for j in range(20)]
    sent: list[dict[str, Any]] = []
    while health(http) == 200:
        assert len(sent) < 20_000, "the disk never filled: resize the tmpfs"
        body = {
            "x": dict(zip(names, rng.normal(size=20).tolist(), strict=True)),
            "y": len(sent) % 3 == 0,
            "id": len(sent),
        }
        client.send(body)
        sent.append(body)
        assert client.receive(1)[0][1]["id"] == body["id"]  # every message scored
    assert WRITE_FAILED in found, "the disk filled under another path"
    step_during = server.engine.learner.step
    for _ in range(50):  # held while the disk is full
        body = {"x": dict(zip(names, rng.normal(size=20).tolist(), strict=True)), "y": 1, "id": len(sent)}
        client.send(body)
        sent.append(body)
        client.receive(1)
    assert server.engine.learner.step == step_during
    subprocess.run(["mount", "-o", "remount,size=32m", str(small_disk)], check=True)
    wait_for("recovery", lambda: health(http) == 200)
    after = [
        {"x": dict(zip(names, rng.normal(size=20).tolist(), strict=True)), "y": 0, "id": len(sent) + i}
        for i in range(200)
    ]
    records = finish_and_check_the_journal(running, client, after, sent + after, learner)
    assert server.engine.learner.step == len(sent) + len(after)  # each learned once (probes have no label)
    assert found.count(WRITE_FAILED) == 1 and len(records) >= len(sent) + len(after)
    print(f"disk full after {len(sent) - 50} lone messages; held 50, all journaled and learned")


def produce(client: Client, events: list[dict[str, Any]], stop: Any, sent: list[int]) -> None:
    """Stream training events, each with a unique id, from number sent[0] on, until `stop`; leave the
    next number in sent[0]."""
    import msgpack
    import zmq

    i = sent[0]
    while not stop.is_set():
        body = dict(events[i % len(events)], id=f"e{i}")
        try:
            client.push.send_multipart([b"events", msgpack.packb(body)], zmq.NOBLOCK)
        except zmq.Again:
            time.sleep(0.001)
            continue
        i += 1
        if i % 40 == 0:
            time.sleep(0.004)  # about 8,000 events a second: a live stream, not a flood
    sent[0] = i


def test_kill_9_twenty_times_during_a_live_stream(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    """Each round: a daemon process resumes, a producer streams into it, and it is killed (SIGKILL)
    at a random moment. Then, every time: the state a restart recovers equals an offline replay of
    the journal bit for bit, every score published before the kill is for a journaled event, and
    every checkpoint on disk reads. Every fifth round, a torn record is appended to the journal, as
    a crash in mid-write leaves it: the restart cuts it and says so."""
    import random
    import signal
    import threading

    import msgpack
    import zmq
    from oddsmill.server import Server
    from oddsmill.storage import list_checkpoints, read_checkpoint

    from tests.test_server import free_port, start

    rnd = random.Random(20)
    learner = LearnerSettings(scale_warmup=200)  # what start() passes on the command line
    events = [b for b in bodies(30_000, seed=9) if "x" in b and "y" in b]  # each scored, so each has an id
    sent_upto = 0
    ctx: zmq.Context[Any] = zmq.Context()
    rounds = 20
    for k in range(rounds):
        ingest, scores = f"tcp://127.0.0.1:{free_port()}", f"tcp://127.0.0.1:{free_port()}"
        proc = start(tmp_path, ingest, scores, "--checkpoint-events", "4000")
        client = Client(ctx, ingest, scores)
        got: list[Any] = []
        stop = threading.Event()

        sent_box = [sent_upto]
        producer = threading.Thread(target=produce, args=(client, events, stop, sent_box))
        producer.start()
        assert client.sub.poll(10_000), f"round {k}: no score within 10 s"
        deadline = time.monotonic() + rnd.uniform(0.05, 0.6)  # then a random moment of the stream
        while time.monotonic() < deadline:
            if client.sub.poll(20):
                got.append(msgpack.unpackb(client.sub.recv_multipart()[1]))
        proc.kill()
        assert proc.wait(10) == -signal.SIGKILL
        stop.set()
        producer.join()
        while client.sub.poll(100):  # scores already in flight before the kill
            got.append(msgpack.unpackb(client.sub.recv_multipart()[1]))
        client.close()
        sent_upto = sent_box[0]

        # every score published before the kill is for an event in the journal
        ids = {body.get("id") for seg in list_journal(tmp_path) for _, _, body in read_journal(seg)}
        published = [s["id"] for s in got if "id" in s and s["id"] is not None]
        assert published, f"round {k}: no scores before the kill ({len(got)} answers: {got[:3]})"
        assert set(published) <= ids, f"round {k}: a score was published for an event not journaled"
        # no checkpoint is unreadable
        for path in list_checkpoints(tmp_path):
            read_checkpoint(path)
        if k % 5 == 4:
            last = list_journal(tmp_path)[-1]
            with open(last, "ab") as f:
                f.write(storage.journal_record(time.time(), msgpack.packb({"x": {"a": 1.0}, "y": 1}))[:-7])
        # the state a restart recovers equals an offline replay of the whole journal
        caplog.clear()
        with caplog.at_level(logging.WARNING, logger="oddsmill"):
            recovered = Server(ServerSettings(state_dir=tmp_path, http="off"), learner)
        recovered.close()  # (it holds the directory until then: the next round's daemon is a process)
        if k % 5 == 4:
            assert any("cutting a torn tail" in r.getMessage() for r in caplog.records)
        engine, _ = replay_journal(tmp_path, learner)
        mine, theirs = recovered.engine.learner.state_dict(), engine.learner.state_dict()
        assert mine["scalars"].tobytes() == theirs["scalars"].tobytes(), f"round {k}"
        assert mine["slots"].tobytes() == theirs["slots"].tobytes(), f"round {k}"
        assert recovered.engine.metrics.sum == engine.metrics.sum
        print(f"round {k}: {len(published)} scores before the kill, step {engine.learner.step}", flush=True)
    ctx.term()
    assert len(list_checkpoints(tmp_path)) >= 1
    print(f"{rounds} kills; {sent_upto:,} messages sent; {engine.learner.step:,} events learned")


def test_a_corrupt_newest_checkpoint_falls_back_to_the_previous_and_the_journal(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    from oddsmill.server import Server
    from oddsmill.storage import list_checkpoints

    settings = loopback(tmp_path, checkpoint_events=300)
    learner = LearnerSettings(scale_warmup=100)
    running = RunningServer(settings, learner)
    client = Client(running.ctx, running.server.bound["ingest"], running.server.bound["scores"])
    sent = [b for b in bodies(1500, seed=16) if "x" in b and "y" in b]
    for lo in range(0, len(sent), 100):
        for b in sent[lo : lo + 100]:
            client.send(b)
        client.receive(len(sent[lo : lo + 100]))
    client.close()
    running.close()
    checkpoints = list_checkpoints(tmp_path)
    assert len(checkpoints) >= 2
    newest = checkpoints[-1]
    data = bytearray(newest.read_bytes())
    data[len(data) // 2] ^= 0xFF
    newest.write_bytes(bytes(data))
    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        recovered = Server(ServerSettings(state_dir=tmp_path, http="off"), learner)
    recovered.journal.close()
    assert any("damaged checkpoint" in r.getMessage() and newest.name in r.getMessage() for r in caplog.records)
    engine, _ = replay_journal(tmp_path, learner)
    assert recovered.engine.learner.step == engine.learner.step == running.server.engine.learner.step
    mine, theirs = recovered.engine.learner.state_dict(), engine.learner.state_dict()
    assert mine["slots"].tobytes() == theirs["slots"].tobytes()


def test_a_failure_to_start_a_new_segment_holds_only_what_follows(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The journal rotates to a new segment after a block is safe in the old one; if the new segment
    cannot be created, that block is learned, the following are held, and nothing is written twice."""
    import msgpack
    from oddsmill import server as server_module

    real = server_module.JournalWriter
    failing = {"on": False}

    class FlakyWriter(real):  # type: ignore[misc, valid-type]
        def __init__(self, path: Path, reserve: int = 0) -> None:
            if failing["on"] and not path.exists():
                raise OSError(errno.ENOSPC, "No space left on device (injected)")
            super().__init__(path, reserve)

    monkeypatch.setattr(server_module, "JournalWriter", FlakyWriter)
    learner = LearnerSettings(scale_warmup=100)
    running = RunningServer(loopback(tmp_path, http="127.0.0.1:0", segment_bytes=30_000), learner)
    server, http = running.server, running.server.bound["http"]
    client = Client(running.ctx, server.bound["ingest"], server.bound["scores"])
    sent = [b for b in bodies(3000, seed=17) if "x" in b and "y" in b]
    failing["on"] = True
    for lo in range(0, 1000, 50):
        for b in sent[lo : lo + 50]:
            client.send(b)
        client.receive(50)
    wait_for("the outage", lambda: health(http) == 503)
    failing["on"] = False
    wait_for("recovery", lambda: health(http) == 200)
    # (in steps, as above: a burst of a thousand answers not read meanwhile can pass the scores'
    # high-water mark on a loaded machine, where ZeroMQ drops what the subscriber has no room for)
    for lo in range(1000, len(sent), 50):
        for b in sent[lo : lo + 50]:
            client.send(b)
        client.receive(len(sent[lo : lo + 50]))
    client.close()
    running.close()
    records = journaled(tmp_path)
    assert records[-len(sent) :] == [msgpack.packb(b) for b in sent]  # each once, in order
    assert len(list_journal(tmp_path)) >= 2
    assert server.engine.learner.step == len(sent)
    assert_state_is_the_replay_of_the_journal(tmp_path, learner)


def test_the_http_port_is_on_loopback_by_default_and_changes_nothing(tmp_path: Path) -> None:
    """PROTOCOL 1: HTTP binds to loopback unless told otherwise, and serves reads only: every other
    method is refused on every path, and the model is the same afterwards."""
    import http.client

    assert ServerSettings(state_dir=tmp_path).http.startswith("127.0.0.1:")
    running = RunningServer(loopback(tmp_path, http="127.0.0.1:0"), LearnerSettings())
    host, port = running.server.bound["http"].rsplit(":", 1)
    before = running.server.engine.learner.state_dict()["slots"].tobytes()
    for method in ("POST", "PUT", "DELETE", "PATCH", "OPTIONS"):
        for path in ("/", "/metrics", "/healthz", "/api/status"):
            conn = http.client.HTTPConnection(host, int(port), timeout=5)
            conn.request(method, path, body=b'{"step": 0}')
            answer = conn.getresponse()
            conn.close()
            # method not allowed, and which are (http.server's own 501 said "not implemented")
            assert (answer.status, answer.getheader("Allow")) == (405, "GET, HEAD"), (method, path, answer.status)
    assert running.server.engine.learner.state_dict()["slots"].tobytes() == before
    running.close()


def test_a_connection_that_sends_no_request_is_closed_in_time(monkeypatch: pytest.MonkeyPatch) -> None:
    """http.server waited for ever on a connection that sent no whole request, a thread each: 300
    idle sockets held 300 threads. Each is now closed after `metrics.IDLE_SECONDS` (30; here 0.5),
    and the port answers meanwhile."""
    import socket
    import urllib.request

    from oddsmill import metrics
    from prometheus_client import CollectorRegistry

    monkeypatch.setattr(metrics, "IDLE_SECONDS", 0.5)
    httpd, thread = metrics.serve_http(metrics.Board(CollectorRegistry()), "127.0.0.1", 0)
    port = httpd.server_address[1]
    try:
        idle = socket.create_connection(("127.0.0.1", port), timeout=10)
        partial = socket.create_connection(("127.0.0.1", port), timeout=10)
        partial.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\n")  # (the headers never end)
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as answer:
            assert answer.status == 200
        t0 = time.monotonic()
        assert idle.recv(100) == b"" and partial.recv(100) == b""  # closed by the daemon
        assert time.monotonic() - t0 < 5
        idle.close()
        partial.close()
    finally:
        httpd.shutdown()
        httpd.server_close()


def test_a_journal_that_lost_its_tail_under_the_checkpoint_continues_in_a_new_segment(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """A journal cut shorter than a checkpoint's position (the daemon syncs the journal before each
    checkpoint, so something else did it: a file system repaired after a crash, a copy of the
    directory taken while it ran). Appending after the short end would put new records where the
    checkpoint's position points into, and the next restart from that checkpoint would read from the
    middle of one: the new records must go to a new segment, and a restart (kill -9: no checkpoint)
    must learn them all."""
    import msgpack
    import zmq
    from oddsmill.server import Server

    learner = LearnerSettings(scale_warmup=50)
    settings = ServerSettings(state_dir=tmp_path, http="off", fsync="os")
    ctx: zmq.Context[Any] = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind("inproc://scores")
    sent = [[b"events", msgpack.packb(b)] for b in bodies(700, seed=21) if "x" in b and "y" in b]

    def feed(server: Server, messages: list[list[bytes]]) -> None:
        for lo in range(0, len(messages), 25):
            server.handle(messages[lo : lo + 25], pub)

    first = Server(settings, learner)
    feed(first, sent[:300])
    first.checkpoint()
    first.journal.close()
    (segment,) = list_journal(tmp_path)
    ends = [end for end, _, _ in read_journal(segment)]
    with open(segment, "r+b") as f:  # the last 5 of 12 blocks are gone
        f.truncate(ends[7 * 25 - 1])

    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        second = Server(settings, learner)
    assert any("before the checkpoint's position" in r.getMessage() for r in caplog.records)
    assert second.engine.learner.step == 300  # the checkpoint's
    feed(second, sent[300:])
    second.journal.close()  # and then kill -9: no checkpoint
    assert len(list_journal(tmp_path)) == 2

    third = Server(settings, learner)
    third.journal.close()
    assert third.engine.learner.step == len(sent)
    mine, theirs = third.engine.state_dict(), second.engine.state_dict()
    for key in ("scalars", "slots", "flags"):
        assert mine["learner"][key].tobytes() == theirs["learner"][key].tobytes(), key
    assert mine["counters"] == theirs["counters"]
    pub.close(0)
    ctx.term()


def test_messages_refused_before_decoding_are_counted_again_after_kill_9(tmp_path: Path) -> None:
    """A message that cannot be decoded (not msgpack, too large, not two frames) changes nothing
    but its counter; a restart without a checkpoint (kill -9) must count it again from the
    journal, as an uninterrupted run counted it, with its reason."""
    import msgpack
    import zmq
    from oddsmill.server import Server

    settings = ServerSettings(state_dir=tmp_path, http="off", fsync="os")
    ctx: zmq.Context[Any] = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind("inproc://scores")
    good = [[b"events", msgpack.packb(b)] for b in bodies(60, seed=22) if "x" in b and "y" in b]
    bad = [
        [b"events", b"\xc1"],  # not msgpack: undecodable
        [b"events", msgpack.packb({"x": {"note": "n" * 70_000}, "y": 1})],  # a string past MAX_STR
        [b"events"],  # one frame: undecodable
        [b"events", msgpack.packb({"x": {"route_km": 3.0}, "y": 7})],  # decoded, then refused
    ]
    first = Server(settings, LearnerSettings())
    first.checkpoint()
    for k, message in enumerate(good):
        first.handle([message, bad[k % len(bad)]] if k < 8 else [message], pub)
    counted = dict(first.engine.counters.rejected)
    assert counted == {"undecodable": 4, "too_large": 2, "bad_label": 2}
    first.journal.close()  # and then kill -9: no checkpoint since the start

    second = Server(settings, LearnerSettings())
    second.journal.close()
    assert second.engine.counters.rejected == counted
    assert second.engine.learner.step == first.engine.learner.step == len(good)
    for key in ("scalars", "slots"):
        assert (
            second.engine.state_dict()["learner"][key].tobytes() == first.engine.state_dict()["learner"][key].tobytes()
        )
    pub.close(0)
    ctx.term()
