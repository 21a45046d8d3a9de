"""Convergence: `replay --epochs E` reaches the optimum found by the Newton reference fit.

The fit is itself checked against statsmodels and scikit-learn (test_reference.py). Figures are
printed (pytest -s shows them); the thresholds are the ones the learner promises: relative
coefficient error in standardised units below 1e-3 and mean log-loss within 1e-5 of the optimum.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from oddsmill.offline import fit_logs, new_engine, replay
from oddsmill.settings import LearnerSettings

from tests.conftest import DEMO, phishing


@pytest.fixture(scope="module")
def phishing_log(tmp_path_factory: pytest.TempPathFactory) -> str:
    """river's bundled Phishing data as a JSON Lines log of training events."""
    path = tmp_path_factory.mktemp("logs") / "phishing.jsonl"
    with open(path, "w") as f:
        for x, y in phishing():
            f.write(json.dumps({"x": x, "y": y}) + "\n")
    return str(path)


def distance_to_optimum(log: str, settings: LearnerSettings, epochs: int) -> tuple[float, float]:
    res, design = fit_logs([log], settings)
    assert res.converged
    engine, tail = new_engine(settings, epochs, average_start_given=False)
    replay(engine, [log], epochs, tail)
    c = engine.learner.coefficients()
    mine = np.array([c.as_dict()[k] for k in design.names])
    err = np.linalg.norm((mine - res.coef[1:]) * design.scale) / np.linalg.norm(res.coef[1:] * design.scale)
    z = c.intercept + design.X @ mine
    excess = float(np.mean(np.logaddexp(0.0, z) - design.y * z)) - res.log_loss
    return float(err), excess


CASES = [
    # (data, settings, epochs)
    ("phishing", LearnerSettings(), 300),
    ("phishing", LearnerSettings(l2=0.0), 300),
    ("demo", LearnerSettings(), 200),
    ("demo", LearnerSettings(l2=0.0), 200),
    # each schedule with settings of its own
    ("phishing", LearnerSettings(schedule="constant", eta0=0.001), 600),
    ("phishing", LearnerSettings(schedule="inverse-time", l2=1e-2), 300),
    ("phishing", LearnerSettings(schedule="adagrad", eta0=0.1), 300),
]


@pytest.mark.parametrize(
    "data,settings,epochs",
    CASES,
    ids=[
        "phishing-defaults",
        "phishing-l2-0",
        "demo-defaults",
        "demo-l2-0",
        "phishing-constant",
        "phishing-inverse-time",
        "phishing-adagrad",
    ],
)
def test_replay_reaches_the_newton_optimum(
    data: str, settings: LearnerSettings, epochs: int, phishing_log: str
) -> None:
    log = phishing_log if data == "phishing" else str(DEMO)
    err, excess = distance_to_optimum(log, settings, epochs)
    print(
        f"\n{data} {settings.schedule} l2={settings.l2:g} eta0={settings.eta0:g} epochs={epochs}: "
        f"relative coefficient error {err:.2e}, log-loss above the optimum {excess:.2e}"
    )
    assert err < 1e-3
    assert abs(excess) < 1e-5


def test_a_feature_scaled_by_ten_thousand_gives_the_same_converged_predictions(
    tmp_path: Path,
) -> None:
    """Standardisation makes the learner indifferent to units: grams or tonnes, the same model."""
    events = phishing()
    logs = []
    for factor in (1.0, 1e4):
        path = tmp_path / f"scaled-{factor:g}.jsonl"
        with open(path, "w") as f:
            for x, y in events:
                f.write(json.dumps({"x": {**x, "long_url": x["long_url"] * factor}, "y": y}) + "\n")
        logs.append(str(path))
    preds, coefs = [], []
    for factor, log in zip((1.0, 1e4), logs, strict=True):
        engine, tail = new_engine(LearnerSettings(), 300, average_start_given=False)
        replay(engine, [log], 300, tail)
        coefs.append(engine.learner.coefficients().as_dict()["long_url"])
        xs = [{**x, "long_url": x["long_url"] * factor} for x, _ in events[:200]]
        preds.append(np.array([engine.learner.predict_proba(x) for x in xs]))
    assert coefs[0] != 0.0
    assert coefs[1] == pytest.approx(coefs[0] / 1e4, rel=1e-3)  # the same effect, in other units
    np.testing.assert_allclose(preds[1], preds[0], atol=1e-4)
