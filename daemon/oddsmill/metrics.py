"""Prometheus metrics (PROTOCOL 8) and the HTTP endpoints: /metrics, /healthz, /api/status.

The event loop is the only writer of the model; after each block it publishes a `Snapshot` (an
immutable record, swapped in by one assignment). The collector and the HTTP handlers read only
snapshots, at scrape time. The registry is injected, never the process-wide default.
"""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from collections import deque
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources
from typing import Any

import numpy as np
from prometheus_client import CollectorRegistry, Counter, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.exposition import CONTENT_TYPE_LATEST
from prometheus_client.registry import Collector
from prometheus_client.samples import Sample
from prometheus_client.utils import floatToGoString

from .engine import Engine

log = logging.getLogger("oddsmill")

STUCK_SECONDS = 10.0  # /healthz says 503 when the loop has not come round for this long
TOP_COEFFICIENTS = 12  # how many coefficients /api/status lists, largest effect first
RATE_POINTS = 300  # events/s samples kept for the dashboard (one a second or so: five minutes)
REASONS = (
    "undecodable",
    "not_a_map",
    "bad_features",
    "bad_label",
    "bad_weight",
    "non_finite",
    "unknown_outcome",
    "too_large",
    "duplicate",
)


@dataclass(frozen=True)
class Snapshot:
    step: int = 0
    features: int = 0
    features_ignored: int = 0  # values of names that found the vocabulary full (max_features)
    journal_bytes: float = float("nan")  # the journal's segments, their sizes (the daemon's only)
    state_free_bytes: float = float("nan")  # free for the state directory's file system
    log_loss: float = float("nan")
    log_loss_sum: float = 0.0
    log_loss_count: int = 0
    log_loss_window: float = float("nan")
    brier_window: float = float("nan")
    calibration_error_window: float = float("nan")
    calibration_bins: list[dict[str, float]] = field(default_factory=list)
    learning_rate: float = float("nan")
    pending_outcomes: int = 0
    events: dict[str, int] = field(default_factory=dict)
    rejected: dict[str, int] = field(default_factory=dict)
    lost: int = 0
    pending_dropped: dict[str, int] = field(default_factory=dict)
    last_checkpoint: float = 0.0
    loop_time: float = 0.0  # when the loop last came round
    writable: bool = True  # the last write of journal or checkpoint succeeded
    intercept: float = float("nan")
    coefficients: list[dict[str, Any]] = field(default_factory=list)  # largest effect first
    history: list[tuple[int, float, float]] = field(default_factory=list)  # (labelled, progressive, window)
    renormalisations: int = 0
    candidates: list[dict[str, Any]] = field(default_factory=list)  # a race's candidates, if racing
    switches: list[dict[str, Any]] = field(default_factory=list)

    @classmethod
    def of(
        cls,
        engine: Engine,
        last_checkpoint: float,
        writable: bool = True,
        coefficients: tuple[float, list[dict[str, Any]]] | None = None,
        race: Any = None,
        disk: tuple[float, float] = (float("nan"), float("nan")),
    ) -> Snapshot:
        """The figures of `engine` now. `coefficients` reuses an earlier (intercept, top list): the
        ranking costs a pass over the whole vocabulary, so the loop refreshes it less often.
        `disk`: the journal's bytes and the bytes free for the state directory (the daemon's)."""
        m, c, lr = engine.metrics, engine.counters, engine.learner
        intercept, top = coefficients if coefficients is not None else lr.top_coefficients(TOP_COEFFICIENTS)
        return cls(
            step=lr.step,
            features=lr.n_features,
            features_ignored=lr.vocab.ignored,
            journal_bytes=disk[0],
            state_free_bytes=disk[1],
            log_loss=m.log_loss,
            log_loss_sum=m.sum,
            log_loss_count=m.count,
            log_loss_window=m.log_loss_window,
            brier_window=m.brier_window,
            calibration_error_window=m.calibration_error_window,
            calibration_bins=m.calibration_bins(),
            learning_rate=lr.learning_rate(),
            pending_outcomes=len(engine.pending),
            events={"train": c.train, "score": c.score, "outcome": c.outcome},
            rejected=dict(c.rejected),
            lost=c.lost,
            pending_dropped={"expired": c.pending_expired, "evicted": c.pending_evicted},
            last_checkpoint=last_checkpoint,
            loop_time=time.time(),
            writable=writable,
            intercept=intercept,
            coefficients=top,
            history=list(m.history),
            renormalisations=lr.renormalisations,
            candidates=[] if race is None else _candidates(race),
            switches=[] if race is None else list(race.switches),
        )


