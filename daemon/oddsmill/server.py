"""The daemon's loop: receive, decode, journal, score and learn, publish, checkpoint.

The loop is the only writer of the learner's state. Each wake-up drains whatever is waiting (at most
`block_max` messages or `block_bytes` bytes, so a lone event is answered at once) into one block.
Every message whose body is msgpack is journaled (and the journal synced) before any score of its
block is published; the engine then runs the block exactly sequentially. Blocks of the commonest
kinds skip the engine's plan (`_quick` with quick.py, `_lone`, `_columns`), with the same bytes
published and journaled and the same state. A checkpoint records the journal position it covers,
so a restart loads the newest checkpoint and replays the journal after it: the state equals an
uninterrupted run on the same messages, bit for bit.
"""

from __future__ import annotations

import dataclasses
import errno
import ipaddress
import logging
import math
import os
import shutil
import socket
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from itertools import repeat
from pathlib import Path
from typing import Any, cast
from urllib.parse import urlsplit

import msgpack
import numpy as np
import zmq
from prometheus_client import CollectorRegistry

from . import columnar, intake
from . import kernel as K
from .encoding import BlockBuilder
from .engine import ColumnScores, Engine, Rejection, Result, Score
from .errors import ConfigError, OddsmillError, ProtocolError, StateWriteError
from .fastpath import NOT_SUCH, READ, RunReader, read_batch, read_each
from .learner import Learner
from .metrics import Board, Snapshot, serve_http
from .progressive import ProgressiveMetrics
from .protocol import (
    TRANSPORT_LIMIT,
    Body,
    Columns,
    Event,
    Item,
    decode_body,
    is_refused_record,
    refused_record,
    unpack,
)
from .quick import WRITE_FAILED, Known
from .race import MARGIN, PATIENCE, Candidate, Race, begun_with_earlier_auto, check_candidates
from .settings import LearnerSettings
from .storage import (
    JOURNAL_MAGIC,
    KEEP,
    LOCK_NAME,
    JournalWriter,
    Read,
    checkpoint_position,
    checkpoint_step,
    good_record_after,
    hold_state_dir,
    list_checkpoints,
    list_journal,
    load_newest,
    read_journal,
    release_state_dir,
    segment_first,
    write_checkpoint,
)
from .vocabulary import Vocabulary

log = logging.getLogger("oddsmill")

# a columnar message's first key, as the client library and most producers pack it (cols, then rows)
COLUMNAR_FIRST = (b"\xa4cols", b"\xa4rows")
# Bodies of this many bytes or more are received uncopied (`Receiver`). Best of seven on inproc, a
# receive copied against uncopied: 0.59 against 0.76 us at 8,000 bytes, 0.99 against 0.74 at
# 16,000, 2.69 against 0.78 at 32,000, 7.93 against 0.91 at 80,000.
LARGE_BODY = 1 << 14
RACE_RULE = {"race_margin", "race_patience"}  # when a race switches: settings of a race alone
SINGLE = "none (a single learner)"  # what a state that is no race keeps of a race's settings
SINGLES_TOGETHER = 4  # one-event messages in a block from which they are read together (fastpath.read_each)
POLL_MS = 100  # the loop wakes at least this often to see a stop request or a due checkpoint
CHORES_SECONDS = 0.01  # the loop's checks of time run at most this often (a few us each wake-up)
# The figures /metrics and /api/status read are a snapshot the loop takes when a scrape asks for
# one (Board.fresh); without scrapes, one this often at least.
SNAPSHOT_SECONDS = 10.0
RANKING_SECONDS = 2.0  # how stale the top coefficients may be (ranking them reads the whole vocabulary)
RATE_SECONDS = 1.0  # events/s is sampled this often for the dashboard
REPLAY_BLOCK = 4096
EVENT_MAPS = (b"\x82", b"\x83")  # the first byte of a body that may be one numeric training event
EVENT_KEYS = (b"\xa1x", b"\xa1y", b"\xa2i")  # and the start of its first key: "x", "y" or "id"
RETRY_SECONDS = 1.0  # while the state directory cannot be written, try again this often


@dataclass(frozen=True)
class ServerSettings:
    state_dir: Path
    ingest: str = "tcp://127.0.0.1:7571"
    ingest_kind: str = "sub"  # "sub" (producers PUB) or "pull" (producers PUSH: back-pressure)
    scores: str = "tcp://127.0.0.1:7572"
    topic: str = "events"
    block_max: int = 4096
    # A block also stops taking messages once they hold this many bytes: under a backlog of
    # columnar blocks (80 KB each) or batches, a block of block_max messages held hundreds of
    # megabytes, and each pass over it (decode, journal, learn, answer) ran from memory instead of
    # the cache: 980 MB and 0.82 to 0.90 M events/s at 4,096 messages, 280 MB and 1.0 to 1.6 M at
    # 25 to 100 (scratch runs of the bench's columnar load, 2026-12-02)
    block_bytes: int = 4 << 20
    # A checkpoint stops the loop to copy the state (about 1 ms for a small model, 8 to 40 at a
    # million slots), and its thread takes the other core meanwhile (the journal's fsync, encoding,
    # SHA-256, the file's fsync). Every 100,000 events that was 20 a second under the bench's
    # columnar load. A restart replays the tail after the newest checkpoint: a million events take
    # 1.5 to 1.6 s (scripts/recovery_time.py); at lower rates checkpoint_seconds comes first.
    checkpoint_events: int = 1_000_000
    checkpoint_seconds: float = 60.0
    segment_bytes: int = 64 << 20
    window: int = 10_000
    pending_limit: int = 1_000_000
    pending_ttl: float = 7 * 24 * 3600.0
    allow_insecure_bind: bool = False
    http: str = "127.0.0.1:7573"  # HOST:PORT of /metrics, /healthz and /api/status; "off" for none
    journal_keep: int = -1  # segments kept behind the oldest checkpoint's position; -1 keeps them all
    # When the journal is fsynced. Every block is always handed to the operating system before its
    # scores are published, so a crash of the process loses nothing. "block": fsync too, so nothing
    # published is lost to a power cut either; "interval": fsync at most every fsync_ms, so a power
    # cut loses at most that much; "os": the operating system decides.
    fsync: str = "interval"
    fsync_ms: float = 1000.0
    # While the state directory cannot be written (a full disk, a read-only remount, a failed fsync)
    # the daemon keeps scoring and holds what arrives, up to this many bytes, to journal and learn
    # once writes succeed again; beyond it, messages are dropped and counted.
    outage_hold_bytes: int = 256 << 20
    # CURVE (PROTOCOL 1): the daemon's secret certificate (written by `oddsmill keys`) and a directory
    # of the public certificates of the clients allowed to connect. With both, every producer and
    # subscriber must authenticate, and all traffic is encrypted; then the sockets may bind off
    # loopback. The directory is read at start.
    curve_secret: str = ""
    curve_clients: str = ""
    # ZeroMQ high-water marks, in messages. ingest_hwm queues on the daemon's receiving side: past it
    # (plus the producer's own send queue), a PUB producer's messages are dropped by ZeroMQ (counted
    # as lost when numbered with src/seq), and a PUSH producer blocks. scores_hwm queues for each
    # subscriber: a subscriber that falls further behind misses scores.
    ingest_hwm: int = 1000
    scores_hwm: int = 1000
    # A race of candidate learners (race.py): empty for a single learner. A challenger serves once
    # its windowed log-loss beats the serving one's by race_margin (relative) for race_patience
    # labelled events in a row.
    candidates: tuple[Candidate, ...] = ()
    race_margin: float = MARGIN
    race_patience: int = PATIENCE

    def __post_init__(self) -> None:
        if self.ingest_kind not in ("sub", "pull"):
            raise ConfigError(f"ingest_kind must be sub or pull, got {self.ingest_kind!r}")
        for name in (
            "block_max",
            "block_bytes",
            "checkpoint_events",
            "segment_bytes",
            "window",
            "pending_limit",
            "outage_hold_bytes",
            "ingest_hwm",
            "scores_hwm",
        ):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int) or v < 1:
                raise ConfigError(f"{name} must be an integer >= 1, got {v!r}")
        if self.fsync not in ("block", "interval", "os"):
            raise ConfigError(f"fsync must be block, interval or os, got {self.fsync!r}")
        if isinstance(self.fsync_ms, bool) or not isinstance(self.fsync_ms, int | float) or not self.fsync_ms > 0:
            raise ConfigError(f"fsync_ms must be a number > 0, got {self.fsync_ms!r}")
        if isinstance(self.journal_keep, bool) or not isinstance(self.journal_keep, int) or self.journal_keep < -1:
            raise ConfigError(f"journal_keep must be an integer >= -1 (-1 keeps all), got {self.journal_keep!r}")
        for name in ("ingest", "scores", "http", "ingest_kind", "topic", "curve_secret", "curve_clients"):
            if not isinstance(getattr(self, name), str):
                raise ConfigError(f"{name} must be a string, got {getattr(self, name)!r}")
        for name in ("checkpoint_seconds", "pending_ttl"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int | float) or not v > 0:
                raise ConfigError(f"{name} must be a number > 0, got {v!r}")
        if self.candidates:
            check_candidates(list(self.candidates))
        if isinstance(self.race_margin, bool) or not isinstance(self.race_margin, int | float):
            raise ConfigError(f"race_margin must be a number in [0, 1), got {self.race_margin!r}")
        if not 0 <= self.race_margin < 1:
            raise ConfigError(f"race_margin must be in [0, 1), got {self.race_margin!r}")
        if isinstance(self.race_patience, bool) or not isinstance(self.race_patience, int) or self.race_patience < 1:
            raise ConfigError(f"race_patience must be an integer >= 1, got {self.race_patience!r}")
        if bool(self.curve_secret) != bool(self.curve_clients):
            raise ConfigError("curve_secret and curve_clients go together: give both, or neither")
        if self.curve_secret:
            load_curve(self.curve_secret, self.curve_clients)
        for name in ("ingest", "scores"):
            check_bind(name, getattr(self, name), self.allow_insecure_bind, bool(self.curve_secret))
        if self.http != "off":
            host, _, port = self.http.rpartition(":")
            if not host or not port.isdigit():
                raise ConfigError(f"http must be HOST:PORT or off, got {self.http!r}")


