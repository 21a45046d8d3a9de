"""The online logistic learner (PROTOCOL 5): settings, state, and the calls the engine makes.

The state is a few private arrays behind read-only properties; the compiled kernel
(`oddsmill.kernel`) is the only code that changes them. Scoring never changes state.

>>> lr = Learner(LearnerSettings(schedule="constant", eta0=0.1, average=False, scaling="none"))
>>> round(lr.learn_one({"route_km": 1.0}, 1), 6)   # the score published before learning
0.0
>>> round(lr.predict_logit({"route_km": 1.0}), 6)
0.1
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import kernel as K
from .encoding import Block, BlockBuilder, Rows, encode_features
from .schedules import CODES, rate
from .settings import LearnerSettings
from .vocabulary import Vocabulary

INITIAL_SLOTS = 64
# A slot's full row, as checkpoints hold it (slot_order 2): every statistic written out, whatever
# the kernel keeps in memory (a short row, and a detail row only where the statistics are not
# implied). X_FIRST is the step a slot was first learned while its warm-up window is open or once
# it is centred, else 0 (not needed then); X_DPOS is -1 unless it is centred.
X_V, X_U, X_MEAN, X_M2, X_COUNT, X_SCALE, X_FIRST, X_DPOS, X_SUM, X_G, X_LAST = range(11)
FULL_ROW, FULL_ROW_GLOBAL = 11, 9  # AdaGrad's, the global schedules'
# where each column was in the rows of checkpoints written before slot_order 2 (all 11 columns)
OLD_ROW_ORDER = (0, 1, 4, 5, 6, 7, 8, 9, 10, 2, 3)
# the full row's columns a detail row holds as they are (D_FIRST only while a slot is centred)
DETAIL_COLUMNS = (
    (X_MEAN, K.D_MEAN),
    (X_M2, K.D_M2),
    (X_COUNT, K.D_COUNT),
    (X_SCALE, K.D_SCALE),
    (X_DPOS, K.D_DPOS),
    (X_SUM, K.D_SUM),
)


MMAP_THRESHOLD = 1 << 20  # bytes: allocations this large get pages of their own (glibc)


def give_back_large_frees() -> bool:
    """Have glibc's allocator map every allocation of MMAP_THRESHOLD bytes or more on pages of
    its own, returned to the system when freed. The state's and the vocabulary's arrays grow by
    doubling; with glibc's own threshold (which rises to 32 MiB as large blocks are freed), the
    grown arrays come from the heap, and the copies they replace stay there as free memory the
    process keeps: 64 bytes a slot resident at a million slots against 57 to 58 with this
    (measured, scripts/memory_per_slot.py). `oddsmill serve` calls it at start; False where there is no
    glibc (the process then keeps its allocator as it is)."""
    return _mallopt(-3, MMAP_THRESHOLD)  # M_MMAP_THRESHOLD (<malloc.h>)


def _mallopt(param: int, value: int) -> bool:
    """glibc's mallopt(param, value): whether it took it (False where there is no glibc)."""
    import ctypes
    import ctypes.util

    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    return bool(mallopt(param, value))


TRIM_THRESHOLD = 1 << 30  # bytes of free memory at the top of a heap that glibc keeps (M_TRIM_THRESHOLD)


def keep_freed_heap() -> bool:
    """Have glibc keep the free memory at the top of its heaps, up to TRIM_THRESHOLD, for the
    allocations that follow, rather than hand it back to the system whenever it passes 128 KiB.
    Under columnar load the loop keeps the bodies of the journal's records until an fsync covers
    them (up to a segment of 64 MiB), and ZeroMQ's I/O thread holds its queue of messages: each
    release gave those pages back, and the next allocations faulted them in again, a page at a
    time, zeroed (perf: the kernel's clear_page and page faults, 5% to 10% of the loop's
    samples). The cost: memory freed after a burst stays with the process, up to what the burst
    needed. (glibc's M_TOP_PAD at 64 MiB as well took scripts/memory_per_slot.py's resident
    memory from 58 to 88 bytes a slot; this alone, 57 to 60.) `oddsmill serve` calls it at start.
    False where there is no glibc."""
    return _mallopt(-1, TRIM_THRESHOLD)  # M_TRIM_THRESHOLD (<malloc.h>)


