"""The slot layout: a short row a slot, and a detail row only for the slots whose warm-up
statistics are not implied by their count (kernel.py, "Every slot has a short row"). A learner
that gives every learned slot a detail row at once (P_DETAIL_ALL: what every slot had before)
must publish the same logits and reach the same state, bit for bit; the layout may only change
the memory. The dense oracle (tests/oracle.py) and the outside references check the arithmetic
itself elsewhere (test_learner.py, test_quiet_runs.py, test_reference.py)."""

from __future__ import annotations

import random

import numpy as np
import pytest
from oddsmill import kernel as K
from oddsmill.encoding import BlockBuilder
from oddsmill.learner import Learner
from oddsmill.settings import LearnerSettings

SETTINGS = {
    "defaults": LearnerSettings(),
    "short warm-up, few centred": LearnerSettings(scale_warmup=6, max_centred=3),
    "adagrad": LearnerSettings(schedule="adagrad", scale_warmup=8),
    "inverse-time, strong L2 (folds)": LearnerSettings(
        schedule="inverse-time", eta0=0.5, l2=0.05, scale_warmup=9, average_start=50
    ),
    "constant, no averaging": LearnerSettings(schedule="constant", eta0=0.05, average=False),
    "no scaling": LearnerSettings(scaling="none"),
}


def courier_events(n: int, seed: int) -> list[tuple[dict[str, object], float, int, float]]:
    """Invented parcel events (x, y, op, w): parcel and customer ids (one-hot, most seen once),
    numeric features, 0/1 flags, a feature sent as 1.0 for a while and then with other values,
    a numeric feature whose name is also a one-hot's, and runs of one name set (quiet runs)."""
    rnd = random.Random(seed)
    out: list[tuple[dict[str, object], float, int, float]] = []
    for i in range(n):
        kind = rnd.random()
        if kind < 0.3:  # a run's name set, in order
            x: dict[str, object] = {"route_km": rnd.gauss(40, 15), "stops_before": float(rnd.randint(0, 9))}
            x["express"] = 1.0
        else:
            x = {f"parcel{f}": f"P{rnd.randint(0, 400 if f else 40_000):06d}" for f in range(rnd.randint(1, 4))}
            x["depot"] = rnd.choice(["Harbourside", "Millbrook", "Eastgate"])
            if rnd.random() < 0.5:
                x["weight_g"] = rnd.lognormvariate(7, 1)
            if rnd.random() < 0.4:
                x["fragile"] = float(rnd.random() < 0.3)  # 1.0 or 0.0
            if rnd.random() < 0.3:
                x["signature_needed"] = 1.0 if i < n // 2 else rnd.choice([1.0, 2.0, 0.5])
            if rnd.random() < 0.05:  # the one-hot's slot, sent as a number (in an event without a depot)
                del x["depot"]
                x["depot=Millbrook"] = rnd.choice([1.0, 3.0])
        y = float(rnd.random() < 0.3 + 0.2 * ("express" in x))
        op = rnd.choice([K.OP_TRAIN] * 8 + [K.OP_SCORE, K.OP_LEARN])
        out.append((x, y, op, rnd.choice([1.0, 1.0, 0.5])))
    return out


def learn(lr: Learner, events: list[tuple[dict[str, object], float, int, float]], seed: int) -> np.ndarray:
    """Blocks of 1 to 60 events (so quiet runs happen), and now and then a columnar block."""
    rnd = random.Random(seed)
    out = []
    i = 0
    while i < len(events):
        b = BlockBuilder()
        for x, y, op, w in events[i : i + rnd.choice([1, 1, 3, 8, 60])]:
            slots, values = lr.encode(x)
            b.add(slots, values, op, y, w)
            i += 1
        if rnd.random() < 0.1:
            slots, _ = lr.encode({"route_km": 1.0, "stops_before": 1.0, "express": 1.0})
            m = rnd.randint(1, 30)
            rows = np.column_stack([[rnd.gauss(40, 15) for _ in range(m)], np.ones(m), np.ones(m)])
            b.add_rows(np.array(slots), rows, np.full(m, K.OP_TRAIN, np.int8), np.ones(m) * (rnd.random() < 0.3))
        out.append(lr.run_segments(b.segments()))
    return np.concatenate(out)


def detail_all(s: LearnerSettings) -> Learner:
    lr = Learner(s)
    lr._prm[K.P_DETAIL_ALL] = 1.0
    return lr


