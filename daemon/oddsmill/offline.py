"""Offline runs over logs: replay (learn, epoch after epoch) and the data for the reference fit.

Both drive the same `Engine` the daemon uses, so an offline run learns exactly what the daemon
would have learned from the same messages.
"""

from __future__ import annotations

import dataclasses
import sys
import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, replace
from typing import Any, Protocol

import numpy as np

from . import compile_seconds
from . import kernel as K
from .encoding import Block, Rows, encode_features
from .engine import Engine, Rejection
from .errors import InputFileError, OddsmillError, ProtocolError
from .learner import Learner
from .logs import is_journal_record, read_bodies
from .progressive import ProgressiveMetrics
from .protocol import Item, decode_body
from .reference import FitResult, FitWarning, newton_fit
from .settings import LearnerSettings
from .vocabulary import Vocabulary

BLOCK_ITEMS = 4096
CACHE_ENTRIES = 50_000_000  # encoded features kept between epochs (16 bytes each)
NEVER = 2**62  # an average_start no run reaches
# Rejections that belong to the stream (an outcome whose request expired, a resent message), not
# to a malformed file; a replay counts them instead of stopping.
STREAM_REASONS = frozenset({"unknown_outcome", "duplicate"})


@dataclass
class ReplayReport:
    epochs: int
    events: int
    seconds: float  # the replay's, without `compiling`
    compiling: float = 0.0  # seconds spent compiling numba's code on the way (the first run only)


def read_items(paths: list[str]) -> Iterator[tuple[float, Item, str | None]]:
    """Decoded items of every body of `paths`, in order, each with the "file:line" it came from (None
    for a journal record). A malformed line of a file raises InputFileError naming its file and
    line; a journal holds what a daemon received, malformed messages included, and its records are
    rejected and counted again as the daemon did (a warm start from a live daemon's journal must
    not stop at the first message it refused)."""
    for arrival, body, where in read_bodies(paths):
        line = None if is_journal_record(where) else where
        for item in decode_body(body):
            if line is not None:
                _refuse_a_bad_line(item, line)
            yield arrival, item, line


def checked_bodies(bodies: Iterable[tuple[float, Any, str]]) -> Iterator[tuple[float, Any, str]]:
    """The bodies of `read_bodies`, each line of a file checked first as the daemon checks it (its
    fields, then its features' names and values): what `send` sends. A line the daemon would
    refuse raises InputFileError naming it (a journal's records go as they are, since it holds what
    a daemon received, refused messages included)."""
    names = Vocabulary(max_features=1_000_000)  # (as the learner's own: a known set of names is checked fastest)
    for arrival, body, where in bodies:
        if not is_journal_record(where):
            for item in decode_body(body):
                _refuse_a_bad_line(item, where)
                x = getattr(item, "x", None)
                if x is not None:
                    try:
                        encode_features(x, names)
                    except ProtocolError as e:
                        _refuse_a_bad_line(e, where)
        yield arrival, body, where


def _refuse_a_bad_line(item: Item | ProtocolError, line: str) -> None:
    if isinstance(item, ProtocolError) and item.reason not in STREAM_REASONS:
        raise _bad_line(line, item.reason, item.detail)


def _bad_line(where: str, reason: str, detail: str) -> InputFileError:
    path, _, line = where.rpartition(":")
    return InputFileError(path or where, int(line) if line.isdigit() else None, f"{reason}: {detail}")


class Processor(Protocol):
    """An engine, a race, or a server: anything that learns blocks of items (and returns the
    rejections, by the index of the item)."""

    def learn(self, items: list[tuple[float, Item]]) -> list[tuple[int, Rejection]]: ...


def run_logs(
    engine: Processor,
    items: Iterable[tuple[float, Item, str | None]],
    progress: Callable[[int], None] | None = None,
) -> int:
    """Feed items (arrival, item, the "file:line" it came from or None) through `engine` in blocks;
    returns their number. An event of a file that the learner refuses (a feature value it cannot
    take, two features of one name) raises InputFileError naming the line, as a malformed line
    does; what it learned before is left for the caller to drop."""
    batch: list[tuple[float, Any]] = []
    lines: list[str | None] = []
    count = 0

    def flush() -> None:
        nonlocal count
        if batch:
            for n, r in engine.learn(batch):
                line = lines[n]
                if line is not None and r.reason not in STREAM_REASONS:
                    raise _bad_line(line, r.reason, r.detail)
            count += len(batch)
            batch.clear()
            lines.clear()
            if progress:
                progress(count)

    for arrival, item, line in items:
        batch.append((arrival, item))
        lines.append(line)
        if len(batch) >= BLOCK_ITEMS:
            flush()
    flush()
    return count


