"""The numbers the learner takes (protocol.VALUE_MIN, VALUE_MAX, WEIGHT_MAX): within them no stream
can make the state overflow to infinity or NaN; beyond them an event is refused with a reason and
changes nothing, on every path (a map, a batch read by the compiled reader, a columnar block).

Outside reference: IEEE 754 double precision as numpy reports it (`np.finfo(np.float64)`: largest
1.8e308, smallest normal 2.2e-308). Before these bounds, a subnormal first value (2.2e-309) made the
scale 1/0-like and the state NaN for good, and a weight of 1e300 pushed the logits to 1e299."""

from __future__ import annotations

import math
from typing import Any

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from oddsmill.engine import Engine, Rejection, each_score
from oddsmill.fastpath import numeric_training
from oddsmill.learner import Learner
from oddsmill.protocol import VALUE_MAX, VALUE_MIN, WEIGHT_MAX, decode_body, in_range, unpack
from oddsmill.settings import SCHEDULES, LearnerSettings

from tests.tools import names_in

FLOAT = np.finfo(np.float64)


def test_the_bounds_leave_room_below_the_float_limits() -> None:
    # the products the kernel forms (value / scale, scale ratios, weight x value) stay far inside
    assert (VALUE_MAX / VALUE_MIN) ** 2 * WEIGHT_MAX < FLOAT.max / 1e100
    assert VALUE_MIN > FLOAT.smallest_normal * 1e100


magnitudes = st.floats(min_value=math.log10(VALUE_MIN), max_value=math.log10(VALUE_MAX))
value = st.builds(lambda e, s: s * 10.0**e, magnitudes, st.sampled_from([-1.0, 1.0])) | st.just(0.0)
weight = st.builds(lambda e: 10.0**e, st.floats(min_value=-6, max_value=math.log10(WEIGHT_MAX)))
event = st.tuples(
    st.dictionaries(st.sampled_from(["route_km", "weight_g", "stops", "ratio"]), value, min_size=1),
    st.sampled_from([0, 1]),
    weight,
)


def _finite_state(lr: Learner) -> None:
    state = lr.state_dict()
    for key in ("scalars", "slots"):
        assert np.isfinite(state[key]).all(), key
    b, theta = lr.standardised()
    c = lr.coefficients()
    assert math.isfinite(b) and np.isfinite(theta).all()
    assert math.isfinite(c.intercept) and np.isfinite(c.coefs).all()


@pytest.mark.parametrize("average", [False, True])
@pytest.mark.parametrize("schedule", SCHEDULES)
@settings(max_examples=40, deadline=None)
@given(st.lists(event, min_size=1, max_size=60))
def test_any_stream_within_the_bounds_keeps_the_state_finite(
    schedule: str, average: bool, stream: list[tuple[dict[str, float], int, float]]
) -> None:
    lr = Learner(LearnerSettings(schedule=schedule, average=average, scale_warmup=8))
    for x, y, w in stream:
        assert math.isfinite(lr.learn_one(x, y, w))
    _finite_state(lr)


@pytest.mark.parametrize("schedule", SCHEDULES)
def test_the_extremes_in_turn_keep_the_state_finite(schedule: str) -> None:
    """The worst orders: the smallest values through the warm-up, then the largest, at the largest
    weight, of both signs (the scale frozen small, the centre and the steps as large as they get)."""
    lr = Learner(LearnerSettings(schedule=schedule, scale_warmup=100))
    zs = []
    for i in range(600):
        big = i >= 300
        x = {
            "a": (VALUE_MAX if big else VALUE_MIN) * (-1) ** i,
            "b": VALUE_MAX if i % 3 else VALUE_MIN,
            "c": VALUE_MIN if big else VALUE_MAX,
        }
        zs.append(lr.learn_one(x, i % 2, WEIGHT_MAX))
    assert np.isfinite(zs).all()
    _finite_state(lr)


OUT = [
    ("subnormal", 2.2e-309),
    ("below the range", math.nextafter(VALUE_MIN, 0.0)),
    ("above the range", -math.nextafter(VALUE_MAX, math.inf)),
    ("near the float limit", 1e300),
]


def _state(engine: Engine) -> list[bytes | Any]:
    s = engine.state_dict()
    return [s["learner"][k].tobytes() for k in ("scalars", "slots", "flags")] + [names_in(s["learner"]), s["counters"]]


@pytest.mark.parametrize(("what", "v"), OUT)
def test_a_value_out_of_range_is_refused_on_every_path_and_changes_nothing(what: str, v: float) -> None:
    assert not in_range(v) and in_range(VALUE_MIN) and in_range(-VALUE_MAX) and in_range(0.0)
    engine = Engine(Learner(LearnerSettings()))
    good = {"x": {"route_km": 12.0, "stops": 3.0}, "y": 1}
    engine.process([(0.0, it) for it in decode_body(good)])
    before = _state(engine)
    bodies = {
        "event": {"x": {"route_km": v, "stops": 3.0}, "y": 1},
        "new name": {"x": {"route_km": 12.0, "parcel_cm3": v}, "y": 0},
        "batch": {"batch": [{"x": {"route_km": 12.0, "stops": v}, "y": 0}]},
        "integer (JSON only: msgpack ints stop at 2^64)": {"x": {"route_km": 10**31}, "y": 1},
        "columns": {"cols": ["route_km", "stops"], "rows": np.array([[1.0, 2.0], [v, 4.0]]).tobytes()},
    }
    for name, body in bodies.items():
        if name.startswith("integer"):
            decoded = body
        else:
            raw = msgpack.packb(body)
            assert numeric_training(raw) is None, name  # the compiled reader declines it
            decoded = unpack(raw)
        results = engine.process([(1.0, it) for it in decode_body(decoded)])
        reasons = [r.reason for _, r in results if isinstance(r, Rejection)]
        assert reasons == ["bad_features"], (name, reasons)
        detail = next(r.detail for _, r in results if isinstance(r, Rejection))
        assert f"{VALUE_MIN:g}" in detail and f"{VALUE_MAX:g}" in detail, detail
        assert not list(each_score(results)), name
    after = _state(engine)
    assert after[:4] == before[:4]
    assert after[4]["rejected"] == {"bad_features": len(bodies)}


def test_the_weight_is_bounded() -> None:
    engine = Engine(Learner(LearnerSettings()))
    ok = decode_body({"x": {"route_km": 1.0}, "y": 1, "w": WEIGHT_MAX})[0]
    assert not isinstance(ok, Exception) and ok.w == WEIGHT_MAX
    for w in (math.nextafter(WEIGHT_MAX, math.inf), 1e300):
        item = decode_body({"x": {"route_km": 1.0}, "y": 1, "w": w})[0]
        results = engine.process([(0.0, item)])
        assert [(r.reason, "at most" in r.detail) for _, r in results] == [("bad_weight", True)]
    assert engine.learner.step == 0
