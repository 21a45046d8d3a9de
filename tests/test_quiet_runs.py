"""Quiet runs: events that share their slots are run on dense copies of their state
(`kernel._quiet_run`) while nothing changes coordinates. They must leave every bit of the state,
and every published logit, as the one-event-at-a-time path (`kernel._event`) does; the dense
oracle checks the arithmetic itself."""

from __future__ import annotations

import math
import random

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from oddsmill import kernel as K
from oddsmill.encoding import Block, BlockBuilder, Rows
from oddsmill.learner import Learner
from oddsmill.settings import LearnerSettings

from tests.oracle import oracle_for

# Name sets of the invented courier stream, each always sent in this order. The first three are
# frequent (centred once warm), "fragile" is rare (never centred), "detour_km" appears late.
SHAPES = [
    ("route_km", "weight_g", "stops_before"),
    ("route_km", "stops_before"),  # a centred slot absent: its value counts as 0
    ("route_km", "weight_g", "stops_before", "fragile"),
    ("weight_g", "route_km", "stops_before"),  # another order: a run of its own
    ("route_km", "weight_g", "stops_before", "detour_km"),
]
SCALE = {"route_km": (40.0, 15.0), "weight_g": (1500.0, 900.0), "stops_before": (8.0, 5.0)}


def stream(
    n: int, seed: int, rows_share: float
) -> list[tuple[str, tuple[str, ...], np.ndarray, np.ndarray, np.ndarray, np.ndarray]]:
    """Runs of 1 to 40 events with one name set: (kind, names, values m x k, op, y, w). A run is
    sent as columnar rows (weight 1, no LEARN) or as CSR events."""
    rnd = random.Random(seed)
    out = []
    t = 0
    while t < n:
        shape = SHAPES[rnd.choice([0, 0, 0, 1, 2, 3] + ([4] if t > n // 2 else []))]
        m = rnd.randint(1, 40)
        vals = np.array(
            [[rnd.gauss(*SCALE.get(name, (2.0, 1.0))) for name in shape] for _ in range(m)], dtype=np.float64
        )
        y = np.array([float(rnd.random() < 1 / (1 + math.exp(-(r[0] - 40) / 15))) for r in vals])
        as_rows = rnd.random() < rows_share
        op = np.array(
            [rnd.choice([K.OP_TRAIN] * 8 + [K.OP_SCORE] + ([] if as_rows else [K.OP_LEARN])) for _ in range(m)],
            dtype=np.int8,
        )
        w = np.ones(m) if as_rows else np.array([rnd.choice([1.0, 1.0, 0.5, 2.5]) for _ in range(m)])
        out.append(("rows" if as_rows else "csr", shape, vals, op, y, w))
        t += m
    return out


def run(s: LearnerSettings, runs: list, quiet: bool, block: int) -> tuple[Learner, np.ndarray]:  # type: ignore[type-arg]
    """Feed the runs in blocks of about `block` events; return the learner and the published logits."""
    lr = Learner(s)
    lr._prm[K.P_QUIET_RUNS] = 1.0 if quiet else 0.0
    outs = []
    segments: list[Block | Rows] = []
    size = 0
    for kind, names, vals, op, y, w in runs:
        slots = np.array(lr.encode({name: 1.0 for name in names})[0], dtype=np.int64)
        if kind == "rows":
            segments.append(Rows(slots=slots, rows=vals, op=op, y=y))
        else:
            b = BlockBuilder()
            for r in range(vals.shape[0]):
                b.add(slots.tolist(), vals[r].tolist(), int(op[r]), float(y[r]), float(w[r]))
            segments.append(b.build())
        size += vals.shape[0]
        if size >= block:
            outs.append(lr.run_segments(segments))
            segments, size = [], 0
    if segments:
        outs.append(lr.run_segments(segments))
    return lr, np.concatenate(outs)


def same_bits(a: Learner, b: Learner) -> None:
    sa, sb = a.state_dict(), b.state_dict()
    for key in ("scalars", "slots", "flags", "centred_list", "warmup_queue"):
        assert sa[key].tobytes() == sb[key].tobytes(), key


SCHEDULES = st.sampled_from(["constant", "inverse-time", "power", "adagrad"])


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    schedule=SCHEDULES,
    l2=st.sampled_from([0.0, 1e-4, 0.02]),
    average=st.booleans(),
    average_start=st.sampled_from([0, 700]),
    scaling=st.sampled_from(["standardize", "none"]),
    warmup=st.sampled_from([5, 60, 400]),
    max_centred=st.sampled_from([1, 64]),
    seed=st.integers(0, 10**6),
    block=st.sampled_from([1, 37, 500]),
    rows_share=st.sampled_from([0.0, 0.5]),
)
def test_quiet_runs_are_bit_identical_to_one_event_at_a_time(
    schedule: str,
    l2: float,
    average: bool,
    average_start: int,
    scaling: str,
    warmup: int,
    max_centred: int,
    seed: int,
    block: int,
    rows_share: float,
) -> None:
    """Streams of 2,600 events cross two centre updates (every 1,024 steps), warm-up windows that
    end inside runs, the start of averaging, folds of the weight scale (constant rate, L2 0.02), a
    centred slot absent from a run, a frequent slot left out of a full centred set, SCORE and
    LEARN events and weights."""
    eta0 = 0.5 if schedule != "constant" else 0.1
    s = LearnerSettings(
        schedule=schedule,
        eta0=eta0,
        l2=l2,
        average=average,
        average_start=average_start,
        scaling=scaling,
        scale_warmup=warmup,
        max_centred=max_centred,
    )
    runs = stream(2600, seed, rows_share)
    quiet, z_quiet = run(s, runs, True, block)
    plain, z_plain = run(s, runs, False, block)
    same_bits(quiet, plain)
    assert z_quiet.view(np.int64).tolist() == z_plain.view(np.int64).tolist()  # NaN for LEARN too


def settled(s: LearnerSettings, steps: int) -> tuple[Learner, np.ndarray]:
    """A learner past the warm-up of the three frequent names (all centred), and their slots."""
    lr = Learner(s)
    slots = np.array(lr.encode({"route_km": 1.0, "weight_g": 1.0, "stops_before": 1.0})[0], dtype=np.int64)
    lr._prm[K.P_QUIET_RUNS] = 0.0
    rng = np.random.default_rng(1)
    lr.run_segments(
        [
            Rows(
                slots,
                rng.normal(size=(steps, 3)) * 10 + 30,
                np.full(steps, K.OP_TRAIN, np.int8),
                (rng.random(steps) < 0.4) * 1.0,
            )
        ]
    )
    lr._prm[K.P_QUIET_RUNS] = 1.0
    return lr, slots


def quiet_steps(lr: Learner, slots: np.ndarray, m: int) -> int:
    """How many of m training rows `_quiet_run` takes from the start."""
    rng = np.random.default_rng(2)
    rows = rng.normal(size=(m, slots.shape[0])) * 10 + 30
    op = np.full(m, K.OP_TRAIN, np.int8)
    y = (rng.random(m) < 0.4) * 1.0
    prm, sc, sl, fl, cl, wq, dt = lr.arrays(slots.shape[0])
    return int(K._quiet_run(prm, sc, sl, fl, dt, cl, wq, slots, rows, op, y, np.ones(m), np.empty(m), 0))


def test_a_quiet_run_stops_at_the_next_centre_update() -> None:
    lr, slots = settled(LearnerSettings(scale_warmup=50), 300)
    assert lr._sc[K.S_NCENT] == 3
    assert quiet_steps(lr, slots, 5000) == 1024 - 300  # the centres move at step 1024
    assert lr.step == 1024


def test_a_quiet_run_stops_where_a_warm_up_window_ends() -> None:
    lr, slots = settled(LearnerSettings(scale_warmup=50), 100)
    detour = np.array(lr.encode({"detour_km": 1.0})[0], dtype=np.int64)
    lr.run_segments([Rows(detour, np.ones((1, 1)), np.array([K.OP_TRAIN], np.int8), np.ones(1))])
    first = lr.step - 1  # detour_km was first learned at this step; its window ends 50 later
    assert quiet_steps(lr, slots, 500) == first + 50 - (first + 1)
    assert lr.step == first + 50


def test_a_quiet_run_stops_before_the_weight_scale_folds() -> None:
    s = LearnerSettings(schedule="constant", eta0=0.1, l2=0.05, scaling="none", average=False)
    lr, slots = settled(s, 10)
    ws = float(lr._sc[K.S_WS])
    expected = 0
    while ws * (1 - 0.1 * 0.05) >= K.WS_FLOOR:
        ws *= 1 - 0.1 * 0.05
        expected += 1
    assert expected > 100
    assert quiet_steps(lr, slots, 5000) == expected
    assert lr.renormalisations == 0


@pytest.mark.parametrize(
    ("s", "why"),
    [
        (LearnerSettings(schedule="adagrad", scale_warmup=50), "AdaGrad's per-slot rates go one event at a time"),
        (LearnerSettings(scale_warmup=500), "the slots are still warming up"),
    ],
)
def test_a_quiet_run_declines(s: LearnerSettings, why: str) -> None:
    lr, slots = settled(s, 300)
    assert quiet_steps(lr, slots, 100) == 0, why


def test_quiet_runs_equal_the_dense_oracle() -> None:
    """The dense, step-by-step oracle (tests/oracle.py, written from PROTOCOL 5 without the
    kernel's lazy scale or u + A v sums) on a columnar stream that is mostly quiet runs."""
    s = LearnerSettings(schedule="power", eta0=0.5, l2=1e-3, average=True, average_start=100, scale_warmup=100)
    orc = oracle_for(s)
    lr = Learner(s)
    names = ("route_km", "weight_g", "stops_before")
    slots = np.array(lr.encode({name: 1.0 for name in names})[0], dtype=np.int64)
    rng = np.random.default_rng(4)
    for _ in range(6):
        rows = rng.normal(size=(500, 3)) * [15.0, 900.0, 5.0] + [40.0, 1500.0, 8.0]
        y = (rng.random(500) < 1 / (1 + np.exp(-(rows[:, 0] - 40) / 15))) * 1.0
        z = lr.run_segments([Rows(slots, rows, np.full(500, K.OP_TRAIN, np.int8), y)])
        for r in range(500):
            x = dict(zip(names, rows[r].tolist(), strict=True))
            assert z[r] == pytest.approx(orc.logit(x), rel=1e-10, abs=1e-12)
            orc.learn(x, float(y[r]), 1.0)
    b, coefs = orc.coefficients()
    c = lr.coefficients()
    assert c.intercept == pytest.approx(b, rel=1e-10)
    for name, v in c.as_dict().items():
        assert v == pytest.approx(coefs[name], rel=1e-10), name