def _candidates(race: Any) -> list[dict[str, Any]]:
    return [
        {
            "name": name,
            "serving": k == race.serving,
            "log_loss": e.metrics.log_loss,
            "log_loss_window": e.metrics.log_loss_window,
            "history": [[c, w] for c, _, w in e.metrics.history],
        }
        for k, (name, e) in enumerate(zip(race.names, race.engines, strict=True))
    ]


class Timings(Collector):
    """A Prometheus histogram the loop fills in bulk, exposed as prometheus_client's `Histogram`
    is (its buckets, count, sum and creation time). `observe` only appends to a list: 50 ns,
    against 0.9 us for `Histogram.observe`, which the loop's path for a lone message paid twice.
    `fold` (the loop: when a scrape asks for a snapshot, and whenever FOLD_AT values wait) bins
    what was observed."""

    def __init__(self, name: str, documentation: str, buckets: tuple[float, ...], registry: CollectorRegistry) -> None:
        self.name, self.documentation = name, documentation
        self._bounds = np.array([*buckets, math.inf])
        self._counts = np.zeros(self._bounds.shape[0], dtype=np.int64)
        self._sum = 0.0
        self._created = time.time()
        self._lock = threading.Lock()  # fold (the loop) against collect (a scrape, on its thread)
        self._observed: list[float] = []
        self.observe = self._observed.append
        self._many: list[float] = []  # values observed several times over (`observe_many`)
        self._times: list[int] = []  # and how many times each
        registry.register(self)

    def observe_many(self, value: float, n: int) -> None:
        """`observe` the value n times: the latency of a block's n answers, sent at one moment."""
        self._many.append(value)
        self._times.append(n)

    def waiting(self) -> int:
        """Values observed and not binned yet."""
        return len(self._observed) + len(self._many)

    def fold(self) -> None:
        """Bin what was observed since the last fold (the loop's thread only)."""
        if not self._observed and not self._many:
            return
        values = np.array(self._observed)
        many = np.array(self._many)
        times = np.array(self._times, dtype=np.int64)
        self._observed.clear()
        self._many.clear()
        self._times.clear()
        # a value on a bound counts in that bound's bucket (le: less than or equal)
        buckets = self._counts.shape[0]
        counts = np.bincount(np.searchsorted(self._bounds, values, side="left"), minlength=buckets)
        if many.size:  # (float sums of whole counts: exact below 2**53)
            at = np.searchsorted(self._bounds, many, side="left")
            counts += np.bincount(at, weights=times, minlength=buckets).astype(np.int64)
        with self._lock:
            self._counts += counts
            self._sum += float(values.sum()) + float((many * times).sum())

    def describe(self) -> Iterator[Metric]:
        yield HistogramMetricFamily(self.name, self.documentation)

    def collect(self) -> Iterator[Metric]:
        with self._lock:
            cumulative = np.cumsum(self._counts).tolist()
            total = self._sum
        family = HistogramMetricFamily(self.name, self.documentation)
        # the bounds as Histogram writes them ("+Inf", "0.0001")
        bounds = [floatToGoString(b) for b in self._bounds.tolist()]  # type: ignore[no-untyped-call]
        family.add_metric([], list(zip(bounds, cumulative, strict=True)), total)
        family.samples.append(Sample(self.name + "_created", {}, self._created))
        yield family


FOLD_AT = 1024  # values a Timings holds before the loop bins them (about 30 us then, in process)
SNAPSHOT_WAIT = 1.0  # seconds a scrape waits for the loop's fresh snapshot before it takes the last


