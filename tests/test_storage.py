"""Checkpoints and the journal: exact round trips, damage detected, no pickle."""

from __future__ import annotations

import logging
import os
import pickle
from functools import partial
from pathlib import Path

import numpy as np
import pytest
from oddsmill.engine import Engine
from oddsmill.errors import CheckpointError
from oddsmill.learner import Learner
from oddsmill.protocol import decode_body
from oddsmill.settings import LearnerSettings
from oddsmill.storage import (
    JournalWriter,
    decode_checkpoint,
    encode_checkpoint,
    journal_record,
    load_newest,
    read_journal,
    write_checkpoint,
)

from tests.conftest import sparse_stream
from tests.tools import require


def _items(events, start):  # type: ignore[no-untyped-def]
    out = []
    for i, (x, _) in enumerate(events):
        ident = f"P{start + i}"
        out.extend((float(start + i), it) for it in decode_body({"id": ident, "x": x}))
        if i >= 3:  # outcomes arrive a few events later
            out.extend((float(start + i), it) for it in decode_body({"id": f"P{start + i - 3}", "y": events[i - 3][1]}))
    return out


@pytest.mark.parametrize("compact", [True, False], ids=["checkpoint form", "full rows and lists"])
@pytest.mark.parametrize("schedule", ["constant", "inverse-time", "power", "adagrad"])
def test_save_load_continue_equals_an_uninterrupted_run(tmp_path: Path, schedule: str, compact: bool) -> None:
    events = sparse_stream(1200, seed=11)
    first, second = _items(events[:600], 0), _items(events[600:], 600)
    s = LearnerSettings(schedule=schedule, average_start=200, scale_warmup=300)
    straight = Engine(Learner(s), window=100)
    for chunk in (first, second):
        straight.process(chunk)
    resumed = Engine(Learner(s), window=100)
    resumed.process(first)
    write_checkpoint(tmp_path, resumed.learner.step, {"engine": resumed.state_dict(compact)})
    state, _ = load_newest(tmp_path)  # type: ignore[misc]
    again = Engine.from_state_dict(state["engine"])
    held = [e[0] for e in again.pending.values()]
    assert len(held) > 0 and list(again.pending) == list(resumed.pending)
    if compact:  # requests with the same names share one tuple of slots again, as before the save
        assert len({id(t) for t in held}) == len(set(held))
    again.process(second)
    a, b = straight.state_dict(), again.state_dict()
    assert a["learner"]["scalars"].tobytes() == b["learner"]["scalars"].tobytes()
    assert a["learner"]["slots"].tobytes() == b["learner"]["slots"].tobytes()
    assert a["metrics"]["sum"] == b["metrics"]["sum"]
    assert a["pending"] == b["pending"]