def check_ports_free(settings: ServerSettings) -> None:
    """ConfigError when a port the daemon will bind is taken (another daemon, a second `serve`),
    found before the state is loaded: loading a large state and replaying its journal take
    seconds, and the directory is not touched. Each fixed TCP port is bound and let go at once,
    as the daemon will bind it (address reuse on, so a port left in TIME_WAIT is not taken);
    ports chosen by the system (`*`, 0), other transports and interface names are left to the
    bind itself. (Another process can still take a port between this and the bind, which then
    fails as it did before.)"""
    wanted: list[tuple[str, str, str]] = []  # (what a failure says, host, port)
    for name in ("ingest", "scores"):
        address = getattr(settings, name)
        if address.startswith("tcp://"):
            host, _, port = urlsplit(address).netloc.rpartition(":")
            wanted.append((f"cannot bind {name} to {address}", host.strip("[]"), port))
    if settings.http != "off":
        host, _, port = settings.http.rpartition(":")
        wanted.append((f"cannot serve HTTP on {settings.http}", host, port))
    for says, host, port in wanted:
        host = {"*": "0.0.0.0", "localhost": "127.0.0.1"}.get(host, host)
        try:
            family = socket.AF_INET6 if ipaddress.ip_address(host).version == 6 else socket.AF_INET
        except ValueError:
            continue  # an interface's name: ZeroMQ's to resolve
        if not port.isdigit() or int(port) == 0:
            continue  # a port the system chooses
        with socket.socket(family, socket.SOCK_STREAM) as probe:
            probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            try:
                probe.bind((host, int(port)))
            except OSError as e:
                raise ConfigError(f"{says} ({e.strerror})") from None


def warm_up(settings: LearnerSettings) -> None:
    """Load every compiled function the loop calls (about a second from numba's cache) before
    serving, so that the first event is not answered a second late, nor the first block of a kind
    a few milliseconds late (test_server checks that a fresh process compiles or loads nothing
    more). A scratch learner: the real state is untouched."""
    scratch = Learner(settings)
    scratch.learn_one({"warm": 1.0, "up": "yes"}, 1)
    scratch.predict_logit({"warm": 1.0})
    rows = BlockBuilder()  # and the columnar path
    rows.add_rows(np.array([0]), np.ones((1, 1)), np.array([K.OP_TRAIN]), np.ones(1))
    scratch.run_segments(rows.segments())
    one = msgpack.packb({"x": {"warm": 1.0}, "y": 1})  # and the compiled reading of events
    read_batch(msgpack.packb({"batch": [{"x": {"warm": 1.0}, "y": 1}]}))
    read_each([one, one])
    RunReader().read([one, one])  # and of blocks of them (Server._quick)
    scratch.run_rows([0], np.ones((2, 1)), np.ones(2))
    scratch.run_one([0], [1.0], K.OP_TRAIN, 1.0, 1.0)  # a lone event (Engine.one)
    decode_body(unpack(msgpack.packb({"cols": ["warm"], "rows": np.ones(1).tobytes()})))  # a block's check
    Vocabulary.from_state(1, {"name_bytes": b"w", "name_ends": [1]})  # the table's growth (rehash)
    metrics = ProgressiveMetrics(window=2)
    metrics.update(np.zeros(3), np.ones(3))  # the metrics' update
    metrics.update_one(0.0, 1.0)
    known = Known()  # and the names of the last block, learned in two compiled calls
    known.remember(None, b"\xa4warm", (0,))
    named = msgpack.packb({"x": {"warm": 1.0}, "y": 1, "id": 5})
    if known.read([named, named]) == READ:
        known.learn(scratch.arrays(1), metrics.arrays(), metrics.scalars(), 0.0)
    void = os.open(os.devnull, os.O_WRONLY)  # and in one, journal included
    try:
        known.journal_and_learn([named], void, 0.0, scratch.arrays(1), metrics.arrays(), metrics.scalars())
    finally:
        os.close(void)
    metrics.summary()  # and the window's figures
    intake.warm_up()  # and a wake-up in one call
    cols = msgpack.packb({"cols": ["warm"], "rows": np.ones(1).tobytes(), "y": b"\x01"})
    columnar.ColumnReader().read([cols], {("warm",): (0,)})  # and of columnar blocks (Server._columnar)
    columnar.score_body(np.zeros(1), 0, 0.0)


def load_curve(secret_file: str, clients_dir: str) -> tuple[bytes, bytes]:
    """The daemon's (public, secret) CURVE keys, after checking the allowed clients' directory."""
    import zmq.auth

    try:
        public, secret = zmq.auth.load_certificate(secret_file)
    except (OSError, ValueError) as e:
        raise ConfigError(f"curve_secret {secret_file!r}: cannot read a certificate ({e})") from None
    if secret is None:
        raise ConfigError(f"curve_secret {secret_file!r} holds no secret key: give the .key_secret file")
    clients = Path(clients_dir)
    if not clients.is_dir():
        raise ConfigError(f"curve_clients {clients_dir!r} is not a directory")
    if not any(p.suffix == ".key" for p in clients.iterdir()):
        log.warning("curve_clients %s holds no public key (*.key): no client can connect", clients_dir)
    return public, secret


class Ticker:
    """A line in the log every `EVERY` seconds of a long start: a warm start from a large history,
    or the replay of a long journal, learned for minutes before `serve` said "serving", with
    nothing in the log meanwhile."""

    EVERY = 10.0

    def __init__(self, what: str) -> None:
        self.what = what
        self.began = self.last = time.monotonic()

    def __call__(self, done: str) -> None:
        now = time.monotonic()
        if now - self.last >= self.EVERY:
            self.last = now
            log.info("%s: %s so far (%.0f s)", self.what, done, now - self.began)


class AllowedClients:
    """The public keys of `curve_clients` (its *.key files, read at the start), for ZeroMQ's
    authenticator. A key it refuses is logged, once a key: the refusal was said only at the
    authenticator's debug level, and the operator of a producer that got nothing through saw
    nothing in the daemon's log. (A client with no keys at all fails its handshake before any
    key is asked for: the client says so itself, oddsmill_client.NoAnswer.)"""

    SAID_AT_MOST = 1000  # keys remembered as said: a stream of made-up keys fills no memory

    def __init__(self, directory: str) -> None:
        import zmq.auth

        self.directory = directory
        self.keys = set(zmq.auth.load_certificates(directory))
        self.said: set[bytes] = set()

    def callback(self, domain: str, key: bytes) -> bool:
        if key in self.keys:
            return True
        if key not in self.said and len(self.said) < self.SAID_AT_MOST:
            self.said.add(key)
            log.warning(
                "refused a client whose public key %s is not among those of %s (said once a key)",
                key.decode("ascii", "replace"),
                self.directory,
            )
        return False


def check_bind(name: str, address: str, allow_insecure: bool, curve: bool = False) -> None:
    """PROTOCOL 1: ZeroMQ sockets bind to loopback unless CURVE is on or the operator opts out."""
    parts = urlsplit(address)
    if parts.scheme in ("ipc", "inproc"):
        return
    if parts.scheme != "tcp" or not parts.hostname:
        raise ConfigError(f"{name} must be tcp://HOST:PORT, ipc://PATH or inproc://NAME, got {address!r}")
    host = parts.hostname
    loopback = host == "localhost"
    if not loopback:
        try:
            loopback = ipaddress.ip_address(host).is_loopback
        except ValueError:
            loopback = False
    if loopback or curve:
        return
    if not allow_insecure:
        raise ConfigError(
            f"{name} {address!r} is not a loopback address; binding off the machine needs CURVE keys "
            "(--curve-secret and --curve-clients; `oddsmill keys` makes them) or --allow-insecure-bind, "
            "which lets anyone who can reach the port feed or read the model"
        )
    log.warning("%s binds to %s without authentication or encryption (--allow-insecure-bind)", name, address)


def _holds_a_record(segment: Path) -> bool:
    """Whether a journal segment holds a record (or cannot be read: not a start's to take away)."""
    try:
        return next(read_journal(segment), None) is not None
    except (OddsmillError, OSError):
        return True


def leave_as_found(state_dir: Path, existed: bool) -> None:
    """Take away what a start that did not serve made in the state directory (journal segments
    with no record, the lock file) and the directory itself when it made it: a failed start left a
    directory holding a lock file, or an empty journal as well."""
    for segment in list_journal(state_dir):
        if not _holds_a_record(segment):
            segment.unlink(missing_ok=True)
    release_state_dir(state_dir)
    (state_dir / LOCK_NAME).unlink(missing_ok=True)
    if not existed:
        try:
            state_dir.rmdir()  # (only if empty: anything else in it stays)
        except OSError:
            pass


def stop_starting(signum: int, state_dir: Path, made: bool) -> None:
    """A stop signal (SIGTERM, or Ctrl-C's SIGINT) while `serve` starts, before it serves: while
    numba compiles (the first start's two minutes), the journal after the checkpoint is learned
    again, or a warm start learns its logs. The process stops at once, as a kill would stop it
    (every file oddsmill writes is whole after one: a checkpoint is renamed into place, a torn
    journal record is cut at the next start), after saying so. In a state directory with neither a
    checkpoint nor a journal record, what this start made is taken away (`leave_as_found`).
    Before, SIGTERM ended such a start without a word and left a new directory holding only its
    lock file; Ctrl-C did so too."""
    if not list_checkpoints(state_dir) and not any(_holds_a_record(seg) for seg in list_journal(state_dir)):
        leave_as_found(state_dir, existed=not made)  # (nothing learned there: a state holding some is left whole)
    if made and not state_dir.exists():
        left = f"the new state directory {state_dir} is taken away"
    else:
        left = f"what {state_dir} holds is whole, and the next start resumes from it"
    log.info("signal %d while starting, before serving anything: stopped; %s", signum, left)
    logging.shutdown()
    os._exit(128 + signum)


