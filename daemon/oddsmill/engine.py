"""The engine: what the daemon does with messages, without the sockets.

Given decoded items in arrival order it scores every event with features, learns training events
and joined outcomes, holds scoring requests with an id until their outcome arrives, checks producer
sequence numbers, and keeps the progressive metrics. `replay` drives it from logs and the server
from sockets, so both learn exactly the same thing from the same messages.
"""

from __future__ import annotations

import logging
import math
from array import array
from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Final

import numpy as np

from . import kernel as K
from .encoding import Block, BlockBuilder, Rows, too_long
from .errors import ProtocolError
from .fastpath import READ
from .learner import Learner
from .progressive import ProgressiveMetrics
from .protocol import Columns, Event, Item

if TYPE_CHECKING:
    from .intake import Intake
    from .quick import Known

log = logging.getLogger("oddsmill")

# A held scoring request: (slots, values, w, logit, clock): the logit is the score published for
# it, the clock its arrival time (the time-to-live counts in the daemon's own clock). A plain tuple
# of numbers, a tuple of numbers and bytes, which Python's garbage collector stops tracking: with a
# million requests held as objects, each full collection walked them all and stopped the loop for
# 1.06 s (measured); as tuples, 0.11 s.
PendingEntry = tuple[tuple[int, ...], bytes, float, float, float]
E_SLOTS: Final = 0
E_VALUES: Final = 1
E_W: Final = 2
E_LOGIT: Final = 3
E_CLOCK: Final = 4


def pending_entry(slots: Sequence[int], values: Sequence[float], w: float, logit: float, clock: float) -> PendingEntry:
    """A held request: its slots (the tuple encoding shares among events with the same names), its
    values as the bytes of native doubles (bytes, unlike an array, are not tracked by the garbage
    collector), its weight, its published score and when it arrived. 520 bytes a request of 20
    numeric features held, with its place in the store; 1,372 with the values as a tuple of floats."""
    return (tuple(slots), array("d", values).tobytes(), w, logit, clock)


def held_values(entry: PendingEntry) -> memoryview[float]:
    """The values of a held request, as doubles."""
    return memoryview(entry[E_VALUES]).cast("d")


def _with_logit(entry: PendingEntry, logit: float) -> PendingEntry:
    """The same request with another published score (the tuple cannot be changed in place)."""
    return (entry[E_SLOTS], entry[E_VALUES], entry[E_W], logit, entry[E_CLOCK])


@dataclass(frozen=True)
class Score:
    id: Any
    logit: float
    step: int
    ts: float


@dataclass(frozen=True)
class ColumnScores:
    """The scores of a columnar block learned whole, one a row in row order, with no Python object
    a row: the daemon publishes the arrays as they are. `steps` holds each row's step (its body
    carries the first, PROTOCOL 3)."""

    ids: tuple[Any, ...] | None
    logits: np.ndarray
    steps: np.ndarray
    ts: float

    @property
    def step(self) -> int:
        return int(self.steps[0])

    def rows(self) -> list[Score]:
        """The same scores as one `Score` a row."""
        ids = self.ids if self.ids is not None else (None,) * self.logits.shape[0]
        return [Score(i, z, s, self.ts) for i, z, s in zip(ids, self.logits.tolist(), self.steps.tolist(), strict=True)]


@dataclass(frozen=True)
class Rejection:
    id: Any
    reason: str
    detail: str


Result = Score | ColumnScores | Rejection  # what `Engine.process` answers for an item


def each_score(results: list[tuple[int, Result]]) -> list[Score]:
    """The scores among results, one a row, in order (columnar blocks unrolled)."""
    out: list[Score] = []
    for _, r in results:
        if isinstance(r, Score):
            out.append(r)
        elif isinstance(r, ColumnScores):
            out.extend(r.rows())
    return out


@dataclass
class Counters:
    train: int = 0
    score: int = 0
    outcome: int = 0
    lost: int = 0
    rejected: dict[str, int] = field(default_factory=dict)
    pending_expired: int = 0
    pending_evicted: int = 0