def row_width(s: LearnerSettings) -> int:
    """Columns of a slot's row: AdaGrad keeps two more (kernel.R_G, kernel.R_LAST)."""
    return K.N_ROWS if s.schedule == "adagrad" else K.N_ROWS_GLOBAL


def settings_record(s: LearnerSettings) -> np.ndarray:
    """The kernel's settings record."""
    prm = np.zeros(K.N_PARAMS)
    prm[K.P_SCHED] = CODES[s.schedule]
    prm[K.P_ETA0] = s.eta0
    prm[K.P_L2] = s.l2
    prm[K.P_A] = s.decay_a
    prm[K.P_C] = s.power
    prm[K.P_DELTA] = s.adagrad_delta
    prm[K.P_AVG] = 1.0 if s.average else 0.0
    prm[K.P_AVG_START] = s.average_start
    prm[K.P_SCALING] = 1.0 if s.scaling == "standardize" else 0.0
    prm[K.P_WARMUP] = s.scale_warmup
    prm[K.P_MAX_CENTRED] = s.max_centred if s.scaling == "standardize" else 0
    prm[K.P_QUIET_RUNS] = 1.0  # 0 runs every event in kernel._event (the tests compare the two)
    return prm


@dataclass(frozen=True)
class Coefficients:
    """The model in the units the features were sent: logit = intercept + sum of coef x value."""

    intercept: float
    names: list[str]
    coefs: np.ndarray

    def as_dict(self) -> dict[str, float]:
        return dict(zip(self.names, self.coefs.tolist(), strict=True))


