"""The contract every learner setting keeps (in the manner of river's estimator checks)."""

from __future__ import annotations

import random

import pytest
from oddsmill.learner import Learner
from oddsmill.settings import LearnerSettings

from tests.conftest import sparse_stream
from tests.tools import names_in

SETTINGS = [
    LearnerSettings(schedule="constant", eta0=0.1),
    LearnerSettings(schedule="inverse-time"),
    LearnerSettings(),
    LearnerSettings(schedule="adagrad"),
    LearnerSettings(average=False, scaling="none", schedule="power", eta0=0.01),
]
IDS = ["constant", "inverse-time", "power-default", "adagrad", "raw-power"]


def _trained(s: LearnerSettings, n: int = 800, seed: int = 2) -> Learner:
    lr = Learner(s)
    for x, y in sparse_stream(n, seed):
        lr.learn_one(x, y)
    return lr


@pytest.mark.parametrize("s", SETTINGS, ids=IDS)
def test_scoring_is_pure(s: LearnerSettings) -> None:
    lr = _trained(s)
    before = lr.state_dict()
    for x, _ in sparse_stream(100, seed=9):
        lr.predict_proba(x)
        lr.predict_proba({**x, "never_seen": 4.0, "depot": "Nowhere"})
    after = lr.state_dict()
    assert names_in(after) == names_in(before)
    assert after["scalars"].tobytes() == before["scalars"].tobytes()
    assert after["slots"].tobytes() == before["slots"].tobytes()


@pytest.mark.parametrize("s", SETTINGS, ids=IDS)
def test_save_load_round_trips(s: LearnerSettings) -> None:
    from oddsmill.storage import decode_checkpoint, encode_checkpoint

    lr = _trained(s)
    back = Learner.from_state_dict(decode_checkpoint(encode_checkpoint(lr.state_dict())))
    for x, _ in sparse_stream(50, seed=4):
        assert back.predict_logit(x) == lr.predict_logit(x)
    assert back.settings == lr.settings


@pytest.mark.parametrize("s", SETTINGS, ids=IDS)
def test_feature_order_does_not_matter(s: LearnerSettings) -> None:
    events = sparse_stream(500, seed=6)
    a, b = Learner(s), Learner(s)
    rnd = random.Random(0)
    for x, y in events:
        keys = list(x)
        rnd.shuffle(keys)
        a.learn_one(x, y)
        b.learn_one({k: x[k] for k in keys}, y)
    ca, cb = a.coefficients().as_dict(), b.coefficients().as_dict()
    assert set(ca) == set(cb)
    for k in ca:
        assert ca[k] == pytest.approx(cb[k], rel=1e-12, abs=1e-14)


@pytest.mark.parametrize("s", SETTINGS, ids=IDS)
def test_late_and_vanishing_features(s: LearnerSettings) -> None:
    lr = _trained(s, 1200)
    c = lr.coefficients().as_dict()
    # stops_before appears after a third of the stream; old_scanner vanishes at half way
    assert c["stops_before"] != 0.0 and c["old_scanner"] != 0.0
    for v in lr.coefficients().coefs:
        assert v == v  # no NaN anywhere
    p = lr.predict_proba({"route_km": 10.0})
    assert 0.0 < p < 1.0


@pytest.mark.parametrize("s", SETTINGS, ids=IDS)
def test_the_same_seed_gives_the_same_run(s: LearnerSettings) -> None:
    a, b = _trained(s, seed=5), _trained(s, seed=5)
    assert a.state_dict()["slots"].tobytes() == b.state_dict()["slots"].tobytes()
    c = _trained(s, seed=6)
    assert a.state_dict()["slots"].tobytes() != c.state_dict()["slots"].tobytes()