DROP, JOIN, HOLD = 0, 1, 2  # what `prepare` did to the pending store, for `follow` to do the same
DROPPED_KEPT = 10_000  # requests dropped from the pending store whose reason is kept (`Engine.dropped`)
JOINED_KEPT = 10_000  # ids whose outcome was learned, kept so that a second outcome is told so (`Engine.joined`)
# Producers (`src`) whose last number is kept: the longest silent beyond it are forgotten (their
# next number starts them afresh, a gap in it not counted). A producer naming itself anew for each
# message (a process id, a uuid) grew the map, and every checkpoint, without bound.
PRODUCERS_KEPT = 100_000


class Plan:
    """A block prepared for the kernel: the events in order, what each item answers (a rejection
    now, or a place in the block), and the pending store's changes."""

    __slots__ = ("block", "results", "holds", "joins", "ops", "step", "learned", "scored", "_segments")

    def __init__(self, step: int) -> None:
        self.block = BlockBuilder()
        self.step = step  # the learner's step before the block
        self.learned = 0  # events of the block that will be learned, so far
        self.scored = 0  # events of the block that are only scored (unlabelled)
        # (item index, Rejection | (position, id, arrival, step) | (first position, rows, ids, arrival,
        # step of the first row, rows only scored))
        self.results: list[tuple[int, Any]] = []
        # scoring requests held (position, id, entry): their score is set after the run
        self.holds: list[tuple[int, Any, PendingEntry]] = []
        self.joins: list[tuple[int, PendingEntry]] = []  # outcomes: learned with these held entries
        self.ops: list[tuple[int, Any, int, Any]] = []  # (DROP, -, -, count) | (JOIN|HOLD, id, position, entry)
        self._segments: list[Block | Rows] | None = None

    def segments(self) -> list[Block | Rows]:
        """The block for the kernel, built once: after this the plan is only read, so a race's
        candidates may run it on several threads at once."""
        if self._segments is None:
            self._segments = self.block.segments()
        return self._segments

    def rejections(self) -> list[tuple[int, Rejection]]:
        return [(n, r) for n, r in self.results if isinstance(r, Rejection)]

    def labels(self) -> tuple[np.ndarray, np.ndarray]:
        """(op, y) of every event of the block, in order."""
        parts = self.segments()
        if len(parts) == 1:
            return parts[0].op, parts[0].y
        return np.concatenate([p.op for p in parts]), np.concatenate([p.y for p in parts])


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
        # why the last DROPPED_KEPT requests dropped from the store went ("expired" or "evicted"), so
        # that an outcome that comes too late is told so (not kept in checkpoints; a candidate that
        # follows a race's leader keeps none)
        self.dropped: OrderedDict[Any, str] = OrderedDict()
        # the ids of the last JOINED_KEPT outcomes learned (not kept in checkpoints either): a second
        # outcome for one (a queue that delivers at least once) was told only that no request was
        # held, as a wrong id is
        self.joined: OrderedDict[Any, None] = OrderedDict()
        self.counters = Counters()
        self.last_seq: dict[str, int] = {}  # by producer, from the longest silent (PRODUCERS_KEPT at most)
        self.said_producers = False  # whether the log has said producers are forgotten

    def process(self, items: list[tuple[float, Item]]) -> list[tuple[int, Result]]:
        """Run items (arrival time, decoded item) as one block; returns (index of the item, score,
        the scores of a columnar block, or rejection) in order. Rejections change nothing but their
        counter."""
        plan = self.prepare(items)
        out = self.finish(plan, plan.holds, plan.joins, publish=True)
        assert out is not None
        return out

    def learn(self, items: list[tuple[float, Item]]) -> list[tuple[int, Rejection]]:
        """`process` without the answers: for replays, which publish nothing. Returns the block's
        rejections (index of the item, rejection), so that a replay can name a bad line."""
        plan = self.prepare(items)
        self.finish(plan, plan.holds, plan.joins, publish=False)
        return plan.rejections()

    def one(self, arrival: float, ev: Event) -> Result | None:
        """`process` of a block of one event: the same checks, pending store, counters, kernel
        arithmetic (kernel.learn_event) and metrics, so the same state bit for bit
        (tests/test_lone.py holds it to `process`), without building and reading a block. Returns
        its score, its rejection, or None for an outcome joined (it publishes nothing). A lone
        message is most wake-ups of the daemon at a modest load, where the block around one event
        cost twice what the event did."""
        if not self.numbered(ev.src, ev.seq):
            return self._reject(ev.id, "duplicate", f"seq {ev.seq} from {ev.src!r} was seen already")
        if self.pending:
            self._expire(arrival)
        lr = self.learner
        if ev.x is None:  # an outcome
            held = self.pending.pop(ev.id, None)
            if held is None:
                return self._unknown(ev.id)
            self._joined(ev.id)
            assert ev.y is not None
            y = float(ev.y)
            lr.run_one(held[E_SLOTS], held_values(held), K.OP_LEARN, y, held[E_W])
            self.counters.outcome += 1
            self.metrics.update_one(held[E_LOGIT], y)  # the score published for its request
            return None
        try:
            slots, values = lr.encode(ev.x, grow=True, event_id=ev.id)
        except ProtocolError as e:
            return self._reject(e.event_id, e.reason, e.detail)
        step = lr.step
        if ev.y is not None:
            y = float(ev.y)
            z = lr.run_one(slots, values, K.OP_TRAIN, y, ev.w)
            self.counters.train += 1
            self.metrics.update_one(z, y)
            return Score(ev.id, z, step, arrival)
        held = None
        if ev.id is not None:
            held = pending_entry(slots, values, ev.w, float("nan"), arrival)
            self._hold(ev.id, held)
        z = lr.run_one(slots, values, K.OP_SCORE, 0.0, ev.w)
        if held is not None and self.pending.get(ev.id) is held:  # its score, keeping its place
            self.pending[ev.id] = _with_logit(held, z)
        self.counters.score += 1
        return Score(ev.id, z, step, arrival)

    def train_rows(
        self,
        arrival: float,
        slots: Sequence[int] | np.ndarray,
        rows: np.ndarray,
        y: np.ndarray,
        p: np.ndarray | None = None,
    ) -> tuple[np.ndarray, int]:
        """`process` of a plain columnar block of training events (labels y, 0 or 1) whose names
        all have their slots already: what `prepare` (`_add_columns`) and `settle` do with it, so
        the same state bit for bit (tests/test_lone.py), without a plan. Returns the published
        logits and the step of the first row (each row's is one more); with `p` (a row each),
        their scores' p go there, computed with the metrics' losses."""
        if self.pending:
            self._expire(arrival)
        lr = self.learner
        step = lr.step
        logits = lr.run_rows(slots, rows, y)
        self.counters.train += rows.shape[0]
        self.metrics.update(logits, y, p)
        return logits, step

    def train_known(self, arrival: float, known: Known) -> list[bytes]:
        """`train_rows` on the block `known` has read (quick.py), in one compiled call: the same
        state bit for bit (tests/test_lone.py). Returns the score bodies, packed."""
        if self.pending:
            self._expire(arrival)
        metrics = self.metrics
        bodies = known.learn(self.learner.arrays(known.slots.shape[0]), metrics.arrays(), metrics.scalars(), arrival)
        self._hold_known(known, arrival)
        return bodies

    def _hold_known(self, known: Known, arrival: float) -> None:
        """After a block of known names (quick.py): count its events, and hold its scoring
        requests with ids in order, as `one` holds them (their slots, values, weight 1, the logit
        published and the arrival)."""
        n = known.request_count
        self.counters.train += known.count - n
        if not n:
            return
        self.counters.score += n
        slots = known.slot_tuple
        for r, ident in known.requests():
            if ident is not None:
                self._hold(ident, (slots, known.row_values(r), 1.0, known.logit(r), arrival))

    def journal_and_train_known(
        self, arrival: float, known: Known, raws: list[bytes], fd: int
    ) -> tuple[int, list[bytes]]:
        """`train_known` with the block's reading and its journal records (appended to the file fd)
        in the same compiled call (`Known.journal_and_learn`): what that returns. The pending
        store's requests past their time-to-live are dropped first, as `train_known` drops them
        before it learns and `prepare` before each item (at one arrival, a second expiry drops
        nothing more: a block this call declines expires nothing again on the path that takes it)."""
        if self.pending:
            self._expire(arrival)
        metrics = self.metrics
        arrays = self.learner.arrays(known.slots.shape[0])
        found, bodies = known.journal_and_learn(raws, fd, arrival, arrays, metrics.arrays(), metrics.scalars())
        if found == READ:
            self._hold_known(known, arrival)
        return found, bodies

    def take_in(self, intake: Intake, known: Known, fd: int, wait_ms: int) -> int:
        """A wake-up of the loop in one compiled call (`Intake.serve`): the block that came, when
        it is one `journal_and_train_known` would take, journaled (to fd), learned and answered;
        what that returns. A block that comes when the oldest pending request is past its
        time-to-live is handed back (EXPIRY_DUE), for the usual path to drop it first."""
        pending = self.pending
        oldest = next(iter(pending.values()))[E_CLOCK] if pending else math.inf
        metrics = self.metrics
        arrays = self.learner.arrays(known.slots.shape[0])
        found = intake.serve(wait_ms, known, fd, arrays, metrics.arrays(), metrics.scalars(), oldest, self.pending_ttl)
        if found == READ:
            self._hold_known(known, intake.arrival)
        return found

    def prepare(self, items: list[tuple[float, Item]]) -> Plan:
        """Everything of a block but the kernel: sequence checks, encoding, the pending store and
        the counters. `finish` then runs the kernel and keeps the metrics."""
        lr = self.learner
        plan = Plan(lr.step)
        b, results, ops = plan.block, plan.results, plan.ops
        for n, (arrival, item) in enumerate(items):
            if isinstance(item, ProtocolError):
                results.append((n, self._reject(item.event_id, item.reason, item.detail)))
                continue
            if not self.numbered(item.src, item.seq):
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
                dropped = self._expire(clock)
                if dropped:
                    ops.append((DROP, None, -1, dropped))
            if isinstance(item, Columns) and self._plain(item):
                self._add_columns(n, arrival, item, plan)
                continue
            for ev in (item,) if type(item) is Event else _events(item):
                if ev.x is None:  # an outcome
                    held = self.pending.pop(ev.id, None)
                    if held is None:
                        results.append((n, self._unknown(ev.id)))
                        continue
                    self._joined(ev.id)
                    assert ev.y is not None
                    pos = len(b)
                    b.add(held[E_SLOTS], held_values(held), K.OP_LEARN, float(ev.y), held[E_W])
                    plan.learned += 1
                    plan.joins.append((pos, held))
                    ops.append((JOIN, ev.id, pos, held))
                    self.counters.outcome += 1
                    continue
                try:
                    slots, values = lr.encode(ev.x, grow=True, event_id=ev.id)
                except ProtocolError as e:
                    results.append((n, self._reject(e.event_id, e.reason, e.detail)))
                    continue
                pos = len(b)
                results.append((n, (pos, ev.id, arrival, plan.step + plan.learned)))
                if ev.y is not None:
                    b.add(slots, values, K.OP_TRAIN, float(ev.y), ev.w)
                    plan.learned += 1
                    self.counters.train += 1
                else:
                    b.add(slots, values, K.OP_SCORE, 0.0, ev.w)
                    plan.scored += 1
                    if ev.id is not None:
                        held = pending_entry(slots, values, ev.w, float("nan"), clock)
                        plan.holds.append((pos, ev.id, held))
                        ops.append((HOLD, ev.id, pos, held))
                        evicted = self._hold(ev.id, held)
                        if evicted:
                            ops.append((DROP, None, -1, evicted))
                    self.counters.score += 1
        return plan

    def follow(
        self, plan: Plan, leader: Engine
    ) -> tuple[list[tuple[int, Any, PendingEntry]], list[tuple[int, PendingEntry]]]:
        """Take a block another engine prepared, as a candidate of a race sharing its vocabulary,
        counters and sequence numbers: grow to the shared vocabulary and do to this engine's own
        pending store what `prepare` did to the leader's (its entries keep this engine's scores).
        Returns this engine's (holds, joins) for `finish`."""
        self.learner.follow_vocabulary(leader.learner)
        holds: list[tuple[int, Any, PendingEntry]] = []
        joins: list[tuple[int, PendingEntry]] = []
        pending = self.pending
        for kind, ident, pos, arg in plan.ops:
            if kind == DROP:
                for _ in range(arg):
                    pending.popitem(last=False)
            elif kind == JOIN:
                joins.append((pos, pending.pop(ident)))
            else:
                entry = _with_logit(arg, float("nan"))
                pending.pop(ident, None)
                pending[ident] = entry
                holds.append((pos, ident, entry))
        return holds, joins

    def finish(
        self,
        plan: Plan,
        holds: list[tuple[int, Any, PendingEntry]],
        joins: list[tuple[int, PendingEntry]],
        publish: bool,
    ) -> list[tuple[int, Result]] | None:
        """Run the kernel over a prepared block, keep the metrics on the labelled events (with the
        score that was published for each), and, when `publish`, return the results in order."""
        return self.settle(plan, holds, joins, self.run(plan), publish)

    def run(self, plan: Plan) -> np.ndarray:
        """The kernel over a prepared block: the published logits (NaN for joined outcomes). The
        only part of `finish` that runs without the GIL."""
        if len(plan.block) == 0:
            return np.empty(0)
        return self.learner.run_segments(plan.segments())

    def settle(
        self,
        plan: Plan,
        holds: list[tuple[int, Any, PendingEntry]],
        joins: list[tuple[int, PendingEntry]],
        logits: np.ndarray,
        publish: bool,
    ) -> list[tuple[int, Result]] | None:
        """What follows the kernel: the held requests' scores, the metrics, the answers."""
        if len(plan.block) == 0:
            return [(n, r) for n, r in plan.results if not isinstance(r, tuple)] if publish else None
        op, ys = plan.labels()
        published: dict[int, float] = {}  # entries held in this block, by identity: their scores
        pending = self.pending
        for pos, ident, entry in holds:  # before the joins: an outcome may follow its request in one block
            z = float(logits[pos])
            published[id(entry)] = z
            if pending.get(ident) is entry:  # (still held: not joined, evicted or held again since)
                pending[ident] = _with_logit(entry, z)  # keeps its place in the order
        zs = logits
        if joins:
            zs = logits.copy()
            for pos, entry in joins:
                zs[pos] = published.get(id(entry), entry[E_LOGIT])
        if plan.scored:  # the labelled events only
            labelled = op != K.OP_SCORE
            zs, ys = zs[labelled], ys[labelled]
        self.metrics.update(zs, ys)
        if not publish:
            return None
        out: list[tuple[int, Result]] = []
        for n, r in plan.results:
            if not isinstance(r, tuple):
                out.append((n, r))
            elif len(r) == 4:
                pos, ident, arrival, step = r
                out.append((n, Score(ident, float(logits[pos]), step, arrival)))
            else:
                start, m, ids, arrival, first, scored = r
                if scored:  # each row's step: the rows learned before it
                    learned = op[start : start + m] != K.OP_SCORE
                    steps = np.cumsum(learned) - learned + first
                else:
                    steps = np.arange(first, first + m)
                out.append((n, ColumnScores(ids, logits[start : start + m], steps, arrival)))
        return out

    def score_only(self, items: list[tuple[float, Item]]) -> list[tuple[int, Result]]:
        """Scores for the events with features, from the model as it stands, changing nothing: not
        the vocabulary (unknown features count as absent), not the pending store, not a counter.
        What the daemon answers while it cannot write its state; the items are learned later."""
        lr = self.learner
        b = BlockBuilder()
        owners: list[tuple[int, Any, float]] = []
        out: list[tuple[int, Result]] = []
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
        is a scoring request to hold (an id without a label), the vocabulary has room for every
        new name, and no new name is too long (each row is then refused). (The decoder has refused
        blocks with a name twice or a value not finite.)"""
        cols = item.cols
        if item.ids is not None and bool(np.isnan(item.y).any()):
            return False
        vocab = self.learner.vocab
        long = [c for c in cols if too_long(c)]
        if long and vocab.count_new(long):
            return False
        return len(vocab) + vocab.count_new(list(cols)) <= vocab.max_features

    def _add_columns(self, n: int, arrival: float, item: Columns, plan: Plan) -> None:
        """The rows of a plain columnar block into the block, as `prepare` would add them one by
        one (the same slots, values, order and counts), with the per-row work done by numpy."""
        rows = item.rows
        m = rows.shape[0]
        if m == 0:
            return
        # the first row gives the new names their slots, in column order, as row by row
        slots, _ = self.learner.encode(dict.fromkeys(item.cols, 0.0), grow=True)
        b = plan.block
        start = len(b)
        labels = item.y
        unlabelled = np.isnan(labels)
        b.add_rows(
            np.asarray(slots, dtype=np.int64),
            rows,
            np.where(unlabelled, K.OP_SCORE, K.OP_TRAIN),
            np.where(unlabelled, 0.0, labels),
        )
        scored = int(np.count_nonzero(unlabelled))
        self.counters.train += m - scored
        self.counters.score += scored
        plan.results.append((n, (start, m, item.ids, arrival, plan.step + plan.learned, scored)))
        plan.learned += m - scored
        plan.scored += scored

    # -- helpers -------------------------------------------------------------------------------
    def _reject(self, ident: Any, reason: str, detail: str) -> Rejection:
        self.counters.rejected[reason] = self.counters.rejected.get(reason, 0) + 1
        return Rejection(ident, reason, detail)

    def numbered(self, src: str | None, seq: int | None) -> bool:
        """A message's number: False for a duplicate. A gap counts as lost; a repeat is a
        duplicate. seq 0 from a known producer starts a new numbering (the producer restarted) and
        is neither."""
        if src is None or seq is None:
            return True
        last = self.last_seq.get(src)
        if last is not None and seq != 0:
            if seq <= last:
                return False
            self.counters.lost += seq - last - 1
        if last is not None:
            del self.last_seq[src]  # (put back last: the map runs from the longest silent producer)
        self.last_seq[src] = seq
        if len(self.last_seq) > PRODUCERS_KEPT:
            del self.last_seq[next(iter(self.last_seq))]
            if not self.said_producers:
                self.said_producers = True
                log.warning(
                    "more than %s producers (src) have numbered their messages: the longest silent are forgotten "
                    "(a gap in their numbering is then not counted as lost); a producer names itself anew for "
                    "each message or process?",
                    f"{PRODUCERS_KEPT:,}",
                )
        return True

    def in_sequence(self, numbers: list[tuple[str | None, int | None]]) -> bool:
        """Whether messages so numbered, in order, hold no duplicate (`numbered` would take every
        one); changes nothing."""
        last: dict[str, int] = {}
        for src, seq in numbers:
            if src is None or seq is None:
                continue
            before = last.get(src, self.last_seq.get(src))
            if before is not None and seq != 0 and seq <= before:
                return False
            last[src] = seq
        return True

    def _hold(self, ident: Any, entry: PendingEntry) -> int:
        """Hold a scoring request; returns how many of the oldest were evicted for room."""
        self.pending.pop(ident, None)
        self.pending[ident] = entry
        if self.dropped:
            self.dropped.pop(ident, None)
        if self.joined:
            self.joined.pop(ident, None)
        evicted = 0
        while len(self.pending) > self.pending_limit:
            self._dropped(self.pending.popitem(last=False)[0], "evicted")
            evicted += 1
        self.counters.pending_evicted += evicted
        return evicted

    def _expire(self, now: float) -> int:
        """Drop the held requests past their time-to-live; returns how many."""
        expired = 0
        while self.pending:
            first = next(iter(self.pending.values()))
            if first[E_CLOCK] >= now - self.pending_ttl:
                break
            self._dropped(self.pending.popitem(last=False)[0], "expired")
            expired += 1
        self.counters.pending_expired += expired
        return expired

    def _dropped(self, ident: Any, why: str) -> None:
        dropped = self.dropped
        dropped[ident] = why
        if len(dropped) > DROPPED_KEPT:
            dropped.popitem(last=False)

    def _joined(self, ident: Any) -> None:
        joined = self.joined
        joined[ident] = None
        if len(joined) > JOINED_KEPT:
            joined.popitem(last=False)

    def _unknown(self, ident: Any) -> Rejection:
        """An outcome whose request is not held: said to have come too late when it was dropped."""
        why = self.dropped.get(ident)
        if why == "expired":
            detail = (
                f"the scoring request with id {ident!r} was held for the time-to-live ({self.pending_ttl:g} s)"
                " and dropped before this outcome came"
            )
        elif why == "evicted":
            detail = (
                f"the scoring request with id {ident!r} was pushed out of the pending store, full at"
                f" {self.pending_limit:,} requests, before this outcome came"
            )
        elif ident in self.joined:
            detail = (
                f"the outcome of the scoring request with id {ident!r} was learned already: an outcome is learned once"
            )
        else:
            detail = f"no scoring request with id {ident!r} is held"
        return self._reject(ident, "unknown_outcome", detail)

    # -- state -----------------------------------------------------------------------------------
    def state_dict(self, compact: bool = False) -> dict[str, Any]:
        """The engine's state; `compact` for checkpoints (Learner.state_dict)."""
        c = self.counters
        return {
            "learner": self.learner.state_dict(compact),
            "metrics": self.metrics.state_dict(),
            "pending": self._pending_columns()
            if compact
            else [[k, list(e[E_SLOTS]), held_values(e).tolist(), *e[E_W:]] for k, e in self.pending.items()],
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

    def _pending_columns(self) -> dict[str, Any]:
        """The held requests for a checkpoint, as columns in the store's order: the ids, each
        request's set of slots as an index into the distinct sets, its values end to end (`ends`:
        where each request's end), its weight, score and arrival. A list of lists a request took
        9 s to build and 2.8 s to write at a million held (measured at 200,000: 1.8 and 0.55 s)."""
        n = len(self.pending)
        held = list(self.pending.values())  # (a list a field: zip(*held) took 6 times as long)
        slots = [e[E_SLOTS] for e in held]
        values = [e[E_VALUES] for e in held]
        w, logit, clock = ([e[f] for e in held] for f in (E_W, E_LOGIT, E_CLOCK))
        index: dict[tuple[int, ...], int] = {}  # the distinct sets of slots, in order of first use
        which = np.fromiter((index.setdefault(s, len(index)) for s in slots), np.int64, n)
        shapes = [list(s) for s in index]
        return {
            "keys": list(self.pending),
            "shapes": shapes,
            "shape": which,
            "values": np.frombuffer(b"".join(values), dtype=np.float64),
            "ends": np.cumsum(np.fromiter(map(len, values), np.int64, n)) // 8,
            "w": np.array(w, dtype=np.float64),
            "logit": np.array(logit, dtype=np.float64),
            "clock": np.array(clock, dtype=np.float64),
        }

    def _load_pending_columns(self, p: dict[str, Any]) -> None:
        """The held requests of `_pending_columns`, in order; requests with the same set of slots
        share one tuple (8 bytes a request where a tuple of 20 slots takes 200)."""
        shapes = [tuple(int(j) for j in s) for s in p["shapes"]]
        raw = np.asarray(p["values"], dtype=np.float64).tobytes()
        ends = np.asarray(p["ends"], dtype=np.int64) * 8
        starts = np.concatenate([[0], ends])[:-1].astype(np.int64)
        columns = (p["shape"], starts, ends, p["w"], p["logit"], p["clock"])
        n = len(p["keys"])
        if any(len(c) != n for c in columns) or (n and (ends[-1] != len(raw) or np.any(ends < starts))):
            raise ValueError("the checkpoint's held requests do not fit together")
        which, a, b, w, logit, clock = (np.asarray(c).tolist() for c in columns)
        pending = self.pending
        for k, j, lo, hi, wi, li, ci in zip(p["keys"], which, a, b, w, logit, clock, strict=True):
            pending[k] = (shapes[j], raw[lo:hi], wi, li, ci)

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
        if isinstance(d["pending"], dict):
            eng._load_pending_columns(d["pending"])
        else:
            for k, slots, values, w, logit, clock in d["pending"]:
                eng.pending[k] = pending_entry(slots, values, w, logit, clock)
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