class Server:
    def __init__(
        self,
        settings: ServerSettings,
        learner: LearnerSettings | None = None,
        warm_start: list[str] | None = None,
        asked: dict[str, Any] | None = None,
    ) -> None:
        """`asked`: the settings the user gave (flags, --config), by name: learner settings, and
        `window`, `pending_limit`, `pending_ttl`. A state that exists keeps those it was created
        with, so that its journal replays exactly; one asked for with another value is refused
        (ConfigError) before anything in the directory changes. `race_margin` and
        `race_patience` are refused on a new state that is no race, and `candidates` are given
        when a race is asked for."""
        self.settings = settings
        self.race: Race | None = None
        check_ports_free(settings)
        existed = settings.state_dir.exists()  # (a warm start that fails leaves it as it found it)
        rule = sorted(RACE_RULE & (asked or {}).keys())
        if rule and not settings.candidates and not list_checkpoints(settings.state_dir):
            one = len(rule) == 1
            raise ConfigError(
                f"{' and '.join(rule)} {'sets' if one else 'set'} when a race switches, and without candidates "
                "there is no race: give --candidates auto or [candidates.NAME] tables in --config as well, or "
                f"leave {'it' if one else 'them'} out"
            )
        self.engine, self.records, position = self._load(learner or LearnerSettings())
        if asked and self._loaded_path is not None:
            self._refuse_other_settings(asked)
        warm_up(self.engine.learner.settings)
        self._loaded_position = position
        self._journal_end: tuple[Path, int] | None = None
        self._replay_journal(position)
        warmed = False
        if warm_start and (self._loaded_path is not None or self.records):
            # A warm start begins a state: on one that exists it would learn the logs again at
            # every restart of a daemon whose command line or configuration names them.
            log.warning(
                "the state directory %s holds a model already (step %s): --warm-start begins a new state "
                "and is not applied again (send the logs to the daemon to learn them on top)",
                settings.state_dir,
                f"{self.engine.learner.step:,}",
            )
        elif warm_start:
            from .offline import nothing_learned, read_items, run_logs

            ticker = Ticker("warm start")
            try:
                messages = run_logs(
                    self, read_items(warm_start), lambda n: ticker(f"{self.engine.learner.step:,} events learned")
                )
                error = nothing_learned(warm_start, self.engine, messages)
                if error is not None:
                    raise error
            except BaseException:  # a log missing, bad or of no labelled event: the new state is not begun
                leave_as_found(settings.state_dir, existed)
                raise
            log.info("warm start: learned %s events from %s", f"{self.engine.learner.step:,}", ", ".join(warm_start))
            warmed = True
        self.journal = self._open_journal()
        # journal positions of the checkpoints on disk, by step (a checkpoint's name), oldest first:
        # retention reads the oldest
        self.positions: dict[int, dict[str, Any]] = {}
        # (records, step, path) of the newest checkpoint: while the live state is still at its
        # records and step, it holds that state, and another would only write it again
        self.newest: tuple[int, int, Path] | None = None
        if self._loaded_position is not None and self._loaded_path is not None:
            step = checkpoint_step(self._loaded_path)
            self.positions[step] = self._loaded_position
            self.newest = (int(self._loaded_position["records"]), step, self._loaded_path)
        if settings.journal_keep >= 0:  # the positions of the checkpoints an earlier run left
            for path in list_checkpoints(settings.state_dir):
                if checkpoint_step(path) not in self.positions:
                    found = checkpoint_position(path)  # (None: unreadable, and retention waits)
                    if found is not None:
                        self.positions[checkpoint_step(path)] = found
            self.positions = dict(sorted(self.positions.items()))
        self.last_checkpoint = time.time()
        self.last_checkpoint_step = self.engine.learner.step
        self.checkpoint_begun = self.last_checkpoint  # when the newest checkpoint, written or not, began
        # a checkpoint being written on a thread of its own: (the thread, its result, position, step)
        self.writing: tuple[threading.Thread, list[Any], dict[str, Any], int] | None = None
        self.bound: dict[str, str] = {}
        self.ready = threading.Event()
        self.clean_exit = True  # False when the daemon stopped with messages it could not save
        self.next_fsync = time.monotonic() + self.settings.fsync_ms / 1000  # when the next is due
        self.sync_records = 0  # the records journaled when the background fsync in flight began
        # Write failures. `base` is the journal offset up to which everything is known to be safe
        # (synced, or with fsync = "os" handed to the operating system); `unsaved` are the bodies of
        # the records after it, already learned, and `unsaved_at` their arrivals. After a failure the
        # segment is cut back to `base` and they are written again: a failed fsync is never taken as
        # having succeeded. (Two lists, not one of pairs: a pair a message, held until the next
        # fsync, was a container the garbage collector tracks. At 10,000 lone messages a second
        # they set off 32 young collections of 70 to 90 us and 2 of the middle generation of 100
        # to 120 us in 3 s of the latency bench; 2 young ones now.)
        self.base = self.journal.tell()
        self.base_records = self.records
        self.unsaved: list[Body] = []
        self.unsaved_at: list[float] = []
        self.outage: str | None = None  # why writes fail, while they do
        self.held: list[tuple[float, bytes]] = []  # arrived during an outage: journal, then learn
        self.held_bytes = 0
        self.dropping = False
        self.last_retry = 0.0
        # While set, a failed write goes on with the outage there is (or ends the start) without a
        # line or a count of its own: the recovery's checkpoint, and the warm start's.
        self.going_on = False
        self.said_checkpoint_fails = False  # whether this outage's log says its checkpoints fail
        self.learned_in_outage = 0  # held messages journaled and learned by this outage's recoveries
        self.board = Board(CollectorRegistry())
        self.last_ranking = self.last_rate = -1e9
        self.ranked: Engine | None = None  # whose coefficients the board's snapshot ranks
        self.said_full = False  # whether the log has said the vocabulary is full
        self.reader = RunReader()  # blocks of numeric training events, read in compiled code
        self.known = Known()  # and the names of the last such block, learned in compiled code
        self.taking_in = False  # whether the next wake-up may be one compiled call (`_take_in`)
        self.columns = columnar.ColumnReader()  # blocks of columnar messages, read in compiled code
        self._refresh()
        if warmed:
            # The warm start's events are in no journal: a checkpoint holds them before anything is
            # served, so that a crash cannot lose them, nor a restart learn the journal before them.
            # Without it nothing is served: an outage would have journaled what came on top of a
            # model only memory held, and a crash then left a journal that a restart learned alone,
            # refusing the warm start (the directory held a model).
            self._checkpoint_going_on()  # (the outage's line would say that scoring goes on)
            if self.outage is not None:
                reason = self.outage
                self.close()
                leave_as_found(settings.state_dir, existed)
                raise StateWriteError(
                    f"cannot write the warm start's checkpoint to {settings.state_dir}: {reason}. Nothing was "
                    "served and nothing was kept; make room (or give another --state) and start again"
                )

    def _checkpoint_going_on(self) -> None:
        """`checkpoint`, a failure going on with the outage there is (`going_on`): no line and no
        count of its own (the warm start's checkpoint, and the recovery's)."""
        self.going_on = True
        try:
            self.checkpoint()
        finally:
            self.going_on = False

    def _refresh(self) -> None:
        now = time.monotonic()
        top = None
        shown = self.board.snapshot
        # the last ranking stands for RANKING_SECONDS, unless it is of another engine (a race's
        # serving candidate changed) or it had no features and the model has some now: a fresh
        # daemon's dashboard said "no features learned yet" beside its count of features
        if (
            now - self.last_ranking < RANKING_SECONDS
            and self.ranked is self.engine
            and (shown.coefficients or not self.engine.learner.n_features)
        ):
            top = (shown.intercept, shown.coefficients)
        else:
            self.last_ranking = now
            self.ranked = self.engine
        snapshot = Snapshot.of(
            self.engine,
            self.last_checkpoint,
            writable=self.outage is None,
            coefficients=top,
            race=self.race,
            disk=self._disk(),
        )
        self.board.held = len(self.held)
        self.board.taken(snapshot)
        self.last_refresh = now
        if snapshot.features_ignored and not self.said_full:
            self.said_full = True
            log.warning(
                "the vocabulary is full (max_features %s): feature names not seen before are ignored from now on"
                " (%s values so far, oddsmill_features_ignored_total); raise --max-features, or send fewer names",
                f"{self.engine.learner.vocab.max_features:,}",
                f"{snapshot.features_ignored:,}",
            )

    def _disk(self) -> tuple[float, float]:
        """The journal's bytes (its segments' sizes, as `ls` shows them) and the bytes free to the
        daemon on the state directory's file system; NaN for one it cannot read."""
        state = self.settings.state_dir
        try:
            journal = float(sum(p.stat().st_size for p in list_journal(state)))
        except OSError:
            journal = math.nan
        try:
            st = os.statvfs(state)
            free = float(st.f_bavail * st.f_frsize)
        except OSError:
            free = math.nan
        return journal, free

    def _chores_of_the_board(self) -> None:
        """The board's part of each round of chores: a snapshot when a scrape asks for one (or
        SNAPSHOT_SECONDS after the last), the timings binned when enough wait, events/s sampled."""
        board = self.board
        now = time.monotonic()
        if board.wanted.is_set() or now - self.last_refresh >= SNAPSHOT_SECONDS:
            self._refresh()
        board.fold_timings()
        if now - self.last_rate >= RATE_SECONDS:
            c = self.engine.counters
            board.sample_rates(time.time(), c.train, c.score, c.outcome)
            self.last_rate = now

    # -- state -----------------------------------------------------------------------------------
    def _load(self, learner: LearnerSettings) -> tuple[Engine, int, dict[str, Any] | None]:
        s = self.settings
        hold_state_dir(s.state_dir)  # before anything is read or cut: no other process serves it
        found = load_newest(s.state_dir)
        self._loaded_path: Path | None = None
        if found is None:
            if s.candidates:
                self.race = Race(
                    list(s.candidates), s.window, s.pending_limit, s.pending_ttl, s.race_margin, s.race_patience
                )
                return self.race.engine, 0, None
            engine = Engine(Learner(learner), s.window, s.pending_limit, s.pending_ttl)
            return engine, 0, None
        state, path = found
        self._loaded_path = path
        if "race" in state:
            self.race = Race.from_state_dict(state["race"])
            engine = self.race.engine
        else:
            engine = Engine.from_state_dict(state["engine"])
        position = state.get("journal")
        log.info("resuming from %s at step %d", path.name, engine.learner.step)
        return engine, int(position["records"]) if position else 0, position

    def _refuse_other_settings(self, asked: dict[str, Any]) -> None:
        """ConfigError, and the directory let go of, when a setting asked for differs from the
        loaded state's. A single learner's learner settings are compared one by one; a race's are
        its candidates', compared whole when candidates are given (learner settings given without
        them ask for a single learner)."""
        engine, race = self.engine, self.race
        kept: dict[str, Any] = {
            "window": engine.metrics.window,
            "pending_limit": engine.pending_limit,
            "pending_ttl": engine.pending_ttl,
        }
        learner_keys = {f.name for f in dataclasses.fields(LearnerSettings)}
        wanted = {k: v for k, v in asked.items() if k in kept}
        given = {k: v for k, v in asked.items() if k in learner_keys}
        rule = {k: asked[k] for k in sorted(RACE_RULE & asked.keys())}
        candidates: tuple[Candidate, ...] | None = asked.get("candidates")
        if race is None:
            normal = LearnerSettings(**given)  # (validated, and each value as the state keeps it)
            kept.update({k: getattr(engine.learner.settings, k) for k in given})
            wanted.update({k: getattr(normal, k) for k in given})
            kept.update({k: SINGLE for k in rule})
            wanted.update(rule)
            if candidates:
                kept["candidates"], wanted["candidates"] = SINGLE, [c.name for c in candidates]
        else:
            kept.update({"race_margin": race.margin, "race_patience": race.patience})
            wanted.update(rule)
            held = [Candidate(n, e.learner.settings) for n, e in zip(race.names, race.engines, strict=True)]
            if candidates and begun_with_earlier_auto(candidates, held):
                log.info(
                    "the race in %s was begun with the auto grid of nine candidates, before the grid raced "
                    "averaging too, and keeps them (a new state races all %d)",
                    self.settings.state_dir,
                    len(candidates),
                )
            elif candidates and [c.name for c in candidates] != race.names:
                kept["candidates"], wanted["candidates"] = list(race.names), [c.name for c in candidates]
            elif candidates:
                for c, e in zip(candidates, race.engines, strict=True):
                    have, want = e.learner.settings.to_dict(), c.settings.to_dict()
                    for k in (k for k in have if have[k] != want[k]):
                        kept[f"candidates.{c.name}.{k}"], wanted[f"candidates.{c.name}.{k}"] = have[k], want[k]
            elif given:  # learner settings without candidates: a single learner is asked for
                kept["candidates"], wanted["candidates"] = list(race.names), SINGLE
        differ = [k for k in wanted if wanted[k] != kept[k]]
        if not differ:
            return
        release_state_dir(self.settings.state_dir)
        assert self._loaded_path is not None

        def shown(v: Any) -> str:
            return v if v is SINGLE else repr(v)

        raise ConfigError(
            f"the state in {self.settings.state_dir} (from {self._loaded_path.name}) keeps "
            "the settings it was created with, so that its journal replays exactly: "
            + ", ".join(f"{k} = {shown(kept[k])}, not {shown(wanted[k])}" for k in differ)
            + ". Serve it without them, or learn with them in a new state directory (replay its logs there)"
        )

    def process(self, items: list[tuple[float, Item]]) -> list[tuple[int, Result]]:
        """Score and learn a block: the engine's results, or in a race the serving candidate's."""
        if self.race is None:
            return self.engine.process(items)
        results = self.race.process(items)
        self.engine = self.race.engine  # the serving candidate may have changed
        return results

    def learn(self, items: list[tuple[float, Item]]) -> list[tuple[int, Rejection]]:
        """`process` without the answers (replays publish nothing); the block's rejections."""
        if self.race is None:
            return self.engine.learn(items)
        rejected = self.race.learn(items)
        self.engine = self.race.engine
        return rejected

    def _replay_journal(self, position: dict[str, Any] | None) -> None:
        """Learn the journal records after the checkpoint's position, in blocks, publishing nothing."""
        start_segment = position["segment"] if position else None
        start_offset = int(position["offset"]) if position else 0
        replayed = 0
        ticker = Ticker("replaying the journal")
        for seg in list_journal(self.settings.state_dir):
            if start_segment is not None and seg.name < start_segment:
                continue
            skip_to = start_offset if seg.name == start_segment else 0
            if skip_to == 0 and segment_first(seg) > self.records:
                # A segment before this one is gone, or its end was not read (a damaged record): the
                # records between are not learned. Counted on from the segment's own number, so
                # that the names of the segments to come go on rising.
                log.error(
                    "the journal lacks records %d to %d (a segment before %s is gone, or was not read to its "
                    "end): the state resumes without them",
                    self.records,
                    segment_first(seg) - 1,
                    seg.name,
                )
                self.records = segment_first(seg)
            batch: list[tuple[float, Item]] = []
            events = 0  # in the batch (a block read by the fast path counts its rows)
            good = max(skip_to, len(JOURNAL_MAGIC) + 4)
            for end, arrival, body in read_journal(seg, skip_to, fast=True):
                good = end
                self.records += 1
                replayed += 1
                if isinstance(body, Read):
                    batch.extend((arrival, block) for block in body.blocks)
                    events += sum(block.rows.shape[0] for block in body.blocks)
                else:
                    decoded = decode_body(body)
                    batch.extend((arrival, item) for item in decoded)
                    events += len(decoded)
                if events >= REPLAY_BLOCK:
                    self.learn(batch)
                    batch, events = [], 0
                    ticker(f"{replayed:,} records, step {self.engine.learner.step:,}")
            if batch:
                self.learn(batch)
            self._journal_end = (seg, good)  # where its good records end: no second reading
        if replayed:
            log.info("replayed %d journal records after the checkpoint; step %d", replayed, self.engine.learner.step)

    def _open_journal(self) -> JournalWriter:
        segments = list_journal(self.settings.state_dir)
        if segments:
            last = segments[-1]
            read = self._journal_end
            if read is not None and read[0] == last:
                good = read[1]
            else:
                good = len(JOURNAL_MAGIC) + 4
                for end, _, _ in read_journal(last):
                    good = end
            size = last.stat().st_size
            if size < good:
                # The checkpoint covers records this segment no longer holds. A checkpoint syncs the
                # journal first, so the daemon never leaves it so; something else cut it (a file
                # system repaired after a crash, a copy of the directory taken while it ran).
                # Appending here would put new records where the checkpoint's position points, and
                # a restart from it would read from the middle of one: they go to a new segment,
                # which a replay reads from its start.
                log.warning(
                    "%s ends at byte %d, before the checkpoint's position %d: the journal lost records the "
                    "checkpoint holds (they are not lost from the model); continuing in a new segment",
                    last.name,
                    size,
                    good,
                )
                number = max(self.records, int(last.stem.split("-")[-1]) + 1)
                return self._segment(f"journal-{number:012d}.omj")
            if size > good:
                later = good_record_after(last.read_bytes(), good)
                if later is None:
                    log.warning("%s: cutting a torn tail at byte %d", last.name, good)
                else:
                    # Not a tail torn by a crash: a record damaged in the middle, good ones after it.
                    # The segment is cut there all the same (the records after a damaged one cannot
                    # be learned in order), but its bytes are kept whole beside it first.
                    kept = last.with_name(f"{last.name}.damaged-{time.strftime('%Y%m%dT%H%M%S')}")
                    shutil.copyfile(last, kept)
                    log.error(
                        "%s: a damaged record at byte %d, and good records after it from byte %d: cutting "
                        "the segment at byte %d, and keeping it whole as %s",
                        last.name,
                        good,
                        later,
                        good,
                        kept.name,
                    )
                with open(last, "r+b") as f:
                    f.truncate(good)
            return self._segment(last.name)
        return self._segment(f"journal-{self.records:012d}.omj")

    def _segment(self, name: str) -> JournalWriter:
        """The journal segment of that name in the state directory, opened to append, its blocks
        reserved up to the segment's size."""
        return JournalWriter(self.settings.state_dir / name, reserve=self.settings.segment_bytes)

    def checkpoint(self) -> Path | None:
        """Write a checkpoint now (after the one being written, if any), as the loop does but
        waiting for it; None (and an outage begins) when the state directory refuses it. When the
        newest checkpoint already holds the live state, its path, and nothing is written."""
        self.collect_checkpoint(wait=True)
        if self.outage is None and self._holds_the_state():
            assert self.newest is not None
            self._still_held()
            log.info("checkpoint %s holds the state already (step %d)", self.newest[2].name, self.newest[1])
            return self.newest[2]
        self.checkpoint_soon()
        return self.collect_checkpoint(wait=True)

    def _holds_the_state(self) -> bool:
        """Whether the newest checkpoint holds the live state: nothing journaled or learned since.
        The state changes only with a journaled message, or with the events a warm start learns
        (which move the step); a pending request expires at a message's arrival, not with time."""
        newest = self.newest
        return newest is not None and (newest[0], newest[1]) == (self.records, self.engine.learner.step)

    def _still_held(self) -> None:
        """A checkpoint due while the newest already holds the state: none is written, and the
        state counts as checkpointed now (oddsmill_checkpoint_last_success_timestamp_seconds, which
        an alert watches, says when the state on disk was last known to be the live one)."""
        self.last_checkpoint = self.checkpoint_begun = time.time()
        self.last_checkpoint_step = self.engine.learner.step

    def checkpoint_soon(self) -> None:
        """The loop's checkpoints: the state is taken here (copies, the loop stopped for that only:
        8 to 40 ms at a million slots) and written on a thread of its own, which took the loop
        another 0.3 s at a million slots and 1.6 to 2.4 s with a million requests held (encoding,
        SHA-256, fsync). The journal's fsync up to the checkpoint's position runs on the background
        thread too (`JournalWriter.sync_soon`), and the checkpoint is written once it is done: in
        the loop it took 4.0 ms after 200,000 columnar events, where the loop's part is now 0.9 ms
        (`cktime.py`, scratch, eight each). `collect_checkpoint` takes the result; a failed write or
        fsync begins an outage as a failed write in the loop does."""
        if self.writing is not None or self.outage is not None:
            return
        if self._holds_the_state():  # an idle interval: the checkpoint on disk is this state
            self._still_held()
            return
        try:
            synced = self.journal.sync_soon()
        except OSError as e:
            self._fail(e)
            return
        position, state, step = self._checkpoint_state()
        result: list[Any] = []

        def write() -> None:
            try:
                synced.result()  # the journal up to the checkpoint's position is on disk first
                result.append(write_checkpoint(self.settings.state_dir, step, state))
            except BaseException as e:  # noqa: BLE001 (handed to the loop, which raises what it does not handle)
                result.append(e)

        thread = threading.Thread(target=write, name="oddsmill-checkpoint", daemon=True)
        self.writing = (thread, result, position, step)
        self.last_checkpoint_step, self.checkpoint_begun = step, time.time()
        thread.start()

    def collect_checkpoint(self, wait: bool = False) -> Path | None:
        """Take the result of the checkpoint being written, once it is done (or, with `wait`,
        after it is done): its path, or None (none written, not done, or it failed)."""
        if self.writing is None:
            return None
        thread, result, position, step = self.writing
        if thread.is_alive() and not wait:
            return None
        thread.join()
        self.writing = None
        outcome = result[0]
        if isinstance(outcome, OSError):
            if self.outage is None:  # (during an outage the recovery writes a checkpoint itself)
                self._fail(outcome)
            return None
        if isinstance(outcome, BaseException):
            raise outcome
        if self.outage is None and position["segment"] == self.journal.path.name:
            self._safe_to(position["offset"], position["records"])  # (its fsync covered them)
        self._checkpoint_written(outcome, position, step)
        path: Path = outcome
        return path

    def _checkpoint_state(self) -> tuple[dict[str, Any], dict[str, Any], int]:
        """(journal position, state, step) of a checkpoint: the journal's end (flushed; its fsync
        is the writing thread's to wait for), and the state as copies, which the loop may go on
        changing while they are written."""
        position = {"segment": self.journal.path.name, "offset": self.journal.tell(), "records": self.records}
        state = {
            "kind": "oddsmill-state",
            "created": time.time(),
            "engine": self.engine.state_dict(compact=True),
            "journal": position,
        }
        if self.race is not None:
            state["race"] = self.race.state_dict(compact=True)
        return position, state, self.engine.learner.step

    def _checkpoint_written(self, path: Path, position: dict[str, Any], step: int) -> None:
        self.positions.pop(step, None)  # (a checkpoint of the same step replaced its file)
        self.positions[step] = position
        for old in list(self.positions)[:-KEEP]:
            del self.positions[old]
        self.newest = (int(position["records"]), step, path)
        self._retire_segments()
        self.last_checkpoint = time.time()
        self.last_checkpoint_step = max(self.last_checkpoint_step, step)
        self.checkpoint_begun = max(self.checkpoint_begun, self.last_checkpoint)
        self._refresh()
        log.info("checkpoint %s (step %d)", path.name, step)

    def _retire_segments(self) -> None:
        """Delete journal segments wholly before the oldest checkpoint on disk, but `journal_keep`:
        none while a checkpoint on disk has a position this process does not know (one it could
        not read, or a replay's, which has none), since it may start in any segment."""
        keep = self.settings.journal_keep
        on_disk = [checkpoint_step(p) for p in list_checkpoints(self.settings.state_dir)]
        if keep < 0 or not on_disk or not set(on_disk) <= set(self.positions):
            return
        oldest_segment = min(self.positions[step]["segment"] for step in on_disk)
        behind = [p for p in list_journal(self.settings.state_dir) if p.name < oldest_segment]
        for path in behind[: len(behind) - keep] if keep else behind:
            path.unlink(missing_ok=True)
            log.info("retired journal segment %s", path.name)

    # -- the loop ----------------------------------------------------------------------------------
    def serve(self, stop: threading.Event, context: zmq.Context[Any] | None = None) -> None:
        """Bind, then learn and answer until `stop` is set. The journal is closed however this
        ends (a port taken, an error in the loop): its segment gives back the room it reserved, and
        the directory is let go of."""
        try:
            self._serve(stop, context)
        finally:
            self.close()

    def _serve(self, stop: threading.Event, context: zmq.Context[Any] | None) -> None:
        s = self.settings
        ctx = context or zmq.Context.instance()
        kind = zmq.SUB if s.ingest_kind == "sub" else zmq.PULL
        with ctx.socket(kind) as ingest, ctx.socket(zmq.PUB) as pub:
            for sock in (ingest, pub):
                sock.setsockopt(zmq.LINGER, 0)
            ingest.setsockopt(zmq.MAXMSGSIZE, TRANSPORT_LIMIT)
            ingest.setsockopt(zmq.RCVHWM, s.ingest_hwm)
            pub.setsockopt(zmq.SNDHWM, s.scores_hwm)
            auth = None
            if s.curve_secret:
                from zmq.auth.thread import ThreadAuthenticator

                public, secret = load_curve(s.curve_secret, s.curve_clients)
                auth = ThreadAuthenticator(ctx, log=logging.getLogger("oddsmill.auth"))
                auth.start()
                auth.configure_curve_callback(domain="*", credentials_provider=AllowedClients(s.curve_clients))
                for sock in (ingest, pub):
                    sock.curve_secretkey = secret
                    sock.curve_publickey = public
                    sock.curve_server = True
            try:
                ingest.bind(s.ingest)
                pub.bind(s.scores)
            except zmq.ZMQError as e:
                if auth is not None:
                    auth.stop()
                raise ConfigError(f"cannot bind ({e}): ingest {s.ingest}, scores {s.scores}") from None
            if kind == zmq.SUB:
                ingest.setsockopt(zmq.SUBSCRIBE, s.topic.encode())
            self.bound = {
                "ingest": ingest.getsockopt_string(zmq.LAST_ENDPOINT),
                "scores": pub.getsockopt_string(zmq.LAST_ENDPOINT),
            }
            httpd = None
            if s.http != "off":
                host, _, port = s.http.rpartition(":")
                try:
                    httpd, _ = serve_http(self.board, host, int(port))
                except OSError as e:
                    raise ConfigError(f"cannot serve HTTP on {s.http} ({e.strerror})") from None
                self.bound["http"] = f"{host}:{httpd.server_address[1]}"
            log.info(
                "serving: ingest %s (%s), scores %s, http %s, step %d%s",
                self.bound["ingest"],
                s.ingest_kind,
                self.bound["scores"],
                self.bound.get("http", "off"),
                self.engine.learner.step,
                f", CURVE with the clients of {s.curve_clients}" if auth else "",
            )
            self.ready.set()
            # A receive that waits at most POLL_MS, then the messages already waiting, while the
            # socket says there are some: a wake-up costs one receive a message, where a poll, then
            # receives until one failed, cost a poll and an exception more (zmq.Again).
            ingest.setsockopt(zmq.RCVTIMEO, POLL_MS)
            recv = Receiver(ingest)
            views = 0  # the receiver's count of memoryviews before the block

            def waiting() -> int:
                return int(_get(ingest, _EVENTS))

            observe = self.board.batch_seconds.observe
            block_max, block_bytes, every = s.block_max, s.block_bytes, s.checkpoint_events
            # while the blocks are those of the quick path's one call, a wake-up in one compiled call
            taking = intake.Intake(ingest, pub, block_max, block_bytes) if intake.AVAILABLE else None
            chores = 0.0  # when the checks of time (heartbeat, refresh, retry, checkpoint) are next due
            while not stop.is_set():
                if taking is not None and self._may_take_in():
                    if self._take_in(taking, pub):
                        now = time.perf_counter()
                        observe(now - taking.woke)
                    else:
                        now = time.perf_counter()
                else:
                    try:
                        frames: list[list[Body]] = [recv()]
                    except zmq.Again:
                        frames = []
                    if frames:
                        frames = _drain(frames[0], recv, waiting, block_max, block_bytes)
                        t0 = time.perf_counter()
                        self.handle(frames, pub, uncopied=recv.views != views)
                        views = recv.views
                        now = time.perf_counter()
                        observe(now - t0)
                    else:
                        now = time.perf_counter()
                due = self.engine.learner.step - self.last_checkpoint_step >= every
                if now < chores and not due:
                    continue
                chores = now + CHORES_SECONDS
                if s.fsync == "interval":
                    self._collect_sync()  # a finished background fsync: its records are safe, or it failed
                    if self.outage is None and self.records > self.base_records:
                        # records no fsync has covered: a block starts one when due, but a block that
                        # came while one was in flight started none, and when traffic stops no block
                        # follows; without this they waited for the next message or checkpoint
                        self._sync_in_background()
                self.board.heartbeat = time.time()
                if self.outage is not None and time.monotonic() - self.last_retry >= RETRY_SECONDS:
                    self._recover()
                self._chores_of_the_board()
                self.collect_checkpoint()
                if self.outage is None and (due or time.time() - self.checkpoint_begun >= s.checkpoint_seconds):
                    self.checkpoint_soon()
            if self.outage is not None:
                self._recover()
            if self.outage is not None:
                log.error(
                    "stopping while the state directory cannot be written (%s): %d held messages are lost",
                    self.outage,
                    len(self.held),
                )
                self.clean_exit = False
            else:
                self.checkpoint()
            if taking is not None:
                taking.close()
            if httpd is not None:
                httpd.shutdown()
                httpd.server_close()
            if auth is not None:
                auth.stop()

    def close(self) -> None:
        """Close the journal (unless an outage has abandoned it) and let go of the state directory:
        another process may serve it now. `serve` ends with it."""
        if self.outage is None:
            self.journal.close()
        release_state_dir(self.settings.state_dir)

    def _may_take_in(self) -> bool:
        """Whether the next wake-up may be `_take_in`'s: the last block took the quick path's one
        call (`Server._quick`), and it still would."""
        return (
            self.taking_in
            and self.known.vocab is self.engine.learner.vocab
            and self.race is None
            and self.outage is None
            and not self.journal.buffered()
        )

    def _take_in(self, taking: intake.Intake, pub: zmq.Socket[Any]) -> bool:
        """A wake-up in one compiled call (intake.py): wait for messages, then journal, learn and
        answer the block as `_quick`'s one call does, or hand it to `handle` as it came. False
        when nothing came."""
        known = self.known
        found = self.engine.take_in(taking, known, self.journal.fileno(), POLL_MS)
        if found == intake.EMPTY:
            code = taking.poll_errno
            if code not in (0, errno.EINTR):
                raise zmq.ZMQError(code)
            return False
        arrival = taking.arrival
        if found == READ:
            self.journal.wrote(known.written)
            self._journal_kept(arrival, taking.bodies(), False)
            self.board.score_latency.observe_many(time.time() - arrival, taking.count)
            return True
        messages = taking.handed()
        if found == WRITE_FAILED:
            self._write_failed(messages, pub, arrival)
        else:
            self.handle(messages, pub, arrival, uncopied=False)
        return True

    def _write_failed(self, messages: Sequence[Sequence[Body]], pub: zmq.Socket[Any], arrival: float) -> None:
        """The one call's journal write failed (`Known.errno`): nothing of the block was learned;
        the outage begins and the full path holds the block."""
        code = self.known.errno
        self._fail(OSError(code, os.strerror(code)))
        self._block(_as_bytes(messages), pub, arrival, [])

    def handle(
        self,
        messages: Sequence[Sequence[Body]],
        pub: zmq.Socket[Any],
        arrival: float | None = None,
        uncopied: bool = True,
    ) -> None:
        """One block: journal, then score and learn, then publish, in arrival order. While the state
        directory cannot be written: score with the model as it stands, and hold the block.
        `arrival`: when it came (default: now). `uncopied`: the block may hold memoryviews
        (`Receiver`'s); the loop says when it holds none, and the paths that take bytes are then
        given it without a look at each frame (70 ns a message, 2% of the full path's time for
        one-event messages)."""
        if arrival is None:
            arrival = time.time()
        self.taking_in = False
        bodies: list[object] = []
        small_paths = self.race is None and self.outage is None
        if small_paths and (self._quick(messages, pub, arrival) or self._columnar(messages, pub, arrival)):
            return
        plain = _as_bytes(messages) if uncopied else cast(list[list[bytes]], messages)
        if small_paths and len(messages) < SINGLES_TOGETHER:
            bodies = self._lone(plain, pub, arrival)
            if not bodies:
                return
        self._block(plain, pub, arrival, bodies)

    def _quick(self, messages: Sequence[Sequence[Body]], pub: zmq.Socket[Any], arrival: float) -> bool:
        """A block of messages of one numeric training event each (or, once its names are known,
        one scoring request with an integer id), all with the same names in the same order, every
        name known: read in compiled code, journaled, and learned as the rows of one columnar
        block, as the full path would learn them, without its plan. The names of the
        block before, with integer ids or none, take one compiled call that writes the journal's
        records too (quick.py, `Engine.journal_and_train_known`; a third less time a message than
        two calls for blocks of 500, an eighth less for pairs), or two with fsync = "block" or while
        the journal holds buffered records (`Engine.train_known`); other names or str ids `fastpath.RunReader` and
        `Engine.train_rows`, which remember the names for the next block. The commonest block
        under load. False, with nothing done, for any other block."""
        raws: list[bytes] = []
        for frames in messages:
            if len(frames) != 2:
                return False
            raw = frames[1]
            head = raw[:3]
            if head[1:] not in EVENT_KEYS or head[:1] not in EVENT_MAPS:
                return False
            # (a large event received uncopied is read as bytes are; a columnar block is declined
            # above, without a copy)
            raws.append(raw if type(raw) is bytes else bytes(raw))
        known = self.known
        engine = self.engine
        vocab = engine.learner.vocab
        if known.vocab is vocab:  # the names of the last block, in compiled code (quick.py)
            journal = self.journal
            if self.settings.fsync != "block" and not journal.buffered():
                # read, journaled and learned in one call
                found, bodies = engine.journal_and_train_known(arrival, known, raws, journal.fileno())
                if found == READ:
                    journal.wrote(known.written)
                    self._journal_kept(arrival, raws, False)
                    self._answer(pub, bodies, arrival)
                    self.taking_in = True
                    return True
                if found == WRITE_FAILED:
                    self._write_failed(messages, pub, arrival)
                    return True
            else:  # in two
                found = known.read(raws)
                if found == READ:
                    if self._journaled(messages, pub, arrival, raws, []):
                        self._answer(pub, engine.train_known(arrival, known), arrival)
                    return True
            if found == NOT_SUCH:
                return False
        read = self.reader.read(raws, requests=True)
        if read is None:
            return False
        names, rows, y, idents = read
        slots = vocab.shapes.get(names)
        if slots is None:  # a name not known yet (or not recently): the full path encodes them
            return False
        if idents is None or all(type(i) is int for i in idents):  # the next block may take quick.py
            known.remember(vocab, self.reader.key_bytes(), slots)
        if np.isnan(y).any():  # scoring requests: quick.py takes them from the next block on
            return False
        if not self._journaled(messages, pub, arrival, raws, []):
            return True
        logits, step = self.engine.train_rows(arrival, slots, rows, y)
        ids = idents if idents is not None else (None,) * len(raws)
        pack = msgpack.packb
        bodies = [
            pack(_score(i, z, step + r, arrival)) for r, (i, z) in enumerate(zip(ids, logits.tolist(), strict=True))
        ]
        self._answer(pub, bodies, arrival)
        return True

    def _columnar(self, messages: Sequence[Sequence[Body]], pub: zmq.Socket[Any], arrival: float) -> bool:
        """A block of plain columnar messages (columnar.py): each read in one compiled call,
        journaled, its runs of the same names learned by `Engine.train_rows` and each answered with
        the body the full path packs. The commonest block of a columnar producer under load. False,
        with nothing done, for any other block."""
        raws: list[Body] = []
        for frames in messages:
            if len(frames) != 2 or frames[1][1:6] not in COLUMNAR_FIRST:
                return False
            raws.append(frames[1])
        engine = self.engine
        read = self.columns.read(raws, engine.learner.vocab.shapes)
        if read is None or not engine.in_sequence(read[1]):
            return False
        runs, numbers = read
        if not self._journaled(messages, pub, arrival, raws, []):
            return True
        for src, seq in numbers:
            engine.numbered(src, seq)
        bodies: list[bytes] = []
        for run in runs:
            p = np.empty(run.y.shape[0])
            logits, step = engine.train_rows(arrival, run.slots, run.rows, run.y, p)
            at = 0
            for m in run.counts:
                bodies.append(columnar.score_body(logits[at : at + m], step + at, arrival, p[at : at + m]))
                at += m
        self._answer(pub, bodies, arrival)
        return True

    def _lone(self, messages: list[list[bytes]], pub: zmq.Socket[Any], arrival: float) -> list[object]:
        """A block of a few messages of one event each, the commonest wake-up at a modest load:
        journaled, then each run by `Engine.one` and published, as the full path does, with none
        of a block's lists and dicts (in process: 45 against 130 us a message of 20 features); a
        lone columnar block goes to `_columns`. Returns [] when done; otherwise, for the full path,
        the bodies unpacked so far (nothing has been done with them)."""
        bodies: list[object] = []
        events: list[Event] = []
        for frames in messages:
            if len(frames) != 2 or frames[1][:7] == b"\x81\xa5batch":
                return bodies or [None]
            try:
                body = unpack(frames[1])
            except ProtocolError:
                return bodies or [None]
            bodies.append(body)
            if (
                type(body) is dict
                and "cols" in body
                and len(messages) == 1
                and self._columns(body, frames, pub, arrival)
            ):
                return []
            if type(body) is not dict or "batch" in body or "cols" in body:
                return bodies
            ev = decode_body(body)[0]
            if type(ev) is not Event:
                return bodies
            events.append(ev)
        if not self._journaled(messages, pub, arrival, [frames[1] for frames in messages], bodies):
            return []
        results = [self.engine.one(arrival, ev) for ev in events]
        rejects: list[Rejection] = []  # published after the scores, as the full path does
        scores: list[bytes] = []
        for result in results:
            if isinstance(result, Score):
                scores.append(msgpack.packb(_one(result)))
            elif isinstance(result, Rejection):
                rejects.append(result)
        self._answer(pub, scores, arrival)
        for r in rejects:
            pub.send(b"rejects", zmq.SNDMORE)
            pub.send(msgpack.packb(_rejection(r)))
        return []

    def _columns(self, body: dict[str, Any], frames: list[bytes], pub: zmq.Socket[Any], arrival: float) -> bool:
        """A lone columnar block of training events, every row labelled, unnumbered, every name
        known: journaled, learned as `prepare` and `settle` would learn it (`Engine.train_rows`)
        and answered with the same body. False, with nothing done, for any other. (`_columnar`
        takes such blocks first when they have no ids; this takes those with ids.)"""
        item = decode_body(body)[0]
        if type(item) is not Columns or item.src is not None or item.seq is not None or not item.rows.shape[0]:
            return False
        if bool(np.isnan(item.y).any()):
            return False
        slots = self.engine.learner.vocab.shapes.get(item.cols)
        if slots is None:
            return False
        if self._journaled([frames], pub, arrival, [frames[1]], [body]):
            logits, step = self.engine.train_rows(arrival, slots, item.rows, item.y)
            steps = np.arange(step, step + logits.shape[0])
            body = _score_body(ColumnScores(item.ids, logits, steps, arrival), "cols")
            self._answer(pub, [msgpack.packb(body)], arrival)
        return True

    def _journaled(
        self,
        messages: Sequence[Sequence[Body]],
        pub: zmq.Socket[Any],
        arrival: float,
        raws: Sequence[Body],
        unpacked: list[object],
    ) -> bool:
        """Journal a block one of the small paths took. When the write fails, the full path takes
        the block (the outage holds it and scores it with the model as it stands), and False."""
        if self._journal(arrival, raws):
            return True
        self._block(_as_bytes(messages), pub, arrival, unpacked)
        return False

    def _answer(self, pub: zmq.Socket[Any], scores: list[bytes], arrival: float) -> None:
        """Publish a block's score bodies (one a message answered), and observe their latency."""
        if scores:
            _publish(pub, scores)
            self.board.score_latency.observe_many(time.time() - arrival, len(scores))

    def _block(self, messages: list[list[bytes]], pub: zmq.Socket[Any], arrival: float, unpacked: list[object]) -> None:
        """`handle` for any block (`unpacked`: the bodies of its first messages, when they were
        unpacked; None for one that was not)."""
        items: list[tuple[float, Item]] = []
        owner: list[int] = []  # message index of each item
        shapes: list[str] = []  # "one", "batch" or "cols" for each message
        rejects: list[Rejection] = []
        raws: list[bytes] = []
        # messages of one numeric training event each, read together in compiled code: runs of
        # consecutive ones with the same names become one block (`members`: its messages in order)
        which, runs = _read_singles(messages)
        placed: dict[int, int] = {}  # run -> its item
        members: dict[int, list[int]] = {}
        for i, frames in enumerate(messages):
            shapes.append("one")
            if len(frames) != 2:
                rejects.append(
                    self._count(Rejection(None, "undecodable", f"a message has 2 frames, got {len(frames)}"))
                )
                raws.append(refused_record("undecodable"))  # journaled, so that a restart counts it
                continue
            run = which[i]
            if run >= 0:
                raws.append(frames[1])
                n = placed.get(run)
                if n is None:
                    placed[run] = len(items)
                    members[len(items)] = [i]
                    block = runs[run]
                    assert block is not None  # a message's run is one whose names are usable
                    items.append((arrival, block))
                    owner.append(-1)
                else:
                    members[n].append(i)
                continue
            blocks = read_batch(frames[1])  # batches of numeric training events, read in compiled code
            if blocks is not None:
                raws.append(frames[1])
                shapes[i] = "batch"
                for block in blocks:
                    items.append((arrival, block))
                    owner.append(i)
                continue
            try:
                body = unpacked[i] if i < len(unpacked) and unpacked[i] is not None else unpack(frames[1])
            except ProtocolError as e:
                rejects.append(self._count(Rejection(None, e.reason, e.detail)))
                raws.append(refused_record(e.reason))
                continue
            raws.append(frames[1])
            if isinstance(body, dict) and "batch" in body:
                shapes[i] = "batch"
            decoded = decode_body(body)
            if len(decoded) == 1 and isinstance(decoded[0], Columns):
                shapes[i] = "cols"
            for item in decoded:
                items.append((arrival, item))
                owner.append(i)
        journaled = self.outage is None
        if raws and journaled:
            journaled = self._journal(arrival, raws)
        if journaled:  # (a write that fails after this block is in the journal holds only later blocks)
            results = self.process(items) if items else []
        else:
            self._hold(arrival, raws)
            results = self.engine.score_only(items)
        scores: dict[int, list[Score | ColumnScores] | ColumnScores] = {}
        bodies: dict[int, dict[str, Any]] = {}  # the answers of messages read together
        rows_done: dict[int, int] = {}
        for n, r in results:
            if n in members:
                if isinstance(r, ColumnScores):
                    bodies.update(zip(members[n], _row_scores(r), strict=True))
                elif isinstance(r, Score):  # its rows scored one by one (a write outage, a full vocabulary)
                    k = rows_done.get(n, 0)
                    rows_done[n] = k + 1
                    bodies[members[n][k]] = _one(r)
                else:
                    rejects.append(r)
                continue
            if isinstance(r, Score):
                scores.setdefault(owner[n], []).append(r)  # type: ignore[union-attr]
            elif isinstance(r, ColumnScores):
                if shapes[owner[n]] == "cols":
                    scores[owner[n]] = r  # a columnar message is one item
                else:  # a run of a batch read by the fast path: answered one score an event
                    scores.setdefault(owner[n], []).append(r)  # type: ignore[union-attr]
            else:
                rejects.append(r)
        # Two frames, sent one by one: the same message as send_multipart, in 1.8 us against 5.5
        # (measured with pyzmq 27.3; send_multipart checks each part before sending it).
        send = pub.send
        answered = sorted(scores.keys() | bodies.keys())
        for i in answered:
            body = bodies[i] if i in bodies else _score_body(scores[i], shapes[i])
            send(b"scores", zmq.SNDMORE)
            send(msgpack.packb(body))
        if answered:
            # every message of a block arrived (was drained) at the same moment
            self.board.score_latency.observe_many(time.time() - arrival, len(answered))
        for r in rejects:
            send(b"rejects", zmq.SNDMORE)
            send(msgpack.packb(_rejection(r)))

    # -- writing, and what happens when it fails -------------------------------------------------
    def _journal(self, arrival: float, raws: Sequence[Body]) -> bool:
        """Journal a block's messages before anything of it is learned or published; False when
        the write failed and the block is not in the journal."""
        try:
            synced = self._persist(arrival, raws)
        except OSError as e:
            self._fail(e)  # the caller holds this block
            return False
        self._journal_kept(arrival, raws, synced)
        return True

    def _journal_kept(self, arrival: float, raws: Sequence[Body], synced: bool) -> None:
        """`_journal`'s accounts, once a block's records reached the file (`synced`: and the disk):
        what is safe, the background fsync, the segment's turn."""
        self.records += len(raws)
        self.unsaved += raws
        self.unsaved_at += repeat(arrival, len(raws))
        if synced or self.settings.fsync == "os":  # handed to the OS is all "os" promises
            self._saved()
        elif not self._sync_in_background():
            return  # (a background fsync failed: the outage holds only what follows)
        if self.journal.tell() >= self.settings.segment_bytes:
            try:
                self.journal.sync()
                self._saved()
                self.journal.close()
                self.journal = self._segment(f"journal-{self.records:012d}.omj")
                self._saved()
            except OSError as e:
                self._fail(e)  # this block is safe in the old segment: only what follows is held

    def _saved(self) -> None:
        """Everything journaled so far is safe (synced, or as safe as the policy asks)."""
        self.base = self.journal.tell()
        self.base_records = self.records
        self.unsaved.clear()
        self.unsaved_at.clear()

    def _fail(self, e: OSError) -> None:
        """A write failed: stop learning and journaling, keep scoring, hold what arrives."""
        self.journal.abandon()
        self.outage = f"{e.strerror or e} ({type(e).__name__})"
        self.last_retry = time.monotonic()
        self.held, self.held_bytes = [], 0
        if self.going_on:
            self._refresh()
            return
        self.said_checkpoint_fails, self.learned_in_outage = False, 0
        self.board.write_failures.inc()
        log.error(
            "cannot write the state directory %s: %s. Scoring goes on; learning and journaling pause "
            "until writes succeed again (tried every %g s); /healthz answers 503",
            self.settings.state_dir,
            self.outage,
            RETRY_SECONDS,
        )
        self._refresh()

    def _hold(self, arrival: float, raws: list[bytes]) -> None:
        for raw in raws:
            if self.held_bytes + len(raw) > self.settings.outage_hold_bytes:
                self.board.outage_dropped.inc()
                if not self.dropping:
                    log.error("the hold for a write outage is full: dropping messages (counted)")
                    self.dropping = True
                continue
            self.held.append((arrival, raw))
            self.held_bytes += len(raw)

    def _recover(self) -> None:
        """Try the writes again: cut the segment back to what is known safe, write the unsaved and
        the held records, sync; then learn the held ones (publishing nothing: they were scored)."""
        self.last_retry = time.monotonic()
        path = self.journal.path
        journal = None
        try:
            JournalWriter.cut(path, self.base)
            journal = self._segment(path.name)
            for arrival, raw in [*zip(self.unsaved_at, self.unsaved, strict=True), *self.held]:
                journal.append(arrival, raw)
            journal.sync()
        except OSError as e:
            if journal is not None:
                journal.abandon()
            self.outage = f"{e.strerror or e} ({type(e).__name__})"
            return
        held, self.held, self.held_bytes, self.dropping = self.held, [], 0, False
        self.journal = journal
        self.records = self.base_records + len(self.unsaved) + len(held)
        self._saved()
        self.outage = None
        items = [(arrival, item) for arrival, raw in held for item in _items(raw)]
        for lo in range(0, len(items), REPLAY_BLOCK):
            self.learn(items[lo : lo + REPLAY_BLOCK])
        self.learned_in_outage += len(held)
        # The outage ends with a checkpoint written. The journal takes writes before a checkpoint
        # does on a full disk (its segment's blocks are reserved): the log said "writes succeed
        # again" and then the outage's error, every RETRY_SECONDS, for as long as it lasted.
        self._checkpoint_going_on()
        if self.outage is not None:
            if not self.said_checkpoint_fails:
                self.said_checkpoint_fails = True
                log.warning(
                    "the journal takes writes again, but a checkpoint cannot be written (%s): the outage goes "
                    "on, and what it holds is journaled and learned every %g s",
                    self.outage,
                    RETRY_SECONDS,
                )
            return
        log.warning(
            "writes succeed again: journaled and learned %d messages held during the outage", self.learned_in_outage
        )
        self._refresh()

    def _persist(self, arrival: float, raws: Sequence[Body]) -> bool:
        """Journal a block's records: they reach the operating system (and with fsync = "block"
        the disk); True when they were synced. With "interval" the fsync runs in the background
        (`_sync_in_background`): it took 20 ms and more here, every second, with the loop stopped."""
        if self.settings.fsync == "block":
            self.journal.append_all(arrival, raws)
            self.journal.sync()
            return True
        self.journal.write_all(arrival, raws)
        return False

    def _sync_in_background(self) -> bool:
        """With fsync = "interval", after a block is journaled: when an fsync is due, collect the
        last one (the records it covered are safe) and start the next. False when the one
        collected had failed (an outage has begun). Between two, the loop's chores collect a
        finished one (every CHORES_SECONDS): a block then pays one clock read, where collecting
        on every block cost 0.3 us of a lone message's 12.7 (measured side by side)."""
        now = time.monotonic()
        if now < self.next_fsync:
            return True
        if not self._collect_sync():
            return False
        if self.journal.sync_later():
            self.next_fsync = now + self.settings.fsync_ms / 1000
            self.sync_records = self.records
        return True

    def _collect_sync(self) -> bool:
        """Take the result of a finished background fsync, if any; False (and an outage begins)
        when it failed: the records after the last good sync are written again on recovery."""
        if self.outage is not None:
            return True
        try:
            end = self.journal.synced_to()
        except OSError as e:
            self._fail(e)
            return False
        if end is not None:
            self._safe_to(end, self.sync_records)
        return True

    def _safe_to(self, offset: int, records: int) -> None:
        """The current segment is on disk up to `offset`, the end of record number `records`:
        the records before it need not be kept for writing again."""
        if records > self.base_records:
            del self.unsaved[: records - self.base_records]
            del self.unsaved_at[: records - self.base_records]
            self.base, self.base_records = offset, records

    def _count(self, r: Rejection) -> Rejection:
        rej = self.engine.counters.rejected
        rej[r.reason] = rej.get(r.reason, 0) + 1
        return r


