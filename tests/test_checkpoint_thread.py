"""The loop's checkpoints are written on a thread of their own (Server.checkpoint_soon): the loop
goes on learning while one is written, the checkpoint holds the state as it was when it began (not
what the loop changed since), a restart from it equals the live state bit for bit, and a failed
write begins an outage as a failed write in the loop does."""

from __future__ import annotations

import copy
import errno
import threading
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
from oddsmill import server as server_module
from oddsmill.server import Server, ServerSettings
from oddsmill.storage import load_newest

from tests.tools import full_rows


class Recorder:
    def __init__(self) -> None:
        self.frames = 0

    def send(self, data: bytes, flags: int = 0) -> None:
        self.frames += 1


def messages(n: int, seed: int) -> list[list[bytes]]:
    """Parcel events: numeric features, a depot, scoring requests with ids and their outcomes."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        body: dict[str, Any] = {"x": {"route_km": float(rng.gamma(3, 14)), "depot": f"D{rng.integers(0, 5)}"}}
        if i % 4 == 0:
            body["id"] = f"{seed}-{i}"  # held until its outcome
        else:
            body["y"] = int(rng.random() < 0.3)
        out.append([b"events", msgpack.packb(body)])
        if i % 4 == 3:
            out.append([b"events", msgpack.packb({"id": f"{seed}-{i - 3}", "y": 1})])
    return out


def held_write(monkeypatch: pytest.MonkeyPatch, fail: bool = False) -> threading.Event:
    """The checkpoint writer waits for the returned event, then writes (or fails as a full disk)."""
    real = server_module.write_checkpoint
    go = threading.Event()

    def write(*args: Any, **kwargs: Any) -> Path:
        assert go.wait(20)
        if fail:
            raise OSError(errno.ENOSPC, "No space left on device (injected)")
        return real(*args, **kwargs)

    monkeypatch.setattr(server_module, "write_checkpoint", write)
    return go


def test_the_loop_learns_on_while_a_checkpoint_is_written(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    settings = ServerSettings(state_dir=tmp_path, http="off", window=100)  # (the window wraps meanwhile)
    server = Server(settings)
    pub = Recorder()
    for m in messages(300, 1):
        server.handle([m], pub)  # type: ignore[arg-type]
    go = held_write(monkeypatch)
    at_begin = copy.deepcopy(server.engine.state_dict())  # (a copy of its own, whatever the dict shares)
    server.checkpoint_soon()
    assert server.writing is not None  # begun, not written: the writer waits
    step = server.engine.learner.step
    for m in messages(300, 2):  # the loop goes on learning meanwhile
        server.handle([m], pub)  # type: ignore[arg-type]
    assert server.engine.learner.step > step
    server.collect_checkpoint()  # not done yet: nothing taken
    assert server.writing is not None and not list(tmp_path.glob("checkpoint-*.omc"))
    go.set()
    server.collect_checkpoint(wait=True)
    assert server.writing is None and server.outage is None
    state, path = load_newest(tmp_path)  # type: ignore[misc]
    assert path.name == f"checkpoint-{step:012d}.omc"
    saved = full_rows(state["engine"]["learner"])
    for key in ("scalars", "slots", "flags", "warmup_queue"):  # the state as it was when it began
        assert saved[key].tobytes() == at_begin["learner"][key].tobytes(), key
    assert state["engine"]["counters"] == at_begin["counters"]
    for key in ("z", "y", "history"):  # the metrics' window too
        assert state["engine"]["metrics"][key].tobytes() == at_begin["metrics"][key].tobytes(), key
    assert state["journal"] == server.positions[step]
    # a restart from it and the journal after it is the live state, bit for bit
    server.journal.close()
    again = Server(settings)
    again.journal.close()
    live, restored = server.engine.state_dict(), again.engine.state_dict()
    for key in ("scalars", "slots", "flags", "warmup_queue"):
        assert restored["learner"][key].tobytes() == live["learner"][key].tobytes(), key
    assert restored["pending"] == live["pending"] and restored["counters"] == live["counters"]


def test_a_failed_checkpoint_write_on_its_thread_begins_an_outage(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    server = Server(ServerSettings(state_dir=tmp_path, http="off"))
    pub = Recorder()
    for m in messages(100, 3):
        server.handle([m], pub)  # type: ignore[arg-type]
    go = held_write(monkeypatch, fail=True)
    server.checkpoint_soon()
    go.set()
    server.collect_checkpoint(wait=True)
    assert server.outage is not None and "No space left" in server.outage
    step = server.engine.learner.step
    frames = pub.frames
    for m in messages(40, 4):  # scored, held for the outage, not learned
        server.handle([m], pub)  # type: ignore[arg-type]
    assert server.engine.learner.step == step and pub.frames > frames and server.held
    monkeypatch.undo()
    server._recover()  # the disk answers again: the held messages are journaled and learned
    assert server.outage is None and not server.held and server.engine.learner.step > step
    server.journal.close()


def test_an_outage_whose_checkpoints_fail_goes_on_without_flapping(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    """On a full disk the journal takes writes (its segment's blocks are reserved) while a
    checkpoint does not. Each retry journaled and learned the held messages, said "writes succeed
    again", then failed its checkpoint and began the outage again with its error: two lines and a
    counted failure every second. Now the outage ends only with a checkpoint written; meanwhile
    what it holds is journaled and learned at each retry, and the log says so once."""
    import errno

    server = Server(ServerSettings(state_dir=tmp_path, http="off"))
    pub = Recorder()
    for m in messages(50, 3):
        server.handle([m], pub)  # type: ignore[arg-type]
    real = server_module.write_checkpoint

    def full(*args: Any, **kwargs: Any) -> Path:
        raise OSError(errno.ENOSPC, "No space left on device (injected)")

    monkeypatch.setattr(server_module, "write_checkpoint", full)
    with caplog.at_level("INFO", logger="oddsmill"):
        server.checkpoint()
        steps = [server.engine.learner.step]
        for seed in (4, 5, 6):
            for m in messages(50, seed):
                server.handle([m], pub)  # type: ignore[arg-type]
            assert server.held
            server._recover()
            assert server.outage is not None and not server.held
            steps.append(server.engine.learner.step)
        assert steps[0] < steps[1] < steps[2] < steps[3]  # learned at each retry
        assert server.board.write_failures._value.get() == 1
        lines = [(r.levelname, r.getMessage().split(":")[0]) for r in caplog.records]
        assert lines == [
            ("ERROR", f"cannot write the state directory {tmp_path}"),
            (
                "WARNING",
                "the journal takes writes again, but a checkpoint cannot be written "
                "(No space left on device (injected) (OSError))",
            ),
        ], lines
        caplog.clear()
        monkeypatch.setattr(server_module, "write_checkpoint", real)
        held = len(messages(50, 7))
        for m in messages(50, 7):
            server.handle([m], pub)  # type: ignore[arg-type]
        server._recover()
    assert server.outage is None
    assert caplog.messages[-1] == (
        f"writes succeed again: journaled and learned {3 * len(messages(50, 4)) + held} messages held during the outage"
    )
    state, _ = load_newest(tmp_path)  # type: ignore[misc]
    assert state["journal"]["records"] == server.records
    server.journal.close()


def test_the_loop_does_not_wait_on_the_disk_for_a_checkpoint(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The journal's fsync before a checkpoint runs on the background thread (`sync_soon`): the
    loop takes the state and goes on while the disk is slow, and the checkpoint is written only
    once the journal up to its position is on disk."""
    from oddsmill import storage

    server = Server(ServerSettings(state_dir=tmp_path, http="off"))
    pub = Recorder()
    for m in messages(200, 5):
        server.handle([m], pub)  # type: ignore[arg-type]
    real_fsync, real_write = storage._fsync, server_module.write_checkpoint
    disk = threading.Event()  # the slow disk answers once set
    order: list[str] = []

    def slow_fsync(fd: int) -> None:
        assert threading.current_thread() is not threading.main_thread(), "the loop waited on the disk"
        assert disk.wait(20)
        real_fsync(fd)
        order.append("journal synced")

    def write(*args: Any, **kwargs: Any) -> Path:
        order.append("checkpoint written")
        return real_write(*args, **kwargs)

    monkeypatch.setattr(storage, "_fsync", slow_fsync)
    monkeypatch.setattr(server_module, "write_checkpoint", write)
    server.checkpoint_soon()  # returns at once: the fsync waits on the disk
    step = server.engine.learner.step
    for m in messages(100, 6):  # the loop learns on meanwhile
        server.handle([m], pub)  # type: ignore[arg-type]
    assert server.engine.learner.step > step and not order and not list(tmp_path.glob("checkpoint-*.omc"))
    disk.set()
    path = server.collect_checkpoint(wait=True)
    assert path is not None and path.name == f"checkpoint-{step:012d}.omc" and server.outage is None
    assert order == ["journal synced", "checkpoint written"]
    state, _ = load_newest(tmp_path)  # type: ignore[misc]
    assert state["journal"]["offset"] <= server.base  # what the fsync covered is known safe
    server.journal.close()


def test_a_failed_journal_fsync_writes_no_checkpoint_and_begins_an_outage(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from oddsmill import storage

    server = Server(ServerSettings(state_dir=tmp_path, http="off"))
    pub = Recorder()
    for m in messages(100, 7):
        server.handle([m], pub)  # type: ignore[arg-type]

    def failing(fd: int) -> None:
        raise OSError(errno.EIO, "Input/output error (injected)")

    monkeypatch.setattr(storage, "_fsync", failing)
    server.checkpoint_soon()
    assert server.collect_checkpoint(wait=True) is None
    assert server.outage is not None and "Input/output error" in server.outage
    assert not list(tmp_path.glob("checkpoint-*.omc"))
    monkeypatch.undo()
    server._recover()  # the disk answers again
    assert server.outage is None and list(tmp_path.glob("checkpoint-*.omc"))
    server.journal.close()