def test_flipped_byte_and_truncation_are_detected_and_fall_back(tmp_path: Path, caplog) -> None:  # type: ignore[no-untyped-def]
    eng = Engine(Learner())
    eng.process(_items(sparse_stream(50, seed=1), 0))
    older = write_checkpoint(tmp_path, 1, {"engine": eng.state_dict(), "mark": "older"})
    newer = write_checkpoint(tmp_path, 2, {"engine": eng.state_dict(), "mark": "newer"})
    data = bytearray(newer.read_bytes())
    data[len(data) // 2] ^= 0x40
    newer.write_bytes(bytes(data))
    with pytest.raises(CheckpointError, match="checksum"):
        decode_checkpoint(bytes(data))
    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        state, path = load_newest(tmp_path)  # type: ignore[misc]
    assert path == older and state["mark"] == "older"
    assert "damaged" in caplog.text
    with pytest.raises(CheckpointError, match="truncated"):
        decode_checkpoint(older.read_bytes()[:-10])


def test_a_pickle_is_refused(tmp_path: Path) -> None:
    bad = tmp_path / "checkpoint-000000000001.omc"
    bad.write_bytes(pickle.dumps({"engine": "x"}))
    with pytest.raises(CheckpointError, match="not an oddsmill checkpoint"):
        load_newest(tmp_path)


def test_only_known_array_types_are_parsed() -> None:
    with pytest.raises(TypeError):
        encode_checkpoint({"a": np.array(["text"])})


def test_journal_round_trip_and_torn_tail(tmp_path: Path, caplog) -> None:  # type: ignore[no-untyped-def]
    import msgpack

    seg = tmp_path / "journal-000000000000.omj"
    bodies = [{"id": i, "x": {"route_km": float(i)}} for i in range(5)]
    with JournalWriter(seg) as j:
        for i, body in enumerate(bodies):
            j.append(100.0 + i, msgpack.packb(body))
        j.sync()
    got = list(read_journal(seg))
    assert [b for _, _, b in got] == bodies
    assert [t for _, t, _ in got] == [100.0, 101.0, 102.0, 103.0, 104.0]
    seg.write_bytes(seg.read_bytes()[:-3])  # a torn last record
    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        torn = list(read_journal(seg))
    assert [b for _, _, b in torn] == bodies[:4]
    assert "torn record" in caplog.text


def test_a_record_damaged_in_the_middle_is_an_error_not_a_tail(tmp_path: Path, caplog) -> None:  # type: ignore[no-untyped-def]
    """A bad record with good ones after it (a byte gone bad, not a crash's torn write): the reading
    stops there all the same, but says so as an error, naming where the good records resume; a
    corrupt last record stays a warning about the tail."""
    import msgpack

    seg = tmp_path / "journal-000000000000.omj"
    with JournalWriter(seg) as j:
        for i in range(6):
            j.append(100.0 + i, msgpack.packb({"id": i, "x": {"route_km": float(i)}}))
        j.sync()
    ends = [end for end, _, _ in read_journal(seg)]
    data = bytearray(seg.read_bytes())
    data[ends[1] + 15] ^= 0x40  # a byte of the third record's payload
    seg.write_bytes(bytes(data))
    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        assert [b["id"] for _, _, b in read_journal(seg)] == [0, 1]
    (error,) = [r for r in caplog.records if r.levelno == logging.ERROR]
    said = error.getMessage()
    assert f"a damaged record at byte {ends[1]} (CRC mismatch), and good records after it from byte {ends[2]}" in said
    caplog.clear()
    data[ends[1] + 15] ^= 0x40  # mended
    data[ends[-2] + 15] ^= 0x40  # and the last record damaged: a tail
    seg.write_bytes(bytes(data))
    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        assert [b["id"] for _, _, b in read_journal(seg)] == [0, 1, 2, 3, 4]
    assert [r.levelno for r in caplog.records] == [logging.WARNING]
    assert "the tail is ignored" in caplog.records[0].getMessage()


def test_the_journal_checksum_is_zlibs_crc32(tmp_path: Path) -> None:
    """The journal's CRC-32 comes from zlib-ng; the reference is the standard library's
    zlib.crc32, over lengths from none to a columnar block's 80 KB (short ones on either side of
    powers of two, where a vectorised loop hands over to its tail), chained from a start value as a
    record's is."""
    import struct
    import zlib

    import msgpack
    from oddsmill.storage import crc32

    rng = np.random.default_rng(5)
    for n in (0, 1, 15, 16, 17, 31, 63, 64, 65, 127, 255, 256, 4095, 80_007):
        data = rng.bytes(n)
        for start in (0, 1, 0xFFFFFFFF, zlib.crc32(b"\x92\xcb")):
            assert crc32(data, start) == zlib.crc32(data, start), (n, start)
    rows = rng.normal(size=(500, 20)).tobytes()
    raw = msgpack.packb({"cols": [f"f{j:02d}" for j in range(20)], "rows": rows})
    record = journal_record(7.25, raw)
    payload = msgpack.packb([7.25, msgpack.unpackb(raw)])  # the record's payload, packed independently
    assert record == struct.pack("<II", len(payload), zlib.crc32(payload)) + payload
    seg = tmp_path / "journal-000000000000.omj"
    with JournalWriter(seg) as j:
        j.write_all(7.25, [raw])
    assert seg.read_bytes().endswith(record)
    [(_, arrival, body)] = list(read_journal(seg))
    assert arrival == 7.25 and body["rows"] == rows


def _resident_bytes(path: Path) -> int:
    """How much of a file the page cache holds, by util-linux's fincore (mincore(2))."""
    import subprocess

    out = subprocess.run(
        [require("fincore"), "--bytes", "--noheadings", "--output", "RES", str(path)],
        capture_output=True,
        text=True,
        check=True,
    )
    return int(out.stdout.split()[0])


def test_synced_journal_bytes_leave_the_page_cache(tmp_path: Path) -> None:
    """Once a segment's bytes are on disk the page cache lets them go (storage.CLEAN_BYTES), after
    `sync` and after a background fsync alike; the records read back the same. Reference: fincore
    from util-linux, which asks the kernel (mincore) which of the file's pages are cached. At most
    the last, partly written page stays."""
    import msgpack

    seg = tmp_path / "journal-000000000000.omj"
    rng = np.random.default_rng(11)
    bodies = [msgpack.packb({"cols": ["route_km"], "rows": rng.bytes(80_000)}) for _ in range(50)]
    with JournalWriter(seg) as j:
        j.write_all(1.0, bodies[:25])
        assert _resident_bytes(seg) > 1_000_000  # written, not yet on disk: cached
        j.sync()
        assert _resident_bytes(seg) <= 4096
        j.write_all(2.0, bodies[25:])
        assert j.sync_later()
        assert j.synced_to(wait=True) == seg.stat().st_size
        assert _resident_bytes(seg) <= 4096
    assert [b for _, _, b in read_journal(seg)] == [msgpack.unpackb(b) for b in bodies]


def test_cleaning_steps_advise_dropping_the_segment_so_far(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Between fsyncs, every CLEAN_BYTES appended the writer advises the system to drop the segment
    so far (the pages on disk go; the others start to be written, and go at a later step). The
    advice is recorded here in place of posix_fadvise, each step waited for before the next write
    (a step still running when one falls due puts it off to the next write): from the segment's
    start to its end at the step, a step at the first write CLEAN_BYTES past the last."""
    from oddsmill import storage

    advised: list[tuple[int, int, int]] = []

    def record(fd: int, offset: int, length: int, advice: int) -> None:
        advised.append((offset, offset + length, os.fstat(fd).st_size))
        assert advice == os.POSIX_FADV_DONTNEED

    monkeypatch.setattr(storage, "_advise", record)
    seg = tmp_path / "journal-000000000000.omj"
    body = bytes(100_000)
    record = len(journal_record(1.0, body))
    with JournalWriter(seg) as j:
        while j.tell() < 5 * (storage.CLEAN_BYTES + record):  # five steps, and less than a sixth
            j.write_all(1.0, [body])
            if j._cleaning is not None:
                j._cleaning.result()
    assert len(advised) == 5
    ends = [0] + [end for _, end, _ in advised]
    for k, (start, end, size) in enumerate(advised):
        assert start == 0 and end == size
        assert storage.CLEAN_BYTES <= end - ends[k] < storage.CLEAN_BYTES + record
    assert seg.stat().st_size - advised[-1][1] < storage.CLEAN_BYTES


def test_a_checkpoints_fsync_fails_after_a_background_fsync_failed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """`sync_soon` after a background fsync that failed, and was not collected yet, raises that
    error even though its own fsync would succeed: the kernel may have dropped the pages the first
    could not write, and a checkpoint must not claim them. Likewise `sync` (the loop's, at a new
    segment) after a checkpoint's fsync failed."""
    import errno

    from oddsmill import storage

    writer = JournalWriter(tmp_path / "journal-000000000000.omj")
    writer.write_all(1.0, [b"\x80"])
    real = storage._fsync
    failing = {"on": True}

    def fsync(fd: int) -> None:
        if failing["on"]:
            raise OSError(errno.EIO, "Input/output error (injected)")
        real(fd)

    monkeypatch.setattr(storage, "_fsync", fsync)
    assert writer.sync_later()
    assert writer._pending is not None and isinstance(writer._pending.exception(), OSError)  # failed, not collected
    failing["on"] = False
    job = writer.sync_soon()
    with pytest.raises(OSError, match="Input/output error"):
        job.result()
    fresh = JournalWriter(tmp_path / "journal-000000000001.omj")  # another segment: its own fsyncs
    fresh.write_all(2.0, [b"\x80"])
    assert fresh.sync_soon().result() == fresh.tell()
    fresh.close()
    writer.abandon()
    # a checkpoint's fsync that failed: a sync in the loop after it fails too, though its own
    # fsync would succeed
    third = JournalWriter(tmp_path / "journal-000000000002.omj")
    third.write_all(3.0, [b"\x80"])
    failing["on"] = True
    assert isinstance(third.sync_soon().exception(), OSError)
    failing["on"] = False
    with pytest.raises(OSError, match="Input/output error"):
        third.sync()
    third.abandon()


def test_a_segment_reserves_its_blocks_while_open_and_gives_back_the_rest(tmp_path: Path) -> None:
    """`JournalWriter(reserve=...)`: the segment's blocks are reserved when it opens, its size stays
    its records' (PROTOCOL 6: records end to end, so a crash leaves nothing to cut), and what was not
    used is given back when it closes, or when it is abandoned after a failed write."""
    size = 8 << 20
    for ending in ("close", "abandon"):
        path = tmp_path / f"journal-{ending}.omj"
        writer = JournalWriter(path, reserve=size)
        if not writer._reserved:  # the file system declines (this machine's does not)
            message = f"{tmp_path} takes no reservation of blocks (fallocate)"
            if os.environ.get("CI") == "true":
                pytest.fail(message)
            pytest.skip(message)
        bodies = [bytes([i]) * 3000 for i in range(40)]
        writer.write_all(5.0, bodies)
        records = b"".join(journal_record(5.0, b) for b in bodies)
        assert path.stat().st_size == writer.tell() == 21 + len(records)
        assert path.stat().st_blocks * 512 >= size  # reserved past the end
        getattr(writer, ending)()
        assert path.stat().st_blocks * 512 < size // 4  # given back
        assert path.read_bytes()[21:] == records
    from oddsmill.server import Server, ServerSettings

    server = Server(ServerSettings(state_dir=tmp_path / "state", segment_bytes=size, http="off"))
    segment = server.journal.path  # the daemon's segments reserve their size
    assert segment.stat().st_blocks * 512 >= size and segment.stat().st_size == 21
    server.close()
    assert segment.stat().st_blocks * 512 < size // 4
    plain = JournalWriter(tmp_path / "journal-plain.omj")  # without reserve: nothing reserved
    plain.write_all(1.0, [b"\x80"])
    assert not plain._reserved and (tmp_path / "journal-plain.omj").stat().st_blocks * 512 < size // 4
    plain.close()


@pytest.mark.parametrize("first", ["append_all then flush", "write_all"])
def test_short_and_failed_writes_leave_the_journal_exact(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, first: str
) -> None:
    """The writer buffers pieces (record heads and the bodies as received) and writes them with
    os.writev. A write that takes fewer bytes than offered (as POSIX allows, and a nearly full disk
    does) or fails must leave the file holding a prefix of the records and the buffer holding exactly
    the rest, so that writing again continues where the file ends. `write_all` (the daemon's
    write, which skips the buffer when it is empty) must leave them as `append_all` then `flush` do."""
    import errno
    import os

    import msgpack
    from oddsmill import storage

    real = os.writev
    plan = {"limit": 7, "fail_every": 4, "calls": 0}

    def stingy(fd: int, parts: list[bytes]) -> int:  # at most `limit` bytes, and every 4th call fails
        plan["calls"] += 1
        if plan["calls"] % plan["fail_every"] == 0:
            raise OSError(errno.ENOSPC, "No space left on device (injected)")
        return real(fd, [b"".join(parts)[: plan["limit"]]])

    seg = tmp_path / "journal-000000000000.omj"
    bodies = [msgpack.packb({"id": i, "x": {"route_km": float(i) * 1.5}, "y": i % 2}) for i in range(40)]
    j = JournalWriter(seg)  # its header written as usual
    monkeypatch.setattr(storage.os, "writev", stingy)
    failures = 0
    for lo in range(0, 40, 3):
        expected_end = j.tell() + sum(len(journal_record(200.0 + lo, b)) for b in bodies[lo : lo + 3])
        write = j.flush
        if first == "write_all":
            write = partial(j.write_all, 200.0 + lo, bodies[lo : lo + 3])
        else:
            j.append_all(200.0 + lo, bodies[lo : lo + 3])
        while True:
            try:
                write()
                break
            except OSError:
                failures += 1
                write = j.flush
                assert j.tell() == expected_end  # nothing lost, nothing counted twice
                assert seg.stat().st_size <= expected_end
        assert seg.stat().st_size == expected_end
    monkeypatch.setattr(storage.os, "writev", real)
    j.close()
    assert failures >= 10 and plan["calls"] > 300  # the short and failed writes were exercised
    got = list(read_journal(seg))
    assert [msgpack.packb(b) for _, _, b in got] == bodies
    for t, b in ((200.0, bodies[0]), (1.7e9 + 0.123, bodies[1]), (-0.0, bodies[2])):  # the payload is
        assert journal_record(t, b)[8:] == msgpack.packb([t, msgpack.unpackb(b)])  # msgpack's own
    assert [t for _, t, _ in got] == [200.0 + 3 * (i // 3) for i in range(40)]


def test_only_the_newest_checkpoints_are_kept(tmp_path: Path) -> None:
    from oddsmill.storage import KEEP, list_checkpoints

    for step in range(1, KEEP + 4):
        write_checkpoint(tmp_path, step, {"step": step})
    kept = list_checkpoints(tmp_path)
    assert [int(p.name[11:23]) for p in kept] == list(range(4, KEEP + 4))
    assert not list(tmp_path.glob(".*.tmp"))  # no temporary file left behind


def test_pending_requests_expire_by_arrival_time_and_are_counted() -> None:
    eng = Engine(Learner(), pending_ttl=60.0)
    eng.process([(1000.0, it) for it in decode_body({"id": "old", "x": {"a": 1.0}, "ts": 5.0})])
    # a message whose event time lies far ahead of the request's does not expire it
    eng.process([(1010.0, it) for it in decode_body({"x": {"a": 1.0}, "ts": 9e9})])
    assert "old" in eng.pending
    eng.process([(1061.0, it) for it in decode_body({"x": {"a": 1.0}})])  # 61 s after it arrived
    assert "old" not in eng.pending and eng.counters.pending_expired == 1
    results = eng.process([(1062.0, it) for it in decode_body({"id": "old", "y": 1})])
    assert [r.reason for _, r in results] == ["unknown_outcome"]  # type: ignore[union-attr]
    # the outcome is told it came too late (it was "no scoring request with id 'old' is held",
    # which a late outcome and a wrong id both got), through either path, and an id never held is not
    late = "the scoring request with id 'old' was held for the time-to-live (60 s) and dropped before this outcome came"
    assert [r.detail for _, r in results] == [late]  # type: ignore[union-attr]
    (only,) = decode_body({"id": "old", "y": 1})
    assert eng.one(1063.0, only).detail == late  # type: ignore[union-attr, arg-type]
    results = eng.process([(1064.0, it) for it in decode_body({"id": "never", "y": 0})])
    assert [r.detail for _, r in results] == ["no scoring request with id 'never' is held"]  # type: ignore[union-attr]
    # a request held again under the id is joined as usual, and its reason forgotten
    eng.process([(1065.0, it) for it in decode_body({"id": "old", "x": {"a": 2.0}})])
    assert "old" not in eng.dropped
    assert [type(r).__name__ for _, r in eng.process([(1066.0, it) for it in decode_body({"id": "old", "y": 1})])] == []


def test_a_second_outcome_is_told_its_request_was_answered_already(monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """A second outcome for an id (a queue that delivers at least once) got "no scoring request with
    id ... is held", as a wrong id does. The ids of the last `JOINED_KEPT` outcomes learned are
    kept (here 2), so it is told, on both paths; a request held again under the id is joined as
    usual."""
    from oddsmill import engine

    monkeypatch.setattr(engine, "JOINED_KEPT", 2)
    eng = Engine(Learner())
    for i in range(3):
        eng.process([(float(i), it) for it in decode_body({"id": f"P{i}", "x": {"a": 1.0}})])
        assert eng.process([(float(i), it) for it in decode_body({"id": f"P{i}", "y": 1})]) == []
    assert list(eng.joined) == ["P1", "P2"]
    again = "the outcome of the scoring request with id 'P2' was learned already: an outcome is learned once"
    results = eng.process([(5.0, it) for it in decode_body({"id": "P2", "y": 0})])
    assert [r.detail for _, r in results] == [again]  # type: ignore[union-attr]
    (only,) = decode_body({"id": "P2", "y": 0})
    assert eng.one(6.0, only).detail == again  # type: ignore[union-attr, arg-type]
    results = eng.process([(7.0, it) for it in decode_body({"id": "P0", "y": 0})])  # beyond the last 2
    assert [r.detail for _, r in results] == ["no scoring request with id 'P0' is held"]  # type: ignore[union-attr]
    eng.process([(8.0, it) for it in decode_body({"id": "P2", "x": {"a": 2.0}})])
    assert "P2" not in eng.joined
    assert eng.process([(9.0, it) for it in decode_body({"id": "P2", "y": 1})]) == []


def test_the_pending_store_is_bounded_by_count_and_counts_evictions() -> None:
    eng = Engine(Learner(), pending_limit=2)
    for i in range(3):
        eng.process([(float(i), it) for it in decode_body({"id": f"P{i}", "x": {"a": 1.0}})])
    assert list(eng.pending) == ["P1", "P2"]  # the oldest went first
    assert eng.counters.pending_evicted == 1
    results = eng.process([(3.0, it) for it in decode_body({"id": "P0", "y": 1})])
    assert [r.detail for _, r in results] == [  # type: ignore[union-attr]
        "the scoring request with id 'P0' was pushed out of the pending store, full at 2 requests,"
        " before this outcome came"
    ]


def test_the_reasons_of_dropped_requests_are_kept_for_the_last_few_only(monkeypatch) -> None:  # type: ignore[no-untyped-def]
    from oddsmill import engine

    monkeypatch.setattr(engine, "DROPPED_KEPT", 3)
    eng = Engine(Learner(), pending_limit=1)
    for i in range(6):  # P0 to P4 pushed out in turn
        eng.process([(float(i), it) for it in decode_body({"id": f"P{i}", "x": {"a": 1.0}})])
    assert list(eng.dropped) == ["P2", "P3", "P4"]
    details = [
        r.detail for i in (1, 4) for _, r in eng.process([(9.0, it) for it in decode_body({"id": f"P{i}", "y": 1})])
    ]
    assert details[0] == "no scoring request with id 'P1' is held" and "P4' was pushed out" in details[1]  # type: ignore[attr-defined]


def test_held_requests_keep_their_scores_and_leave_the_garbage_collectors_sight() -> None:
    """A held request is a tuple of numbers, so Python's collector stops tracking it (a million
    tracked entries made each full collection stop the loop for a second, measured). Its score is
    the one published for it, also when its outcome arrives in the same block, and a request held
    again under the same id replaces the first."""
    import gc

    from oddsmill.engine import E_LOGIT

    eng = Engine(Learner())
    bodies = [{"id": f"P{i}", "x": {"route_km": float(i), "depot": "Eastgate"}} for i in range(50)]
    scored = eng.process([(1.0, it) for b in bodies for it in decode_body(b)])
    published = {r.id: r.logit for _, r in scored}  # type: ignore[union-attr]
    # in one block: a new request, its outcome, and P3 held again with other features
    block = [{"id": "P50", "x": {"route_km": 3.0}}, {"id": "P50", "y": 1}, {"id": "P3", "x": {"stops_before": 2.0}}]
    again = eng.process([(2.0, it) for b in block for it in decode_body(b)])
    scores = [r for _, r in again if hasattr(r, "logit")]
    published["P3"] = scores[-1].logit  # type: ignore[union-attr]
    gc.collect()
    gc.collect()  # (a tuple is untracked once the tuples inside it are: the first pass may meet it first)
    assert len(eng.pending) == 50 and "P50" not in eng.pending
    for ident, entry in eng.pending.items():
        assert entry[E_LOGIT] == published[ident]
        assert not gc.is_tracked(entry)
    first = scores[0].logit  # type: ignore[union-attr]
    assert eng.metrics.count == 1  # P50's outcome, scored with the score published for it:
    assert eng.metrics.sum == pytest.approx(np.logaddexp(0.0, first) - first)


def test_a_state_directory_is_held_once_a_process_and_let_go(tmp_path: Path) -> None:
    """hold_state_dir: the lock file names this process; asking again in it holds nothing more;
    another process is refused while it holds, and takes the directory once it has let go."""
    import os
    import subprocess
    import sys

    from oddsmill import storage

    state = tmp_path / "s"
    other = [
        sys.executable,
        "-c",
        "import sys; from pathlib import Path; from oddsmill.storage import hold_state_dir; "
        "hold_state_dir(Path(sys.argv[1])); print('held')",
        str(state),
    ]
    storage.hold_state_dir(state)
    try:
        storage.hold_state_dir(state)  # again: nothing more
        assert (state / storage.LOCK_NAME).read_text() == f"{os.getpid()}\n"
        refused = subprocess.run(other, capture_output=True, text=True, timeout=60)
        assert refused.returncode == 1 and f"in use by another oddsmill process (pid {os.getpid()})" in refused.stderr
    finally:
        storage.release_state_dir(state)
    taken = subprocess.run(other, capture_output=True, text=True, timeout=60)
    assert taken.returncode == 0 and taken.stdout == "held\n", taken.stderr


def test_a_file_system_without_locks_is_warned_of_not_refused(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    import errno
    import os

    from oddsmill import storage

    def no_locks(fd: int, op: int) -> None:
        raise OSError(errno.ENOLCK, "No locks available")

    monkeypatch.setattr(storage.fcntl, "flock", no_locks)
    state = tmp_path / "s"
    with caplog.at_level(logging.WARNING, logger="oddsmill"):
        storage.hold_state_dir(state)
    try:
        assert any("does not take locks (No locks available)" in r.getMessage() for r in caplog.records)
        assert (state / storage.LOCK_NAME).read_text() == f"{os.getpid()}\n"
    finally:
        storage.release_state_dir(state)