# The socket options the loop reads on every message, through pyzmq's Cython socket: its Python
# subclass wraps each answer in an enum, which took 5.0 against 3.2 us a read here (measured).
_get = zmq.backend.Socket.get
# and sends through it too: the subclass's send (for DRAFT sockets' routing ids and groups, which
# the daemon does not use) took 0.74 against 0.32 us for a score's two frames here (measured)
_send = zmq.backend.Socket.send
_EVENTS, _RCVMORE, _POLLIN = int(zmq.EVENTS), int(zmq.RCVMORE), int(zmq.POLLIN)


class Receiver:
    """Socket.recv_multipart for the loop, reading RCVMORE through `_get`. A frame comes as a
    bytes object, except that while large bodies arrive (LARGE_BODY bytes or more: columnar
    blocks, batches) each comes as a read-only memoryview of the frame ZeroMQ received, not copied.

    A copy of each columnar block's 80 KB into a new bytes object took a ninth of the loop's time
    a message under the benchmark's columnar load (DEVELOPERS, twenty-second session). A frame
    taken uncopied costs a Frame object, more than a copy of a small body, so the receiver copies
    until a body is large, and again from the first small one on. The paths other than
    `Server._columnar` take bytes (`_as_bytes`; `_quick` copies the body it reads)."""

    def __init__(self, sock: zmq.Socket[Any]) -> None:
        self.sock = sock
        self.uncopied = False  # the last body was large: take the next one uncopied
        self.views = 0  # memoryviews handed out so far

    def __call__(self, flags: int = 0) -> list[Body]:
        sock = self.sock
        parts: list[Body] = [sock.recv(flags)]
        while _get(sock, _RCVMORE):
            if self.uncopied:
                frame = sock.recv(flags, copy=False)
                if len(frame) >= LARGE_BODY:
                    # read-only, as a bytes object is: numpy's view of a writable one is an array
                    # of another type to numba, and the columnar reader compiled again in the loop
                    parts.append(frame.buffer.toreadonly())
                    self.views += 1
                else:
                    parts.append(frame.bytes)
                    self.uncopied = False
            else:
                part = sock.recv(flags)
                if len(part) >= LARGE_BODY:
                    self.uncopied = True
                parts.append(part)
        return parts


