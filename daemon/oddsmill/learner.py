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
        self._wq = np.zeros(0, dtype=np.int64)
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
        sl = np.zeros((new_cap, self._sl.shape[1]))
        sl[:cap] = self._sl
        sl[cap:, K.R_SCALE] = 1.0
        if self._sl.shape[1] > K.R_LAST:
            sl[cap:, K.R_LAST] = self._sc[K.S_T]
        sl[cap:, K.R_DPOS] = -1.0
        fl = np.zeros(new_cap, dtype=np.uint8)
        fl[:cap] = self._fl
        wq = np.zeros(new_cap, dtype=np.int64)
        wq[:cap] = self._wq
        self._sl, self._fl, self._wq = sl, fl, wq

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
        state = (self._prm, self._sc, self._sl, self._fl, self._cl, self._wq)
        at = 0
        for seg in segments:
            end = at + len(seg)
            if isinstance(seg, Rows):
                K.learn_rows(*state, seg.slots, seg.rows, seg.op, seg.y, out[at:end])
            else:
                K.learn_block(*state, seg.ptr, seg.idx, seg.val, seg.op, seg.y, seg.w, out[at:end])
            at = end
        return out

    def arrays(self) -> tuple[np.ndarray, ...]:
        """The kernel's state (settings, scalars, slot rows, flags, centred list, warm-up queue),
        for compiled callers that run the kernel's steps themselves (quick.py)."""
        return (self._prm, self._sc, self._sl, self._fl, self._cl, self._wq)

    def run_one(self, slots: Sequence[int], values: Sequence[float], op: int, y: float, w: float) -> float:
        """`run` over a block of one event (kernel.learn_event); returns its published logit."""
        idx = np.array(slots, dtype=np.int64)
        val = np.array(values, dtype=np.float64)
        z: float = K.learn_event(self._prm, self._sc, self._sl, self._fl, self._cl, self._wq, idx, val, op, y, w)
        return z

    def run_rows(self, slots: Sequence[int], rows: np.ndarray, y: np.ndarray) -> np.ndarray:
        """`run` over training events that share their slots (row e: the values rows[e] at `slots`,
        label y[e], weight 1), as a columnar block's rows run (kernel.learn_rows)."""
        m = rows.shape[0]
        out = np.empty(m)
        op = np.full(m, K.OP_TRAIN, dtype=np.int8)
        idx = np.array(slots, dtype=np.int64)
        K.learn_rows(self._prm, self._sc, self._sl, self._fl, self._cl, self._wq, idx, rows, op, y, out)
        return out

    def score(self, block: Block) -> np.ndarray:
        """Logits of a block's events with the current state; changes nothing."""
        out = np.empty(len(block))
        K.score_block(self._prm, self._sc, self._sl, self._fl, self._cl, block.ptr, block.idx, block.val, out)
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
        centred = (self._fl[:n] & K.F_CENTERED) != 0
        return np.where(centred, self._sl[:n, K.R_MEAN], 0.0), self._sl[:n, K.R_SCALE].copy()

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
    def state_dict(self) -> dict[str, Any]:
        n = len(self.vocab)
        return {
            "settings": self._settings.to_dict(),
            **self.vocab.state(),  # the names: their UTF-8 bytes end to end, and where each ends
            "ignored": self.vocab.ignored,
            "scalars": self._sc.copy(),
            "slots": self._sl[:n].copy(),
            "slot_order": 2,  # kernel.R_* (1, or absent: OLD_ROW_ORDER)
            "flags": self._fl[:n].copy(),
            "centred_list": self._cl.copy(),
            "warmup_queue": self._wq[: int(self._sc[K.S_QLEN])].copy(),
        }

    @classmethod
    def from_state_dict(cls, d: dict[str, Any]) -> Learner:
        lr = cls(LearnerSettings.from_dict(dict(d["settings"])))
        lr.vocab = Vocabulary.from_state(lr._settings.max_features, d)
        lr.vocab.ignored = int(d["ignored"])
        lr._sc = np.array(d["scalars"], dtype=np.float64)
        lr._nslots = int(lr._sc[K.S_NSLOTS])
        n = len(lr.vocab)
        lr._grow(n)
        slots = np.asarray(d["slots"], dtype=np.float64)
        if int(d.get("slot_order", 1)) == 1:  # written before AdaGrad's columns came last
            slots = slots[:, list(K.OLD_ROW_ORDER)]
        lr._sl[:n] = slots[:, : lr._sl.shape[1]]
        lr._fl[:n] = d["flags"]
        lr._cl = np.array(d["centred_list"], dtype=np.int64)
        queue = np.asarray(d["warmup_queue"], dtype=np.int64)
        lr._wq[: queue.shape[0]] = queue
        return lr
