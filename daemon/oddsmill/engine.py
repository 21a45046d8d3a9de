"""The engine: what the daemon does with messages, without the sockets.

Given decoded items in arrival order it scores every event with features, learns training events
and joined outcomes, holds scoring requests with an id until their outcome arrives, checks producer
sequence numbers, and keeps the progressive metrics. `replay` drives it from logs and the server
from sockets, so both learn exactly the same thing from the same messages.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import kernel as K
from .encoding import BlockBuilder
from .errors import ProtocolError
from .learner import Learner
from .progressive import ProgressiveMetrics
from .protocol import Columns, Event, Item


@dataclass
class PendingEntry:
    slots: list[int]
    values: list[float]
    w: float
    logit: float  # the score published for it
    clock: float  # arrival time: the time-to-live counts in the daemon's own clock


@dataclass(frozen=True)
class Score:
    id: Any
    logit: float
    step: int
    ts: float


@dataclass(frozen=True)
class Rejection:
    id: Any
    reason: str
    detail: str


@dataclass
class Counters:
    train: int = 0
    score: int = 0
    outcome: int = 0
    lost: int = 0
    rejected: dict[str, int] = field(default_factory=dict)
    pending_expired: int = 0
    pending_evicted: int = 0


class Engine:
    """Learner + pending outcomes + sequence checks + progressive metrics."""

    def __init__(
        self,
        learner: Learner,
        window: int = 10_000,
        pending_limit: int = 1_000_000,
        pending_ttl: float = 7 * 24 * 3600.0,
    ) -> None:
        self.learner = learner
        self.metrics = ProgressiveMetrics(window)
        self.pending: OrderedDict[Any, PendingEntry] = OrderedDict()
        self.pending_limit = pending_limit
        self.pending_ttl = pending_ttl
        self.counters = Counters()
        self.last_seq: dict[str, int] = {}

    def process(self, items: list[tuple[float, Item]]) -> list[tuple[int, Score | Rejection]]:
        """Run items (arrival time, decoded item) as one block; returns (index of the item, score
        or rejection) in order. Rejections change nothing but their counter."""
        lr = self.learner
        b = BlockBuilder()
        # per block position: (id, arrival, held pending entry or None, label or None)
        slots_meta: list[tuple[Any, float, PendingEntry | None, float | None]] = []
        results: list[tuple[int, Score | Rejection | int]] = []  # int: position in the block
        steps: list[int] = []
        step = lr.step
        for n, (arrival, item) in enumerate(items):
            if isinstance(item, ProtocolError):
                results.append((n, self._reject(item.event_id, item.reason, item.detail)))
                continue
            if not self._sequence_ok(item):
                results.append(
                    (
                        n,
                        self._reject(
                            getattr(item, "id", None), "duplicate", f"seq {item.seq} from {item.src!r} was seen already"
                        ),
                    )
                )
                continue
            # One time base for the time-to-live: when the daemon received the message (the journal
            # keeps it, so a replay expires exactly what the live run did). Event times are the
            # producers' and need not agree with each other or with this clock.
            clock = arrival
            if self.pending:
                self._expire(clock)
            if isinstance(item, Columns) and self._plain(item):
                step = self._add_columns(n, arrival, item, b, slots_meta, results, steps, step)
                continue
            for ev in _events(item):
                if ev.x is None:  # an outcome
                    held = self.pending.pop(ev.id, None)
                    if held is None:
                        results.append(
                            (n, self._reject(ev.id, "unknown_outcome", f"no scoring request with id {ev.id!r} is held"))
                        )
                        continue
                    assert ev.y is not None
                    b.add(held.slots, held.values, K.OP_LEARN, float(ev.y), held.w)
                    slots_meta.append((ev.id, arrival, held, float(ev.y)))
                    steps.append(step)
                    step += 1
                    self.counters.outcome += 1
                    continue
                try:
                    slots, values = lr.encode(ev.x, grow=True, event_id=ev.id)
                except ProtocolError as e:
                    results.append((n, self._reject(e.event_id, e.reason, e.detail)))
                    continue
                results.append((n, len(b)))
                steps.append(step)
                if ev.y is not None:
                    b.add(slots, values, K.OP_TRAIN, float(ev.y), ev.w)
                    slots_meta.append((ev.id, arrival, None, float(ev.y)))
                    step += 1
                    self.counters.train += 1
                else:
                    b.add(slots, values, K.OP_SCORE, 0.0, ev.w)
                    held = None
                    if ev.id is not None:
                        held = PendingEntry(slots, values, ev.w, float("nan"), clock)
                        self._hold(ev.id, held)
                    slots_meta.append((ev.id, arrival, held, None))
                    self.counters.score += 1
        if len(b) == 0:
            return [(n, r) for n, r in results if not isinstance(r, int)]
        logits = lr.run(b.build())
        # metrics on labelled events: the score that was published for each
        zs, ys = [], []
        for pos, (_, _, held, label) in enumerate(slots_meta):
            if held is not None and label is None:
                held.logit = float(logits[pos])
            if label is not None:
                zs.append(held.logit if held is not None else float(logits[pos]))
                ys.append(label)
        self.metrics.update(np.asarray(zs, dtype=np.float64), np.asarray(ys, dtype=np.float64))
        out: list[tuple[int, Score | Rejection]] = []
        for n, r in results:
            if isinstance(r, int):
                ident, arrival, _, _ = slots_meta[r]
                out.append((n, Score(ident, float(logits[r]), steps[r], arrival)))
            else:
                out.append((n, r))
        return out

    def score_only(self, items: list[tuple[float, Item]]) -> list[tuple[int, Score | Rejection]]:
        """Scores for the events with features, from the model as it stands, changing nothing: not
        the vocabulary (unknown features count as absent), not the pending store, not a counter.
        What the daemon answers while it cannot write its state; the items are learned later."""
        lr = self.learner
        b = BlockBuilder()
        owners: list[tuple[int, Any, float]] = []
        out: list[tuple[int, Score | Rejection]] = []
        for n, (arrival, item) in enumerate(items):
            if isinstance(item, ProtocolError):
                out.append((n, Rejection(item.event_id, item.reason, item.detail)))
                continue
            for ev in _events(item):
                if ev.x is None:
                    continue
                try:
                    slots, values = lr.encode(ev.x, grow=False, event_id=ev.id)
                except ProtocolError as e:
                    out.append((n, Rejection(e.event_id, e.reason, e.detail)))
                    continue
                b.add(slots, values, K.OP_SCORE, 0.0, ev.w)
                owners.append((n, ev.id, arrival))
        logits = lr.score(b.build()) if len(b) else np.empty(0)
        out.extend(
            (n, Score(ident, float(z), lr.step, arrival)) for (n, ident, arrival), z in zip(owners, logits, strict=True)
        )
        out.sort(key=lambda r: r[0])  # stable: in item order, each item's own results in order
        return out

    # -- columnar blocks, whole ---------------------------------------------------------------
    def _plain(self, item: Columns) -> bool:
        """Whether a columnar block can be encoded whole, with the same result as row by row: no row
        is a scoring request to hold (an id without a label), and the vocabulary has room for every
        new name. (The decoder has refused blocks with a name twice or a value not finite.)"""
        cols = item.cols
        if item.ids is not None and bool(np.isnan(item.y).any()):
            return False
        vocab = self.learner.vocab
        new = sum(1 for c in cols if c not in vocab.index)
        return len(vocab) + new <= vocab.max_features

    def _add_columns(
        self,
        n: int,
        arrival: float,
        item: Columns,
        b: BlockBuilder,
        slots_meta: list[tuple[Any, float, PendingEntry | None, float | None]],
        results: list[tuple[int, Score | Rejection | int]],
        steps: list[int],
        step: int,
    ) -> int:
        """The rows of a plain columnar block into the block, as `process` would add them one by
        one (the same slots, values, order and counts), with the per-row work done by numpy."""
        rows, ids = item.rows, item.ids
        m = rows.shape[0]
        if m == 0:
            return step
        # the first row gives the new names their slots, in column order, as row by row
        slots, _ = self.learner.encode(dict.fromkeys(item.cols, 0.0), grow=True)
        first = len(b)
        labels = item.y
        unlabelled = np.isnan(labels)
        b.add_rows(
            np.asarray(slots, dtype=np.int64),
            rows,
            np.where(unlabelled, K.OP_SCORE, K.OP_TRAIN),
            np.where(unlabelled, 0.0, labels),
        )
        for pos, label in enumerate(labels.tolist()):
            ident = ids[pos] if ids is not None else None
            results.append((n, first + pos))
            steps.append(step)
            if label == label:  # labelled: learned
                slots_meta.append((ident, arrival, None, label))
                step += 1
                self.counters.train += 1
            else:
                slots_meta.append((ident, arrival, None, None))
                self.counters.score += 1
        return step

    # -- helpers -------------------------------------------------------------------------------
    def _reject(self, ident: Any, reason: str, detail: str) -> Rejection:
        self.counters.rejected[reason] = self.counters.rejected.get(reason, 0) + 1
        return Rejection(ident, reason, detail)

    def _sequence_ok(self, item: Event | Columns) -> bool:
        """A gap counts as lost; a repeat is a duplicate. seq 0 from a known producer starts a new
        numbering (the producer restarted) and is neither."""
        if item.src is None or item.seq is None:
            return True
        last = self.last_seq.get(item.src)
        if last is not None and item.seq != 0:
            if item.seq <= last:
                return False
            self.counters.lost += item.seq - last - 1
        self.last_seq[item.src] = item.seq
        return True

    def _hold(self, ident: Any, entry: PendingEntry) -> None:
        self.pending.pop(ident, None)
        self.pending[ident] = entry
        while len(self.pending) > self.pending_limit:
            self.pending.popitem(last=False)
            self.counters.pending_evicted += 1

    def _expire(self, now: float) -> None:
        while self.pending:
            first = next(iter(self.pending.values()))
            if first.clock >= now - self.pending_ttl:
                break
            self.pending.popitem(last=False)
            self.counters.pending_expired += 1

    # -- state -----------------------------------------------------------------------------------
    def state_dict(self) -> dict[str, Any]:
        c = self.counters
        return {
            "learner": self.learner.state_dict(),
            "metrics": self.metrics.state_dict(),
            "pending": [[k, e.slots, e.values, e.w, e.logit, e.clock] for k, e in self.pending.items()],
            "pending_limit": self.pending_limit,
            "pending_ttl": self.pending_ttl,
            "counters": {
                "train": c.train,
                "score": c.score,
                "outcome": c.outcome,
                "lost": c.lost,
                "rejected": dict(c.rejected),
                "pending_expired": c.pending_expired,
                "pending_evicted": c.pending_evicted,
            },
            "last_seq": dict(self.last_seq),
        }

    @classmethod
    def from_state_dict(cls, d: dict[str, Any]) -> Engine:
        m = ProgressiveMetrics.from_state_dict(d["metrics"])
        eng = cls(
            Learner.from_state_dict(d["learner"]),
            m.window,
            int(d["pending_limit"]),
            float(d["pending_ttl"]),
        )
        eng.metrics = m
        for k, slots, values, w, logit, clock in d["pending"]:
            eng.pending[k] = PendingEntry(list(slots), list(values), w, logit, clock)
        c = d["counters"]
        eng.counters = Counters(
            c["train"],
            c["score"],
            c["outcome"],
            c["lost"],
            dict(c["rejected"]),
            c["pending_expired"],
            c["pending_evicted"],
        )
        eng.last_seq = dict(d["last_seq"])
        return eng


def _events(item: Event | Columns) -> tuple[Event, ...] | list[Event]:
    """A columnar block as events (each row one event, its features the numeric columns)."""
    if isinstance(item, Event):
        return (item,)
    out = []
    for r in range(item.rows.shape[0]):
        y = item.y[r]
        ident = item.ids[r] if item.ids is not None else None
        out.append(
            Event(
                ident,
                dict(zip(item.cols, item.rows[r].tolist(), strict=True)),
                None if np.isnan(y) else int(y),
                1.0,
                item.ts,
            )
        )
    return out