def _as_bytes(messages: Sequence[Sequence[Body]]) -> list[list[bytes]]:
    """The block with each frame a bytes object (a copy of each `Receiver`'s memoryview). A block
    is a list of lists, whatever the annotation says: one of bytes is itself."""
    if all(type(f) is bytes for frames in messages for f in frames):
        return cast(list[list[bytes]], messages)
    return [[f if type(f) is bytes else bytes(f) for f in frames] for frames in messages]


def _drain(
    first: list[Body], recv: Callable[[int], list[Body]], waiting: Callable[[], int], most: int, most_bytes: int
) -> list[list[Body]]:
    """The block a wake-up takes: the message received, then those already waiting while the block
    holds fewer than `most` messages and `most_bytes` bytes (so the last may cross it)."""
    frames = [first]
    size = sum(map(len, first))
    while len(frames) < most and size < most_bytes and waiting() & _POLLIN:
        message = recv(zmq.NOBLOCK)
        frames.append(message)
        size += sum(map(len, message))
    return frames


def _read_singles(messages: list[list[bytes]]) -> tuple[list[int], list[Columns | None]]:
    """fastpath.read_each over the messages that may be one numeric training event: a body that
    is a map of two entries, or three with an id, whose first key is x, y or id (a columnar block
    is a map of two or three entries too, and reading its tens of kilobytes only to decline them
    cost 8% of the daemon's time on columnar traffic). When there are fewer than SINGLES_TOGETHER
    of them the full path is quicker, and nothing is read."""
    candidates: list[bytes | None] = [
        f[1] if len(f) == 2 and f[1][:1] in EVENT_MAPS and f[1][1:3] in EVENT_KEYS else None for f in messages
    ]
    if sum(c is not None for c in candidates) < SINGLES_TOGETHER:
        return [-1] * len(messages), []
    return read_each(candidates)


