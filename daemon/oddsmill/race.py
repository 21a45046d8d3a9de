"""A race of candidate learners on one stream; the best one serves.

Every candidate is a full engine (learner, pending outcomes, progressive metrics) fed the same
messages, so each is scored progressively on every labelled event (predict, then learn) and each
equals a single-learner run with its settings, bit for bit. The work that does not depend on the
settings is done once a block: the first candidate's engine checks sequence numbers, encodes the
features into one block and keeps the counters; the candidates share its vocabulary, counters and
sequence numbers, and each runs the kernel over that same block (`Engine.prepare`, `follow`,
`finish`). So the candidates must share `max_features`, the one setting of the encoding. One candidate
serves: its scores are the ones published. Another takes over only when its windowed progressive
log-loss has been better than the serving one's by `margin` (relative) for `patience` labelled
events in a row, checked after every block: no flapping. A switch changes which scores are
published, and nothing in any candidate. The first candidate serves at the start.

Switches are considered after every block. A restarted daemon replays its journal in other blocks
than the live run saw, so after a restart the race may switch a few events earlier or later than
it did live; every candidate's state is exact all the same.

>>> grid = auto_candidates(LearnerSettings())
>>> len(grid), grid[0].name, grid[4].name, grid[10].name
(12, 'eta0=0.5,l2=0.0001', 'eta0=0.125,l2=1e-05', 'eta0=0.125,l2=0.0001,no-average')
"""

from __future__ import annotations

import logging
import math
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from .engine import Engine, Plan, Rejection, Result
from .errors import ConfigError
from .learner import Learner
from .protocol import Item
from .settings import LearnerSettings

log = logging.getLogger("oddsmill")

MAX_CANDIDATES = 16
MARGIN = 0.02  # a challenger must be this much better (relative windowed log-loss) ...
PATIENCE = 2000  # ... for this many labelled events in a row


@dataclass(frozen=True)
class Candidate:
    name: str
    settings: LearnerSettings


def auto_candidates(base: LearnerSettings) -> list[Candidate]:
    """Three initial rates by three L2 strengths around `base` (a quarter, the same, four times the
    rate; a tenth, the same, ten times the L2), then the three rates at `base`'s L2 with averaging
    the other way round (named `,no-average`, or `,average` when `base` averages not). `base` itself
    comes first: it serves at the start. Averaging steadies the weights of a stationary stream and
    lags a drifting one; the grid lets the race choose (the demo's log, a week of snow: 0.470
    against 0.493 for the best of the nine averaged)."""
    out = []
    for eta0 in (base.eta0, base.eta0 / 4, base.eta0 * 4):
        for l2 in (base.l2, base.l2 / 10, base.l2 * 10):
            out.append(Candidate(f"eta0={eta0:g},l2={l2:g}", replace(base, eta0=eta0, l2=l2)))
    other = "no-average" if base.average else "average"
    for eta0 in (base.eta0, base.eta0 / 4, base.eta0 * 4):
        flipped = replace(base, eta0=eta0, average=not base.average)
        out.append(Candidate(f"eta0={eta0:g},l2={base.l2:g},{other}", flipped))
    return out


EARLIER_AUTO = 9  # the auto grid's candidates before its averaging axis: its first nine, in order


def begun_with_earlier_auto(asked: list[Candidate] | tuple[Candidate, ...], held: list[Candidate]) -> bool:
    """Whether `asked` is the auto grid (around its first candidate's settings) and `held`, a
    state's race, is that grid as it was before the averaging axis (its first nine). Such a state
    keeps its nine: `serve --candidates auto` resumes it (before, with twelve asked, the daemon
    would have refused a state it began itself)."""
    return (
        len(held) == EARLIER_AUTO
        and bool(asked)
        and list(asked) == auto_candidates(asked[0].settings)
        and list(asked[:EARLIER_AUTO]) == held
    )