def nothing_learned(logs: list[str], engine: Engine, messages: int) -> InputFileError | None:
    """The error of logs that taught `engine` no event (None when they taught it one), for the
    commands that begin a state from logs (`replay`, `serve --warm-start`), which then write no
    state: a checkpoint of nothing, served from, would start as cold as no checkpoint while seeming
    warm, and logs without a labelled event are most often the wrong files (the scores' log, or the
    wrong day's)."""
    if engine.learner.step:
        return None
    rejected = engine.counters.rejected
    why = (
        f"; {sum(rejected.values()):,} rejected: " + ", ".join(f"{k} {v:,}" for k, v in sorted(rejected.items()))
        if rejected
        else ""
    )
    return InputFileError(
        " ".join(logs),
        None,
        f"no labelled event to learn from in {messages:,} message(s){why}. A state begins from events "
        "with y; no state was written",
    )


class Progress:
    """A one-line progress display on a terminal; silent otherwise."""

    def __init__(self, engine: Engine, label: str, stream: Any = None) -> None:
        self.engine = engine
        self.label = label
        self.stream = stream or sys.stderr
        self.active = bool(getattr(self.stream, "isatty", lambda: False)())
        self.start = time.monotonic()
        self.last = 0.0

    def __call__(self, items: int) -> None:
        now = time.monotonic()
        if not self.active or now - self.last < 0.25:
            return
        self.last = now
        rate = self.engine.learner.step / max(now - self.start, 1e-9)
        self.stream.write(
            f"\r{self.label}  {self.engine.learner.step:,} learned  {rate:,.0f} events/s"
            f"  log-loss {self.engine.metrics.log_loss:.4f}   "
        )
        self.stream.flush()

    def done(self) -> None:
        if self.active:
            self.stream.write("\n")


def _entries(seg: Block | Rows) -> int:
    """What a kept segment holds, counted as the cache limit counts (values and events)."""
    if isinstance(seg, Rows):
        return int(seg.rows.size) + len(seg)
    return int(seg.idx.shape[0]) + len(seg)