def _items(raw: bytes) -> list[Item]:
    """The items of a body held during an outage (a message refused before decoding has none: it
    was counted when it came)."""
    if is_refused_record(raw):
        return []
    blocks = read_batch(raw)
    return list(blocks) if blocks is not None else decode_body(unpack(raw))


def _publish(pub: zmq.Socket[Any], bodies: list[bytes]) -> None:
    """Score bodies on topic `scores`, packed beforehand and sent back to back: ZeroMQ's I/O thread
    is woken once for several, where a send between two packings woke it for each (py-spy put a
    quarter of the loop's time in Socket.send at 10,000 lone messages a second)."""
    send = _send.__get__(pub) if isinstance(pub, zmq.backend.Socket) else pub.send  # (tests pass stand-ins)
    for body in bodies:
        send(b"scores", zmq.SNDMORE)
        send(body)


def _rejection(r: Rejection) -> dict[str, Any]:
    """One rejection body (PROTOCOL 3)."""
    return {"id": r.id, "reason": r.reason, "detail": r.detail}


def _one(s: Score) -> dict[str, Any]:
    return _score(s.id, s.logit, s.step, s.ts)


def _score(ident: Any, z: float, step: int, ts: float) -> dict[str, Any]:
    """One score body (PROTOCOL 3)."""
    return {"id": ident, "p": _p(z), "logit": z, "step": step, "ts": ts}


