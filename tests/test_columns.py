"""A columnar block is learned whole (engine._add_columns) with exactly the result of the same rows
sent one event at a time: the same scores, state, vocabulary and counts, bit for bit."""

from __future__ import annotations

import numpy as np
import pytest
from oddsmill.engine import ColumnScores, Engine, Rejection, each_score
from oddsmill.learner import Learner
from oddsmill.protocol import decode_body
from oddsmill.settings import LearnerSettings

from tests.tools import names_in

NO_LABEL = 255


def blocks(seed: int) -> list[dict[str, object]]:
    rng = np.random.default_rng(seed)
    out = []
    for k in range(12):
        cols = ["route_km", "weight_g", "stops"] + (["late_col"] if k >= 5 else [])
        rows = rng.normal(size=(40, len(cols))) * [30.0, 2000.0, 5.0, 1.0][: len(cols)]
        y = (rng.random(40) < 0.3).astype(np.uint8)
        if k % 3 == 2:
            y[::5] = NO_LABEL  # scoring requests without ids: scored, not held
        block: dict[str, object] = {"cols": cols, "rows": np.ascontiguousarray(rows, dtype="<f8").tobytes()}
        block["y"] = y.tobytes()
        if k % 4 == 3:  # with ids: all labelled (learned whole), or at k = 11 some held (row by row)
            block["id"] = [f"B{k}-{r}" for r in range(40)]
        out.append(block)
    return out


def as_events(block: dict[str, object]) -> list[dict[str, object]]:
    cols = block["cols"]
    rows = np.frombuffer(block["rows"], dtype="<f8").reshape(-1, len(cols))  # type: ignore[arg-type]
    events = []
    ids = block.get("id") or [None] * len(rows)
    for r, label, ident in zip(rows, block["y"], ids, strict=True):  # type: ignore[call-overload]
        e: dict[str, object] = {"x": dict(zip(cols, r.tolist(), strict=True))}  # type: ignore[call-overload]
        if ident is not None:
            e["id"] = ident
        if label != NO_LABEL:
            e["y"] = int(label)
        events.append(e)
    return events


@pytest.mark.parametrize("schedule", ["power", "adagrad"])
def test_a_columnar_block_equals_its_rows_one_by_one(schedule: str) -> None:
    settings = LearnerSettings(schedule=schedule, scale_warmup=50)
    whole, one_by_one = Engine(Learner(settings)), Engine(Learner(settings))
    for block in blocks(3):
        got = whole.process([(0.0, item) for item in decode_body(block)])
        want = one_by_one.process([(0.0, item) for e in as_events(block) for item in decode_body(e)])
        # the same id, score and step for every row (a block learned whole answers in one
        # ColumnScores, unrolled here)
        assert [(r.id, r.logit, r.step, r.ts) for r in each_score(got)] == [
            (r.id, r.logit, r.step, r.ts) for r in each_score(want)
        ]
        held = "id" in block and NO_LABEL in bytes(block["y"])  # type: ignore[arg-type]
        assert any(isinstance(r, ColumnScores) for _, r in got) == (not held)
        assert not any(isinstance(r, Rejection) for _, r in got + want)
    a, b = whole.learner.state_dict(), one_by_one.learner.state_dict()
    assert names_in(a) == names_in(b)
    for key in a:
        if hasattr(a[key], "tobytes"):
            assert a[key].tobytes() == b[key].tobytes(), key
    assert whole.metrics.sum == one_by_one.metrics.sum
    assert whole.counters == one_by_one.counters
    assert list(whole.pending) == list(one_by_one.pending) and len(whole.pending) == 8