def _run_group(engines: list[Engine], plan: Plan) -> list[np.ndarray]:
    return [e.run(plan) for e in engines]


def default_threads(candidates: int) -> int:
    """Threads for the candidates' kernels: the cores this process may use, at most one a candidate
    and at most four."""
    return max(1, min(candidates, len(os.sched_getaffinity(0)), 4))


def check_candidates(candidates: list[Candidate]) -> None:
    if not 1 <= len(candidates) <= MAX_CANDIDATES:
        raise ConfigError(f"a race has 1 to {MAX_CANDIDATES} candidates, got {len(candidates)}")
    names = [c.name for c in candidates]
    if len(set(names)) != len(names):
        raise ConfigError(f"candidate names must differ, got {names}")
    caps = {c.settings.max_features for c in candidates}
    if len(caps) > 1:
        raise ConfigError(
            f"the candidates of a race share one feature encoding, so one max_features; got {sorted(caps)}"
        )
    for name in names:
        if not name or len(name) > 64 or any(ch in name for ch in '"\\\n'):
            raise ConfigError(f"candidate name {name!r}: 1 to 64 characters, no quotes, backslashes or newlines")


class Race:
    def __init__(
        self,
        candidates: list[Candidate],
        window: int = 10_000,
        pending_limit: int = 1_000_000,
        pending_ttl: float = 7 * 24 * 3600.0,
        margin: float = MARGIN,
        patience: int = PATIENCE,
    ) -> None:
        check_candidates(candidates)
        if not 0 <= margin < 1:
            raise ConfigError(f"margin must be in [0, 1), got {margin!r}")
        if patience < 1:
            raise ConfigError(f"patience must be >= 1, got {patience!r}")
        self.names = [c.name for c in candidates]
        self.engines = [Engine(Learner(c.settings), window, pending_limit, pending_ttl) for c in candidates]
        self._share()
        self.threads = default_threads(len(candidates))
        self._pool: ThreadPoolExecutor | None = None
        self.margin, self.patience = margin, patience
        self.serving = 0
        self.switches: list[dict[str, Any]] = []  # each switch: at which labelled event, from, to, figures
        self.leader: int | None = None  # the challenger now ahead by the margin, and since when
        self.leading_since = 0

    @property
    def engine(self) -> Engine:
        """The serving candidate's engine."""
        return self.engines[self.serving]

    def process(self, items: list[tuple[float, Item]]) -> list[tuple[int, Result]]:
        """Every candidate runs the block; the serving one's results are returned (to publish).
        The block is prepared (checked and encoded) once, by the first candidate's engine."""
        served = self._block(self.engines[0].prepare(items), publish=True)
        assert served is not None
        return served

    def learn(self, items: list[tuple[float, Item]]) -> list[tuple[int, Rejection]]:
        """`process` without the answers: for replays, which publish nothing. Returns the block's
        rejections (the candidates share them: the block is prepared once)."""
        plan = self.engines[0].prepare(items)
        self._block(plan, publish=False)
        return plan.rejections()

    def _block(self, plan: Plan, publish: bool) -> list[tuple[int, Result]] | None:
        """The candidates take a block the first one prepared: each runs and settles it."""
        lead = self.engines[0]
        mirrored = [(plan.holds, plan.joins)] + [e.follow(plan, lead) for e in self.engines[1:]]
        logits = self._run(plan)
        served: list[tuple[int, Result]] | None = None
        for k, e in enumerate(self.engines):
            holds, joins = mirrored[k]
            out = e.settle(plan, holds, joins, logits[k], publish=publish and k == self.serving)
            if out is not None:
                served = out
        self._consider()
        return served

    def _run(self, plan: Plan) -> list[np.ndarray]:
        """Every candidate's kernel over the block. The kernels release the GIL and each candidate's
        state is its own, so they run on `threads` threads at once (this one among them); each
        candidate is still learned in order, so the result does not depend on the threads."""
        engines = self.engines
        plan.segments()  # built here, before any thread reads it
        if self.threads <= 1 or len(engines) == 1 or len(plan.block) == 0:
            return [e.run(plan) for e in engines]
        if self._pool is None:
            self._pool = ThreadPoolExecutor(self.threads - 1, thread_name_prefix="oddsmill-race")
        groups = [engines[g :: self.threads] for g in range(self.threads)]
        futures = [self._pool.submit(_run_group, grp, plan) for grp in groups[1:]]
        done = [_run_group(groups[0], plan)] + [f.result() for f in futures]
        out: list[np.ndarray] = [np.empty(0)] * len(engines)
        for g, results in enumerate(done):
            for i, z in enumerate(results):
                out[g + i * self.threads] = z
        return out

    def _share(self) -> None:
        """The candidates share the first one's vocabulary, counters and sequence numbers."""
        lead = self.engines[0]
        for e in self.engines[1:]:
            if not e.learner.vocab.same_names(lead.learner.vocab):
                raise ValueError("a race's candidates disagree on the vocabulary")
            e.learner.vocab = lead.learner.vocab
            e.counters = lead.counters
            e.last_seq = lead.last_seq

    def score_only(self, items: list[tuple[float, Item]]) -> list[tuple[int, Result]]:
        return self.engine.score_only(items)

    def _consider(self) -> None:
        labelled = self.engine.metrics.count
        windows = [e.metrics.log_loss_window for e in self.engines]
        best = min(range(len(windows)), key=lambda k: windows[k] if math.isfinite(windows[k]) else math.inf)
        current = windows[self.serving]
        ahead = best != self.serving and math.isfinite(current) and windows[best] < current * (1 - self.margin)
        if not ahead:
            self.leader = None
            return
        if self.leader != best:
            self.leader, self.leading_since = best, labelled
            return
        if labelled - self.leading_since >= self.patience:
            record = {
                "at": labelled,
                "from": self.names[self.serving],
                "to": self.names[best],
                "from_log_loss_window": current,
                "to_log_loss_window": windows[best],
            }
            self.switches.append(record)
            log.info(
                "race: %s serves from labelled event %d (recent log-loss %.5f against %.5f for %s)",
                record["to"],
                labelled,
                windows[best],
                current,
                record["from"],
            )
            self.serving, self.leader = best, None

    def table(self) -> list[dict[str, Any]]:
        """Each candidate's figures, the serving one marked."""
        return [
            {
                "candidate": name,
                "serving": k == self.serving,
                "log_loss": e.metrics.log_loss,
                "log_loss_window": e.metrics.log_loss_window,
                "step": e.learner.step,
                "learner": e.learner.settings.to_dict(),
            }
            for k, (name, e) in enumerate(zip(self.names, self.engines, strict=True))
        ]

    def state_dict(self, compact: bool = False) -> dict[str, Any]:
        return {
            "names": list(self.names),
            "engines": [e.state_dict(compact) for e in self.engines],
            "serving": self.serving,
            "switches": list(self.switches),
            "leader": -1 if self.leader is None else self.leader,
            "leading_since": self.leading_since,
            "margin": self.margin,
            "patience": self.patience,
        }

    @classmethod
    def from_state_dict(cls, d: dict[str, Any]) -> Race:
        race = cls.__new__(cls)
        race.names = [str(n) for n in d["names"]]
        race.engines = [Engine.from_state_dict(e) for e in d["engines"]]
        race.margin, race.patience = float(d["margin"]), int(d["patience"])
        race.serving = int(d["serving"])
        race.switches = [dict(s) for s in d["switches"]]
        race.leader = None if int(d["leader"]) < 0 else int(d["leader"])
        race.leading_since = int(d["leading_since"])
        if len(race.names) != len(race.engines) or not 0 <= race.serving < len(race.engines):
            raise ValueError("a race's names, engines and serving index do not agree")
        race._share()
        race.threads = default_threads(len(race.engines))
        race._pool = None
        return race
