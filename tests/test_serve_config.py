"""serve's configuration, warm start, wire bytes and journal retention."""

from __future__ import annotations

import gzip
import os
import re
import signal
import struct
import subprocess
import sys
import time
import zlib
from pathlib import Path

import msgpack
import pytest
from oddsmill.cli import main
from oddsmill.engine import Score
from oddsmill.server import Server, ServerSettings, _score_body
from oddsmill.settings import LearnerSettings
from oddsmill.storage import journal_record, list_journal, load_newest

from tests.conftest import DEMO, RunningServer, loopback
from tests.test_server import Client, bodies
from tests.tools import full_rows, names_in


def test_print_config_reads_back_and_flags_win(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    cfg = tmp_path / "oddsmill.toml"
    cfg.write_text('[learner]\nl2 = 0.001\n\n[server]\ningest_kind = "pull"\ncheckpoint_events = 500\n')
    assert main(["serve", "--config", str(cfg), "--checkpoint-events", "700", "--print-config"]) == 0
    printed = capsys.readouterr().out
    assert "l2 = 0.001" in printed and 'ingest_kind = "pull"' in printed and "checkpoint_events = 700" in printed
    again = tmp_path / "printed.toml"
    again.write_text(printed)
    assert main(["serve", "--config", str(again), "--print-config"]) == 0
    assert capsys.readouterr().out == printed


@pytest.mark.parametrize(
    "text,flags,needle",
    [
        ("[server]\ningest_knd = 'pull'\n", [], "unknown setting server.ingest_knd"),
        ("[server]\ncheckpoint_events = 'often'\n", [], "server.checkpoint_events must be int, got 'often'"),
        ("[server]\nblock_max = 0\n", [], "block_max must be an integer >= 1, got 0"),
        ("[server]\nblock_bytes = -5\n", [], "block_bytes must be an integer >= 1, got -5"),
        ("[servr]\n", [], "unknown table or key 'servr'"),
        ("", ["--ingest", "tcp://0.0.0.0:7571"], "not a loopback address"),
    ],
)
def test_bad_settings_are_refused_with_key_and_value(
    tmp_path: Path, capsys, text: str, flags: list[str], needle: str
) -> None:  # type: ignore[no-untyped-def]
    cfg = tmp_path / "oddsmill.toml"
    cfg.write_text(text)
    assert main(["serve", "--config", str(cfg), "--print-config", *flags]) == 2
    assert needle in capsys.readouterr().err


def test_warm_start_equals_replay_then_serve(tmp_path: Path) -> None:
    learner = LearnerSettings()
    warm = Server(ServerSettings(state_dir=tmp_path / "warm", http="off"), learner, [str(DEMO)])
    assert main(["replay", str(DEMO), "--state", str(tmp_path / "replayed")]) == 0
    resumed = Server(ServerSettings(state_dir=tmp_path / "replayed", http="off"), learner)
    a, b = warm.engine.state_dict(), resumed.engine.state_dict()
    assert a["learner"]["scalars"].tobytes() == b["learner"]["scalars"].tobytes()
    assert a["learner"]["slots"].tobytes() == b["learner"]["slots"].tobytes()
    assert names_in(a["learner"]) == names_in(b["learner"])
    warm.journal.close()
    resumed.journal.close()


def test_score_body_bytes() -> None:
    # Source: the msgpack specification (fixmap, fixstr, float 64 = 0xcb big-endian, positive fixint).
    body = _score_body([Score("P1", 0.5, 3, 1.5)], "one")
    p = 1 / (1 + 2.718281828459045**-0.5)
    got = msgpack.packb(body)
    expected = (
        b"\x85\xa2id\xa2P1\xa1p\xcb"
        + struct.pack(">d", body["p"])
        + b"\xa5logit\xcb"
        + struct.pack(">d", 0.5)
        + b"\xa4step\x03\xa2ts\xcb"
        + struct.pack(">d", 1.5)
    )
    assert got == expected
    assert body["p"] == pytest.approx(p, rel=1e-15)


def test_a_warm_start_is_checkpointed_at_once_and_not_applied_again(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """A daemon whose command line or configuration names --warm-start logs learned them again at
    every restart (56,000 events after the second start on the demo's 28,000). The warm start
    begins a new state only: a state directory with a model says so and learns nothing again. Its
    events are in no journal, so a checkpoint holds them before anything is served: a daemon
    killed before its first checkpoint lost them, and a restart then learned the journal first."""
    import zmq
    from oddsmill.storage import list_checkpoints

    learner = LearnerSettings()
    settings = ServerSettings(state_dir=tmp_path, http="off")
    first = Server(settings, learner, [str(DEMO)])
    assert [p.name for p in list_checkpoints(tmp_path)] == ["checkpoint-000000028000.omc"]
    ctx: zmq.Context = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind("inproc://warm-again")
    try:
        first.handle([[b"events", msgpack.packb(b)] for b in bodies(60, seed=3)], pub)
    finally:
        first.journal.close()  # and then kill -9: no checkpoint after the warm start's
        pub.close(0)
        ctx.term()
    with caplog.at_level("WARNING", logger="oddsmill"):
        again = Server(settings, learner, [str(DEMO)])
    try:
        live, resumed = first.engine.state_dict(), again.engine.state_dict()
        assert again.engine.learner.step == first.engine.learner.step > 28_000
        for key in ("scalars", "slots", "flags"):
            assert resumed["learner"][key].tobytes() == live["learner"][key].tobytes(), key
        assert resumed["metrics"]["sum"] == live["metrics"]["sum"]
        assert caplog.messages == [
            f"the state directory {tmp_path} holds a model already (step {again.engine.learner.step:,}): "
            "--warm-start begins a new state and is not applied again (send the logs to the daemon to learn "
            "them on top)"
        ]
    finally:
        again.journal.close()


def test_a_warm_start_whose_checkpoint_cannot_be_written_serves_nothing(  # type: ignore[no-untyped-def]
    tmp_path: Path, capsys, monkeypatch
) -> None:
    """A warm start's events are in no journal. When its first checkpoint failed (a full disk), the
    daemon served in an outage and its recovery journaled the held messages on top: killed then,
    it left a journal and no checkpoint, and a restart learned the journal alone (step 98 where the
    live model was at 28,098), refusing the warm start since the directory held a model. Now
    `serve` stops before serving (exit 1, one line) and the directory keeps no model: the same
    command, once there is room, warm-starts."""
    import errno

    import oddsmill.server
    from oddsmill.storage import list_checkpoints

    real = oddsmill.server.write_checkpoint

    def full(*args: object, **kwargs: object) -> Path:
        raise OSError(errno.ENOSPC, "No space left on device")

    def serve_not(self: Server, stop: object) -> None:  # a start that is not stopped fails here, not hangs
        self.close()
        raise AssertionError("served with a warm start that no checkpoint holds")

    monkeypatch.setattr(oddsmill.server, "write_checkpoint", full)
    monkeypatch.setattr(oddsmill.server.Server, "serve", serve_not)
    state = tmp_path / "s"
    argv = ["serve", "--state", str(state), "--http", "off", "--warm-start", str(DEMO)]
    assert main(argv) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1] == (
        f"oddsmill: cannot write the warm start's checkpoint to {state}: No space left on device (OSError). "
        "Nothing was served and nothing was kept; make room (or give another --state) and start again"
    )
    assert not any("Scoring goes on" in line for line in err), err  # (the outage's line: nothing is served)
    assert not state.exists()  # (it made the directory: it takes it away, with its lock and empty journal)
    monkeypatch.setattr(oddsmill.server, "write_checkpoint", real)  # room again: the same start warm-starts
    server = Server(ServerSettings(state_dir=state, http="off"), LearnerSettings(), [str(DEMO)])
    try:
        assert server.engine.learner.step == 28_000 and server.outage is None
        assert [p.name for p in list_checkpoints(state)] == ["checkpoint-000000028000.omc"]
    finally:
        server.close()


def test_a_warm_start_from_a_bad_log_leaves_the_directory_as_it_was(
    tmp_path: Path, capsys, monkeypatch: pytest.MonkeyPatch
) -> None:  # type: ignore[no-untyped-def]
    """`serve --warm-start` of a missing log, or of one with a bad line, refused it (exit 2) and left
    behind the state directory it had made, with a lock file in it. Now a directory it made is
    taken away, and one that was there (empty) is left empty. A log of no labelled event (empty, or
    scoring requests only) warm-started a state of nothing, "learned 0 events", and served it; it is
    refused the same way now."""
    bad = tmp_path / "parcels.jsonl"
    bad.write_text('{"x": {"route_km": 3.5}, "y": 1}\n{"x": {"route_km": 4.5}, "y": 2}\n')
    empty, scores = tmp_path / "empty.jsonl", tmp_path / "scores.jsonl"
    empty.write_text("")
    scores.write_text('{"id": "p1", "x": {"route_km": 3.5}}\n')
    made, there = tmp_path / "made", tmp_path / "there"
    there.mkdir()

    def serve_not(self: Server, stop: object) -> None:  # a start that is not refused fails here, not hangs
        self.close()
        raise AssertionError("served a state the warm start should have refused")

    monkeypatch.setattr(Server, "serve", serve_not)
    for state, log, says in (
        (made, tmp_path / "missing.jsonl", "missing.jsonl: no such file"),
        (made, bad, "parcels.jsonl:2: bad_label: y must be 0, 1, true or false, got 2"),
        (there, bad, "parcels.jsonl:2: bad_label"),
        (made, empty, "empty.jsonl: no labelled event to learn from in 0 message(s)"),
        (there, scores, "scores.jsonl: no labelled event to learn from in 1 message(s)"),
    ):
        argv = ["serve", "--state", str(state), "--http", "off", "--ingest", "tcp://127.0.0.1:*"]
        assert main([*argv, "--scores", "tcp://127.0.0.1:*", "--warm-start", str(log)]) == 2
        assert says in capsys.readouterr().err
    assert not made.exists() and list(there.iterdir()) == []


def test_a_long_start_says_how_far_it_has_come(
    tmp_path: Path, caplog: pytest.LogCaptureFixture, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A warm start from a large history, or a long journal replayed at a restart, learned for
    minutes before "serving" with nothing in the log. A line now comes every `Ticker.EVERY`
    seconds (10; here every block)."""
    import zmq
    from oddsmill import server as server_module

    monkeypatch.setattr(server_module.Ticker, "EVERY", 0.0)
    settings = ServerSettings(state_dir=tmp_path, http="off")
    with caplog.at_level("INFO", logger="oddsmill"):
        first = Server(settings, LearnerSettings(), [str(DEMO)])
    ticks = [m for m in caplog.messages if m.startswith("warm start: ") and "so far" in m]
    assert len(ticks) >= 5 and all(
        re.fullmatch(r"warm start: [\d,]+ events learned so far \(\d+ s\)", m) for m in ticks
    )
    learned = [int(m.split()[2].replace(",", "")) for m in ticks]
    assert learned == sorted(learned) and 0 < learned[0] < learned[-1] <= 28_000, learned
    ctx: zmq.Context = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind("inproc://long-start")
    try:
        for lo in range(0, 9000, 500):
            first.handle([[b"events", msgpack.packb(b)] for b in bodies(500, seed=lo)[:500]], pub)
    finally:
        first.journal.close()  # and then kill -9: the journal after the checkpoint is replayed
        pub.close(0)
        ctx.term()
    caplog.clear()
    with caplog.at_level("INFO", logger="oddsmill"):
        again = Server(settings, LearnerSettings())
    again.close()
    ticks = [m for m in caplog.messages if m.startswith("replaying the journal: ")]
    assert len(ticks) >= 2, caplog.messages
    assert all(re.fullmatch(r"replaying the journal: [\d,]+ records, step [\d,]+ so far \(\d+ s\)", m) for m in ticks)


def test_journal_record_bytes() -> None:
    # PROTOCOL 6: u32 LE length | u32 LE CRC-32 of the payload | msgpack [arrival_time, body as received]
    raw = msgpack.packb({"x": {"a": 1}})
    payload = b"\x92\xcb" + struct.pack(">d", 12.5) + raw
    assert journal_record(12.5, raw) == struct.pack("<II", len(payload), zlib.crc32(payload)) + payload


def test_journal_retention_keeps_what_restarts_need(tmp_path: Path) -> None:
    learner = LearnerSettings(scale_warmup=200)
    settings = loopback(tmp_path, checkpoint_events=100, segment_bytes=4096, journal_keep=0)
    running = RunningServer(settings, learner)
    server, ctx = running.server, running.ctx
    client = Client(ctx, server.bound["ingest"], server.bound["scores"])
    for chunk in range(6):
        part = bodies(150, seed=10 + chunk)
        for body in part:
            client.send(body)
        client.receive(sum(1 for b in part if "x" in b))  # one block at a time, so checkpoints fall between
    client.close()
    running.close()
    state, newest = load_newest(tmp_path)  # type: ignore[misc]
    segments = list_journal(tmp_path)
    assert segments[0].name != "journal-000000000000.omj"  # the oldest segments were retired
    # even without the newest checkpoint, the older one plus the journal kept behind it rebuild the state
    newest.unlink()
    again = Server(ServerSettings(state_dir=tmp_path, http="off"), learner)
    assert (
        again.engine.state_dict()["learner"]["slots"].tobytes()
        == full_rows(state["engine"]["learner"])["slots"].tobytes()
    )
    assert again.engine.metrics.sum == state["engine"]["metrics"]["sum"]
    again.journal.close()


def test_a_port_taken_is_found_before_the_state_is_loaded(tmp_path: Path) -> None:
    """`serve` bound its ports only after it had loaded the state and replayed the journal
    (seconds, for a large state), and a port taken then raised with the journal open: the segment
    kept its 64 MiB reservation (`du` 64 MiB for a 6 MB segment, by hand). A fixed port that is
    taken is now found first, with the directory untouched (a new one not even made); and a port
    taken between that check and the bind stops `serve` with its journal closed, the room given
    back and the directory let go of."""
    import fcntl
    import socket
    import threading

    from oddsmill.errors import ConfigError

    from tests.conftest import handled_once

    handled = tmp_path / "s"
    handled_once(handled, bodies(50, seed=3)).close()
    before = {p.name: p.stat().st_mtime_ns for p in handled.iterdir() if p.name != "lock"}
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        for kw, says in (
            ({"http": f"127.0.0.1:{port}"}, f"cannot serve HTTP on 127.0.0.1:{port} (Address already in use)"),
            ({"ingest": f"tcp://127.0.0.1:{port}"}, f"cannot bind ingest to tcp://127.0.0.1:{port} (Address already"),
            ({"scores": f"tcp://localhost:{port}"}, f"cannot bind scores to tcp://localhost:{port} (Address already"),
        ):
            for state in (handled, tmp_path / "new"):
                with pytest.raises(ConfigError) as refused:
                    Server(loopback(state, **kw))
                assert str(refused.value).startswith(says), refused.value
        assert not (tmp_path / "new").exists()
        assert {p.name: p.stat().st_mtime_ns for p in handled.iterdir() if p.name != "lock"} == before
    # taken after the check: the bind itself fails, and the journal is closed
    with socket.socket() as free:
        free.bind(("127.0.0.1", 0))
        port = free.getsockname()[1]
    server = Server(loopback(handled, http=f"127.0.0.1:{port}"))
    (segment,) = list_journal(handled)
    assert segment.stat().st_blocks * 512 >= 64 << 20  # reserved while open
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", port))
        taken.listen()
        with pytest.raises(ConfigError, match=f"cannot serve HTTP on 127.0.0.1:{port} .Address already in use"):
            server.serve(threading.Event())
    assert segment.stat().st_blocks * 512 < 1 << 20  # given back
    with open(handled / "lock") as lock:  # the directory is free: another holder's flock is granted
        fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)


def test_serve_sets_the_allocator_before_it_loads_the_state(tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """`oddsmill serve` sets glibc's two thresholds (learner.give_back_large_frees, then
    learner.keep_freed_heap) before it builds the server, which loads the state: set after, the
    state's arrays would already sit in the heap. Their effect is test_learner's heap test; this
    is that the command sets them, which only the bench would notice otherwise. (The server is a
    stand-in that records when it was built and stops at once.)"""
    import gc
    import signal

    from oddsmill import learner, server

    order: list[str] = []
    monkeypatch.setattr(learner, "give_back_large_frees", lambda: order.append("mmap threshold") or True)
    monkeypatch.setattr(learner, "keep_freed_heap", lambda: order.append("trim threshold") or True)
    monkeypatch.setattr(gc, "freeze", lambda: None)  # (not this test process's collector)
    monkeypatch.setattr(signal, "signal", lambda *a: None)  # (nor its signal handlers)

    class StandIn:
        clean_exit = True

        def __init__(self, settings: object, learner_settings: object, warm: object, asked: object) -> None:
            order.append("server built")

        def serve(self, stop: object) -> None:
            order.append("served")

    monkeypatch.setattr(server, "Server", StandIn)
    assert main(["serve", "--state", str(tmp_path / "state"), "--http", "off"]) == 0
    assert order == ["mmap threshold", "trim threshold", "server built", "served"]


def test_checkpoints_of_an_idle_daemon_keep_every_older_checkpoint_restartable(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """A daemon with nothing new to learn writes no checkpoint (the one on disk already holds its
    state), so idle intervals and the stop neither rewrite it nor push the older checkpoints out of
    the positions retention reads: with --journal-keep 0, a segment is retired only when no
    checkpoint left on disk starts in it. (Before, three idle intervals made the newest position
    the only one remembered, and the segments the checkpoints before it needed were deleted; and
    after a restart, the positions of the checkpoints older than the one it resumed from were not
    known, and their segments went at its first checkpoint.) A restart reads those positions."""
    import zmq
    from oddsmill.storage import checkpoint_step, list_checkpoints, read_checkpoint

    learner = LearnerSettings(scale_warmup=200)
    settings = ServerSettings(state_dir=tmp_path, http="off", segment_bytes=4096, journal_keep=0)

    def each_checkpoint_has_its_segment() -> None:
        segments = {p.name for p in list_journal(tmp_path)}
        assert len(list_checkpoints(tmp_path)) == 3
        for path in list_checkpoints(tmp_path):
            assert read_checkpoint(path)["journal"]["segment"] in segments, path.name

    ctx: zmq.Context = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind("inproc://idle-checkpoints")
    seeds = iter(range(40, 60))

    def block(server: Server, n: int) -> None:
        server.handle([[b"events", msgpack.packb(b)] for b in bodies(n, seed=next(seeds))], pub)

    server = Server(settings, learner)
    try:
        for _ in range(4):
            block(server, 120)
            assert server.checkpoint() is not None
        written = {p.name: p.stat().st_mtime_ns for p in list_checkpoints(tmp_path)}
        before = server.last_checkpoint
        with caplog.at_level("INFO", logger="oddsmill"):
            newest = server.checkpoint()  # three idle intervals' worth, as the loop and the stop call it
        assert server.last_checkpoint > before  # the state counts as checkpointed (an alert reads when)
        assert newest is not None
        assert (
            caplog.messages[-1]
            == f"checkpoint {newest.name} holds the state already (step {server.engine.learner.step})"
        )
        before = server.last_checkpoint
        server.checkpoint_soon()  # the loop's call, when --checkpoint-seconds have passed
        assert server.writing is None and server.last_checkpoint > before
        assert server.checkpoint() == newest and server.checkpoint() == newest
        assert newest is not None and newest.name == max(written)
        assert {p.name: p.stat().st_mtime_ns for p in list_checkpoints(tmp_path)} == written  # none rewritten
        block(server, 120)  # (a new segment: the checkpoints before a restart start in three)
        last = server.checkpoint()
        assert last is not None and last != newest  # something new: a checkpoint again
    finally:
        server.journal.close()
    each_checkpoint_has_its_segment()
    kept = {p.name for p in list_journal(tmp_path)}
    assert "journal-000000000000.omj" not in kept  # (retention did retire the segments no checkpoint needs)

    # a restart reads the positions of the checkpoints the run before left (it waited for three
    # checkpoints of its own before, and retired nothing meanwhile), or of none it cannot read
    server = Server(settings, learner)
    try:
        assert server.checkpoint() == last  # nothing new since: the checkpoint it resumed from
        assert sorted(server.positions) == [checkpoint_step(p) for p in list_checkpoints(tmp_path)]
        for path in list_checkpoints(tmp_path):  # (read without the model, as a whole read has them)
            assert server.positions[checkpoint_step(path)] == read_checkpoint(path)["journal"]
        block(server, 120)
        assert server.checkpoint() is not None
        each_checkpoint_has_its_segment()
        assert not kept <= {p.name for p in list_journal(tmp_path)}  # retired at its first checkpoint
        for _ in range(2):
            block(server, 120)
            assert server.checkpoint() is not None
            each_checkpoint_has_its_segment()
    finally:
        server.journal.close()
    middle = list_checkpoints(tmp_path)[1]
    middle.write_bytes(middle.read_bytes()[:-1])  # damaged: its position cannot be read
    kept = {p.name for p in list_journal(tmp_path)}
    server = Server(settings, learner)
    try:
        assert checkpoint_step(middle) not in server.positions
        block(server, 120)
        assert server.checkpoint() is not None  # (the oldest goes: three checkpoints are kept)
        assert kept <= {p.name for p in list_journal(tmp_path)}  # nothing retired on a position unknown
    finally:
        server.journal.close()
        pub.close(0)
        ctx.term()


def test_a_restart_names_the_records_a_missing_segment_held(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    """A journal segment gone from the middle (deleted by hand, lost with a disk) leaves records the
    restart cannot learn: it says which, in an error, and counts on from the next segment's number,
    so the segments it writes next still sort after the ones on disk. Reading the directory as a
    replay's input says so too."""
    import zmq
    from oddsmill.storage import list_checkpoints, read_checkpoint, segment_first

    settings = ServerSettings(state_dir=tmp_path, http="off", segment_bytes=4096)
    ctx: zmq.Context = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind("inproc://missing-segment")
    server = Server(settings)
    try:
        server.handle([[b"events", msgpack.packb(b)] for b in bodies(120, seed=70)], pub)
        assert server.checkpoint() is not None
        for seed in (71, 72, 73):
            server.handle([[b"events", msgpack.packb(b)] for b in bodies(120, seed=seed)], pub)
        total = server.records
    finally:
        server.journal.close()
    (checkpoint,) = list_checkpoints(tmp_path)
    position = read_checkpoint(checkpoint)["journal"]
    segments = list_journal(tmp_path)
    k = [p.name for p in segments].index(position["segment"])
    assert len(segments) >= k + 3
    gone, after = segments[k + 1], segments[k + 2]  # (one after the checkpoint's: a replay reads it)
    lost = segment_first(after) - segment_first(gone)  # the records it held
    gone.unlink()
    with caplog.at_level("ERROR", logger="oddsmill"):
        again = Server(settings)
    try:
        errors = [r.getMessage() for r in caplog.records if r.levelname == "ERROR"]
        first, last = segment_first(gone), segment_first(after) - 1
        assert errors == [
            f"the journal lacks records {first} to {last} (a segment before {after.name} is gone, or was "
            "not read to its end): the state resumes without them"
        ]
        assert again.records == total  # counted as journaled, though not learned
        assert again.engine.learner.step < server.engine.learner.step
        assert lost > 0
    finally:
        again.journal.close()
        pub.close(0)
        ctx.term()

    # `replay` and `fit` reading the directory say the same, and that its journal starts late once
    # its first segment is gone too (as --journal-keep retires them)
    from oddsmill.logs import read_bodies

    segments[0].unlink()
    caplog.clear()
    with caplog.at_level("WARNING", logger="oddsmill"):
        read = sum(1 for _ in read_bodies([str(tmp_path)]))
    start = segment_first(segments[1])
    assert read == total - start - lost
    assert [(r.levelname, r.getMessage()) for r in caplog.records] == [
        (
            "WARNING",
            f"{tmp_path}: its journal starts at record {start} (the segments before were retired by "
            "--journal-keep, or removed): the events before it are not read",
        ),
        (
            "ERROR",
            f"{tmp_path}: its journal lacks records {first} to {last} (a segment before {after.name} is gone, "
            "or was not read to its end): they are not read",
        ),
    ]


def test_serve_refuses_settings_other_than_the_states_and_changes_nothing(  # type: ignore[no-untyped-def]
    tmp_path: Path, capsys, monkeypatch
) -> None:
    """A state keeps the settings it was created with (its journal replays with them); `serve` on
    it with another --l2, --window or --pending-ttl used the state's and said nothing. It now
    refuses (exit 2) naming each, before the directory is touched; the same values, or none, go."""
    import oddsmill.server

    def serve_not(self: Server, stop: object) -> None:  # a refusal missed fails here, not hangs
        self.close()
        raise AssertionError("served a state whose settings differ from those asked for")

    monkeypatch.setattr(oddsmill.server.Server, "serve", serve_not)
    state = tmp_path / "s"
    assert main(["replay", str(DEMO), "--state", str(state), "--l2", "0.001"]) == 0
    capsys.readouterr()
    before = {p.name: p.stat().st_mtime_ns for p in state.iterdir()}
    cfg = tmp_path / "oddsmill.toml"
    cfg.write_text("[server]\npending_ttl = 3600.0\n")
    code = main(
        ["serve", "--state", str(state), "--http", "off", "--l2", "0.01", "--window", "500", "--config", str(cfg)]
    )
    assert code == 2
    err = capsys.readouterr().err
    assert err.strip() == (
        f"oddsmill: the state in {state} (from checkpoint-000000028000.omc) keeps the settings it was created "
        "with, so that its journal replays exactly: window = 10000, not 500, pending_ttl = 604800.0, not 3600.0, "
        "l2 = 0.001, not 0.01. Serve it without them, or learn with them in a new state directory (replay its "
        "logs there)"
    )
    assert {p.name: p.stat().st_mtime_ns for p in state.iterdir()} == before
    # the same values, given or not: it resumes (and the directory is free again after the refusal)
    for asked in ({"l2": 0.001, "window": 10_000}, {}):
        server = Server(ServerSettings(state_dir=state, http="off"), LearnerSettings(), asked=asked)
        assert server.engine.learner.settings.l2 == 0.001
        server.close()


def test_serve_refuses_a_race_other_than_the_states_and_changes_nothing(  # type: ignore[no-untyped-def]
    tmp_path: Path, capsys, monkeypatch
) -> None:
    """A race keeps its candidates and its rule for switching as a single learner keeps its
    settings. `serve --candidates auto` on a single learner's state served the single learner, and
    other candidates, margin or patience on a race's state were dropped for the state's, all in
    silence; `--race-margin` on a new state with no race was ignored. Each is now refused (exit 2)
    naming what differs, before the directory is touched; the state's own values, or none, go."""
    import oddsmill.server
    from oddsmill.race import auto_candidates

    served: list[Server] = []

    def serve_not(self: Server, stop: object) -> None:  # resuming is all the passing cases need
        served.append(self)
        self.close()

    monkeypatch.setattr(oddsmill.server.Server, "serve", serve_not)
    monkeypatch.setattr("signal.signal", lambda *a: None)
    monkeypatch.setattr("gc.freeze", lambda: None)
    single, race, named = tmp_path / "single", tmp_path / "race", tmp_path / "named"
    cfg = tmp_path / "named.toml"
    cfg.write_text('[candidates.steady]\neta0 = 0.5\n\n[candidates.quick]\nschedule = "constant"\neta0 = 0.05\n')
    assert main(["replay", str(DEMO), "--state", str(single)]) == 0
    assert main(["replay", str(DEMO), "--state", str(race), "--candidates", "auto"]) == 0
    assert main(["replay", str(DEMO), "--state", str(named), "--config", str(cfg)]) == 0
    capsys.readouterr()
    auto = [c.name for c in auto_candidates(LearnerSettings())]
    quicker = tmp_path / "quicker.toml"
    quicker.write_text(cfg.read_text().replace("eta0 = 0.05", "eta0 = 0.1"))
    refused = [
        (single, ["--candidates", "auto"], f"candidates = none (a single learner), not {auto!r}"),
        (single, ["--race-patience", "500"], "race_patience = none (a single learner), not 500"),
        (race, ["--candidates", "auto", "--eta0", "0.25"], f"candidates = {auto!r}, not ["),
        (race, ["--config", str(cfg)], f"candidates = {auto!r}, not ['steady', 'quick']"),
        (race, ["--candidates", "auto", "--race-margin", "0.05"], "race_margin = 0.02, not 0.05"),
        (race, ["--l2", "0.001"], f"candidates = {auto!r}, not none (a single learner)"),
        (named, ["--config", str(quicker)], "candidates.quick.eta0 = 0.05, not 0.1"),
    ]
    for state, flags, says in refused:
        # (the file "lock" takes the pid of each process that holds the directory, refused or not)
        before = {p.name: p.stat().st_mtime_ns for p in state.iterdir() if p.name != "lock"}
        assert main(["serve", "--state", str(state), "--http", "off", *flags]) == 2, flags
        err = capsys.readouterr().err.strip()
        assert err.startswith(f"oddsmill: the state in {state} (from checkpoint-000000028000.omc) keeps"), err
        assert says in err and err.count(" = ") == 1, (flags, err)
        assert {p.name: p.stat().st_mtime_ns for p in state.iterdir() if p.name != "lock"} == before
    # a new state: a margin or patience without candidates, refused before the directory is made
    assert main(["serve", "--state", str(tmp_path / "new"), "--http", "off", "--race-margin", "0.05"]) == 2
    assert capsys.readouterr().err.strip() == (
        "oddsmill: race_margin sets when a race switches, and without candidates there is no race: give "
        "--candidates auto or [candidates.NAME] tables in --config as well, or leave it out"
    )
    assert not (tmp_path / "new").exists()
    # the state's own values, or none: each resumes what it holds
    resumed = [
        (single, ["--l2", "0.0001"], None),
        (race, ["--candidates", "auto", "--race-margin", "0.02", "--race-patience", "2000"], auto),
        (race, [], auto),
        (named, ["--config", str(cfg)], ["steady", "quick"]),
        (named, [], ["steady", "quick"]),
    ]
    for state, flags, names in resumed:
        argv = ["serve", "--state", str(state), "--http", "off", "--ingest", "tcp://127.0.0.1:*"]
        assert main([*argv, "--scores", "tcp://127.0.0.1:*", *flags]) == 0, capsys.readouterr().err
        server = served.pop()
        assert (server.race.names if server.race else None) == names
        assert server.engine.learner.step == 28_000


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_a_stop_signal_while_serve_compiles_stops_it_in_one_line(tmp_path: Path, signum: int) -> None:
    """The first start compiles numba's code for about two minutes. Ctrl-C then raised
    KeyboardInterrupt wherever the interpreter was, and when that was a callback of numba's
    compiler it came out as a page of traceback (a RuntimeError, "no compiled object yet": one of
    three interrupts at 10, 25 and 40 s here); SIGTERM ended the process without a word, and left
    the new state directory holding only its lock file. Either now stops the start at once, saying
    so in one line, with 128 + the signal's number as the shell expects, and takes the directory
    it made away. (The traceback depends on where the interrupt lands, so this test cannot provoke
    it each time; the line fails it without the handler. A cache directory of its own, empty,
    makes this start compile. Other commands stop on Ctrl-C with "interrupted while compiling".)"""
    env = {**os.environ, "NUMBA_CACHE_DIR": str(tmp_path / "numba-cache")}
    state = tmp_path / "s"
    proc = subprocess.Popen(
        [sys.executable, "-c", "import sys; from oddsmill.cli import main; sys.exit(main(sys.argv[1:]))",
         "serve", "--state", str(state), "--http", "off",
         "--ingest", "tcp://127.0.0.1:*", "--scores", "tcp://127.0.0.1:*"],
        stderr=subprocess.PIPE, text=True, env=env,
    )  # fmt: skip
    assert proc.stderr is not None
    try:
        first = proc.stderr.readline()
        assert "compiling the learner's code" in first, first
        time.sleep(8)  # well inside the compiling
        assert proc.poll() is None and (state / "lock").exists()
        proc.send_signal(signum)
        rest = proc.stderr.read()
        assert proc.wait(30) == 128 + signum
    finally:
        proc.kill()
    assert "Traceback" not in rest and "Error" not in rest, rest
    assert rest.strip().splitlines()[-1] == (
        f"oddsmill: signal {signum} while starting, before serving anything: stopped; "
        f"the new state directory {state} is taken away"
    )
    assert not state.exists()


@pytest.mark.parametrize("given", ["new", "empty"])
def test_sigterm_during_a_warm_start_stops_it_and_takes_away_what_it_made(tmp_path: Path, given: str) -> None:
    """SIGTERM while a warm start learns its logs (the history of a busy stream can take minutes)
    ended the process without a word and left a new state directory holding only its lock file.
    It now stops at once, says so, and leaves the directory as it found it: gone when the start
    made it, empty when it was given empty. The log is a named pipe, so that the signal is sure
    to come while the warm start reads it."""
    log = tmp_path / "history.jsonl"
    os.mkfifo(log)
    state = tmp_path / "s"
    if given == "empty":
        state.mkdir()
    with gzip.open(DEMO, "rt") as f:
        lines = [next(f) for _ in range(200)]
    proc = subprocess.Popen(
        [sys.executable, "-m", "oddsmill.cli", "serve", "--state", str(state), "--warm-start", str(log),
         "--http", "off", "--ingest", "tcp://127.0.0.1:*", "--scores", "tcp://127.0.0.1:*"],
        stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    try:
        with open(log, "w") as w:  # (open returns once the daemon has opened the log to read it)
            w.writelines(lines)
            w.flush()
            assert os.listdir(state) == ["lock"]
            proc.send_signal(signal.SIGTERM)
            assert proc.wait(30) == 128 + signal.SIGTERM
    finally:
        proc.kill()
    assert proc.stderr is not None
    said = proc.stderr.read()
    if given == "new":
        assert said.endswith(f"stopped; the new state directory {state} is taken away\n"), said
        assert not state.exists()
    else:
        assert said.endswith(f"stopped; what {state} holds is whole, and the next start resumes from it\n"), said
        assert os.listdir(state) == []
    assert "Traceback" not in said


def test_a_race_begun_with_the_auto_grid_of_nine_resumes_under_candidates_auto(
    tmp_path: Path, capsys, caplog, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    """The auto grid races averaging too since the twenty-fifth session: twelve candidates, the
    nine before first. A state whose race began with those nine, restarted by a unit file that
    says `--candidates auto`, would have been refused as holding other candidates; it resumes its
    nine and says so. Nine around other settings are refused as before."""
    import logging

    import oddsmill.server
    from oddsmill.race import auto_candidates

    served: list[Server] = []

    def serve_not(self: Server, stop: object) -> None:
        served.append(self)
        self.close()

    monkeypatch.setattr(oddsmill.server.Server, "serve", serve_not)
    monkeypatch.setattr("signal.signal", lambda *a: None)
    monkeypatch.setattr("gc.freeze", lambda: None)
    nine = auto_candidates(LearnerSettings())[:9]
    cfg = tmp_path / "nine.toml"
    cfg.write_text(
        "\n".join(f'[candidates."{c.name}"]\neta0 = {c.settings.eta0!r}\nl2 = {c.settings.l2!r}\n' for c in nine)
    )
    state = tmp_path / "old"
    assert main(["replay", str(DEMO), "--state", str(state), "--config", str(cfg)]) == 0
    argv = ["serve", "--state", str(state), "--http", "off", "--ingest", "tcp://127.0.0.1:*"]
    argv += ["--scores", "tcp://127.0.0.1:*", "--candidates", "auto"]
    with caplog.at_level(logging.INFO, logger="oddsmill"):
        assert main(argv) == 0, capsys.readouterr().err
    server = served.pop()
    assert server.race is not None and server.race.names == [c.name for c in nine]
    assert server.engine.learner.step == 28_000
    assert f"the race in {state} was begun with the auto grid of nine candidates" in caplog.text
    capsys.readouterr()
    assert main([*argv, "--eta0", "0.25"]) == 2  # the grid around another rate: not the nine it holds
    err = capsys.readouterr().err
    assert "keeps the settings it was created with" in err and "candidates = ['eta0=0.5,l2=0.0001'," in err
    assert not served


def test_a_stop_while_starting_keeps_a_state_that_holds_what_was_learned(tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """`stop_starting` takes away only what holds nothing learned. A state directory with journal
    records and no checkpoint yet (a daemon killed before its first, now learning its journal
    again when the signal comes) keeps every file; a new one with only its lock file and an
    empty segment is taken away. (`os._exit` and `logging.shutdown` stubbed: the test's process
    goes on.)"""
    from oddsmill.server import stop_starting
    from oddsmill.storage import LOCK_NAME, JournalWriter

    exits: list[int] = []
    monkeypatch.setattr("os._exit", exits.append)
    monkeypatch.setattr("logging.shutdown", lambda: None)
    kept, empty = tmp_path / "kept", tmp_path / "empty"
    for state in (kept, empty):
        state.mkdir()
        (state / LOCK_NAME).write_text("1\n")
    with JournalWriter(kept / "journal-000000000000.omj") as j:
        j.append(1.0, msgpack.packb({"x": {"route_km": 3.0}, "y": 1}))
        j.sync()
    JournalWriter(empty / "journal-000000000000.omj").close()
    before = {p.name: p.read_bytes() for p in kept.iterdir()}
    stop_starting(signal.SIGTERM, kept, made=False)
    assert {p.name: p.read_bytes() for p in kept.iterdir()} == before
    stop_starting(signal.SIGTERM, empty, made=True)
    assert not empty.exists()
    assert exits == [143, 143]