# Bucket bounds (seconds), from 25 us, each at most 2.5 times the one before. The block time had
# prometheus_client's defaults (5 ms up) and the latency began at 0.1 ms: after the demo's 28,000
# events through a live daemon, all 24,947 blocks were in the first bucket, and 13,662 of the
# 15,822 latencies then observed; a block of the demo takes tens to hundreds of microseconds.
BLOCK_BUCKETS = (
    *(0.000025, 0.00005, 0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25),
    *(0.5, 1.0, 2.5, 5.0, 10.0),
)
LATENCY_BUCKETS = BLOCK_BUCKETS[: BLOCK_BUCKETS.index(1.0) + 1]


class Board:
    """Where the loop leaves its latest snapshot and observes its timings.

    The loop takes a snapshot when a scrape asks for one (`fresh`, from the HTTP threads), and at
    a slow pace besides: taking one reads the metrics' whole window (0.1 to 0.3 ms of the loop's
    time, about a millisecond with the machine's other processes in between), and four a second,
    asked for or not, made clusters of late scores every 0.25 s at 10,000 messages a second."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.registry = registry
        self.snapshot = Snapshot(loop_time=time.time())
        self.batch_seconds = Timings(
            "oddsmill_batch_seconds", "Time to process one block of messages.", BLOCK_BUCKETS, registry
        )
        self.score_latency = Timings(
            "oddsmill_score_latency_seconds",
            "From a message's arrival to its score being published.",
            LATENCY_BUCKETS,
            registry,
        )
        self.write_failures = Counter(
            "oddsmill_write_failures",
            "Times a write of the journal or a checkpoint failed (each begins an outage).",
            registry=registry,
        )
        self.outage_dropped = Counter(
            "oddsmill_outage_dropped",
            "Messages dropped because the hold for a write outage was full.",
            registry=registry,
        )
        self.held = 0  # messages held during a write outage, set by the loop
        registry.register(SnapshotCollector(self))

        self.wanted = threading.Event()  # a scrape waits for a snapshot taken after it asked
        self._taken = threading.Condition()
        self._generation = 0  # snapshots taken
        self.heartbeat = time.time()  # set by the loop every time it comes round
        self.started = time.time()
        # (time, train/s, score/s, outcome/s), appended by the loop; read whole by /api/status
        self.rates: deque[tuple[float, float, float, float]] = deque(maxlen=RATE_POINTS)
        self._last_counts: tuple[float, int, int, int] | None = None

    def fresh(self, timeout: float = SNAPSHOT_WAIT) -> Snapshot:
        """A snapshot taken after this call (the loop takes one at its next round), or the last one
        if the loop has not taken one within `timeout` (busy with a long block, or stopped)."""
        with self._taken:
            asked = self._generation
            self.wanted.set()
            self._taken.wait_for(lambda: self._generation > asked, timeout)
        return self.snapshot

    def taken(self, snapshot: Snapshot) -> None:
        """The loop's new snapshot: the scrapes waiting for one go on."""
        with self._taken:
            self.wanted.clear()
            self.snapshot = snapshot
            self.batch_seconds.fold()
            self.score_latency.fold()
            self._generation += 1
            self._taken.notify_all()

    def fold_timings(self) -> None:
        """Bin the timings observed, if FOLD_AT of them wait (the loop, every round of chores)."""
        for t in (self.batch_seconds, self.score_latency):
            if t.waiting() >= FOLD_AT:
                t.fold()

    def sample_rates(self, now: float, train: int, score: int, outcome: int) -> None:
        """Append the events/s by kind since the last call (the loop calls this about once a second
        with the engine's counts)."""
        sample = (now, train, score, outcome)
        last = self._last_counts
        if last is not None and now > last[0]:
            dt = now - last[0]
            self.rates.append((now, (train - last[1]) / dt, (score - last[2]) / dt, (outcome - last[3]) / dt))
        self._last_counts = sample

    def healthy(self) -> bool:
        return self.snapshot.writable and time.time() - self.heartbeat < STUCK_SECONDS