def replay(engine: Engine, paths: list[str], epochs: int, tail_average: bool) -> ReplayReport:
    """Learn from `paths` `epochs` times. With `tail_average`, averaging starts at the first epoch
    of the second half (the learner must have been built with average_start = NEVER).

    The first pass goes through the engine: scores, joins, counters and progressive metrics, exactly
    as the daemon would have seen the stream. Later passes learn the same events in the same order
    again; their scores would be in-sample, so they do not enter the progressive metrics. They rerun
    the first pass's encoded blocks through the kernel when these fit in memory."""
    t0, c0 = time.monotonic(), compile_seconds()
    lr = engine.learner
    blocks: list[list[Block | Rows]] | None = []
    kept = 0
    plain_run = lr.run_segments

    def recording_run(segments: list[Block | Rows]) -> np.ndarray:
        nonlocal blocks, kept
        if blocks is not None:
            kept += sum(_entries(seg) for seg in segments)
            blocks = None if kept > CACHE_ENTRIES else blocks + [segments]
        return plain_run(segments)

    lr.run_segments = recording_run  # type: ignore[method-assign]
    bar = Progress(engine, f"epoch 1/{epochs}")
    try:
        first = run_logs(engine, read_items(paths), bar)
    finally:
        lr.run_segments = plain_run  # type: ignore[method-assign]
    bar.done()
    items = first
    if tail_average:
        lr.set_average_start(lr.step * (epochs // 2))
    for epoch in range(2, epochs + 1):
        bar = Progress(engine, f"epoch {epoch}/{epochs}")
        if blocks is not None:
            for block in blocks:
                plain_run(block)
        else:
            # too large to keep: decode again, with the metrics and counters of the first pass kept
            saved = engine.state_dict()
            run_logs(engine, read_items(paths), bar)
            engine.metrics = ProgressiveMetrics.from_state_dict(saved["metrics"])
            engine.counters = Engine.from_state_dict({**saved, "learner": lr.state_dict()}).counters
        items += first
        bar(0)
        bar.done()
    compiling = compile_seconds() - c0
    return ReplayReport(epochs, items, time.monotonic() - t0 - compiling, compiling)


def new_engine(settings: LearnerSettings, epochs: int, average_start_given: bool, **kw: Any) -> tuple[Engine, bool]:
    """An engine for a replay; tail averaging when epochs > 1 and average_start was not given."""
    tail = settings.average and epochs > 1 and not average_start_given
    if tail:
        settings = replace(settings, average_start=NEVER)
    return Engine(Learner(settings), **kw), tail


@dataclass
class Design:
    """The labelled events of a log in learning order, as a dense raw design matrix."""

    names: list[str]
    X: np.ndarray
    y: np.ndarray
    w: np.ndarray
    scale: np.ndarray
    learner: Learner


# The Newton fit holds every event as a dense row: the design matrix, then the step's copies of it
# (X / scale, Z with its intercept, Z.T weighted). Measured: a fit of 200,000 events x 202 columns
# (323 MB of matrix) peaked at 1.28 GB resident, 3.9 times the matrix (`/usr/bin/time`, 2026-12-03).
FIT_COPIES = 4


def fit_bytes(events: int, features: int) -> int:
    """About the memory a fit of `events` rows over `features` takes at its peak (its matrices;
    the Hessian and its inverse, (features + 1) squared each, too)."""
    return 8 * (FIT_COPIES * events * (features + 1) + 3 * (features + 1) ** 2)


def available_bytes() -> int | None:
    """The memory the system says a process can take without swapping (Linux's MemAvailable), or
    None where it does not say."""
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _size(n: int) -> str:
    return f"{n / 2**30:.1f} GiB" if n >= 2**30 else f"{n / 2**20:.0f} MiB"


def _too_large(events: int, features: int, have: int | None) -> OddsmillError:
    need = _size(fit_bytes(events, features))
    free = "" if have is None else f", and {_size(have)} is available"
    return OddsmillError(
        f"the Newton fit of {events:,} events x {features:,} features needs about {need} of memory{free}:"
        " fit part of the log (the fit holds every event as a dense row)"
    )


def design_from_logs(paths: list[str], settings: LearnerSettings) -> Design:
    """Learn the logs once (one epoch) and record every learned event. The scales are those the
    online learner settled on, so the fit standardises exactly as the learner does."""
    engine = Engine(Learner(settings))
    rows: list[tuple[np.ndarray, np.ndarray]] = []
    ys: list[np.ndarray] = []
    ws: list[np.ndarray] = []
    original = engine.learner.run_segments

    def recording_run(segments: list[Block | Rows]) -> np.ndarray:
        for seg in segments:
            block = seg.as_block() if isinstance(seg, Rows) else seg
            learned = np.nonzero(block.op != K.OP_SCORE)[0]
            for e in learned:
                lo, hi = block.ptr[e], block.ptr[e + 1]
                rows.append((block.idx[lo:hi].copy(), block.val[lo:hi].copy()))
            ys.append(block.y[learned])
            ws.append(block.w[learned])
        return original(segments)

    engine.learner.run_segments = recording_run  # type: ignore[method-assign]
    run_logs(engine, read_items(paths))
    lr = engine.learner
    d = lr.n_features
    have = available_bytes()
    if have is not None and fit_bytes(len(rows), d) > have:  # (before numpy's MemoryError, or the OOM killer)
        raise _too_large(len(rows), d, have)
    X = np.zeros((len(rows), d))
    for i, (idx, val) in enumerate(rows):
        X[i, idx] = val
    _, scale = lr.scales()
    y = np.concatenate(ys) if ys else np.zeros(0)
    w = np.concatenate(ws) if ws else np.zeros(0)
    return Design(list(lr.vocab.names), X, y, w, scale, lr)


def fit_logs(paths: list[str], settings: LearnerSettings) -> tuple[FitResult, Design]:
    design = design_from_logs(paths, settings)
    try:
        fit = newton_fit(design.X, design.y, design.w, design.scale, settings.l2, design.names)
    except MemoryError:  # (the estimate above was short, or the system does not say what is free)
        events, features = design.X.shape
        raise _too_large(events, features, available_bytes()) from None
    full = design.learner.vocab.full_note()
    if full:  # the fit's features are those the vocabulary holds
        fit = dataclasses.replace(fit, warnings=(*fit.warnings, FitWarning("vocabulary_full", (), full)))
    return fit, design