def same_state(a: Learner, b: Learner) -> None:
    """The same full rows, and the same checkpoint form (short rows, detail rows in slot order):
    both canonical, whatever the layout in memory."""
    for compact in (False, True):
        da, db = a.state_dict(compact), b.state_dict(compact)
        assert sorted(da) == sorted(db)
        for key in sorted(set(da) - {"settings"}):
            assert np.asarray(da[key]).tobytes() == np.asarray(db[key]).tobytes(), (key, compact)
    assert a.coefficients().coefs.tobytes() == b.coefficients().coefs.tobytes()


@pytest.mark.parametrize("name", list(SETTINGS))
def test_short_rows_learn_bit_for_bit_as_detail_rows_for_every_slot(name: str) -> None:
    s = SETTINGS[name]
    events = courier_events(4000, seed=len(name))
    short, full = Learner(s), detail_all(s)
    z_short = learn(short, events[:2500], seed=1)
    z_full = learn(full, events[:2500], seed=1)
    same_state(short, full)
    # through a checkpoint (short rows, detail rows where needed) and through full rows (the form of
    # checkpoints before, which load into the same layout)
    assert Learner.from_state_dict(short.state_dict()).state_dict(compact=True)["slots"].tobytes() == (
        short.state_dict(compact=True)["slots"].tobytes()
    )
    short = Learner.from_state_dict(short.state_dict(compact=True))
    z_short = np.concatenate([z_short, learn(short, events[2500:], seed=2)])
    z_full = np.concatenate([z_full, learn(full, events[2500:], seed=2)])
    assert z_short.tobytes() == z_full.tobytes()
    same_state(short, full)
    n_short, n_full = int(short._sc[K.S_NDETAIL]), int(full._sc[K.S_NDETAIL])
    if s.scaling == "none":  # nothing warms up: no slot needs its statistics
        assert n_short == 0
        return
    # the ids and categories (every value 1) need none unless centred; the numbers do
    assert 0 < n_short < n_full / 10
    fl = short._fl
    for feature, has_detail in (("parcel0=P000123", False), ("weight_g", True), ("signature_needed", True)):
        assert bool(fl[short.vocab.slot(feature, grow=False)] & K.F_DETAIL) == has_detail, feature


def test_the_warmup_queue_holds_only_open_windows() -> None:
    """A stream of new ids opens a window for each; the queue keeps only the windows still open
    (scale_warmup steps), not every slot ever learned. An id present once in its window is not
    frequent enough to be centred (kernel.CENTRE_MIN_SHARE), so none needs a detail row."""
    lr = Learner(LearnerSettings(scale_warmup=200))
    rnd = random.Random(3)
    for k in range(4000):
        x = {f"customer{f}": f"C{k:05d}-{f}" for f in range(5)}
        lr.learn_one(x, rnd.random() < 0.3)
    assert len(lr.vocab) == 20_000
    open_windows = int(lr._sc[K.S_QLEN] - lr._sc[K.S_QHEAD])
    assert open_windows == 200 * 5
    assert lr._wq.shape[0] <= 4 * open_windows  # not 20,000 entries
    assert int(lr._sc[K.S_NDETAIL]) == 0 and lr._dt.shape[0] <= 256


def test_state_and_names_take_under_64_bytes_a_slot() -> None:
    """The arrays a learned one-hot slot costs at defaults (issue 6's target: under 64 bytes a slot):
    its short row, its flags and its name (20 bytes here, where it begins, the hash table). The
    resident memory of a million slots, which scripts/memory_per_slot.py measures, is in
    DEVELOPERS.md."""
    lr = Learner()
    rnd = random.Random(4)
    b = BlockBuilder()
    for k in range(5000):
        slots, values = lr.encode({f"f{j}": f"customer-{k * 20 + j:08d}" for j in range(20)})
        b.add(slots, values, K.OP_TRAIN, float(rnd.random() < 0.2), 1.0)
    lr.run_segments(b.segments())
    n = len(lr.vocab)
    assert n == 100_000 and lr.step == 5000
    assert lr.vocab.nbytes / n < 36  # 20.5 bytes of name, 4 where it begins, the table (<= 70% full)
    # (the rows in use: room made for a block that was not used is zeros the system has not
    # given pages for)
    detail, head, qlen = (int(lr._sc[i]) for i in (K.S_NDETAIL, K.S_QHEAD, K.S_QLEN))
    state = lr._sl[:n].nbytes + lr._fl[:n].nbytes + lr._dt[:detail].nbytes
    assert state / n < 25.1  # 24 bytes of row, 1 of flags; no detail row but the centred ones
    # the open warm-up windows: the slots first learned in the last 1,000 steps, however many
    # slots there are (20,000 here, 3.2 bytes a slot of this small vocabulary; 0.3 at a million)
    assert qlen - head == 1000 * 20
    assert (state + lr._wq[head:qlen].nbytes + lr.vocab.nbytes) / n < 64