class SnapshotCollector(Collector):
    def __init__(self, board: Board) -> None:
        self.board = board

    def collect(self) -> Iterator[Metric]:
        s = self.board.snapshot
        ev = CounterMetricFamily("oddsmill_events", "Events received, by kind.", labels=["kind"])
        for kind in ("train", "score", "outcome"):
            ev.add_metric([kind], s.events.get(kind, 0))
        yield ev
        rej = CounterMetricFamily("oddsmill_events_rejected", "Messages rejected, by reason.", labels=["reason"])
        for reason in REASONS:
            rej.add_metric([reason], s.rejected.get(reason, 0))
        yield rej
        yield CounterMetricFamily(
            "oddsmill_events_lost", "Sequence gaps seen (messages that never arrived).", value=s.lost
        )
        yield CounterMetricFamily("oddsmill_updates", "Events learned.", value=s.step)
        yield CounterMetricFamily(
            "oddsmill_features_ignored",
            "Feature values whose names found the vocabulary full (max_features): no slot, not learned.",
            value=s.features_ignored,
        )
        yield CounterMetricFamily("oddsmill_log_loss_sum", "Sum of progressive log-loss.", value=s.log_loss_sum)
        yield CounterMetricFamily(
            "oddsmill_log_loss_count", "Labelled events in the progressive log-loss.", value=s.log_loss_count
        )
        gauges = [
            ("oddsmill_log_loss", "Progressive mean log-loss since the state was created.", s.log_loss),
            ("oddsmill_log_loss_window", "Mean log-loss over the last labelled events.", s.log_loss_window),
            ("oddsmill_brier_window", "Brier score over the last labelled events.", s.brier_window),
            (
                "oddsmill_calibration_error_window",
                "Expected calibration error over the last labelled events.",
                s.calibration_error_window,
            ),
            ("oddsmill_learning_rate", "The current learning rate eta_t.", s.learning_rate),
            ("oddsmill_features", "Vocabulary size.", float(s.features)),
            ("oddsmill_journal_bytes", "Bytes of the journal's segments in the state directory.", s.journal_bytes),
            (
                "oddsmill_state_free_bytes",
                "Bytes free to the daemon on the state directory's file system.",
                s.state_free_bytes,
            ),
            ("oddsmill_pending_outcomes", "Scoring requests awaiting their outcome.", float(s.pending_outcomes)),
            (
                "oddsmill_checkpoint_last_success_timestamp_seconds",
                "When a checkpoint last held the live state (written, or already on disk when nothing changed since).",
                s.last_checkpoint,
            ),
            (
                "oddsmill_state_writable",
                "1 while the journal and checkpoints can be written; 0 during a write outage.",
                1.0 if s.writable else 0.0,
            ),
            (
                "oddsmill_outage_held",
                "Messages held during a write outage, to be journaled and learned when writes succeed.",
                float(self.board.held),
            ),
        ]
        for name, doc, value in gauges:
            yield GaugeMetricFamily(name, doc, value=value)
        dropped = CounterMetricFamily(
            "oddsmill_pending_dropped", "Held scoring requests dropped, by cause.", labels=["why"]
        )
        for why in ("expired", "evicted"):
            dropped.add_metric([why], s.pending_dropped.get(why, 0))
        yield dropped
        if s.candidates:  # a race: one series a configured candidate (at most 16)
            families = {
                "log_loss": GaugeMetricFamily(
                    "oddsmill_candidate_log_loss", "Progressive log-loss of each candidate.", labels=["candidate"]
                ),
                "log_loss_window": GaugeMetricFamily(
                    "oddsmill_candidate_log_loss_window",
                    "Windowed progressive log-loss of each candidate.",
                    labels=["candidate"],
                ),
                "serving": GaugeMetricFamily(
                    "oddsmill_candidate_serving",
                    "1 for the candidate whose scores are published.",
                    labels=["candidate"],
                ),
            }
            for c in s.candidates:
                for key, fam in families.items():
                    fam.add_metric([c["name"]], float(c[key]))
            yield from families.values()
            yield CounterMetricFamily(
                "oddsmill_candidate_switches", "Times another candidate took over serving.", value=len(s.switches)
            )