def _row_scores(s: ColumnScores) -> list[dict[str, Any]]:
    """A score body for each row of a block, built from its arrays (no `Score` object a row)."""
    ids = s.ids if s.ids is not None else (None,) * s.logits.shape[0]
    return [_score(i, z, st, s.ts) for i, z, st in zip(ids, s.logits.tolist(), s.steps.tolist(), strict=True)]


def _p(z: float) -> float:
    if z >= 0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


def _score_body(scores: list[Score | ColumnScores] | ColumnScores, shape: str) -> dict[str, Any]:
    if isinstance(scores, ColumnScores):
        z = scores.logits.astype("<f8", copy=False)
        m = z.shape[0]
        return {
            "id": list(scores.ids) if scores.ids is not None else [None] * m,
            "p": columnar.probabilities(z),
            "logit": z.tobytes(),
            "step": scores.step,
            "ts": scores.ts,
        }
    if shape == "cols":  # a columnar block learned row by row (it held rows by id)
        rows = [s for s in scores if isinstance(s, Score)]
        z = np.array([s.logit for s in rows], dtype="<f8")
        return {
            "id": [s.id for s in rows],
            "p": columnar.probabilities(z),
            "logit": z.tobytes(),
            "step": rows[0].step,
            "ts": rows[0].ts,
        }
    if shape == "batch":
        out: list[dict[str, Any]] = []
        for s in scores:
            if isinstance(s, ColumnScores):  # rows of a run: no Score object a row
                out.extend(_row_scores(s))
            else:
                out.append(_one(s))
        return {"batch": out}
    first = scores[0]
    return _row_scores(first)[0] if isinstance(first, ColumnScores) else _one(first)