class Learner:
    """SGD on the log-likelihood with L2, one of four schedules and optional averaging."""

    def __init__(self, settings: LearnerSettings | None = None) -> None:
        self._settings = settings or LearnerSettings()
        self._prm = settings_record(self._settings)
        self.vocab = Vocabulary(self._settings.max_features)
        self._sc = np.zeros(K.N_SCALARS)
        self._sc[K.S_WS] = 1.0
        self._nslots = 0  # sc[S_NSLOTS] as a Python int: read on every event, where numpy's scalar costs 1.6 us
        self._sl = np.zeros((0, row_width(self._settings)))
        self._fl = np.zeros(0, dtype=np.uint8)
        self._cl = np.zeros(self._settings.max_centred, dtype=np.int64)
        self._wq = np.zeros((0, 2))  # the warm-up queue: (slot, first step) of each open window
        self._dt = np.zeros((0, K.N_DETAIL))
        self._spare = 0  # kernel.S_NDETAIL and S_QLEN can grow this much more before _room looks
        self._grow(INITIAL_SLOTS)

    # -- read-only views -------------------------------------------------------------------------
    @property
    def settings(self) -> LearnerSettings:
        return self._settings

    @property
    def step(self) -> int:
        """Events learned so far."""
        return int(self._sc[K.S_T])

    @property
    def n_features(self) -> int:
        return len(self.vocab)

    @property
    def renormalisations(self) -> int:
        return int(self._sc[K.S_RENORMS])

    def set_average_start(self, step: int) -> None:
        """Move the start of averaging; only before it has begun (used by multi-epoch replays)."""
        if self._sc[K.S_NAVG] > 0 or step < self.step:
            raise ValueError(f"averaging cannot start at {step}: it has begun or the step is past")
        from dataclasses import replace

        self._settings = replace(self._settings, average_start=step)
        self._prm = settings_record(self._settings)

    def learning_rate(self) -> float:
        """eta_t for the next step (for AdaGrad, the intercept's rate)."""
        if self._settings.schedule == "adagrad":
            return rate(self._settings, self.step, float(self._sc[K.S_GB]))
        return rate(self._settings, self.step)

    # -- encoding ----------------------------------------------------------------------------------
    def _grow(self, needed: int) -> None:
        cap = self._sl.shape[0]
        if needed <= cap:
            return
        new_cap = max(needed, 2 * cap, INITIAL_SLOTS)
        # A new row is all zeros, which the kernel reads as never learned (memory the system gives
        # as zeros, not touched until a slot is used). AdaGrad's R_LAST of 0 is not a step the
        # slot was caught up at, but a coefficient of 0 needs no catching up from any step.
        sl = np.zeros((new_cap, self._sl.shape[1]))
        sl[:cap] = self._sl
        fl = np.zeros(new_cap, dtype=np.uint8)
        fl[:cap] = self._fl
        self._sl, self._fl = sl, fl

    def _room(self, n: int) -> None:
        """Room for a call of the kernel over n feature values: each may give its slot a detail
        row (and the centred set may take up to max_centred), and each may open a warm-up window.
        The queue drops its closed windows first, and grows only when half of it is open ones."""
        if n <= self._spare:
            self._spare -= n
            return
        sc = self._sc
        used = int(sc[K.S_NDETAIL])
        need = used + n + self._settings.max_centred
        if need > self._dt.shape[0]:
            dt = np.zeros((max(need, 2 * self._dt.shape[0], INITIAL_SLOTS), K.N_DETAIL))
            dt[:used] = self._dt[:used]
            self._dt = dt
        head, qlen = int(sc[K.S_QHEAD]), int(sc[K.S_QLEN])
        if qlen + n > self._wq.shape[0]:
            live = qlen - head
            cap = self._wq.shape[0]
            if 2 * (live + n) > cap:
                wq = np.zeros((max(2 * (live + n), 2 * cap, INITIAL_SLOTS), 2))
                wq[:live] = self._wq[head:qlen]
                self._wq = wq
            else:
                self._wq[:live] = self._wq[head:qlen]  # (numpy copies overlapping ranges as if buffered)
            sc[K.S_QHEAD], sc[K.S_QLEN] = 0.0, float(live)
        free_rows = self._dt.shape[0] - self._settings.max_centred - int(sc[K.S_NDETAIL])
        self._spare = min(free_rows, self._wq.shape[0] - int(sc[K.S_QLEN])) - n

    def encode(
        self, x: Mapping[str, Any], grow: bool = True, event_id: object = None
    ) -> tuple[Sequence[int], list[float]]:
        """Slots and raw values of an event's features; new names get slots when `grow`."""
        slots, values, created = encode_features(x, self.vocab, grow, event_id)
        if created or len(self.vocab) > self._nslots:
            self._grow(len(self.vocab))
            for j in created:
                self._fl[j] |= K.F_NUMERIC
            self._nslots = len(self.vocab)
            self._sc[K.S_NSLOTS] = self._nslots
        return slots, values

    def follow_vocabulary(self, leader: Learner) -> None:
        """Take the slots `leader` created in the vocabulary this learner shares with it (a race's
        candidates encode once): the same capacity, grown at the same step, and the same numeric
        flags, so the state is what encoding the events itself would have left."""
        if self.vocab is not leader.vocab:
            raise ValueError("follow_vocabulary needs the leader's own vocabulary object")
        n = len(self.vocab)
        old = self._nslots
        if n <= old:
            return
        self._grow(leader._sl.shape[0])
        self._fl[old:n] |= leader._fl[old:n] & K.F_NUMERIC
        self._nslots = n
        self._sc[K.S_NSLOTS] = n

    # -- the kernel ------------------------------------------------------------------------------
    def run(self, block: Block) -> np.ndarray:
        """Score and learn a block in order (kernel.learn_block); returns the published logits."""
        return self.run_segments([block])

    def run_segments(self, segments: list[Block | Rows]) -> np.ndarray:
        """`run` over segments in order (CSR blocks, and the rows of columnar blocks as they are)."""
        out = np.empty(sum(len(s) for s in segments))
        at = 0
        for seg in segments:
            end = at + len(seg)
            if isinstance(seg, Rows):
                self._room(seg.slots.shape[0])
                state = (self._prm, self._sc, self._sl, self._fl, self._cl, self._wq, self._dt)
                K.learn_rows(*state, seg.slots, seg.rows, seg.op, seg.y, out[at:end])
            else:
                self._room(seg.idx.shape[0])
                state = (self._prm, self._sc, self._sl, self._fl, self._cl, self._wq, self._dt)
                K.learn_block(*state, seg.ptr, seg.idx, seg.val, seg.op, seg.y, seg.w, out[at:end])
            at = end
        return out

    def arrays(self, k: int) -> tuple[np.ndarray, ...]:
        """The kernel's state (settings, scalars, slot rows, flags, centred list, warm-up queue,
        detail rows) with room for a call over events of k slots, for compiled callers that run
        the kernel's steps themselves (quick.py)."""
        self._room(k)
        return (self._prm, self._sc, self._sl, self._fl, self._cl, self._wq, self._dt)

    def run_one(self, slots: Sequence[int], values: Sequence[float], op: int, y: float, w: float) -> float:
        """`run` over a block of one event (kernel.learn_event); returns its published logit."""
        idx = np.array(slots, dtype=np.int64)
        val = np.array(values, dtype=np.float64)
        self._room(idx.shape[0])
        z: float = K.learn_event(
            self._prm, self._sc, self._sl, self._fl, self._cl, self._wq, self._dt, idx, val, op, y, w
        )
        return z

    def run_rows(self, slots: Sequence[int] | np.ndarray, rows: np.ndarray, y: np.ndarray) -> np.ndarray:
        """`run` over training events that share their slots (row e: the values rows[e] at `slots`,
        label y[e], weight 1), as a columnar block's rows run (kernel.learn_rows)."""
        m = rows.shape[0]
        out = np.empty(m)
        op = np.full(m, K.OP_TRAIN, dtype=np.int8)
        idx = np.array(slots, dtype=np.int64)
        self._room(idx.shape[0])
        K.learn_rows(self._prm, self._sc, self._sl, self._fl, self._cl, self._wq, self._dt, idx, rows, op, y, out)
        return out

    def score(self, block: Block) -> np.ndarray:
        """Logits of a block's events with the current state; changes nothing."""
        out = np.empty(len(block))
        K.score_block(self._prm, self._sc, self._sl, self._fl, self._cl, self._dt, block.ptr, block.idx, block.val, out)
        return out

    # -- conveniences for one event ------------------------------------------------------------
    def learn_one(self, x: Mapping[str, Any], y: float, w: float = 1.0) -> float:
        """Score, then learn one event; returns the logit published before learning."""
        b = BlockBuilder()
        slots, values = self.encode(x)
        b.add(slots, values, K.OP_TRAIN, float(y), float(w))
        return float(self.run(b.build())[0])

    def predict_logit(self, x: Mapping[str, Any]) -> float:
        b = BlockBuilder()
        slots, values = self.encode(x, grow=False)
        b.add(slots, values, K.OP_SCORE, 0.0, 1.0)
        return float(self.score(b.build())[0])

    def predict_proba(self, x: Mapping[str, Any]) -> float:
        return float(K.sigmoid(self.predict_logit(x)))

    # -- the model in raw units ------------------------------------------------------------------
    def uses_average(self) -> bool:
        return self._settings.average and self._sc[K.S_NAVG] > 0

    def standardised(self, averaged: bool | None = None) -> tuple[float, np.ndarray]:
        """(intercept in centred coordinates, theta in standardised units), slot order."""
        avg = self.uses_average() if averaged is None else averaged
        n = len(self.vocab)
        sl, sc = self._sl[:n], self._sc
        if self._settings.schedule == "adagrad":
            theta = np.array([K._ada_lag(self._prm, sc, self._sl, j)[1 if avg else 0] for j in range(n)])
            if avg:
                theta = theta / sc[K.S_NAVG]
        elif avg:
            theta = (sl[:, K.R_U] + sc[K.S_A] * sl[:, K.R_V]) / sc[K.S_NAVG]
        else:
            theta = sc[K.S_WS] * sl[:, K.R_V]
        b = sc[K.S_SB] / sc[K.S_NAVG] if avg else sc[K.S_B]
        return float(b), theta

    def scales(self) -> tuple[np.ndarray, np.ndarray]:
        """(centre, scale) of each slot: x_std = (x - centre) / scale."""
        n = len(self.vocab)
        fl = self._fl[:n]
        centre, scale = np.zeros(n), np.ones(n)
        det = np.flatnonzero(fl & K.F_DETAIL)
        rows = self._dt[self._sl[det, K.R_AUX].astype(np.int64)]
        scale[det] = rows[:, K.D_SCALE]
        centre[det] = np.where((fl[det] & K.F_CENTERED) != 0, rows[:, K.D_MEAN], 0.0)
        return centre, scale

    def coefficients(self, averaged: bool | None = None) -> Coefficients:
        """The model in the units the features were sent (the averaged weights when averaging)."""
        intercept, coefs, _ = self._raw_coefficients(averaged)
        return Coefficients(intercept, self.vocab.names, coefs)

    def _raw_coefficients(self, averaged: bool | None = None) -> tuple[float, np.ndarray, np.ndarray]:
        """(intercept, coefficients, scales) in the units the features were sent, slot order."""
        b, theta = self.standardised(averaged)
        centre, scale = self.scales()
        coefs = theta / scale
        return float(b - np.sum(coefs * centre)), coefs, scale

    def top_coefficients(self, k: int) -> tuple[float, list[dict[str, float | str]]]:
        """(intercept, the `k` coefficients of largest effect), largest first. The effect is the
        change in log-odds for one standard deviation of a numeric feature (for a category or a
        flag, its coefficient), so a feature sent in grams does not win or lose by its units."""
        intercept, coefs, scale = self._raw_coefficients()  # (the names of the top k only)
        signed = coefs * scale
        effect = np.abs(signed)
        if k < effect.size:
            part = np.argpartition(-effect, k)[:k]
            order = part[np.argsort(-effect[part], kind="stable")]
        else:
            order = np.argsort(-effect, kind="stable")
        return intercept, [
            {
                "feature": self.vocab.name(j),
                "coef": float(coefs[j]),
                "odds_ratio": math.exp(min(float(coefs[j]), 709.0)),
                "effect": float(signed[j]),
            }
            for j in order.tolist()
        ]

    # -- state for checkpoints -------------------------------------------------------------------
    def _full_rows(self) -> np.ndarray:
        """Each slot's full row (X_*): the short row's sums, the statistics a count implies or the
        detail row holds, and the first step of an open warm-up window from the queue."""
        n = len(self.vocab)
        width = FULL_ROW if self._settings.schedule == "adagrad" else FULL_ROW_GLOBAL
        sl, fl = self._sl[:n], self._fl[:n]
        full = np.zeros((n, width))
        full[:, X_V], full[:, X_U] = sl[:, K.R_V], sl[:, K.R_U]
        if width == FULL_ROW:
            full[:, X_G], full[:, X_LAST] = sl[:, K.R_G], sl[:, K.R_LAST]
        det = (fl & K.F_DETAIL) != 0
        count = np.where(det, 0.0, sl[:, K.R_AUX])
        full[:, X_MEAN] = count > 0.0
        full[:, X_COUNT] = np.minimum(count, self._settings.scale_warmup)
        full[:, X_SCALE] = 1.0
        full[:, X_DPOS] = -1.0
        full[:, X_SUM] = count
        rows = self._dt[sl[det, K.R_AUX].astype(np.int64)]
        for x, d in DETAIL_COLUMNS:
            full[det, x] = rows[:, d]
        centred = (fl & K.F_CENTERED) != 0
        full[centred, X_FIRST] = self._dt[sl[centred, K.R_AUX].astype(np.int64), K.D_FIRST]
        open_ = self._wq[int(self._sc[K.S_QHEAD]) : int(self._sc[K.S_QLEN])]
        full[open_[:, 0].astype(np.int64), X_FIRST] = open_[:, 1]
        return full

    def state_dict(self, compact: bool = False) -> dict[str, Any]:
        """The state with every statistic written out (full rows, the open warm-up windows): two
        learners that learned the same events hold the same dict, however their detail rows were
        laid out and their queue compacted. `compact` (checkpoints) keeps the short rows instead,
        with a detail row only for the slots whose statistics their count does not imply, in slot
        order (`slot_order` 3): as canonical, and a third of the bytes at a million ids."""
        n = len(self.vocab)
        scalars = self._sc[: K.N_SCALARS_SAVED].copy()
        head, qlen = int(self._sc[K.S_QHEAD]), int(self._sc[K.S_QLEN])
        scalars[K.S_QHEAD], scalars[K.S_QLEN] = 0.0, float(qlen - head)
        d = {
            "settings": self._settings.to_dict(),
            **self.vocab.state(),  # the names: their UTF-8 bytes end to end, and where each ends
            "ignored": self.vocab.ignored,
            "scalars": scalars,
            "centred_list": self._cl.copy(),
            "warmup_queue": self._wq[head:qlen, 0].astype(np.int64),
        }
        if not compact:
            return {**d, "slots": self._full_rows(), "slot_order": 2, "flags": self._fl[:n] & ~K.F_DETAIL}
        short, flags = self._sl[:n].copy(), self._fl[:n].copy()
        det = np.flatnonzero(flags & K.F_DETAIL)
        rows = self._dt[short[det, K.R_AUX].astype(np.int64)]
        centred = (flags[det] & K.F_CENTERED) != 0
        stats = (rows[:, K.D_MEAN], rows[:, K.D_M2], rows[:, K.D_COUNT], rows[:, K.D_SCALE], rows[:, K.D_SUM])
        keep = ~implied_by_count(*stats, centred, self._settings.scale_warmup)
        short[det[~keep], K.R_AUX] = rows[~keep, K.D_SUM]  # its count
        flags[det[~keep]] &= ~K.F_DETAIL
        det, rows, centred = det[keep], rows[keep], centred[keep]
        rows[~centred, K.D_FIRST] = 0.0
        short[det, K.R_AUX] = np.arange(det.shape[0])
        return {
            **d,
            "slots": short,
            "slot_order": 3,  # kernel.R_* and D_*
            "flags": flags,
            "details": rows,
            "warmup_first": self._wq[head:qlen, 1].copy(),
        }

    @classmethod
    def from_state_dict(cls, d: dict[str, Any]) -> Learner:
        lr = cls(LearnerSettings.from_dict(dict(d["settings"])))
        lr.vocab = Vocabulary.from_state(lr._settings.max_features, d)
        lr.vocab.ignored = int(d["ignored"])
        sc = np.zeros(K.N_SCALARS)
        saved = np.asarray(d["scalars"], dtype=np.float64)[: K.N_SCALARS_SAVED]
        sc[: saved.shape[0]] = saved
        lr._sc = sc
        lr._nslots = int(sc[K.S_NSLOTS])
        n = len(lr.vocab)
        lr._grow(n)
        lr._cl = np.array(d["centred_list"], dtype=np.int64)
        queue = np.asarray(d["warmup_queue"], dtype=np.int64)[int(sc[K.S_QHEAD]) : int(sc[K.S_QLEN])]
        order = int(d.get("slot_order", 1))
        if order == 3:
            lr._load_short(n, d, queue)
        else:
            lr._load_full(n, d, order, queue)
        sc[K.S_QHEAD], sc[K.S_QLEN] = 0.0, float(queue.shape[0])
        lr._spare = 0
        return lr

    def _load_short(self, n: int, d: dict[str, Any], queue: np.ndarray) -> None:
        """The state of `state_dict(compact=True)`."""
        short = np.asarray(d["slots"], dtype=np.float64)
        fl = np.asarray(d["flags"], dtype=np.uint8)
        rows = np.asarray(d["details"], dtype=np.float64).reshape(-1, K.N_DETAIL)
        first = np.asarray(d["warmup_first"], dtype=np.float64)
        det = np.flatnonzero(fl & K.F_DETAIL)
        if (
            short.shape != (n, self._sl.shape[1])
            or fl.shape != (n,)
            or rows.shape[0] != det.shape[0]
            or first.shape != queue.shape
            or not np.array_equal(short[det, K.R_AUX], np.arange(det.shape[0]))
        ):
            raise ValueError("the checkpoint's slots, flags, details and warm-up queue do not fit each other")
        self._sl[:n], self._fl[:n] = short, fl
        self._dt = np.zeros((max(det.shape[0] + self._settings.max_centred, INITIAL_SLOTS), K.N_DETAIL))
        self._dt[: det.shape[0]] = rows
        self._sc[K.S_NDETAIL] = det.shape[0]
        self._wq = np.zeros((max(2 * queue.shape[0], INITIAL_SLOTS), 2))
        self._wq[: queue.shape[0], 0], self._wq[: queue.shape[0], 1] = queue, first

    def _load_full(self, n: int, d: dict[str, Any], order: int, queue: np.ndarray) -> None:
        """Full rows (`state_dict()`, and every checkpoint before `slot_order` 3): a detail row for
        each slot whose statistics its count does not imply, in slot order."""
        rows = np.asarray(d["slots"], dtype=np.float64)
        if order == 1:  # written before AdaGrad's columns came last
            rows = rows[:, list(OLD_ROW_ORDER)]
        fl = np.asarray(d["flags"], dtype=np.uint8) & ~K.F_DETAIL
        sl = self._sl
        sl[:n, K.R_V], sl[:n, K.R_U] = rows[:, X_V], rows[:, X_U]
        if sl.shape[1] == K.N_ROWS:
            sl[:n, K.R_G], sl[:n, K.R_LAST] = rows[:, X_G], rows[:, X_LAST]
        total = rows[:, X_SUM]
        cols = (rows[:, X_MEAN], rows[:, X_M2], rows[:, X_COUNT], rows[:, X_SCALE], total)
        implied = implied_by_count(*cols, (fl & K.F_CENTERED) != 0, self._settings.scale_warmup)
        det = np.flatnonzero(~implied)
        sl[:n, K.R_AUX] = np.where(implied, total, 0.0)
        sl[det, K.R_AUX] = np.arange(det.shape[0])
        fl[det] |= K.F_DETAIL
        self._fl[:n] = fl
        self._dt = np.zeros((max(det.shape[0] + self._settings.max_centred, INITIAL_SLOTS), K.N_DETAIL))
        for x, c in DETAIL_COLUMNS:
            self._dt[: det.shape[0], c] = rows[det, x]
        self._dt[: det.shape[0], K.D_FIRST] = np.where((fl[det] & K.F_CENTERED) != 0, rows[det, X_FIRST], 0.0)
        self._sc[K.S_NDETAIL] = det.shape[0]
        self._wq = np.zeros((max(2 * queue.shape[0], INITIAL_SLOTS), 2))
        self._wq[: queue.shape[0], 0] = queue
        self._wq[: queue.shape[0], 1] = rows[queue, X_FIRST]


def implied_by_count(
    mean: np.ndarray,
    m2: np.ndarray,
    count: np.ndarray,
    scale: np.ndarray,
    total: np.ndarray,
    centred: np.ndarray,
    warmup: int,
) -> np.ndarray:
    """Which slots need no detail row: not centred, and statistics that are, bit for bit, what
    their learned values of 1 imply (the sum a whole count n, mean 1 or 0 when n is 0, M2 0,
    count min(n, warm-up), scale 1; kernel._promote writes them)."""
    expected_mean = np.where(total > 0.0, 1.0, 0.0).view(np.int64)
    implied: np.ndarray = (
        ~centred
        & (total >= 0.0)
        & (total == np.floor(total))
        & (count == np.minimum(total, warmup))
        & (mean.view(np.int64) == expected_mean)
        & (m2.view(np.int64) == 0)
        & (scale.view(np.int64) == np.float64(1.0).view(np.int64))
    )
    return implied