def status_document(snapshot: Snapshot, now: float) -> dict[str, Any]:
    """The /api/status document of one snapshot (the dashboard and `oddsmill report` read it):
    the values of the metrics, the calibration bins, the top coefficients and the log-loss history.
    A figure that does not exist yet (the log-loss of no events) is null."""
    doc = asdict(snapshot)
    doc["history"] = [list(h) for h in snapshot.history]
    doc["checkpoint_age_seconds"] = now - snapshot.last_checkpoint if snapshot.last_checkpoint else None
    out: dict[str, Any] = _nulls(doc)
    return out


def _nulls(v: Any) -> Any:
    if isinstance(v, float):
        return None if not math.isfinite(v) else v
    if isinstance(v, dict):
        return {k: _nulls(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [_nulls(x) for x in v]
    return v


def status(board: Board) -> dict[str, Any]:
    """The live /api/status document: the snapshot's, plus health, uptime and recent events/s."""
    now = time.time()
    doc = status_document(board.snapshot, now)
    doc["healthy"] = board.healthy()
    doc["time"] = now
    doc["uptime_seconds"] = now - board.started
    doc["rates"] = _nulls([list(r) for r in list(board.rates)])
    doc["outage_held"] = board.held
    return doc


def dashboard_page() -> bytes:
    """The dashboard: one page shipped with the package, its script and styles inline."""
    return (resources.files("oddsmill") / "web" / "dashboard.html").read_bytes()


# A connection that sends no whole request within this many seconds is closed. http.server waits
# for ever by default, a thread a connection: a browser's unused preconnection, or a client that
# opened a socket and stalled, held a thread each until it left (300 of them, 306 threads).
IDLE_SECONDS = 30.0


def serve_http(board: Board, host: str, port: int) -> tuple[ThreadingHTTPServer, threading.Thread]:
    """Start the HTTP endpoints in a daemon thread; returns the server (its port is bound)."""

    class Handler(BaseHTTPRequestHandler):
        head = False
        timeout = IDLE_SECONDS  # (socketserver's StreamRequestHandler sets it on the connection)

        def version_string(self) -> str:
            """The Server header: not Python's version, which tells a scanner more."""
            return "oddsmill"

        def _read_only(self) -> None:
            """Any other method: 405 with the methods allowed (http.server's own answer is 501,
            "not implemented", which says the server could, some day)."""
            body = b"read only: GET or HEAD\n"
            self.send_response(405)
            self.send_header("Allow", "GET, HEAD")
            self.send_header("Content-Type", "text/plain; charset=utf-8")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _read_only  # noqa: N815 (the names http.server calls)

        def do_HEAD(self) -> None:  # noqa: N802
            """GET's status and headers without the body: load balancers and uptime checks ask
            /healthz this way."""
            self.head = True
            self.do_GET()

        def do_GET(self) -> None:  # noqa: N802 (the name http.server calls)
            path = self.path.split("?", 1)[0]
            if path == "/metrics":
                board.fresh()
                self._send(200, CONTENT_TYPE_LATEST, generate_latest(board.registry))
            elif path == "/healthz":
                ok = board.healthy()
                self._send(200 if ok else 503, "text/plain; charset=utf-8", b"ok\n" if ok else b"unhealthy\n")
            elif path == "/api/status":
                board.fresh()
                self._send(200, "application/json", json.dumps(status(board)).encode())
            elif path == "/":
                self._send(200, "text/html; charset=utf-8", dashboard_page())
            else:
                self._send(404, "text/plain; charset=utf-8", b"not found\n")

        def _send(self, code: int, ctype: str, body: bytes) -> None:
            self.send_response(code)
            self.send_header("Content-Type", ctype)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            if not self.head:
                self.wfile.write(body)

        def log_message(self, format: str, *args: Any) -> None:  # noqa: A002 (the base class's name)
            pass

    httpd = ThreadingHTTPServer((host, port), Handler)
    httpd.daemon_threads = True
    thread = threading.Thread(target=httpd.serve_forever, name="oddsmill-http", daemon=True)
    thread.start()
    return httpd, thread
